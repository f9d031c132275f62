"""Warp families: their configuration, parameter counts and the theta -> matrix maths.

Every family describes a map from OUTPUT normalised coordinates to INPUT
normalised coordinates (the convention of ``torch.nn.functional.grid_sample``):
an output pixel at ``p = (x, y)`` takes its value from the input at ``f(p)``.
Normalised coordinates follow ``align_corners=False``: the image spans
``[-1, 1]`` edge to edge, so pixel index ``u`` of a row of width ``W`` sits at
``x = (2u + 1) / W - 1``.

The matrix families write ``f`` as a 3x3 homogeneous matrix ``M``:
``[x', y', w']^T = M [x, y, 1]^T`` and ``f(p) = (x'/w', y'/w')``. For every
family except ``projective`` the last row is ``[0, 0, 1]`` so ``w' = 1``.

Parameter vectors ``theta`` (the raw head output, shape ``(N, P)``):

- ``translation`` (P=2): ``(tx, ty)``;
  ``M = [[1, 0, tx], [0, 1, ty], [0, 0, 1]]``.
- ``attention`` (P=3): ``(r, tx, ty)`` with isotropic scale ``s = exp(-|r|)``;
  ``M = [[s, 0, tx], [0, s, ty], [0, 0, 1]]``. See :func:`attention_scale`.
- ``similarity`` (P=4): ``(a, l, tx, ty)``, angle ``a`` in radians and
  log-scale ``l``; ``M = [[e^l cos a, -e^l sin a / r, tx], [e^l sin a r, e^l cos a, ty], [0, 0, 1]]``
  with ``r = W / H``, the aspect ratio of the warped tensor (``frame = "pixels"``,
  the default): the rotation ``R(a)`` turns pixel offsets, ``M = D^-1 R(a) D``
  with ``D = diag(W/2, H/2)``, so the warp is rigid in pixels on any tensor.
  ``frame = "normalised"`` keeps ``r = 1`` (rigid on square tensors only): what
  a similarity warp was before frames were recorded, as older folders hold it.
- ``affine`` (P=6): the top two rows of ``M``, row-major; identity ``[1, 0, 0, 0, 1, 0]``.
- ``projective`` (P=8): the first eight entries of ``M`` row-major, ``M[2, 2] = 1``.
- ``tps`` (P=2K^2): offsets ``(dx, dy)`` of a KxK grid of control points; no matrix.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import torch
from torch import Tensor

from splice.errors import SpliceError, suggest
from splice.warps.grids import static_shape

__all__ = [
    "FAMILIES",
    "SAMPLERS",
    "FRAMES",
    "PADDINGS",
    "MATRIX_FAMILIES",
    "THETA_LIMIT",
    "LOG_SCALE_LIMIT",
    "TPS_K_RANGE",
    "WarpError",
    "WarpConfig",
    "family_param_count",
    "identity_theta",
    "attention_scale",
    "theta_to_matrix",
]

FAMILIES = ("translation", "attention", "similarity", "affine", "projective", "tps")
SAMPLERS = ("bilinear", "nearest", "bicubic")
#: the frame a similarity warp's rotation turns (see the module docstring)
FRAMES = ("pixels", "normalised")
PADDINGS = ("zeros", "border", "reflection")
MATRIX_FAMILIES = FAMILIES[:-1]

# Every raw parameter is clamped to +-THETA_LIMIT before it is used, so any
# finite head output gives a finite grid (a shift of 1e4 image half-widths is
# far outside anything useful; within the limit the clamp is the identity, so
# it never changes the exact identity at init). Common practice, no source.
THETA_LIMIT = 1.0e4
# The similarity log-scale is clamped to +-8 (scale in [3.4e-4, 2981]) so that
# exp() stays finite in float16/float32. Common practice, no source.
LOG_SCALE_LIMIT = 8.0
# Control-point grid sizes accepted for tps: 2x2 (4 points, the smallest
# non-degenerate set with an affine part) up to 16x16 (256 points).
TPS_K_RANGE = (2, 16)

_PARAMS = {"translation": 2, "attention": 3, "similarity": 4, "affine": 6, "projective": 8}


class WarpError(SpliceError, ValueError):
    """A warp family, sampler, padding or shape is not usable."""


def _advice(hint: str, text: str) -> str:
    """``"; choose ..."`` or, after a "did you mean" hint, ``"? Choose ..."``."""
    return f"{hint} {text[0].upper()}{text[1:]}" if hint else f"; {text}"


def _check_choice(field: str, value: Any, allowed: tuple[str, ...]) -> None:
    if not isinstance(value, str) or value not in allowed:
        hint = suggest(value, allowed) if isinstance(value, str) else ""
        raise WarpError(
            f"{field}={value!r} is not supported{_advice(hint, 'choose one of: ' + ', '.join(allowed))}."
        )


def _check_int(field: str, value: Any, low: int, high: int | None) -> None:
    ok = isinstance(value, int) and not isinstance(value, bool)
    if ok and value >= low and (high is None or value <= high):
        return
    span = f"between {low} and {high}" if high is not None else f"at least {low}"
    raise WarpError(f"{field}={value!r} is not valid; it must be an integer {span}.")


@dataclass
class WarpConfig:
    """How to build one warp: the family, the sampler and the localisation head.

    ``loc_from`` names the point whose activation feeds the localisation head;
    ``None`` means the warped tensor itself. The warp package only stores it;
    the surgery resolves it.
    """

    family: str = "affine"
    sampler: str = "bilinear"
    padding: str = "zeros"
    head_width: int = 16
    tps_k: int = 4
    loc_from: str | None = None
    frame: str = "pixels"

    def __post_init__(self) -> None:
        _check_choice("family", self.family, FAMILIES)
        _check_choice("frame", self.frame, FRAMES)
        if self.family != "similarity":  # the other families are the same in either frame
            self.frame = "pixels"
        _check_choice("sampler", self.sampler, SAMPLERS)
        _check_choice("padding", self.padding, PADDINGS)
        _check_int("head_width", self.head_width, 1, 1024)
        _check_int("tps_k", self.tps_k, *TPS_K_RANGE)
        if self.loc_from is not None and (not isinstance(self.loc_from, str) or not self.loc_from):
            raise WarpError(
                f"loc_from={self.loc_from!r} is not valid; give a point name such as "
                "'input' or leave it as None to read the warped tensor."
            )

    @property
    def n_params(self) -> int:
        """Number of family parameters the head predicts."""
        return family_param_count(self.family, self.tps_k)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict with every field (``frame`` only for ``similarity``, the one family it changes)."""
        out = dataclasses.asdict(self)
        if self.family != "similarity":
            del out["frame"]
        return out

    @property
    def pixel_frame(self) -> bool:
        """Whether a similarity warp turns pixel offsets (rigid in pixels on any tensor)."""
        return self.family == "similarity" and self.frame == "pixels"

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> WarpConfig:
        """Rebuild from :meth:`to_dict` output; unknown keys are an error."""
        if not isinstance(d, Mapping):
            raise WarpError(f"a warp config must be a mapping of fields, got {type(d).__name__}.")
        names = [f.name for f in dataclasses.fields(cls)]
        unknown = sorted(str(k) for k in d if k not in names)
        if unknown:
            hint = suggest(unknown[0], names)
            raise WarpError(
                f"unknown warp config key(s) {', '.join(repr(k) for k in unknown)}"
                f"{_advice(hint, 'remove them; known keys: ' + ', '.join(names))}."
            )
        return cls(**dict(d))


def family_param_count(family: str, tps_k: int = 4) -> int:
    """Number of raw parameters ``P`` of ``family`` (``2 * tps_k**2`` for tps)."""
    _check_choice("family", family, FAMILIES)
    if family == "tps":
        _check_int("tps_k", tps_k, *TPS_K_RANGE)
        return 2 * tps_k * tps_k
    return _PARAMS[family]


def identity_theta(
    family: str,
    tps_k: int = 4,
    *,
    dtype: torch.dtype | None = None,
    device: torch.device | str | None = None,
) -> Tensor:
    """The raw parameter vector ``(P,)`` whose warp is exactly the identity."""
    n = family_param_count(family, tps_k)
    theta = torch.zeros(n, dtype=dtype, device=device)
    if family in ("affine", "projective"):  # the diagonal of the (top of the) matrix
        theta[0] = 1.0
        theta[4] = 1.0
    return theta


def attention_scale(r: Tensor) -> Tensor:
    """Isotropic scale of the attention family: ``s = exp(-|r|)``.

    Requirements: ``s`` in ``(0, 1]`` (the warp only zooms in), bounded for any
    ``r``, exactly 1 at a finite init value, and a non-zero gradient there.

    Derivation: a differentiable ``f`` that attains its supremum 1 at a finite
    point has ``f' = 0`` there. At init the head's final weight is zero, so the
    scale's only gradient path is ``dL/ds * f'(r0)``; with ``f'(r0) = 0`` the
    scale would stay frozen at 1 forever (sigmoid/sech style maps), and a hard
    ``min(1, g(r))`` clamp has a dead zone on one side. ``exp(-|r|)`` keeps a
    single kink at ``r = 0`` and has ``|ds/dr| = s`` everywhere else, so there is
    no dead zone on either side. ``|r|`` is written as ``where(r >= 0, r, -r)``
    so that its gradient at exactly 0 is +1 (``torch.abs`` would give 0 and
    freeze the identity): at init ``ds/dr = -1``. If the loss wants a scale
    above 1, gradient descent moves ``r`` below 0, which also lowers ``s``, and
    the next steps bring ``r`` back, so ``s`` hovers at the bound 1 instead of
    sticking. ``exp`` underflows to 0 only for ``|r| > ~87`` (float32); that
    collapses the grid to one point but stays finite.

    The shift ``(tx, ty)`` is deliberately not clamped to the natural crop
    constraint ``|t| <= 1 - s``: writing ``t = (1 - s) tanh(raw)`` would give
    the shift a zero gradient at the identity (``s = 1``), so the warp could
    not start by translating. Crops that leave the image read the padding.
    """
    return torch.exp(-torch.where(r >= 0, r, -r))


def theta_to_matrix(family: str, theta: Tensor, aspect: float = 1.0) -> Tensor:
    """Map raw parameters ``(N, P)`` to the homogeneous sampling matrix ``(N, 3, 3)``.

    Pure function (no state). ``aspect`` is ``W / H`` of the warped tensor for
    a similarity warp in the pixel frame (1 keeps normalised coordinates); no
    other family reads it. Raises :class:`WarpError` for ``tps`` (it has no
    matrix) and for a ``theta`` of the wrong width.
    """
    _check_choice("family", family, FAMILIES)
    if family == "tps":
        raise WarpError(
            "family 'tps' has no sampling matrix; use Warp.grid() for its sampling grid."
        )
    p = _PARAMS[family]
    if theta.dim() != 2 or static_shape(theta, (1,))[0] != p:
        raise WarpError(
            f"family {family!r} takes theta of shape (N, {p}), got {tuple(theta.shape)}; "
            "pass the head output of a Warp of this family."
        )
    t = theta.clamp(-THETA_LIMIT, THETA_LIMIT)
    one = torch.ones_like(t[:, 0])
    zero = torch.zeros_like(t[:, 0])
    if family == "translation":
        rows = [one, zero, t[:, 0], zero, one, t[:, 1], zero, zero, one]
    elif family == "attention":
        s = attention_scale(t[:, 0])
        rows = [s, zero, t[:, 1], zero, s, t[:, 2], zero, zero, one]
    elif family == "similarity":
        # Rotation by a, then isotropic scale e^l, then shift: a composed
        # rotation-scale R(a) * e^l has entries e^l [[cos, -sin], [sin, cos]];
        # in the pixel frame it is conjugated by D = diag(W/2, H/2), which
        # divides the upper off-diagonal by W/H and multiplies the lower one.
        scale = torch.exp(t[:, 1].clamp(-LOG_SCALE_LIMIT, LOG_SCALE_LIMIT))
        c = scale * torch.cos(t[:, 0])
        s = scale * torch.sin(t[:, 0])
        rows = [c, -s / aspect, t[:, 2], s * aspect, c, t[:, 3], zero, zero, one]
    elif family == "affine":
        rows = [t[:, 0], t[:, 1], t[:, 2], t[:, 3], t[:, 4], t[:, 5], zero, zero, one]
    else:  # projective
        rows = [t[:, i] for i in range(8)] + [one]
    return torch.stack(rows, dim=1).reshape(-1, 3, 3)
