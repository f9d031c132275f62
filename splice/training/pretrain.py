"""Warp-head pre-training: teach each head to undo known random warps.

Training a localisation head end-to-end from the task loss alone is fragile
when the base has never seen distorted inputs: the gradient that reaches the
head is weak and noisy, and the head either barely moves or collapses. Here
the head is first trained by plain regression, with a target we know exactly.

Derivation of the target. :func:`splice.distort.random_distort` moves content
at ``p`` to ``D p`` (``D`` a forward 3x3 matrix in normalised coordinates), so
the distorted image is ``x'(q) = x(D^-1 q)``. A warp with sampling matrix
``S`` outputs ``y(q) = x'(S q) = x(D^-1 S q)``; ``y = x`` exactly when
``S = D``. The head is therefore trained so that its sampling grid matches the
grid of ``D``: the loss is the mean squared difference, over every output
pixel centre and both coordinates, between ``warp.grid(theta)`` and
``base_grid @ D^T`` (with the projective division when ``D`` has perspective).
Matching grids rather than raw parameters works for every family (the
translation, similarity and tps heads simply find their best approximation).

A warp deeper in the network sees a feature map that is spatially aligned with
the input through the network's stride, so the same normalised ``D`` is its
target, approximately. When a model holds several warps, the first one in
execution order learns ``D`` and the later ones learn the identity (they see
features the first warp has already straightened).

The base runs in eval mode under ``no_grad`` (nothing of it changes) and the
forward pass stops as soon as the last warp's input is known.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import torch
from torch import Tensor, nn

from ..copies import buffers_kept, modes_kept
from ..distort import random_distort
from . import batches as _b
from .schedule import lr_factor

__all__ = ["target_grid", "execution_order", "warp_inputs", "grid_loss", "leave_unmoved", "reference_distance",
           "pretrain_warps_", "finite_step"]


class _Stop(Exception):
    """Raised by a hook to end a forward pass early."""


def target_grid(matrix: Tensor, height: int, width: int, *, dtype=torch.float32, device=None) -> Tensor:
    """``(N, H, W, 2)`` grid of the sampling matrices ``matrix (N, 3, 3)``, computed in float64."""
    from ..warps.grids import base_grid

    base = base_grid(height, width)  # (HW, 3) float64
    q = torch.matmul(base, matrix.to(torch.float64).transpose(1, 2))
    xy = q[..., :2] / q[..., 2:3]
    return xy.reshape(matrix.shape[0], height, width, 2).to(dtype=dtype, device=device)


def warp_inputs(model: nn.Module, warps: Mapping[str, nn.Module], x: Tensor, *,
                stop_after: str | None = None) -> tuple[dict[str, tuple], list[str]]:
    """Run ``model`` on ``x`` (no grad) and capture each warp's input arguments.

    Returns ``({name: args}, names in execution order)``. With ``stop_after``
    the pass ends right after that warp's input is captured.
    """
    captured: dict[str, tuple] = {}
    order: list[str] = []
    handles = []
    for name, warp in warps.items():
        def hook(_module, args, name=name):
            captured[name] = tuple(a.detach() for a in args)
            order.append(name)
            if name == stop_after:
                raise _Stop
        handles.append(warp.register_forward_pre_hook(hook))
    try:
        with torch.no_grad():
            model(x)
    except _Stop:
        pass
    finally:
        for h in handles:
            h.remove()
    return captured, order


def check_resumable(state: Mapping[str, Any], total: int) -> None:
    """Refuse a pre-training checkpoint ``state`` written for another number of steps than ``total``."""
    from ..errors import SpliceError

    if int(state["total_steps"]) != total:
        raise SpliceError(
            f"the pre-training checkpoint was written for {int(state['total_steps'])} steps, but this run has "
            f"{total}; resume with the data and recipe the run was started with"
        )


def execution_order(model: nn.Module, warps: Mapping[str, nn.Module], example: Tensor) -> list[str]:
    """Names of ``warps`` in the order a forward pass reaches them. The model's buffers are left as they were (a
    counter its forward updates does not count this look, so a resumed run counts as an uninterrupted one)."""
    with buffers_kept(model):
        _, order = warp_inputs(model, warps, example)
    return order


def grid_loss(warp: nn.Module, args: tuple, matrix: Tensor | None) -> Tensor:
    """Mean squared grid difference between ``warp``'s prediction and ``matrix`` (identity if None)."""
    x = args[0]
    loc = args[1] if len(args) > 1 else x
    theta = warp.predict(loc)
    h, w = x.shape[-2], x.shape[-1]
    grid = warp.grid(theta, h, w)
    if matrix is None:
        matrix = torch.eye(3, dtype=torch.float64).expand(x.shape[0], 3, 3)
    target = target_grid(matrix, h, w, dtype=grid.dtype, device=grid.device)
    return (grid - target).pow(2).mean()


def finite_step(loss: Tensor, params: list[Tensor]) -> bool:
    """The loss and every gradient are finite (after any cross-rank averaging, so all ranks agree)."""
    if not bool(torch.isfinite(loss.detach())):
        return False
    grads = [p.grad for p in params if p.grad is not None]
    return all(bool(torch.isfinite(g).all()) for g in grads)


def leave_unmoved(images: Tensor, distorted: Tensor, matrix: Tensor, fraction: float,
                  generator: torch.Generator) -> tuple[Tensor, Tensor]:
    """Put back the unmoved image, with the identity as its target, for a random ``fraction`` of a batch.

    A head that only ever sees moved images learns to move every image, upright
    ones included; mixing in unmoved references with the identity as the
    target teaches it to leave those alone. Draws from ``generator`` (one
    uniform number per image), so the choice is a pure function of the batch seed.
    """
    if fraction <= 0:
        return distorted, matrix
    keep = torch.rand(images.shape[0], generator=generator) < fraction
    distorted = torch.where(keep.view(-1, 1, 1, 1), images, distorted)
    matrix = matrix.clone()
    matrix[keep] = torch.eye(3, dtype=matrix.dtype)
    return distorted, matrix


@torch.no_grad()
def reference_distance(model: nn.Module, warps: Mapping[str, nn.Module], x: Tensor) -> dict[str, float]:
    """How far each warp moves the prepared inputs ``x``: RMS displacement of its sampling grid from the identity.

    In pixels of the tensor the warp samples (the point's feature map), averaged
    over every output pixel and image. On upright reference images a warp that
    leaves them alone scores 0. The model's modes are restored.
    """
    with modes_kept(model):
        model.eval()
        captured, order = warp_inputs(model, warps, x)
    out = {}
    for name in order:
        args = captured[name]
        feats = args[0]
        h, w = feats.shape[-2], feats.shape[-1]
        grid = warps[name].grid(warps[name].predict(args[1] if len(args) > 1 else feats), h, w)
        ident = target_grid(torch.eye(3, dtype=torch.float64).expand(feats.shape[0], 3, 3), h, w,
                            dtype=grid.dtype, device=grid.device)
        # normalised coordinates span 2 units across the width and the height
        px = (grid - ident) * torch.tensor([w / 2.0, h / 2.0], dtype=grid.dtype, device=grid.device)
        out[name] = round(float(px.pow(2).sum(-1).mean().sqrt()), 6)
    return out


def pretrain_warps_(
    model: nn.Module,
    warps: Mapping[str, nn.Module],
    reference,
    config,
    *,
    seed: int,
    prepare: Callable[[Tensor], Tensor],
    rank: int = 0,
    world: int = 1,
    reduce_grads: Callable[[list[Tensor]], None] | None = None,
    on_step: Callable[[int, int, float], bool | None] | None = None,
    workers: int = 0,
    resume: Mapping[str, Any] | None = None,
    on_checkpoint: Callable[[dict[str, Any]], None] | None = None,
) -> dict[str, Any]:
    """Pre-train the heads of ``warps`` in place (the trailing ``_``); the base is not touched.

    ``reference`` is a dataset of images in [0, 1]; ``config`` a
    :class:`splice.recipes.Pretrain`; ``prepare`` turns a raw batch into the
    model's input (normalisation, device). Each step distorts a batch with
    ``config.to_range()`` (seeded by ``(seed, epoch, batch, rank)``) and takes
    one AdamW step on the grid loss; the learning rate follows a cosine decay
    over all pre-training steps. ``reduce_grads`` averages gradients across
    ranks under torchrun. Returns ``{"steps", "grid_loss", "mean_grid_loss",
    "images", "stopped"}``.

    Resuming: ``on_checkpoint(state)`` is called at the end of every epoch and
    when ``on_step`` returns True (a stop request; the loop then returns with
    ``stopped=True``). ``state`` is the loop's whole state apart from the head
    weights (which live in the model): ``epoch`` and ``batch`` to continue at,
    ``step``, the optimiser's state dict and the running loss sums. Passing it
    back as ``resume`` (with the model's weights restored) continues the run
    exactly where it left off: the batches and distortions are pure functions
    of ``(seed, epoch, batch, rank)`` and the learning rate of the step.

    A non-finite grid loss or gradient raises
    :class:`~splice.errors.TrainingDiverged` before the step is taken.
    """
    loop = _Loop(model, warps, reference, config, seed=seed, prepare=prepare, rank=rank, world=world,
                 reduce_grads=reduce_grads, workers=workers)
    if resume is not None:
        loop.load(resume)
    with modes_kept(model):
        model.eval()
        stopped = loop.run(on_step, on_checkpoint)
    return {"steps": loop.step, "grid_loss": loop.recent, "mean_grid_loss": loop.running / max(1, loop.seen),
            "images": loop.seen, "stopped": stopped}


class _Loop:
    """The state of one pre-training run and its epochs."""

    def __init__(self, model, warps, reference, config, *, seed, prepare, rank, world, reduce_grads, workers):
        self.model, self.warps, self.reference, self.config = model, warps, reference, config
        self.seed, self.prepare, self.rank, self.world = seed, prepare, rank, world
        self.reduce_grads, self.workers = reduce_grads, workers
        self.params = [p for w in warps.values() for p in w.parameters() if p.requires_grad]
        self.opt = torch.optim.AdamW(self.params, lr=config.lr, weight_decay=config.weight_decay)
        self.n = len(reference)
        self.per_rank = max(1, config.batch_size // max(1, world))
        self.steps_per_epoch = len(_b.index_batches(_b.shard(torch.arange(self.n), rank, world), self.per_rank))
        self.total = self.steps_per_epoch * config.epochs
        self.epoch, self.batch, self.step = 0, 0, 0
        self.running, self.seen, self.recent = 0.0, 0, 0.0

    def state(self) -> dict[str, Any]:
        return {"epoch": self.epoch, "batch": self.batch, "step": self.step, "optimizer": self.opt.state_dict(),
                "running": self.running, "seen": self.seen, "recent": self.recent, "total_steps": self.total}

    def load(self, state: Mapping[str, Any]) -> None:
        check_resumable(state, self.total)
        self.epoch, self.batch, self.step = int(state["epoch"]), int(state["batch"]), int(state["step"])
        self.opt.load_state_dict(state["optimizer"])
        self.running, self.seen, self.recent = float(state["running"]), int(state["seen"]), float(state["recent"])

    def run(self, on_step, on_checkpoint) -> bool:
        """Train to the end (False) or to a stop request (True, after a checkpoint)."""
        probe = self.prepare(_b.fetch(self.reference, torch.arange(min(2, self.n)))[0])
        order = execution_order(self.model, self.warps, probe)
        while self.epoch < self.config.epochs:
            mine = _b.shard(_b.epoch_order(self.seed, self.epoch, self.n, tag="pretrain-order"), self.rank, self.world)
            batches = _b.index_batches(mine, self.per_rank)
            stop = False
            for b, (images, _labels) in enumerate(
                    _b.iterate(self.reference, batches[self.batch:], workers=self.workers), start=self.batch):
                self._step(images, b, order)
                self.batch = b + 1
                stop = bool(on_step is not None and on_step(self.step, self.total, self.recent))
                if stop and self.batch < len(batches):  # mid-epoch: checkpoint this exact batch
                    if on_checkpoint is not None:
                        on_checkpoint(self.state())
                    return True
            self.epoch, self.batch = self.epoch + 1, 0
            if on_checkpoint is not None:
                on_checkpoint(self.state())
            if stop:
                return True
        return False

    def _step(self, images: Tensor, b: int, order: list[str]) -> None:
        from ..errors import TrainingDiverged

        gen = _b.generator(self.seed, "pretrain-distort", self.epoch, b, self.rank)
        distorted, meta = random_distort(images, self.config.to_range(), gen, fill=0.0)
        distorted, matrix = leave_unmoved(images, distorted, meta["matrix"],
                                          getattr(self.config, "identity_fraction", 0.0), gen)
        captured, _ = warp_inputs(self.model, self.warps, self.prepare(distorted), stop_after=order[-1])
        loss = sum(grid_loss(self.warps[name], captured[name], matrix if name == order[0] else None)
                   for name in order)
        for g in self.opt.param_groups:
            g["lr"] = self.config.lr * lr_factor("cosine", self.step, steps_per_epoch=self.steps_per_epoch,
                                                 total_steps=self.total)
        self.opt.zero_grad(set_to_none=True)
        loss.backward()
        if self.reduce_grads is not None:
            self.reduce_grads([p.grad for p in self.params if p.grad is not None])
        if not finite_step(loss, self.params):
            raise TrainingDiverged(
                f"warp pre-training diverged: the grid loss or its gradient became {float(loss.detach())} at "
                f"pre-training epoch {self.epoch + 1}/{self.config.epochs}, step {self.step + 1}; the checkpoint keeps "
                "the last finite state. Lower [pretrain] lr in the recipe and start a new run",
                {"phase": "pretrain", "epoch": self.epoch + 1, "step": self.step + 1, "what": "grid loss"})
        self.opt.step()
        value = float(loss.detach())
        self.running += value * images.shape[0]
        self.seen += images.shape[0]
        self.recent = value if self.step == 0 else 0.9 * self.recent + 0.1 * value
        self.step += 1
