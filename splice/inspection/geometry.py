"""Where a warp samples: its output's outline and lattice mapped onto the image it reads."""

from __future__ import annotations

import torch
from torch import Tensor

__all__ = ["map_points", "outline_and_lattice"]

# ----------------------------------------------------------------------------- sampling-grid geometry
#
# A picture of a warp draws, on the image the warp reads, where its output
# samples: the output's border (the "outline") and a lattice of lines through
# it. Points are taken on the output in normalised coordinates, sent through
# the warp's own map f (the same maths as Warp.grid, evaluated at exact border
# points rather than pixel centres) and converted to input pixel-edge
# coordinates: X = (x + 1) W / 2, so X = 0 is the left edge of the left-most
# pixel (matplotlib's imshow extent (0, W, H, 0) uses the same frame).
#
# Feature-level warps read a feature map of h x w pixels with stride
# (sy, sx) = input size / point size: the map's footprint scale, not splice.graph.Point.stride (the
# cumulative stride of the ops, 2 for a 37 -> 19 conv where this ratio is 1.947).
# A feature pixel edge X_f covers input pixels up to X = sx X_f, so the
# feature map's normalised coordinates map onto the input by
# X = (x + 1) w sx / 2. This is the feature map's footprint on the input; it
# ignores the half-receptive-field offsets of padded convolutions.

_OUTLINE_STEPS = 48  # points per edge: enough for a smooth curve under tps or projective maps
_LATTICE_LINES = 5  # interior lattice lines per axis (at -2/3 ... 2/3 for 5)


def _outline() -> Tensor:
    """The output's border, ``(4 * steps + 1, 2)`` normalised points: top, right, bottom, left edges, closed."""
    s = torch.linspace(-1.0, 1.0, _OUTLINE_STEPS + 1, dtype=torch.float64)[:-1]
    one = torch.ones_like(s)
    top = torch.stack([s, -one], 1)
    right = torch.stack([one, s], 1)
    bottom = torch.stack([-s, one], 1)
    left = torch.stack([-one, -s], 1)
    pts = torch.cat([top, right, bottom, left])
    return torch.cat([pts, pts[:1]])


def _lattice() -> list[Tensor]:
    """Interior lattice lines of the output, each ``(steps + 1, 2)`` normalised points."""
    s = torch.linspace(-1.0, 1.0, _OUTLINE_STEPS + 1, dtype=torch.float64)
    levels = torch.linspace(-1.0, 1.0, _LATTICE_LINES + 2, dtype=torch.float64)[1:-1]
    lines = []
    for level in levels.tolist():
        lines.append(torch.stack([torch.full_like(s, level), s], 1))  # vertical line x = level
        lines.append(torch.stack([s, torch.full_like(s, level)], 1))  # horizontal line y = level
    return lines


def map_points(warp, theta: Tensor, points: Tensor) -> Tensor:
    """Send output points ``(M, 2)`` (normalised) through each warp ``theta (N, P)``: ``(N, M, 2)``.

    Matrix families: ``q = M (x, y, 1)^T`` dehomogenised with the same guarded
    denominator as the warp's grid; tps: the spline evaluated at the points
    with the grid code itself (:func:`splice.warps.grids.tps_grid`).
    """
    from ..warps import grids

    theta = torch.as_tensor(theta).to("cpu", torch.float64)
    pts = torch.as_tensor(points, dtype=torch.float64)
    base = torch.cat([pts, torch.ones(pts.shape[0], 1, dtype=torch.float64)], dim=1)  # (M, 3)
    if warp.family == "tps":
        control = grids.tps_control_points(warp.config.tps_k)
        offsets = theta.reshape(theta.shape[0], -1, 2)
        grid = grids.tps_grid(base, grids.tps_weights(base, control), offsets, 1, pts.shape[0])
        return grid.reshape(theta.shape[0], -1, 2)
    m = warp.matrix(theta)
    q = torch.matmul(base, m.transpose(1, 2))
    return q[..., :2] / grids.safe_denominator(q[..., 2:3])


def _to_input_pixels(xy: Tensor, feature_hw: tuple[int, int], stride: tuple[float, float]) -> Tensor:
    """Normalised coordinates of a (feature) map -> pixel-edge coordinates on the model input."""
    h, w = feature_hw
    sy, sx = stride
    scale = torch.tensor([w * sx / 2.0, h * sy / 2.0], dtype=torch.float64)
    return (xy + 1.0) * scale



def outline_and_lattice(warp, theta: Tensor, feature_hw, stride) -> tuple[Tensor, list[Tensor]]:
    """Outline ``(N, M, 2)`` and lattice lines (each ``(N, L, 2)``) in input pixel coordinates."""
    outline = _to_input_pixels(map_points(warp, theta, _outline()), feature_hw, stride)
    lattice = [_to_input_pixels(map_points(warp, theta, line), feature_hw, stride) for line in _lattice()]
    return outline, lattice

