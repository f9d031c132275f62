"""The range probe: a projective warp head, apart from the model, that reads how images are moved.

The probe sees what the model's input sees (prepared images) and is trained
by grid regression (:mod:`splice.adapt.regress`) to undo random warps within
the recipe's outer limits (``[site]``), on the reference images minus a
held-out share. It is projective so that it can express every parameter the
estimate reports, whatever family and point the model's own warps use; it is
thrown away after the estimate (only the estimate is kept, in ``ranges.json``).
"""

from __future__ import annotations

from collections.abc import Callable

import torch
from torch import Tensor, nn

from ..errors import DataError
from ..training import batches as _b
from ..warps import Warp, WarpConfig
from .images import Images, split_off
from .ranges import (OBSERVABLE_RATIO, PARAMETERS, RangeEstimate, fit_ranges, observability, read_matrices,
                     site_statistics)
from .regress import near_identity, regress_warps_

__all__ = ["MIN_HELD_OUT", "ProbeNet", "build_probe", "train_probe", "estimate_ranges", "check_reference_size",
           "check_site_size"]

#: the fewest held-out reference images the estimate simulates the site's moves on: with fewer, its spreads and
#: percentiles are a handful of numbers (our choice, no source; a few hundred fix them to about a percent)
MIN_HELD_OUT = 8


class ProbeNet(nn.Module):
    """A lone warp as a model (``forward`` warps the input), so the pre-training loop can drive it."""

    def __init__(self, warp: Warp) -> None:
        super().__init__()
        self.probe = warp

    def forward(self, x: Tensor) -> Tensor:
        return self.probe(x)

    def matrices(self, x: Tensor) -> Tensor:
        """The probe's ``(N, 3, 3)`` sampling matrices for prepared images ``x``."""
        return self.probe.matrix(self.probe.predict(x))


def build_probe(input_shape, width: int, seed: int, device=None, dtype=None) -> ProbeNet:
    """A fresh projective probe for inputs of ``input_shape`` (in the model's ``dtype``, as the prepared batches
    are); its random init is fixed by ``seed``."""
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(_b.mix(seed, "probe-init"))
        warp = Warp(WarpConfig(family="projective", head_width=width), tuple(input_shape))
    return ProbeNet(warp).to(device=device, dtype=dtype)


def check_reference_size(n: int, holdout: float) -> None:
    """Refuse, before any work, a reference too small to hold out :data:`MIN_HELD_OUT` images for the estimate
    (the rest trains the probe; :func:`~splice.adapt.images.split_off` holds out ``holdout`` of them)."""
    held = min(n - 1, max(1, round(holdout * n)))
    if held < MIN_HELD_OUT:
        need = next(k for k in range(MIN_HELD_OUT, 100 * MIN_HELD_OUT) if round(holdout * k) >= MIN_HELD_OUT)
        raise DataError(f"the reference has {n} image{'s' if n != 1 else ''}; estimating the site's ranges holds out "
                        f"{holdout:.0%} of them and needs {MIN_HELD_OUT} held out, so at least {need} reference "
                        "images. "
                        "Add reference images, or set [site] estimate = false to pre-train within the recipe's "
                        "ranges as typed")


def check_site_size(n: int) -> None:
    """Refuse, before any work, a site of fewer than :data:`MIN_HELD_OUT` images for the estimate: the spread of
    the site's readings is matched to that of as many held-out reference images, and the spread of one reading
    is zero whatever the site does."""
    if n < MIN_HELD_OUT:
        raise DataError(f"the site has {n} image{'s' if n != 1 else ''}; estimating how its images are moved reads "
                        f"the spread of their warps and needs at least {MIN_HELD_OUT}. Add site images, or set "
                        "[site] estimate = false to pre-train within the recipe's ranges as typed")


def train_probe(probe: ProbeNet, reference: Images, site_cfg, *, seed: int, prepare: Callable[[Tensor], Tensor],
                batch_size: int, lr: float, rank: int = 0, world: int = 1, reduce_grads=None,
                on_step=None) -> tuple[Images, dict]:
    """Pre-train ``probe`` on the reference minus a held-out share; returns ``(held-out images, result)``."""
    rest, held = split_off(reference, site_cfg.holdout, _b.generator(seed, "probe-holdout"))
    draw = near_identity(site_cfg.to_range(), site_cfg.unmoved)
    result = regress_warps_(probe, {"probe": probe.probe}, rest, draw, epochs=site_cfg.probe_epochs, lr=lr,
                            batch_size=batch_size, seed=seed, prepare=prepare, tag="probe", rank=rank,
                            world=world, reduce_grads=reduce_grads, on_step=on_step)
    return held, result


def estimate_ranges(probe: ProbeNet, site: Images, held: Images, *, outer: RangeEstimate, fallback: RangeEstimate,
                    seed: int, prepare: Callable[[Tensor], Tensor], batch_size: int = 256,
                    max_simulated: int = 1024) -> RangeEstimate:
    """The site's ranges (:func:`splice.adapt.ranges.fit_ranges`) as read by a trained ``probe``.

    Simulations run on at most ``max_simulated`` held-out reference images (a
    few hundred fix the statistics to about a percent; common practice, no source).
    """
    probe.eval()
    size = tuple(probe.probe.shape[1:])
    chunks = torch.arange(min(len(held), max_simulated)).split(batch_size)
    reference = torch.cat([held.batch(chunk) for chunk in chunks])

    def read(images: Tensor) -> Tensor:
        return probe.matrices(prepare(images))

    def simulate(est: RangeEstimate) -> dict[str, float]:
        from ..distort import random_distort

        moved, _ = random_distort(reference, est.to_range(), _b.generator(seed, "simulate"), fill=0.0)
        return site_statistics(read_matrices(read, moved, batch_size=batch_size), size=size)

    idx = torch.arange(len(site))
    site_m = torch.cat([read_matrices(read, site.batch(chunk), batch_size=batch_size)
                        for chunk in idx.split(batch_size)])
    stats = site_statistics(site_m, size=size)
    ratios = observability(simulate, outer)
    observable = {p: ratios[p] >= OBSERVABLE_RATIO for p in PARAMETERS}
    est = fit_ranges(stats, simulate, outer=outer, fallback=fallback, observable=observable)
    est.statistics["observability_ratio"] = {p: float(r) for p, r in ratios.items()}
    return est
