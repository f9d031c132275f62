"""How are the site images moved? Ranges read off a probe's predicted warps, with no label.

A probe is a warp head trained to undo known random warps (grid regression,
as in :mod:`splice.training.pretrain`). On an image whose content was moved by
the forward matrix ``D``, a good probe predicts the sampling matrix ``S ~ D``.
Reading ``S`` on every site image therefore shows how the site moves its
images; the spread of those readings is the range the warp must undo.

What is read from each prediction ``S`` (normalised by ``S[2, 2]``):

- ``angle``: the rotation of the polar factor ``U`` of the linear part in
  pixel units, ``A = D S[:2, :2] D^-1 = U P`` with ``D = diag(W/2, H/2)``
  (:func:`splice.inspection.decompose.pixel_linear`, then ``describe_linear``,
  as inspect reads a warp): on an image that is not square, ``S[:2, :2]`` of a
  rotation rigid in pixels is not itself a rotation;
- ``scale``: the isotropic scale ``sqrt(s1 s2)``, the geometric mean of the
  singular values of ``A``;
- ``shift``: the translation ``S[:2, 2] / 2``, as a fraction of the image size
  (normalised coordinates span 2 units; see :mod:`splice.distort`);
- ``corner``: the non-affine part. The four corners ``(+-1, +-1)`` are mapped by
  ``S``; an affine map fits any three of them, so after a least-squares affine
  fit one residual direction per coordinate is left, the projection on
  ``v = (1, -1, -1, 1) / 2`` (corners ordered ``(-1,-1), (1,-1), (-1,1), (1,1)``).

Site statistics: the root mean square of ``angle`` (about no rotation), the
mean and standard deviation of ``scale``, the root mean square of ``shift``
(both axes pooled, about no shift) and the RMS of ``corner``. For a uniform
draw on ``[-r, r]`` each is ``r / sqrt(3)``, which gives a first guess of every
range. Ranges are symmetric about no motion, so the spread is measured about
no motion too: a camera turned by a constant 30 degrees reads an RMS of 30 and
gets a range of about +-52 degrees, which contains it (a standard deviation
about the mean read it as almost no rotation). The means (``angle_mean``,
``shift_mean_x``, ``shift_mean_y``; the standard deviations beside them) are
kept for the record and the summary: they are the probe's raw readings, pulled
towards no motion where it is unsure.

That first guess is biased: the probe's own error widens the spread, and where
it is unsure it regresses towards the middle of its training range, which
narrows it. **Simulation matching** removes both: candidate ranges are drawn
on held-out reference images (never seen by the probe), read by the same
probe, and adjusted until their statistics equal the site's (a fixed point:
each half-width is multiplied by site statistic / simulated statistic; the
scale centre is fitted apart, below). The probe's bias affects both
sides alike and cancels. Measured on the digits (README, "Label-free
adaptation"): within 5 % on rotation and shift and within 8 % on the scale
bounds for sites moved by up to 90 degrees.

**The scale centre.** The mean scale reading is a poor witness of the centre
of the scale range, for two measured reasons (a tiny affine test model on 32x32
digits, site = upright held-out digits never moved): the probe reads a
resampled image as smaller than the sharp original (held-out reference images
read 1.025 as they are, 1.006 after a random half-pixel shift, which changes no
scale), and its mean reading can hardly move with the centre (0.1 per unit
between centres 1.0 and 1.1 for narrow ranges, 0.8 below 1). Matching means one
to one then climbed to a range of 1.06-1.13 for images that were not scaled at
all. So the centre is fitted in two stages:

1. the half-widths are fitted with the centre held at 1 (no scale), and the
   site's mean reading is tested against "no scale": the band between the
   held-out images read as they are (sharp, no resampling) and the simulation
   at centre 1 (resampled), widened by :data:`CENTRE_Z` standard errors of the
   difference of two means (``sqrt(sd_site**2 / n_site + sd_sim**2 / n_sim)``).
   A site inside the band keeps the centre at exactly 1: a shift of the centre
   smaller than what resampling alone does to the reading cannot be told from
   it;
2. otherwise the centre moves by secant steps: the gap of means divided by the
   slope of the simulated mean reading against the centre, measured at each
   step by a second simulation :data:`CENTRE_STEP` (or the gap, if larger)
   further on. Where that slope
   is below :data:`MIN_CENTRE_SLOPE` the centre is not observable: it keeps
   the ``fallback``'s centre (the recipe's), with the half-width as estimated.

``statistics["scale_centre"]`` records the test and the slope (``moved`` and
``observable`` as 0 or 1).

**Still parameters.** Last, each parameter's statistic is simulated once more with that parameter still and
the rest as estimated: the probe's noise floor. A site spread within :data:`CENTRE_Z` standard errors of its floor
(a sample standard deviation's is about ``sd / sqrt(2 n)``) sets the parameter to 0: the excess of one noisy
spread over another is itself noise, and the fixed point turns it into a width (about 1.2 degrees of rotation on a
shift-only site, under a synthetic reader with that much noise).

**Observability.** A parameter whose statistic hardly moves between no
motion and the outer limit (ratio below :data:`OBSERVABLE_RATIO`) cannot be
estimated from these images; it keeps the recipe's value and is reported as
not observable. On the 48x48 digits this is perspective: the digit fills the
central half of the frame, where a corner offset of 0.3 moves it by well under
a pixel.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import torch
from torch import Tensor

from ..distort import DistortionRange

__all__ = ["PARAMETERS", "OBSERVABLE_RATIO", "CENTRE_Z", "CENTRE_STEP", "MIN_CENTRE_SLOPE", "RangeEstimate",
           "read_matrices", "site_statistics", "first_guess", "observability", "fit_ranges"]

PARAMETERS = ("rotation", "scale", "shift", "perspective")
# A statistic must grow at least this much between no motion and the outer limit
# for its parameter to count as observable (common practice, no source: the
# measured ratios on the digits were 19-30 for rotation, 8-10 scale, 21-35 shift,
# 1.5 perspective).
OBSERVABLE_RATIO = 3.0
# The scale centre (module docstring): a site's mean reading within this many standard errors of the band of
# "no scale" readings keeps the centre at 1, and a spread within this many of its floor sets its parameter to 0
# (common practice, no source: about a 95 % two-sided test);
CENTRE_Z = 2.0
# the slope of the mean reading against the centre is measured at least this far on, or as far as the gap of
# means when that is larger (common practice, no source: a step the mean reading resolves, far below the outer
# limits' span) ...
CENTRE_STEP = 0.05
# ... and below this slope a gap of means says too little about the centre (common practice, no source: a gap of
# one standard error would move the centre by more than ten; the probe of the module docstring measured 0.24-0.25
# on sites scaled 1.1-1.3 and 1.0-1.4, which it then found, and 1.3 on a site scaled 0.8-1.0)
MIN_CENTRE_SLOPE = 0.1
# which statistic answers for which parameter
_STAT_OF = {"rotation": "angle_rms", "scale": "scale_std", "shift": "shift_rms", "perspective": "corner_rms"}
_ROOT3 = math.sqrt(3.0)


@dataclass
class RangeEstimate:
    """Estimated ranges of a site, in the units of a recipe's ``[pretrain]`` table.

    ``observable`` says, per parameter, whether it was estimated or kept at the
    recipe's ``fallback``; ``statistics`` holds the site's statistics and those
    of the final simulation, for the record.
    """

    rotation: float
    scale: tuple[float, float]
    shift: float
    perspective: float
    observable: dict[str, bool] = field(default_factory=dict)
    statistics: dict[str, dict[str, float]] = field(default_factory=dict)

    def to_range(self) -> DistortionRange:
        return DistortionRange(rotation_deg=self.rotation, scale=tuple(self.scale), shift=self.shift,
                               perspective=self.perspective)

    def covering_identity(self) -> RangeEstimate:
        """The same ranges with the scale range stretched to contain 1 (no motion is always in range)."""
        lo, hi = self.scale
        return RangeEstimate(self.rotation, (min(lo, 1.0), max(hi, 1.0)), self.shift, self.perspective,
                             dict(self.observable), dict(self.statistics))

    def to_dict(self, exact: bool = False) -> dict:
        """Plain JSON types, rounded for reading (4 decimals, statistics 6); with ``exact`` every float as it
        is, for a checkpoint whose resumed run must draw from the very ranges the interrupted one used."""
        def r(v: float, digits: int = 4) -> float:
            return float(v) if exact else round(v, digits)

        return {"rotation": r(self.rotation), "scale": [r(self.scale[0]), r(self.scale[1])],
                "shift": r(self.shift), "perspective": r(self.perspective), "observable": dict(self.observable),
                "statistics": {k: {s: r(v, 6) for s, v in d.items()} for k, d in self.statistics.items()}}

    @classmethod
    def from_dict(cls, d: dict) -> RangeEstimate:
        return cls(float(d["rotation"]), (float(d["scale"][0]), float(d["scale"][1])), float(d["shift"]),
                   float(d["perspective"]), dict(d.get("observable", {})), dict(d.get("statistics", {})))

    @classmethod
    def of_ranges(cls, ranges) -> RangeEstimate:
        """From anything with ``rotation``, ``scale``, ``shift``, ``perspective`` (a recipe's tables)."""
        return cls(float(ranges.rotation), (float(ranges.scale[0]), float(ranges.scale[1])), float(ranges.shift),
                   float(ranges.perspective))


@torch.no_grad()
def read_matrices(predict: Callable[[Tensor], Tensor], images: Tensor, *, batch_size: int = 256) -> Tensor:
    """``(N, 3, 3)`` float64 sampling matrices ``predict`` gives for ``images``, batch by batch."""
    out = [predict(chunk).to(torch.float64) for chunk in images.split(batch_size)]
    return torch.cat(out) if out else torch.zeros(0, 3, 3, dtype=torch.float64)


def _corner_residual(m: Tensor) -> Tensor:
    corners = torch.tensor([[-1.0, -1.0, 1.0], [1.0, -1.0, 1.0], [-1.0, 1.0, 1.0], [1.0, 1.0, 1.0]],
                           dtype=torch.float64)
    q = corners @ m.transpose(1, 2)
    q = q[..., :2] / q[..., 2:3]
    v = torch.tensor([1.0, -1.0, -1.0, 1.0], dtype=torch.float64) / 2.0
    return torch.einsum("k,nkc->nc", v, q)


def site_statistics(matrices: Tensor, *, size: tuple[int, int]) -> dict[str, float]:
    """The spread statistics of ``(N, 3, 3)`` predicted sampling matrices of a warp on tensors of
    ``size=(H, W)`` (see the module docstring)."""
    from ..inspection.decompose import describe_linear, pixel_linear

    m = matrices.to(torch.float64)
    m = m / m[:, 2:3, 2:3]
    d = describe_linear(pixel_linear(m[:, :2, :2], size))
    scale = torch.sqrt(d["scale_1"] * d["scale_2"])
    shift = torch.cat([m[:, 0, 2], m[:, 1, 2]]) / 2.0
    corner = _corner_residual(m)
    n = m.shape[0]
    std = (lambda t: float(t.std())) if n > 1 else (lambda t: 0.0)
    mean = (lambda t: float(t.mean())) if n > 0 else (lambda t: 0.0)
    rms = (lambda t: float(t.pow(2).mean().sqrt())) if n > 0 else (lambda t: 0.0)
    return {"angle_rms": rms(d["angle_deg"]), "angle_mean": mean(d["angle_deg"]), "angle_std": std(d["angle_deg"]),
            "scale_mean": mean(scale), "scale_std": std(scale), "shift_rms": rms(shift), "shift_std": std(shift),
            "shift_mean_x": mean(m[:, 0, 2]) / 2.0, "shift_mean_y": mean(m[:, 1, 2]) / 2.0,
            "corner_rms": float(corner.pow(2).sum(1).mean().sqrt()) if n > 0 else 0.0, "images": float(n)}


def first_guess(stats: dict[str, float], fallback: RangeEstimate) -> RangeEstimate:
    """Uniform ranges with the statistics' spread: half-width ``sqrt(3)`` root mean squares (standard deviations,
    for the scale about its mean)."""
    half = _ROOT3 * stats["scale_std"]
    return RangeEstimate(_ROOT3 * stats["angle_rms"],
                         (max(1e-3, stats["scale_mean"] - half), stats["scale_mean"] + half),
                         _ROOT3 * stats["shift_rms"], fallback.perspective)


def observability(simulate: Callable[[RangeEstimate], dict[str, float]], outer: RangeEstimate) -> dict[str, float]:
    """Per parameter: its statistic at the outer limit divided by the statistic with no motion."""
    still = RangeEstimate(0.0, (1.0, 1.0), 0.0, 0.0)
    base = simulate(still)
    ratios = {}
    for p in PARAMETERS:
        moved = RangeEstimate(still.rotation, still.scale, still.shift, still.perspective)
        setattr(moved, p, getattr(outer, p))
        key = _STAT_OF[p]
        ratios[p] = simulate(moved)[key] / max(base[key], 1e-12)
    return ratios


def _clip(est: RangeEstimate, outer: RangeEstimate) -> RangeEstimate:
    lo = min(max(est.scale[0], outer.scale[0]), outer.scale[1])
    hi = min(max(est.scale[1], lo), outer.scale[1])
    return RangeEstimate(min(max(est.rotation, 0.0), outer.rotation), (lo, hi), min(max(est.shift, 0.0), outer.shift),
                         min(max(est.perspective, 0.0), outer.perspective))


def _centre(est: RangeEstimate) -> float:
    return 0.5 * (est.scale[0] + est.scale[1])


def _with_centre(est: RangeEstimate, centre: float) -> RangeEstimate:
    half = 0.5 * (est.scale[1] - est.scale[0])
    return RangeEstimate(est.rotation, (centre - half, centre + half), est.shift, est.perspective)


def _update(est: RangeEstimate, site: dict, sim: dict, start: RangeEstimate) -> RangeEstimate:
    """One fixed-point step: half-widths times site / simulated spread, the scale centre kept.

    A half-width at 0 restarts from ``start`` (a product with 0 would never move again).
    """
    def ratio(value: float, key: str, restart: float) -> float:
        return value * site[key] / max(sim[key], 1e-12) if value > 0.0 else restart

    centre = _centre(est)
    half = ratio(0.5 * (est.scale[1] - est.scale[0]), _STAT_OF["scale"], 0.5 * (start.scale[1] - start.scale[0]))
    return RangeEstimate(ratio(est.rotation, _STAT_OF["rotation"], start.rotation), (centre - half, centre + half),
                         ratio(est.shift, _STAT_OF["shift"], start.shift),
                         ratio(est.perspective, _STAT_OF["perspective"], start.perspective))


def _widths(est: RangeEstimate, site: dict, simulate, start: RangeEstimate, pin, iterations: int):
    """``iterations`` fixed-point steps of the half-widths, the centre kept; ``(estimate, its simulation)``."""
    sim = simulate(est)
    for _ in range(iterations):
        est = pin(_update(est, site, sim, start))
        sim = simulate(est)
    return est, sim


def _standard_error(site: dict, sim: dict, key: str = "scale_std", spread: bool = False) -> float:
    """The standard error of the difference of two sample statistics, from the spread ``key`` of each: of two
    means (the scale readings', ``sd / sqrt(n)`` each), or with ``spread`` of two spreads (``sd / sqrt(2 n)``)."""
    def var(d: dict) -> float:
        return d[key] ** 2 / ((2.0 if spread else 1.0) * max(float(d.get("images", 1.0)), 1.0))
    return math.sqrt(var(site) + var(sim))


def _unscaled_band(site: dict, sim: dict, simulate) -> dict[str, float]:
    """Stage 1 of the scale centre (module docstring): is the site's mean reading one of "no scale"?"""
    sharp = simulate(RangeEstimate(0.0, (1.0, 1.0), 0.0, 0.0))["scale_mean"]
    se = _standard_error(site, sim)
    lo, hi = min(sharp, sim["scale_mean"]) - CENTRE_Z * se, max(sharp, sim["scale_mean"]) + CENTRE_Z * se
    moved = not lo <= site["scale_mean"] <= hi
    return {"band_low": lo, "band_high": hi, "standard_error": se, "moved": float(moved), "observable": 1.0}


def _secant_centre(est: RangeEstimate, site: dict, sim: dict, simulate, start: RangeEstimate, pin,
                   fallback: RangeEstimate, iterations: int):
    """Stage 2 of the scale centre: secant steps on the mean reading; ``(estimate, simulation, record)``."""
    record: dict[str, float] = {}
    for _ in range(iterations):
        centre, gap = _centre(est), site["scale_mean"] - sim["scale_mean"]
        ahead = pin(_with_centre(est, centre + math.copysign(max(CENTRE_STEP, abs(gap)), gap)))
        moved_by = _centre(ahead) - centre
        if moved_by == 0.0:  # held at an outer limit: no step can close the gap
            break
        slope = (simulate(ahead)["scale_mean"] - sim["scale_mean"]) / moved_by
        record["slope"] = slope
        if slope < MIN_CENTRE_SLOPE:
            record["observable"] = 0.0
            est, sim = _widths(pin(_with_centre(est, _centre(fallback))), site, simulate, start, pin, iterations)
            return est, sim, record
        est = pin(_update(_with_centre(est, centre + gap / slope), site, sim, start))
        sim = simulate(est)
    return est, sim, record


def _zero_still(est: RangeEstimate, site: dict, simulate, pin, observable: dict[str, bool]):
    """Still parameters (module docstring): a parameter whose site spread is within :data:`CENTRE_Z` standard
    errors of its floor (its statistic with that parameter still and the rest as estimated) is set to 0.
    Returns ``(estimate, record)``; the record's ``floor``,
    ``floor_standard_error`` and ``zeroed`` (0 or 1) map each statistic to a number.
    """
    record: dict[str, dict[str, float]] = {"floor": {}, "floor_standard_error": {}, "zeroed": {}}
    out = RangeEstimate(est.rotation, est.scale, est.shift, est.perspective)
    for p in PARAMETERS:
        key = _STAT_OF[p]
        if not observable.get(p, False):
            continue
        still = RangeEstimate(est.rotation, est.scale, est.shift, est.perspective)
        setattr(still, p, (_centre(est),) * 2 if p == "scale" else 0.0)
        still = pin(still)
        floor = simulate(still)
        se = _standard_error(site, floor, key, spread=True)
        zeroed = site[key] <= floor[key] + CENTRE_Z * se
        record["floor"][key], record["floor_standard_error"][key], record["zeroed"][key] = floor[key], se, float(zeroed)
        if zeroed:
            setattr(out, p, getattr(still, p))
    return out, record


def fit_ranges(site: dict[str, float], simulate: Callable[[RangeEstimate], dict[str, float]], *,
               outer: RangeEstimate, fallback: RangeEstimate, observable: dict[str, bool],
               iterations: int = 6) -> RangeEstimate:
    """Ranges whose simulation reads like the site (see the module docstring).

    ``site``: :func:`site_statistics` of the probe on the site images;
    ``simulate``: candidate ranges -> the same statistics on held-out reference
    images moved by them (same random draws every call); ``outer``: no
    estimate goes beyond it; ``fallback``: the values kept for parameters that
    are not ``observable``, and the scale centre when the centre is not.
    """
    def pin(est: RangeEstimate) -> RangeEstimate:
        est = _clip(est, outer)
        for p in PARAMETERS:
            if not observable.get(p, False):
                setattr(est, p, getattr(fallback, p))
        return est

    guess = pin(first_guess(site, fallback))
    # restart points for half-widths that reach 0: the first guess, a quarter of the outer perspective
    start = RangeEstimate(guess.rotation, guess.scale, guess.shift, 0.25 * outer.perspective)
    scale_seen = observable.get("scale", False)
    est, sim = _widths(pin(_with_centre(guess, 1.0)) if scale_seen else guess, site, simulate, start, pin,
                       iterations)
    centre = _unscaled_band(site, sim, simulate) if scale_seen else {}
    if centre.get("moved"):
        est, sim, secant = _secant_centre(est, site, sim, simulate, start, pin, fallback, iterations)
        centre.update(secant)
    zeroed, floors = _zero_still(est, site, simulate, pin, observable)
    if any(floors["zeroed"].values()):
        est, sim = zeroed, simulate(zeroed)
    est.observable = {p: bool(observable.get(p, False)) for p in PARAMETERS}
    est.statistics = {"site": dict(site), "simulated": dict(sim)} | floors | (
        {"scale_centre": centre} if centre else {})
    return est
