"""What the warp heads learn from unlabelled site images (``[site] objective``).

``entropy``
    Test-time entropy minimisation (Wang et al., "Tent: fully test-time
    adaptation by entropy minimization", ICLR 2021), applied to the warp heads
    only: the frozen classifier's mean prediction entropy on the canonical
    views of a site batch, ``mean_i H(p_i)``. Alone it can collapse (a warp
    that makes every image look like one confident class scores best), so the
    entropy of the batch's mean prediction is subtracted,
    ``- H(mean_i p_i)``: it is largest when the classes are used evenly (the
    information-maximisation guard of Liang et al., "Do we really need to
    access the source data?", ICML 2020).

``consistency``
    The canonical view of a site image should not change when a known extra
    warp ``A`` (drawn from :data:`EXTRA`) is applied to it first. If the head
    reads ``S(x)`` for ``x`` (content moved by ``D``, ``S ~ D``), then on
    ``A x`` (content moved by ``A D``) it should read ``A S(x)``. The loss is
    the mean squared distance between the grid of ``S(A x)`` and the grid of
    ``A S(x)``, with ``S(x)`` held fixed (no gradient through the target: a
    symmetric loss let both sides drift and cost 2.5 points on the +-90
    degree site).

Both run beside the pre-training loss on reference images (``[site] anchor``),
which keeps the heads from forgetting what they were taught.
"""

from __future__ import annotations

from collections.abc import Callable

import torch
from torch import Tensor, nn

from ..distort import DistortionRange, random_distort
from ..training.pretrain import target_grid

__all__ = ["EXTRA", "entropy_loss", "consistency_loss", "prediction_entropy"]

# The extra warp of the consistency objective: small, so that the composed
# motion stays inside the range the head was pre-trained on (common practice,
# no source; measured: the full site range as extra warp cost 10 points).
EXTRA = DistortionRange(rotation_deg=15.0, scale=(0.9, 1.1), shift=0.05)


def prediction_entropy(logits: Tensor) -> Tensor:
    """``(N,)`` entropy of the softmax of ``logits (N, K)``, in nats."""
    return -(logits.softmax(1) * logits.log_softmax(1)).sum(1)


def entropy_loss(logits: Tensor) -> Tensor:
    """Mean prediction entropy minus the entropy of the mean prediction (see the module docstring)."""
    mean = logits.softmax(1).mean(0)
    return prediction_entropy(logits).mean() + (mean * mean.clamp_min(1e-12).log()).sum()


def consistency_loss(warp: nn.Module, images: Tensor, prepare: Callable[[Tensor], Tensor],
                     generator: torch.Generator) -> Tensor:
    """Grid distance between the head's reading of ``A x`` and ``A`` times its (fixed) reading of ``x``.

    ``warp`` is an input warp with a matrix family, ``images`` a raw batch in
    [0, 1] and ``prepare`` what turns it into the model's input. ``A`` is drawn
    from :data:`EXTRA` with ``generator`` and applied before ``prepare``, so
    what it uncovers reads as the dark background, as on a moved site image.
    """
    moved, meta = random_distort(images, EXTRA, generator, fill=0.0)
    x = prepare(images)
    with torch.no_grad():
        s = warp.matrix(warp.predict(x)).to(torch.float64)
    theta = warp.predict(prepare(moved))
    h, w = x.shape[-2], x.shape[-1]
    grid = warp.grid(theta, h, w)
    target = target_grid(meta["matrix"].to(s.device) @ s, h, w, dtype=grid.dtype, device=grid.device)
    return (grid - target).pow(2).mean()
