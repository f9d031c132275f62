"""Resampling images through forward matrices: one ``grid_sample`` per batch.

Every function takes forward matrices (content at ``p`` moves to ``M p``) and
inverts them internally; fill follows torchvision's ``_apply_grid_transform``.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import Tensor

from ..errors import DataError
from .matrices import affine_matrix, as_points, homography, pixel_to_normalised, to_3x3

__all__ = ["apply_homography", "apply_affine", "apply_perspective"]

_MODES = ("bilinear", "nearest")


def check_images(images: Tensor) -> None:
    if not isinstance(images, Tensor) or images.dim() != 4:
        shape = tuple(images.shape) if isinstance(images, Tensor) else type(images).__name__
        raise DataError(f"images must be a 4-D tensor (N, C, H, W); got {shape}.")
    if not images.is_floating_point():
        raise DataError(
            f"images must be floating point; got {images.dtype}. "
            "Convert first, e.g. images.float() / 255."
        )



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
    check_images(images)
    _check_mode(mode)
    m = torch.as_tensor(matrix).to("cpu", torch.float64)  # tiny; the grid is built where the images are
    if m.shape[-2:] == (2, 3):
        m = to_3x3(m)
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
    check_images(images)
    h, w = images.shape[-2:]
    m = affine_matrix(angle_deg, scale, shift, shear_deg, size=(h, w))
    return apply_homography(images, m, fill=fill, mode=mode)


def apply_perspective(images: Tensor, startpoints, endpoints, *, fill=0.0, mode: str = "bilinear") -> Tensor:
    """Perspective warp moving ``startpoints`` to ``endpoints`` (pixel coordinates).

    Same semantics as ``torchvision.transforms.v2.functional.perspective``;
    points are ``(4, 2)`` shared or ``(N, 4, 2)`` per image, ordered
    top-left, top-right, bottom-right, bottom-left.
    """
    check_images(images)
    _check_mode(mode)
    n, _, h, w = images.shape
    start = as_points(startpoints, "startpoints")
    end = as_points(endpoints, "endpoints")
    t, t_inv = pixel_to_normalised((h, w))
    # Solve directly in the sampling direction (end -> start), as torchvision does.
    inverse = t_inv @ homography(end.cpu(), start.cpu()) @ t
    inverse = _batched(inverse, n)
    if n == 0:
        return images.clone()
    return _sample(images, inverse, fill, mode)

