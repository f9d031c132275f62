"""Pure sampling-grid maths (no modules, no state).

Coordinates are normalised with ``align_corners=False`` (the convention of
``torch.nn.functional.grid_sample``): the image covers ``[-1, 1]`` from the
outer edge of the first pixel to the outer edge of the last, so pixel ``u`` of
``W`` has its centre at::

    x_u = (2u + 1) / W - 1            and back:   u = ((x + 1) W - 1) / 2

A grid is ``(N, H, W, 2)`` with ``grid[n, i, j] = (x, y)``: the INPUT location
that OUTPUT pixel ``(i, j)`` reads from. The base grid lists the output pixel
centres in homogeneous form ``(x, y, 1)``, row-major, shape ``(H*W, 3)``.

Matrix warps: with a homogeneous ``M`` (``(N, 3, 3)``), every output point is
``q = M p`` for ``p = (x, y, 1)``. Stacking the points as rows gives
``Q = B M^T`` for the base grid ``B`` -- one batched matrix product. When the
last row of ``M`` is ``[0, 0, 1]`` the third coordinate is exactly 1 and only
``B M[:, :2]^T`` is needed. With ``M`` exactly the identity each coordinate is
``x * 1 + y * 0 + 1 * 0``, which is ``x`` bit for bit, so the identity grid
reproduces the pixel centres exactly and ``grid_sample`` returns its input.

Thin-plate spline: the control points ``c_j`` (``K x K`` grid spanning
``[-1, 1]^2``) move to ``c_j + d_j``. The map is ``f(p) = p + g(p)`` with the
displacement ``g(p) = a_0 + a_1 x + a_2 y + sum_j w_j U(|p - c_j|)`` and the
radial basis ``U(r) = r^2 log r^2`` (``U(0) = 0``). Interpolation ``g(c_j) = d_j``
plus the side conditions ``sum_j w_j = 0``, ``sum_j w_j c_j = 0`` give the
standard linear system::

    [ K   P ] [ w ]   [ d ]        K_ij = U(|c_i - c_j|),  P_i = (1, x_i, y_i)
    [ P^T 0 ] [ a ] = [ 0 ]

so ``[w; a] = L^{-1}[:, :K^2] d``, and for the base grid
``g(B) = [U(|b - c|) | B_1] [w; a]``, where ``B_1`` is the base grid reordered
to ``(1, x, y)``. Because the affine part of ``f`` lives in the identity term
``p``, zero offsets give zero coefficients and the grid is exactly ``B``.

The product ``A = [U(|b - c|) | B_1] L^{-1}[:, :K^2]`` (``(H*W, K^2)``) is formed
once in float64 (:func:`tps_weights`), so a grid is ``B + A d``. ``A``'s rows
are interpolation weights (each at most about 1 in magnitude), whereas
``L^{-1}`` alone has entries of tens with alternating signs: multiplying the
two factors in float16 or bfloat16 cancelled the rounding up into pixels of
error, folding them first leaves only the rounding of ``A`` and ``B``.

Grids are computed in at least float32 (:func:`grid_dtype`): a float16 grid
is off by a tenth of a pixel on a 600-pixel side before any warp is applied.
"""

from __future__ import annotations

import warnings

import torch
from torch import Tensor

__all__ = [
    "DENOMINATOR_EPS",
    "static_shape",
    "spatial_size",
    "pixel_centres",
    "base_grid",
    "matrix_grid",
    "safe_denominator",
    "tps_control_points",
    "tps_radial",
    "tps_system_inverse",
    "tps_kernel",
    "tps_weights",
    "tps_grid",
    "grid_dtype",
]

# Smallest magnitude allowed for the projective third coordinate. A point whose
# denominator is this small lies about 1/eps half-widths away, i.e. far outside
# the image, so it only samples padding; the guard keeps the grid finite.
# Common practice, no source.
DENOMINATOR_EPS = 1.0e-3


def static_shape(x: Tensor, dims: tuple[int, ...] | None = None) -> tuple[int, ...]:
    """Sizes of ``x`` (all, or only ``dims``) as Python ints.

    While the TorchScript-based ONNX exporter traces, sizes are 0-d tensors and
    turning them into ints raises a TracerWarning. The warp's checks and grid
    (like every buffer) are specialised to the traced spatial size anyway, so
    the conversion is exactly what the trace records; the warning is silenced
    here and only here. Ask only for the dims you need: converting the batch
    size would also pin it under ``torch.export``.
    """
    dims = tuple(range(x.dim())) if dims is None else dims
    if torch.jit.is_tracing():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", torch.jit.TracerWarning)
            return tuple(int(x.shape[d]) for d in dims)
    return tuple(int(x.shape[d]) for d in dims)


def spatial_size(x: Tensor) -> tuple[int, int]:
    """``(H, W)`` of a ``(..., H, W)`` tensor as Python ints (see :func:`static_shape`)."""
    h, w = static_shape(x, (-2, -1))
    return h, w


def pixel_centres(n: int, *, dtype: torch.dtype = torch.float64, device=None) -> Tensor:
    """Normalised centres ``(2u + 1) / n - 1`` of ``n`` pixels.

    Written as ``(2u + 1 - n) / n``: the numerator is an exact integer, so the
    single division rounds correctly in float64 (``(2u + 1) / n - 1`` would
    round twice).
    """
    u = torch.arange(n, dtype=torch.float64)
    return ((2.0 * u + 1.0 - n) / n).to(dtype=dtype, device=device)


def base_grid(height: int, width: int, *, dtype: torch.dtype = torch.float64, device=None) -> Tensor:
    """Homogeneous pixel-centre coordinates ``(H*W, 3)`` as rows ``(x, y, 1)``, row-major."""
    xs = pixel_centres(width)
    ys = pixel_centres(height)
    grid = torch.empty(height, width, 3, dtype=torch.float64)
    grid[..., 0] = xs.view(1, width)
    grid[..., 1] = ys.view(height, 1)
    grid[..., 2] = 1.0
    return grid.reshape(height * width, 3).to(dtype=dtype, device=device)


def safe_denominator(d: Tensor, eps: float = DENOMINATOR_EPS) -> Tensor:
    """Sign-preserving clamp ``|d| >= eps`` (0 counts as positive); exact for ``|d| >= eps``."""
    return torch.where(d >= 0, d.clamp(min=eps), d.clamp(max=-eps))


def matrix_grid(base: Tensor, matrix: Tensor, height: int, width: int, *, projective: bool) -> Tensor:
    """Sampling grid ``(N, H, W, 2)`` of the homogeneous matrices ``(N, 3, 3)``.

    ``projective=False`` assumes the last row is ``[0, 0, 1]`` (checked by the
    caller's family) and skips the division.
    """
    if projective:
        q = torch.matmul(base, matrix.transpose(1, 2))  # (N, HW, 3)
        xy = q[..., :2] / safe_denominator(q[..., 2:3])
    else:
        xy = torch.matmul(base, matrix[:, :2, :].transpose(1, 2))  # (N, HW, 2)
    return xy.reshape(-1, height, width, 2)


def tps_control_points(k: int, *, dtype: torch.dtype = torch.float64, device=None) -> Tensor:
    """``(K*K, 2)`` control points ``(x, y)`` on a KxK grid spanning ``[-1, 1]``, row-major (y outer)."""
    t = torch.linspace(-1.0, 1.0, k, dtype=torch.float64)
    ys, xs = torch.meshgrid(t, t, indexing="ij")
    return torch.stack([xs.reshape(-1), ys.reshape(-1)], dim=1).to(dtype=dtype, device=device)


def tps_radial(points: Tensor, control: Tensor) -> Tensor:
    """``U(|p_i - c_j|) = r^2 log r^2`` for every pair, ``(len(points), len(control))``; ``U(0) = 0``."""
    d2 = (points[:, None, :] - control[None, :, :]).pow(2).sum(-1)
    safe = torch.where(d2 > 0, d2, torch.ones_like(d2))
    return torch.where(d2 > 0, d2 * torch.log(safe), torch.zeros_like(d2))


def tps_system_inverse(control: Tensor) -> Tensor:
    """The columns of ``L^{-1}`` that multiply the offsets: ``(K^2 + 3, K^2)``, solved in float64."""
    c = control.to(torch.float64)
    m = c.shape[0]
    p = torch.cat([torch.ones(m, 1, dtype=torch.float64), c], dim=1)  # (m, 3): (1, x, y)
    top = torch.cat([tps_radial(c, c), p], dim=1)
    bottom = torch.cat([p.t(), torch.zeros(3, 3, dtype=torch.float64)], dim=1)
    system = torch.cat([top, bottom], dim=0)
    rhs = torch.cat([torch.eye(m, dtype=torch.float64), torch.zeros(3, m, dtype=torch.float64)], dim=0)
    return torch.linalg.solve(system, rhs).to(dtype=control.dtype, device=control.device)


def tps_grid(base: Tensor, weights: Tensor, offsets: Tensor, height: int, width: int) -> Tensor:
    """TPS sampling grid ``(N, H, W, 2)``: ``B + A d``.

    ``base`` is ``(H*W, 3)`` from :func:`base_grid`, ``weights`` is ``A``
    (``(H*W, K^2)``, :func:`tps_weights`) and ``offsets`` is ``(N, K^2, 2)``.
    """
    displacement = torch.matmul(weights, offsets)  # (N, HW, 2)
    return (base[:, :2] + displacement).reshape(-1, height, width, 2)


def tps_weights(base: Tensor, control: Tensor) -> Tensor:
    """``A = [U(|b - c|) | 1 | x | y] L^{-1}[:, :K^2]``, ``(H*W, K^2)``: how each base point moves with each
    control point's offset. Formed in float64 and rounded once to ``base``'s dtype."""
    product = tps_kernel(base.to(torch.float64), control) @ tps_system_inverse(control.to(torch.float64))
    return product.to(dtype=base.dtype, device=base.device)


def grid_dtype(dtype: torch.dtype) -> torch.dtype:
    """The dtype a sampling grid is computed in for tensors of ``dtype``: float64 stays, anything narrower
    (float16, bfloat16) gets float32."""
    return torch.promote_types(dtype, torch.float32)


def tps_kernel(base: Tensor, control: Tensor) -> Tensor:
    """``[U(|b - c|) | 1 | x | y]`` for the base grid, ``(H*W, K^2 + 3)``, computed in float64."""
    b = base.to(torch.float64)[:, :2]
    c = control.to(torch.float64)
    ones = torch.ones(b.shape[0], 1, dtype=torch.float64)
    return torch.cat([tps_radial(b, c), ones, b], dim=1).to(dtype=base.dtype, device=base.device)

