"""Grid-regression pre-training of warp heads on unlabelled images, with a choice of draws.

This is :func:`splice.training.pretrain.pretrain_warps_` (same target, same
loss, same seeding by ``(seed, epoch, batch, rank)``) with the random warps
drawn by a policy instead of one range:

- :func:`upright_safe`: a share of every batch is left unmoved with the
  identity as target, so the head learns to leave upright images alone. This
  is the upright-safe pre-training of the efficacy issue (its
  ``[pretrain] identity_fraction``); it is kept here, apart, until that lands;
- :func:`near_identity`: the same share gets a tiny random warp instead, with
  its exact target. The range probe uses it: every other training image is
  resampled, hence slightly blurred, and a probe that sees sharp unmoved
  images next to blurred moved ones learns "sharp means unmoved" and reads
  mildly moved images wrongly (measured: a site of unmoved digits read as
  scaled by 1.05-1.06).

The base runs in eval mode under ``no_grad``; only the heads' parameters move.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import torch
from torch import Tensor, nn

from ..copies import modes_kept
from ..distort import DistortionRange, random_distort
from ..training import batches as _b
from ..errors import TrainingDiverged
from ..training.pretrain import check_resumable, execution_order, finite_step, grid_loss, warp_inputs
from ..training.schedule import lr_factor
from .images import Images

__all__ = ["NEAR_IDENTITY", "Draw", "upright_safe", "near_identity", "regression_loss", "regress_warps_"]

# The tiny warps of near_identity (common practice, no source: a few degrees and
# percent, about one pixel of shift on a 48-pixel image).
NEAR_IDENTITY = DistortionRange(rotation_deg=3.0, scale=(0.97, 1.03), shift=0.02)

Draw = Callable[[Tensor, torch.Generator], tuple[Tensor, Tensor]]


def _share(n: int, fraction: float, generator: torch.Generator) -> Tensor:
    return torch.rand(n, generator=generator) < fraction


def upright_safe(spec: DistortionRange, unmoved: float) -> Draw:
    """Moved by ``spec``, except a random ``unmoved`` share left as it is with the identity as target."""
    def draw(images: Tensor, gen: torch.Generator) -> tuple[Tensor, Tensor]:
        moved, meta = random_distort(images, spec, gen, fill=0.0)
        matrix = meta["matrix"].clone()
        keep = _share(images.shape[0], unmoved, gen)
        matrix[keep] = torch.eye(3, dtype=matrix.dtype)
        return torch.where(keep.view(-1, 1, 1, 1), images, moved), matrix
    return draw


def near_identity(spec: DistortionRange, share: float) -> Draw:
    """Moved by ``spec``, except a random ``share`` moved by :data:`NEAR_IDENTITY` (targets exact)."""
    def draw(images: Tensor, gen: torch.Generator) -> tuple[Tensor, Tensor]:
        moved, meta = random_distort(images, spec, gen, fill=0.0)
        small, small_meta = random_distort(images, NEAR_IDENTITY, gen, fill=0.0)
        keep = _share(images.shape[0], share, gen)
        matrix = torch.where(keep.view(-1, 1, 1), small_meta["matrix"], meta["matrix"])
        return torch.where(keep.view(-1, 1, 1, 1), small, moved), matrix
    return draw


def regression_loss(model: nn.Module, warps: Mapping[str, nn.Module], order: list[str], x: Tensor,
                    matrix: Tensor) -> Tensor:
    """The grid loss of every warp on prepared images ``x``: the first in ``order`` learns ``matrix``, the rest the
    identity."""
    captured, _ = warp_inputs(model, warps, x, stop_after=order[-1])
    return sum(grid_loss(warps[name], captured[name], matrix if name == order[0] else None) for name in order)


def regress_warps_(model: nn.Module, warps: Mapping[str, nn.Module], images: Images, draw: Draw, *,
                   epochs: int, lr: float, batch_size: int, seed: int, prepare: Callable[[Tensor], Tensor],
                   tag: str = "pretrain", weight_decay: float = 0.0, rank: int = 0, world: int = 1,
                   reduce_grads: Callable[[list[Tensor]], None] | None = None,
                   on_step: Callable[[int, int, float], None] | None = None,
                   on_epoch: Callable[[dict[str, Any]], None] | None = None,
                   resume: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Train the heads of ``warps`` in place to undo the warps ``draw`` applies to ``images``.

    One AdamW step per batch on the grid loss (the first warp in execution
    order learns the drawn matrix, later ones the identity), learning rate on
    a cosine over all steps. ``tag`` keeps the data order and draws of two
    calls with the same seed apart. Returns ``{"steps", "grid_loss", "mean_grid_loss", "images"}``.

    ``on_epoch(state)`` is called after every epoch but the last with the loop's state (the heads' weights live
    in the model); passed back as ``resume``, with the model's weights restored, it continues at the next epoch
    with the same data order, draws and learning rates, so the result is the uninterrupted run's.
    """
    params = [p for w in warps.values() for p in w.parameters() if p.requires_grad]
    opt = torch.optim.AdamW(params, lr=lr, weight_decay=weight_decay)
    n = len(images)
    per_rank = max(1, batch_size // max(1, world))
    steps_per_epoch = len(_b.index_batches(_b.shard(torch.arange(n), rank, world), per_rank))
    total = steps_per_epoch * epochs
    order = execution_order(model, warps, prepare(images.batch(torch.arange(min(2, n)))))
    step, running, seen, recent, first = 0, 0.0, 0, 0.0, 0
    if resume is not None:
        check_resumable(resume, total)
        opt.load_state_dict(resume["optimizer"])
        first, step = int(resume["epoch"]), int(resume["step"])
        running, seen, recent = float(resume["running"]), int(resume["seen"]), float(resume["recent"])
    with modes_kept(model):
        model.eval()
        for epoch in range(first, epochs):
            mine = _b.shard(_b.epoch_order(seed, epoch, n, tag=f"{tag}-order"), rank, world)
            for b, idx in enumerate(_b.index_batches(mine, per_rank)):
                moved, matrix = draw(images.batch(idx), _b.generator(seed, f"{tag}-draw", epoch, b, rank))
                loss = regression_loss(model, warps, order, prepare(moved), matrix)
                for g in opt.param_groups:
                    g["lr"] = lr * lr_factor("cosine", step, steps_per_epoch=steps_per_epoch, total_steps=total)
                opt.zero_grad(set_to_none=True)
                loss.backward()
                if reduce_grads is not None:
                    reduce_grads([p.grad for p in params if p.grad is not None])
                if not finite_step(loss, params):  # before the step: the heads keep their last finite state
                    raise TrainingDiverged(
                        f"warp pre-training ({tag}) diverged: the grid loss or its gradient became "
                        f"{float(loss.detach())} at epoch {epoch + 1}/{epochs}, step {step + 1}; the checkpoint keeps "
                        "the last finite state. Lower [pretrain] lr in the recipe and start a new run",
                        {"phase": tag, "epoch": epoch + 1, "step": step + 1, "what": "grid loss"})
                opt.step()
                value = float(loss.detach())
                running += value * len(idx)
                seen += len(idx)
                recent = value if step == 0 else 0.9 * recent + 0.1 * value
                step += 1
                if on_step is not None:
                    on_step(step, total, recent)
            if on_epoch is not None and epoch + 1 < epochs:
                on_epoch({"epoch": epoch + 1, "step": step, "optimizer": opt.state_dict(), "running": running,
                          "seen": seen, "recent": recent, "total_steps": total})
    return {"steps": step, "grid_loss": recent, "mean_grid_loss": running / max(1, seen), "images": seen}
