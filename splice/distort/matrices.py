"""Forward distortion matrices in normalised coordinates (conventions: :mod:`splice.distort`).

Affine matrices follow ``torchvision.transforms.v2.functional.affine``;
perspective matrices solve the four-point homography. Everything is float64
and batched when any parameter is per-image.
"""

from __future__ import annotations

from collections.abc import Sequence

import torch
from torch import Tensor

from ..errors import DataError

__all__ = ["affine_matrix", "perspective_matrix"]



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


def to_3x3(m: Tensor) -> Tensor:
    bottom = torch.zeros(m.shape[:-2] + (1, 3), dtype=m.dtype, device=m.device)
    bottom[..., 0, 2] = 1.0
    return torch.cat([m, bottom], dim=-2)


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


def as_points(points, name: str) -> Tensor:
    t = torch.as_tensor(points, dtype=torch.float64) if not isinstance(points, Tensor) else points.to(torch.float64)
    if t.shape[-2:] != (4, 2) or t.dim() not in (2, 3):
        raise DataError(
            f"{name} must be four (x, y) corners [top-left, top-right, bottom-right, "
            f"bottom-left], shape (4, 2) or (N, 4, 2); got shape {tuple(t.shape)}."
        )
    return t


def homography(src: Tensor, dst: Tensor) -> Tensor:
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


def pixel_to_normalised(size: tuple[int, int]) -> tuple[Tensor, Tensor]:
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
    start = as_points(startpoints, "startpoints")
    end = as_points(endpoints, "endpoints")
    t, t_inv = pixel_to_normalised(size)
    return t_inv @ homography(start, end) @ t



def _corners(h: int, w: int) -> Tensor:
    return torch.tensor([[0.0, 0.0], [w, 0.0], [w, h], [0.0, h]], dtype=torch.float64)


# inward direction of each corner (top-left, top-right, bottom-right, bottom-left)
_INWARD = torch.tensor([[1.0, 1.0], [-1.0, 1.0], [-1.0, -1.0], [1.0, -1.0]], dtype=torch.float64)


def perspective_points_from_offsets(offsets: Tensor, h: int, w: int) -> tuple[Tensor, Tensor]:
    half = torch.tensor([w / 2, h / 2], dtype=torch.float64)
    start = _corners(h, w).expand(offsets.shape)
    end = start + offsets * half * _INWARD
    return start, end

