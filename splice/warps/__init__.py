"""Learned warps (spatial transformers): families, grid maths, localisation head, module.

- :mod:`~splice.warps.families`: :class:`WarpConfig` and the theta -> matrix maths;
- :mod:`~splice.warps.grids`: pure sampling-grid maths (base grid, matrices, TPS);
- :mod:`~splice.warps.head`: the localisation head and its size formula;
- :mod:`~splice.warps.module`: the :class:`Warp` module, :func:`warp_cost` and :func:`warp_bytes`.
"""

from __future__ import annotations

from splice.warps.families import (
    FAMILIES,
    MATRIX_FAMILIES,
    PADDINGS,
    SAMPLERS,
    WarpConfig,
    WarpError,
    attention_scale,
    family_param_count,
    identity_theta,
    theta_to_matrix,
)
from splice.warps.module import Warp, warp_bytes, warp_cost

__all__ = [
    "FAMILIES",
    "MATRIX_FAMILIES",
    "PADDINGS",
    "SAMPLERS",
    "Warp",
    "WarpConfig",
    "WarpError",
    "attention_scale",
    "family_param_count",
    "identity_theta",
    "theta_to_matrix",
    "warp_cost",
    "warp_bytes",
]
