"""Random distortions: the :class:`DistortionRange` distribution, its samples and their matrices."""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass

import torch
from torch import Tensor

from ..errors import DataError
from .matrices import (
    affine_matrix,
    perspective_matrix,
    perspective_points_from_offsets,
    to_3x3,
)
from .sampling import apply_homography, check_images

__all__ = ["random_perspective_points", "DistortionRange", "sample_distortion", "distortion_matrix",
           "random_distort"]


def random_perspective_points(
    h: int, w: int, strength: float, generator: torch.Generator | None = None, *, n: int | None = None
) -> tuple[Tensor, Tensor]:
    """Random perspective corners for an ``h x w`` image.

    ``start`` is the image's four corners ``(0, 0), (w, 0), (w, h), (0, h)``;
    each ``end`` corner moves inwards by an independent uniform amount up to
    ``strength * w/2`` horizontally and ``strength * h/2`` vertically
    (``0 <= strength <= 1``). Returns ``(4, 2)`` tensors, or ``(n, 4, 2)``.
    """
    if not 0.0 <= float(strength) <= 1.0:
        raise DataError(f"perspective strength must be in [0, 1]; got {strength}.")
    shape = (4, 2) if n is None else (n, 4, 2)
    offsets = torch.rand(shape, generator=generator, dtype=torch.float64) * float(strength)
    return perspective_points_from_offsets(offsets, h, w)




def _check_number(name: str, value, low: float, high: float, *, high_open: bool = False, hint: str = "") -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or math.isnan(float(value)):
        raise ValueError(f"DistortionRange.{name} must be a number; got {value!r}.{hint}")
    v = float(value)
    ok = low <= v < high if high_open else low <= v <= high
    if not ok:
        bracket = ")" if high_open else "]"
        raise ValueError(
            f"DistortionRange.{name} must be in [{low:g}, {high:g}{bracket}; got {value!r}.{hint}"
        )
    return v


@dataclass(frozen=True)
class DistortionRange:
    """A distribution of random distortions, sampled independently per image.

    rotation_deg: angles are uniform in ``[-rotation_deg, +rotation_deg]`` (0..180),
        same sign convention as :func:`affine_matrix`.
    scale: ``(low, high)``, scale factors uniform in that range (``0 < low <= high``).
    shift: shifts uniform in ``[-shift, +shift]`` as a fraction of the image
        size, independently per axis (0..1).
    shear_deg: x-shear uniform in ``[-shear_deg, +shear_deg]`` (0..60).
    perspective: strength in 0..1; each corner moves inwards by up to
        ``perspective`` times half the image size (see
        :func:`random_perspective_points`).
    hflip, vflip: flip left-right / top-bottom with probability 1/2 each.
    crop: random-resized-crop style zoom. Up to this fraction of the *area*
        is removed (0 <= crop < 1): the kept box has an area fraction uniform in
        ``[1 - crop, 1]``, an aspect ratio log-uniform in ``[3/4, 4/3]`` (each
        side clipped to the full image), a uniformly random position inside
        the image, and is stretched back to the full size.

    The composition is ``crop . perspective . affine . flip`` (flip first, in
    the content's own frame), rendered with one resampling.
    """

    rotation_deg: float = 0.0
    scale: tuple[float, float] = (1.0, 1.0)
    shift: float = 0.0
    perspective: float = 0.0
    hflip: bool = False
    vflip: bool = False
    crop: float = 0.0
    shear_deg: float = 0.0

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        set_(self, "rotation_deg", _check_number(
            "rotation_deg", self.rotation_deg, 0.0, 180.0,
            hint=" It is the largest |angle| in degrees, e.g. 30 for +-30 degrees."))
        scale = self.scale
        if isinstance(scale, (str, bytes)) or not isinstance(scale, Sequence) or len(scale) != 2:
            raise ValueError(
                f"DistortionRange.scale must be a pair (low, high) with 0 < low <= high; got {scale!r}. "
                "Use e.g. (0.8, 1.2), or (1.0, 1.0) for no scaling."
            )
        numeric = all(isinstance(v, numbers.Real) and not isinstance(v, bool) for v in scale)
        if not numeric or not 0.0 < float(scale[0]) <= float(scale[1]) < math.inf:
            raise ValueError(
                f"DistortionRange.scale must be a pair (low, high) with 0 < low <= high; got {tuple(scale)!r}."
            )
        set_(self, "scale", (float(scale[0]), float(scale[1])))
        set_(self, "shift", _check_number(
            "shift", self.shift, 0.0, 1.0,
            hint=" It is the largest |shift| as a fraction of the image size per axis."))
        set_(self, "perspective", _check_number("perspective", self.perspective, 0.0, 1.0))
        for name in ("hflip", "vflip"):
            if not isinstance(getattr(self, name), bool):
                raise ValueError(f"DistortionRange.{name} must be true or false; got {getattr(self, name)!r}.")
        set_(self, "crop", _check_number(
            "crop", self.crop, 0.0, 1.0, high_open=True,
            hint=" It is the largest fraction of the image area cropped away."))
        set_(self, "shear_deg", _check_number("shear_deg", self.shear_deg, 0.0, 60.0))

    @property
    def is_identity(self) -> bool:
        """True if every sample is the identity transform."""
        return self == DistortionRange()


def sample_distortion(rng: torch.Generator | None, n: int, rng_spec: DistortionRange) -> dict[str, Tensor]:
    """Draw per-image distortion parameters (float64 / bool tensors on the CPU).

    Keys: ``angle_deg (N,)``, ``scale (N,)``, ``shift (N, 2)``, ``shear_deg (N,)``,
    ``hflip (N,)``, ``vflip (N,)``, ``perspective (N, 4, 2)`` (inward corner
    offsets as fractions of half the image size), ``crop (N, 4)`` (kept box
    ``cx, cy, half_w, half_h`` in normalised coordinates).

    Every field is drawn on every call in a fixed order, so changing one range
    never changes the values drawn for the others.
    """
    if not isinstance(rng_spec, DistortionRange):
        raise DataError(f"expected a DistortionRange; got {type(rng_spec).__name__}.")
    if isinstance(n, bool) or not isinstance(n, int) or n < 0:
        raise DataError(f"n must be a non-negative number of images; got {n!r}.")
    spec = rng_spec

    def u(*shape: int) -> Tensor:
        return torch.rand((n, *shape), generator=rng, dtype=torch.float64)

    angle = (u() * 2 - 1) * spec.rotation_deg
    low, high = spec.scale
    scale = low + u() * (high - low)
    shift = (u(2) * 2 - 1) * spec.shift
    shear = (u() * 2 - 1) * spec.shear_deg
    hflip = (u() < 0.5) & spec.hflip
    vflip = (u() < 0.5) & spec.vflip
    persp = u(4, 2) * spec.perspective
    area = 1.0 - u() * spec.crop
    log_ratio = (u() * 2 - 1) * math.log(4.0 / 3.0)
    pos = u(2) * 2 - 1
    ratio = torch.exp(log_ratio)
    half_w = torch.sqrt(area * ratio).clamp(max=1.0)
    half_h = torch.sqrt(area / ratio).clamp(max=1.0)
    if spec.crop == 0.0:
        half_w = torch.ones_like(half_w)
        half_h = torch.ones_like(half_h)
    cx = pos[:, 0] * (1.0 - half_w)
    cy = pos[:, 1] * (1.0 - half_h)
    return {
        "angle_deg": angle,
        "scale": scale,
        "shift": shift,
        "shear_deg": shear,
        "hflip": hflip,
        "vflip": vflip,
        "perspective": persp,
        "crop": torch.stack([cx, cy, half_w, half_h], dim=-1),
    }


def distortion_matrix(params: dict[str, Tensor], size: tuple[int, int]) -> Tensor:
    """Forward ``(N, 3, 3)`` normalised matrices for parameters from :func:`sample_distortion`."""
    h, w = size
    n = params["angle_deg"].shape[0]
    flip = torch.zeros(n, 3, 3, dtype=torch.float64)
    flip[:, 0, 0] = 1.0 - 2.0 * params["hflip"].to(torch.float64)
    flip[:, 1, 1] = 1.0 - 2.0 * params["vflip"].to(torch.float64)
    flip[:, 2, 2] = 1.0
    aff = to_3x3(affine_matrix(params["angle_deg"], params["scale"], params["shift"],
                                params["shear_deg"], size=(h, w)).reshape(n, 2, 3))
    offsets = params["perspective"]
    persp = torch.eye(3, dtype=torch.float64).repeat(n, 1, 1)
    moved = (offsets != 0).any(dim=(-1, -2))
    if moved.any():
        start, end = perspective_points_from_offsets(offsets[moved], h, w)
        persp[moved] = perspective_matrix(start, end, (h, w))
    cx, cy, hw, hh = params["crop"].unbind(-1)
    crop = torch.zeros(n, 3, 3, dtype=torch.float64)
    # the kept box [cx - hw, cx + hw] x [cy - hh, cy + hh] is stretched onto [-1, 1]^2
    crop[:, 0, 0] = 1.0 / hw
    crop[:, 0, 2] = -cx / hw
    crop[:, 1, 1] = 1.0 / hh
    crop[:, 1, 2] = -cy / hh
    crop[:, 2, 2] = 1.0
    return crop @ persp @ aff @ flip


def random_distort(
    images: Tensor,
    spec: DistortionRange,
    generator: torch.Generator | None = None,
    *,
    fill=0.0,
    mode: str = "bilinear",
) -> tuple[Tensor, dict[str, Tensor]]:
    """Distort each image with its own random parameters, in one ``grid_sample``.

    Returns the distorted images and the parameters from
    :func:`sample_distortion` plus ``"matrix"``: the forward ``(N, 3, 3)``
    normalised matrix applied to each image.
    """
    check_images(images)
    n, _, h, w = images.shape
    params = sample_distortion(generator, n, spec)
    matrix = distortion_matrix(params, (h, w))
    params["matrix"] = matrix
    if spec.is_identity:
        return images.clone(), params
    return apply_homography(images, matrix, fill=fill, mode=mode), params
