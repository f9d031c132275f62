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

from ..distort import random_distort
from . import batches as _b
from .schedule import lr_factor

__all__ = ["target_grid", "execution_order", "warp_inputs", "grid_loss", "leave_unmoved", "reference_distance",
           "pretrain_warps_"]


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


def execution_order(model: nn.Module, warps: Mapping[str, nn.Module], example: Tensor) -> list[str]:
    """Names of ``warps`` in the order a forward pass reaches them."""
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
    modes = {m: m.training for m in model.modules()}
    model.eval()
    try:
        captured, order = warp_inputs(model, warps, x)
    finally:
        for m, mode in modes.items():
            m.training = mode
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
    on_step: Callable[[int, int, float], None] | None = None,
    workers: int = 0,
) -> dict[str, Any]:
    """Pre-train the heads of ``warps`` in place (the trailing ``_``); the base is not touched.

    ``reference`` is a dataset of images in [0, 1]; ``config`` a
    :class:`splice.recipes.Pretrain`; ``prepare`` turns a raw batch into the
    model's input (normalisation, device). Each step distorts a batch with
    ``config.to_range()`` (seeded by ``(seed, epoch, batch, rank)``) and takes
    one AdamW step on the grid loss; the learning rate follows a cosine decay
    over all pre-training steps. ``reduce_grads`` averages gradients across
    ranks under torchrun. Returns ``{"steps", "grid_loss", "images"}``.
    """
    spec = config.to_range()
    params = [p for w in warps.values() for p in w.parameters() if p.requires_grad]
    opt = torch.optim.AdamW(params, lr=config.lr, weight_decay=config.weight_decay)
    was_training = model.training
    model.eval()
    n = len(reference)
    per_rank = max(1, config.batch_size // max(1, world))
    probe = prepare(_b.fetch(reference, torch.arange(min(2, n)))[0])
    order = execution_order(model, warps, probe)
    first, last = order[0], order[-1]
    steps_per_epoch = len(_b.index_batches(_b.shard(torch.arange(n), rank, world), per_rank))
    total = steps_per_epoch * config.epochs
    step = 0
    running, seen, recent = 0.0, 0, 0.0
    try:
        for epoch in range(config.epochs):
            mine = _b.shard(_b.epoch_order(seed, epoch, n, tag="pretrain-order"), rank, world)
            batches = _b.index_batches(mine, per_rank)
            for b, (images, _labels) in enumerate(_b.iterate(reference, batches, workers=workers)):
                gen = _b.generator(seed, "pretrain-distort", epoch, b, rank)
                distorted, meta = random_distort(images, spec, gen, fill=0.0)
                distorted, matrix = leave_unmoved(images, distorted, meta["matrix"],
                                                  getattr(config, "identity_fraction", 0.0), gen)
                x = prepare(distorted)
                captured, _ = warp_inputs(model, warps, x, stop_after=last)
                loss = sum(grid_loss(warps[name], captured[name], matrix if name == first else None)
                           for name in order)
                for g in opt.param_groups:
                    g["lr"] = config.lr * lr_factor("cosine", step, steps_per_epoch=steps_per_epoch,
                                                    total_steps=total)
                opt.zero_grad(set_to_none=True)
                loss.backward()
                if reduce_grads is not None:
                    reduce_grads([p.grad for p in params if p.grad is not None])
                opt.step()
                value = float(loss.detach())
                running += value * images.shape[0]
                seen += images.shape[0]
                recent = value if step == 0 else 0.9 * recent + 0.1 * value
                step += 1
                if on_step is not None:
                    on_step(step, total, recent)
    finally:
        model.train(was_training)
    return {"steps": step, "grid_loss": recent, "mean_grid_loss": running / max(1, seen), "images": seen}
