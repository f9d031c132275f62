"""What the parity checks perturb a warp with: a fixed non-identity theta, and the layer that carries it.

A check at the identity alone cannot show a sampler bug (a broken
``grid_sample`` lowering that ignores the grid still returns its input), so
``verify --onnx`` and ``splice export`` also compare with every warp set to
:func:`perturbation_theta`: the head's final layer gets a zero weight and this
theta as its bias (:func:`final_layer` finds that layer).
"""

from __future__ import annotations

import torch
from torch import nn

from splice.errors import SpliceError
from splice.warps.families import family_param_count, identity_theta

__all__ = ["PERTURBATION_SIZE", "perturbation_theta", "final_layer"]

# Size of the fixed perturbation added to the identity parameters.
PERTURBATION_SIZE = 0.1


def perturbation_theta(family: str, tps_k: int = 4, *, dtype=torch.float32) -> torch.Tensor:
    """The fixed non-identity warp used by the parity checks: ``identity + 0.1 * linspace(-1, 1, P)``.

    For affine that is ``[0.9, -0.06, -0.02, 0.02, 1.06, 0.1]``: a slight
    shear, anisotropic scale and a shift of 0.1 half-widths, so sampling falls
    between pixels everywhere. Every family gets a warp that is neither the
    identity nor a whole-pixel shift.
    """
    n = family_param_count(family, tps_k)
    delta = torch.linspace(-1.0, 1.0, n, dtype=torch.float64) if n > 1 else torch.ones(1, dtype=torch.float64)
    return (identity_theta(family, tps_k, dtype=torch.float64) + PERTURBATION_SIZE * delta).to(dtype)


def final_layer(warp: nn.Module) -> nn.Linear:
    """The zero-initialised output layer of a warp's localisation head."""
    head = getattr(warp, "head", None)
    final = getattr(head, "final", None)
    if isinstance(final, nn.Linear):
        return final
    linears = [m for m in (head or warp).modules() if isinstance(m, nn.Linear)]
    if not linears:
        raise SpliceError(f"warp {type(warp).__name__} has no Linear output layer; it is not a splice Warp")
    return linears[-1]
