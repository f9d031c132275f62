"""Process-group set-up for ``torchrun`` and the few collectives the loop needs.

``splice tune`` runs as one process, or as N under ``torchrun`` (which sets
``RANK``, ``WORLD_SIZE``, ``LOCAL_RANK``, ``MASTER_ADDR`` and ``MASTER_PORT``).
The backend is gloo on the CPU and nccl on CUDA. Rank 0 alone writes files and
prints; every rank computes.
"""

from __future__ import annotations

import inspect
import os
from dataclasses import dataclass

import torch
import torch.distributed as dist
from torch import nn

from ..compare import flatten_outputs, logits_or_refuse
from ..copies import tree_copy
from ..errors import SpliceError

__all__ = ["Context", "pick_device", "setup", "teardown", "all_reduce_sum", "broadcast_flag", "sync_buffers",
           "drops_outputs", "LogitsOnly", "data_parallel"]


def pick_device(requested: str | None = None, *, local_rank: int = 0) -> torch.device:
    """``requested`` if given (checked), else cuda, then mps, then cpu."""
    if requested is not None:
        kind = str(requested).split(":")[0]
        if kind not in ("cpu", "cuda", "mps"):
            raise SpliceError(f"unknown device {requested!r}; use cpu, cuda, cuda:N or mps")
        if kind == "cuda" and not torch.cuda.is_available():
            raise SpliceError(f"device {requested!r} was requested but CUDA is not available; use --device cpu")
        if kind == "mps" and not (getattr(torch.backends, "mps", None) and torch.backends.mps.is_available()):
            raise SpliceError(f"device {requested!r} was requested but MPS is not available; use --device cpu")
        if kind == "cuda" and ":" not in str(requested):
            return torch.device("cuda", local_rank)
        return torch.device(requested)
    if torch.cuda.is_available():
        return torch.device("cuda", local_rank)
    if getattr(torch.backends, "mps", None) and torch.backends.mps.is_available():
        return torch.device("mps")
    return torch.device("cpu")


@dataclass
class Context:
    """Where this process sits: rank, world size and device."""

    rank: int = 0
    world_size: int = 1
    local_rank: int = 0
    device: torch.device = torch.device("cpu")
    owns_group: bool = False

    @property
    def distributed(self) -> bool:
        return self.world_size > 1

    @property
    def is_main(self) -> bool:
        return self.rank == 0


def _env_int(name: str, default: int) -> int:
    value = os.environ.get(name)
    if value is None:
        return default
    try:
        return int(value)
    except ValueError:
        raise SpliceError(f"environment variable {name}={value!r} is not an integer; it is set by torchrun") from None


def setup(device: str | None = None) -> Context:
    """Join the torchrun process group if there is one; pick the device."""
    world = _env_int("WORLD_SIZE", 1)
    rank = _env_int("RANK", 0)
    local = _env_int("LOCAL_RANK", 0)
    dev = pick_device(device, local_rank=local)
    if world <= 1:
        return Context(device=dev)
    owns = False
    if not dist.is_initialized():
        backend = "nccl" if dev.type == "cuda" else "gloo"
        if dev.type == "cuda":
            torch.cuda.set_device(dev)
        dist.init_process_group(backend=backend, rank=rank, world_size=world)
        owns = True
    return Context(rank=dist.get_rank(), world_size=dist.get_world_size(), local_rank=local, device=dev,
                   owns_group=owns)


def teardown(ctx: Context) -> None:
    """Leave the process group we joined (after every rank got here)."""
    if ctx.owns_group and dist.is_initialized():
        try:
            dist.barrier()
        finally:
            dist.destroy_process_group()


def all_reduce_sum(ctx: Context, values: list[float]) -> list[float]:
    """Sum a few numbers over every rank (float64)."""
    if not ctx.distributed:
        return list(values)
    t = torch.tensor(values, dtype=torch.float64, device=ctx.device if ctx.device.type == "cuda" else "cpu")
    dist.all_reduce(t)
    return [float(v) for v in t.cpu()]


def broadcast_flag(ctx: Context, flag: bool) -> bool:
    """True on every rank if ``flag`` is true on any rank (used to stop together)."""
    if not ctx.distributed:
        return flag
    return all_reduce_sum(ctx, [1.0 if flag else 0.0])[0] > 0


def sync_buffers(ctx: Context, model) -> None:
    """Copy rank 0's buffers (BatchNorm statistics) to every rank.

    DDP broadcasts buffers at the start of each forward pass, so after the last
    step every rank holds statistics updated by its own last batch. Calling this
    before evaluating or saving makes all ranks hold rank 0's model exactly.
    """
    if not ctx.distributed:
        return
    for buf in model.buffers():
        dist.broadcast(buf.data, src=0)


class LogitsOnly(nn.Module):
    """``net`` returning only the class logits the loss reads, for DDP.

    DDP counts a parameter as used when any tensor the forward returns depends
    on it. A train-mode output that also holds an auxiliary head's logits
    (torchvision's GoogLeNet and Inception) makes that head "used", though the
    loss never gives it a gradient; returning the logits alone lets DDP's
    search for unused parameters find it, as DDP's documentation asks (every
    returned tensor takes part in the loss).
    """

    def __init__(self, net: nn.Module):
        super().__init__()
        self.net = net

    def forward(self, x):
        return logits_or_refuse(self.net(x), "the model")


def data_parallel(net: nn.Module, ctx: Context, input_shape: tuple, *, sync_buffers_in_forward: bool) -> nn.Module:
    """``net`` in a DistributedDataParallel wrapper for ``ctx`` (its logits alone, see :class:`LogitsOnly`).

    DDP searches for unused parameters only when :func:`drops_outputs` finds
    a train-mode output the loss does not read (the search costs a traversal
    of the graph every step). Rank 0's buffers reach every rank at every
    forward with ``sync_buffers_in_forward`` (``forward_sync_buffers`` since
    torch 2.14, ``broadcast_buffers`` before); without it, torch 2.14 still
    copies them once when the wrapper is built and older torch does not (the
    loop copies them at the end of every epoch either way, :func:`sync_buffers`).
    """
    from torch.nn.parallel import DistributedDataParallel as DDP

    key = "forward_sync_buffers" if "forward_sync_buffers" in inspect.signature(DDP).parameters else "broadcast_buffers"
    ids = [ctx.device.index] if ctx.device.type == "cuda" else None
    return DDP(LogitsOnly(net), device_ids=ids, find_unused_parameters=drops_outputs(net, input_shape, ctx.device),
               **{key: sync_buffers_in_forward})


def drops_outputs(model, input_shape, device) -> bool:
    """Whether ``model``'s train-mode output holds tensors besides the logits the loss reads (torchvision's
    GoogLeNet and Inception auxiliary heads): their parameters get no gradient, and DDP must then look for unused
    parameters or it stops at the second step. Run once, on a copy (the run's statistics and random state stay
    as they are)."""
    twin = tree_copy(model)
    cuda = [device.index or 0] if device.type == "cuda" else []
    try:
        with torch.random.fork_rng(devices=cuda), torch.no_grad():
            out = twin.train()(torch.zeros((2, *input_shape), device=device))
    except Exception:  # noqa: BLE001 - a model that cannot run on zeros is reported by the loop
        return False
    return len(flatten_outputs(out)) > 1
