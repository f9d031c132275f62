"""Batched geometric distortions: rotation, scale, shift, shear, perspective, flips, crops.

Used for training-time augmentation, for building the ``digits-moved`` scenario
and for evaluation sweeps. Everything here is a pure function of tensors; the
only state is the :class:`DistortionRange` dataclass that describes a random
distribution of distortions.

Conventions
-----------
*Coordinates.* Matrices live in **normalised coordinates** ``(u, v)`` with
``align_corners=False``: ``u = -1`` is the left edge of the left-most pixel,
``u = +1`` the right edge of the right-most pixel, ``v`` goes **down** the image.
Pixel ``(i, j)`` of an ``H x W`` image has its centre at
``u = (2j + 1) / W - 1``, ``v = (2i + 1) / H - 1``. This is the convention of
``F.grid_sample(..., align_corners=False)`` and of torchvision's v2 geometry
kernels, so there is **no** half-pixel offset between splice and torchvision.

*Direction.* Every matrix in this module (``affine_matrix``, the ``"matrix"``
entry returned by :func:`random_distort`, the argument of
:func:`apply_homography`) is the **forward** map: it says where content moves.
Content found at ``p`` in the input appears at ``M @ p`` in the output. To
render the output we sample the input at ``M^-1 @ q`` for every output pixel
``q`` (the sampling direction); that inversion happens inside
:func:`apply_homography` and never leaks into the API.

*Angles.* ``angle_deg`` follows ``torchvision.transforms.v2.functional.affine``
exactly: the linear part is ``scale * [[cos a, -sin a], [sin a, cos a]]`` in
pixel coordinates with ``x`` to the right and ``y`` **down**. On screen that is
a **clockwise** turn of the content for positive angles (a point to the right
of the centre moves down), which is what torchvision documents for ``affine``
("clockwise direction"). Note that ``torchvision...functional.rotate`` uses the
opposite sign (counter-clockwise); splice follows ``affine``.

*Rotation about the centre.* The centre of rotation and scaling is the
geometric image centre ``(W/2, H/2)`` in pixel-edge coordinates, i.e.
``((W - 1)/2, (H - 1)/2)`` in pixel-index coordinates, the same point
torchvision uses (its ``_affine_grid`` places pixel centres at
``linspace((1 - W)/2, (W - 1)/2)``). Rotation is applied in *pixel* units, so a
non-square image is rotated rigidly; in normalised coordinates this becomes
``D^-1 R D`` with ``D = diag(W/2, H/2)`` (pass ``size=(H, W)`` to
:func:`affine_matrix`).

*Shift* is a fraction of the image size per axis: ``shift=(tx, ty)`` moves the
content by ``tx * W`` pixels right and ``ty * H`` pixels down, i.e. torchvision's
``translate=[tx * W, ty * H]``; in normalised units that is ``(2 tx, 2 ty)``.

*Shear* ``shear_deg`` is torchvision's ``shear=[shear_deg, 0]`` (x-shear).

*Perspective points* are in pixel units with ``(0, 0)`` at the top-left
*corner* of the top-left pixel, so pixel ``(i, j)`` has centre
``(j + 0.5, i + 0.5)`` — the convention of torchvision's ``_perspective_grid``
(and Pillow's). ``startpoints`` move to ``endpoints``.

*Fill.* With ``fill=None`` samples outside the image read as zero
(``padding_mode="zeros"``). With a number (or one number per channel) the
result is ``mask * (sampled - fill) + fill`` where ``mask`` is a sampled
all-ones channel — torchvision's ``_apply_grid_transform`` formula, so border
pixels match torchvision for the same ``fill`` too.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import Tensor

from splice.errors import DataError

__all__ = [
    "affine_matrix",
    "apply_affine",
    "apply_homography",
    "apply_perspective",
    "perspective_matrix",
    "random_perspective_points",
    "DistortionRange",
    "sample_distortion",
    "distortion_matrix",
    "random_distort",
]

_MODES = ("bilinear", "nearest")

# ---------------------------------------------------------------------------
# parameter handling
# ---------------------------------------------------------------------------


def _as_param(value, name: str) -> Tensor:
    """A scalar or a per-image ``(N,)`` tensor, as float64."""
    t = torch.as_tensor(value, dtype=torch.float64)
    if t.dim() > 1:
        raise DataError(
            f"{name} must be a number or a 1-D tensor with one value per image; "
            f"got shape {tuple(t.shape)}."
        )
    return t


def _as_shift(shift) -> Tensor:
    """``(tx, ty)`` or a per-image ``(N, 2)`` tensor, as float64."""
    if isinstance(shift, Tensor):
        t = shift.to(torch.float64)
    elif isinstance(shift, Sequence) and len(shift) == 2:
        parts = [torch.as_tensor(s, dtype=torch.float64) for s in shift]
        parts = torch.broadcast_tensors(*parts)
        t = torch.stack(parts, dim=-1)
    else:
        raise DataError(f"shift must be (tx, ty) or an (N, 2) tensor; got {shift!r}.")
    if t.shape[-1:] != (2,) or t.dim() > 2:
        raise DataError(
            f"shift must be (tx, ty) or an (N, 2) tensor of fractions of the image size; "
            f"got shape {tuple(t.shape)}."
        )
    return t


def _batch_size(*params: Tensor, trailing: Sequence[int]) -> int | None:
    """The common batch size of parameters (``None`` if all are unbatched)."""
    sizes = {p.shape[0] for p, k in zip(params, trailing) if p.dim() > k}
    if len(sizes) > 1:
        raise DataError(
            f"per-image parameters disagree on the number of images: sizes {sorted(sizes)}; "
            "give every per-image tensor the same length N."
        )
    return sizes.pop() if sizes else None


def _check_images(images: Tensor) -> None:
    if not isinstance(images, Tensor) or images.dim() != 4:
        shape = tuple(images.shape) if isinstance(images, Tensor) else type(images).__name__
        raise DataError(f"images must be a 4-D tensor (N, C, H, W); got {shape}.")
    if not images.is_floating_point():
        raise DataError(
            f"images must be floating point; got {images.dtype}. "
            "Convert first, e.g. images.float() / 255."
        )


def _to_3x3(m: Tensor) -> Tensor:
    bottom = torch.zeros(m.shape[:-2] + (1, 3), dtype=m.dtype, device=m.device)
    bottom[..., 0, 2] = 1.0
    return torch.cat([m, bottom], dim=-2)


# ---------------------------------------------------------------------------
# matrices
# ---------------------------------------------------------------------------


def affine_matrix(
    angle_deg,
    scale,
    shift=(0.0, 0.0),
    shear_deg=0.0,
    *,
    size: tuple[int, int] | None = None,
) -> Tensor:
    """Forward 2x3 affine matrix in normalised coordinates (float64).

    Returns ``(2, 3)`` for scalar parameters, ``(N, 2, 3)`` if any parameter is
    per-image. ``size=(H, W)`` accounts for non-square images (rotation is rigid
    in pixels); ``None`` means square.

    Derivation (torchvision ``_get_inverse_affine_matrix`` with ``inverted=False``
    and the centre at the origin). In centred pixel coordinates ``x`` the
    content moves by ``x' = s * R(a) * Sh(sx) * x + t_pix`` with
    ``R(a) Sh(sx) = [[cos a, -cos a tan sx - sin a], [sin a, -sin a tan sx + cos a]]``
    and ``t_pix = (tx W, ty H)``. Normalised coordinates are ``u = D^-1 x`` with
    ``D = diag(W/2, H/2)``, so the normalised matrix is ``D^-1 (s R Sh) D`` with
    translation ``D^-1 t_pix = (2 tx, 2 ty)``.
    """
    angle = _as_param(angle_deg, "angle_deg")
    s = _as_param(scale, "scale")
    sh = _as_param(shear_deg, "shear_deg")
    t = _as_shift(shift)
    n = _batch_size(angle, s, sh, t, trailing=(0, 0, 0, 1))
    if (s <= 0).any():
        raise DataError(f"scale must be positive; got {s.min().item():g}.")
    if size is None:
        aspect = 1.0
    else:
        h, w = size
        aspect = float(w) / float(h)

    if n is not None:
        angle, s, sh = (p.expand(n) for p in (angle, s, sh))
        t = t.expand(n, 2)
    a = torch.deg2rad(angle)
    sx = torch.deg2rad(sh)
    cos, sin, tan = torch.cos(a), torch.sin(a), torch.tan(sx)
    m00 = s * cos
    m01 = s * (-cos * tan - sin) / aspect
    m10 = s * sin * aspect
    m11 = s * (-sin * tan + cos)
    row0 = torch.stack([m00, m01, 2.0 * t[..., 0]], dim=-1)
    row1 = torch.stack([m10, m11, 2.0 * t[..., 1]], dim=-1)
    return torch.stack([row0, row1], dim=-2)


def _as_points(points, name: str) -> Tensor:
    t = torch.as_tensor(points, dtype=torch.float64) if not isinstance(points, Tensor) else points.to(torch.float64)
    if t.shape[-2:] != (4, 2) or t.dim() not in (2, 3):
        raise DataError(
            f"{name} must be four (x, y) corners [top-left, top-right, bottom-right, "
            f"bottom-left], shape (4, 2) or (N, 4, 2); got shape {tuple(t.shape)}."
        )
    return t


def _homography(src: Tensor, dst: Tensor) -> Tensor:
    """3x3 matrices (float64, batched) mapping each of 4 ``src`` points onto ``dst``.

    With ``h33 = 1`` the map ``x' = (a x + b y + c) / (g x + h y + 1)``,
    ``y' = (d x + e y + f) / (g x + h y + 1)`` gives two linear equations per
    point pair in the eight unknowns ``(a..h)``:
    ``a x + b y + c - g x x' - h y x' = x'`` and
    ``d x + e y + f - g x y' - h y y' = y'``.
    """
    x, y = src[..., 0], src[..., 1]
    xp, yp = dst[..., 0], dst[..., 1]
    one, zero = torch.ones_like(x), torch.zeros_like(x)
    rows_x = torch.stack([x, y, one, zero, zero, zero, -x * xp, -y * xp], dim=-1)
    rows_y = torch.stack([zero, zero, zero, x, y, one, -x * yp, -y * yp], dim=-1)
    a = torch.stack([rows_x, rows_y], dim=-2).reshape(src.shape[:-2] + (8, 8))
    b = torch.stack([xp, yp], dim=-1).reshape(src.shape[:-2] + (8,))
    sol, info = torch.linalg.solve_ex(a, b)
    if (info != 0).any() or not torch.isfinite(sol).all():
        raise DataError(
            "perspective points are degenerate (three of the four corners are collinear "
            "or two coincide); give four corners of a proper quadrilateral."
        )
    h = torch.cat([sol, torch.ones_like(sol[..., :1])], dim=-1)
    return h.reshape(src.shape[:-2] + (3, 3))


def _pixel_to_normalised(size: tuple[int, int]) -> tuple[Tensor, Tensor]:
    """``T`` with ``x_pix = T u`` (pixel-edge origin) and its inverse."""
    h, w = size
    t = torch.tensor([[w / 2, 0.0, w / 2], [0.0, h / 2, h / 2], [0.0, 0.0, 1.0]], dtype=torch.float64)
    t_inv = torch.tensor([[2 / w, 0.0, -1.0], [0.0, 2 / h, -1.0], [0.0, 0.0, 1.0]], dtype=torch.float64)
    return t, t_inv


def perspective_matrix(startpoints, endpoints, size: tuple[int, int]) -> Tensor:
    """Forward 3x3 homography in normalised coordinates moving ``startpoints`` to ``endpoints``.

    Points are pixel coordinates of an image of ``size=(H, W)`` (see the module
    docstring); ``(4, 2)`` gives ``(3, 3)``, ``(N, 4, 2)`` gives ``(N, 3, 3)``.
    """
    start = _as_points(startpoints, "startpoints")
    end = _as_points(endpoints, "endpoints")
    t, t_inv = _pixel_to_normalised(size)
    return t_inv @ _homography(start, end) @ t


# ---------------------------------------------------------------------------
# sampling
# ---------------------------------------------------------------------------


def _base_grid(h: int, w: int, dtype: torch.dtype, device: torch.device) -> Tensor:
    """``(H*W, 3)`` homogeneous normalised pixel centres ``(u, v, 1)``, row-major."""
    u = (torch.arange(w, dtype=dtype, device=device) * 2 + 1) / w - 1
    v = (torch.arange(h, dtype=dtype, device=device) * 2 + 1) / h - 1
    vv, uu = torch.meshgrid(v, u, indexing="ij")
    return torch.stack([uu, vv, torch.ones_like(uu)], dim=-1).reshape(h * w, 3)


def _sample(images: Tensor, inverse: Tensor, fill, mode: str) -> Tensor:
    """Sample ``images`` at ``inverse @ q`` for every output pixel centre ``q``.

    ``inverse`` is ``(N, 3, 3)`` in normalised coordinates (float64). One
    ``grid_sample`` call for the whole batch.
    """
    n, c, h, w = images.shape
    dtype, device = images.dtype, images.device
    # Build the grid in float64 and cast once, so float32 images get the most
    # accurate grid float32 can hold.
    inverse = inverse.to(device)
    base = _base_grid(h, w, torch.float64, device)  # (HW, 3)
    src = base @ inverse.transpose(-1, -2)  # (N, HW, 3)
    grid = (src[..., :2] / src[..., 2:]).reshape(n, h, w, 2).to(device=device, dtype=dtype)

    if fill is None:
        return F.grid_sample(images, grid, mode=mode, padding_mode="zeros", align_corners=False)

    fill_t = torch.as_tensor(fill, dtype=dtype, device=device).reshape(-1)
    if fill_t.numel() not in (1, c):
        raise DataError(
            f"fill must be one number or one per channel ({c}); got {fill_t.numel()} values."
        )
    ones = torch.ones((n, 1, h, w), dtype=dtype, device=device)
    out = F.grid_sample(torch.cat([images, ones], dim=1), grid, mode=mode,
                        padding_mode="zeros", align_corners=False)
    out, mask = out[:, :c], out[:, c:]
    fill_img = fill_t.view(1, -1, 1, 1)
    if mode == "nearest":
        return torch.where(mask < 0.5, fill_img.expand_as(out), out)
    # torchvision _apply_grid_transform: mask * (img - fill) + fill
    return (out - fill_img) * mask + fill_img


def _check_mode(mode: str) -> None:
    if mode not in _MODES:
        raise DataError(f"unknown interpolation mode {mode!r}; use one of {', '.join(_MODES)}.")


def _batched(matrix: Tensor, n: int) -> Tensor:
    if matrix.dim() == 2:
        return matrix.expand(n, 3, 3)
    if matrix.shape[0] != n:
        raise DataError(
            f"got {matrix.shape[0]} per-image transforms for {n} images; give one per image "
            "or scalar parameters shared by all."
        )
    return matrix


def apply_homography(images: Tensor, matrix: Tensor, *, fill=0.0, mode: str = "bilinear") -> Tensor:
    """Warp ``images`` by forward 3x3 matrices in normalised coordinates.

    ``matrix`` is ``(3, 3)`` (shared), ``(N, 3, 3)`` (per image), or a 2x3
    affine (``(2, 3)`` / ``(N, 2, 3)``). Content at ``p`` moves to ``matrix @ p``.
    """
    _check_images(images)
    _check_mode(mode)
    m = torch.as_tensor(matrix).to("cpu", torch.float64)  # tiny; the grid is built where the images are
    if m.shape[-2:] == (2, 3):
        m = _to_3x3(m)
    if m.shape[-2:] != (3, 3) or m.dim() not in (2, 3):
        raise DataError(f"matrix must be (3, 3), (N, 3, 3), (2, 3) or (N, 2, 3); got {tuple(m.shape)}.")
    m = _batched(m, images.shape[0])
    if images.shape[0] == 0 or bool((m == torch.eye(3, dtype=m.dtype)).all()):
        # exact identity: skip resampling (which would add ~1e-7 rounding in float32)
        return images.clone()
    try:
        inverse = torch.linalg.inv(m)
    except RuntimeError as exc:
        raise DataError(f"a distortion matrix is singular and cannot be inverted: {exc}") from None
    return _sample(images, inverse, fill, mode)


def apply_affine(
    images: Tensor,
    angle_deg,
    scale,
    shift=(0.0, 0.0),
    *,
    shear_deg=0.0,
    fill=0.0,
    mode: str = "bilinear",
) -> Tensor:
    """Rotate, scale, shear and shift ``images`` about their centre.

    Same result as ``torchvision.transforms.v2.functional.affine(img, angle=a,
    translate=[tx * W, ty * H], scale=s, shear=[shear_deg, 0], fill=fill)``;
    parameters may be scalars or per-image ``(N,)`` tensors (``shift``:
    ``(N, 2)``). One ``grid_sample`` for the whole batch.
    """
    _check_images(images)
    h, w = images.shape[-2:]
    m = affine_matrix(angle_deg, scale, shift, shear_deg, size=(h, w))
    return apply_homography(images, m, fill=fill, mode=mode)


def apply_perspective(images: Tensor, startpoints, endpoints, *, fill=0.0, mode: str = "bilinear") -> Tensor:
    """Perspective warp moving ``startpoints`` to ``endpoints`` (pixel coordinates).

    Same semantics as ``torchvision.transforms.v2.functional.perspective``;
    points are ``(4, 2)`` shared or ``(N, 4, 2)`` per image, ordered
    top-left, top-right, bottom-right, bottom-left.
    """
    _check_images(images)
    _check_mode(mode)
    n, _, h, w = images.shape
    start = _as_points(startpoints, "startpoints")
    end = _as_points(endpoints, "endpoints")
    t, t_inv = _pixel_to_normalised((h, w))
    # Solve directly in the sampling direction (end -> start), as torchvision does.
    inverse = t_inv @ _homography(end.cpu(), start.cpu()) @ t
    inverse = _batched(inverse, n)
    if n == 0:
        return images.clone()
    return _sample(images, inverse, fill, mode)


def _corners(h: int, w: int) -> Tensor:
    return torch.tensor([[0.0, 0.0], [w, 0.0], [w, h], [0.0, h]], dtype=torch.float64)


# inward direction of each corner (top-left, top-right, bottom-right, bottom-left)
_INWARD = torch.tensor([[1.0, 1.0], [-1.0, 1.0], [-1.0, -1.0], [1.0, -1.0]], dtype=torch.float64)


def _perspective_points_from_offsets(offsets: Tensor, h: int, w: int) -> tuple[Tensor, Tensor]:
    half = torch.tensor([w / 2, h / 2], dtype=torch.float64)
    start = _corners(h, w).expand(offsets.shape)
    end = start + offsets * half * _INWARD
    return start, end


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
    return _perspective_points_from_offsets(offsets, h, w)


# ---------------------------------------------------------------------------
# random distortions
# ---------------------------------------------------------------------------


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
    aff = _to_3x3(affine_matrix(params["angle_deg"], params["scale"], params["shift"],
                                params["shear_deg"], size=(h, w)).reshape(n, 2, 3))
    offsets = params["perspective"]
    persp = torch.eye(3, dtype=torch.float64).repeat(n, 1, 1)
    moved = (offsets != 0).any(dim=(-1, -2))
    if moved.any():
        start, end = _perspective_points_from_offsets(offsets[moved], h, w)
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
    _check_images(images)
    n, _, h, w = images.shape
    params = sample_distortion(generator, n, spec)
    matrix = distortion_matrix(params, (h, w))
    params["matrix"] = matrix
    if spec.is_identity:
        return images.clone(), params
    return apply_homography(images, matrix, fill=fill, mode=mode), params
