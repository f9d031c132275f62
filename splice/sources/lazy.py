"""Lazy modules (``nn.LazyConv2d``, ``nn.LazyLinear``, ...): weights whose shapes the first forward decides.

Until that forward, their parameters are ``UninitializedParameter`` objects that
can be neither hashed, copied nor traced. A model the caller hands in is theirs:
splice never runs it to fill them in, and refuses it in one line
(:func:`refuse_lazy`). A model splice builds itself from a spec is its own: one
all-zeros batch at the input shape, in eval mode and without gradients, gives
the lazy modules their shapes and their initial weights, as the first forward
the caller would run does (:func:`materialise_lazy_`); weights loaded afterwards
replace them.

Layer: sources (floor 3); imports ``torch`` and splice's lowest floor.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import torch
from torch import nn
from torch.nn.parameter import is_lazy

from ..copies import modes_kept
from ..errors import SourceError, first_line
from .specs import format_shape

__all__ = ["lazy_names", "refuse_lazy", "materialise_lazy_"]

#: how many names a message lists before "and N more"
_SHOWN = 3


def lazy_names(model: nn.Module) -> list[str]:
    """Names of the parameters and buffers of ``model`` that no forward has given a shape yet."""
    return [name for name, t in itertools.chain(model.named_parameters(), model.named_buffers()) if is_lazy(t)]


def _listed(names: list[str]) -> str:
    more = f" and {len(names) - _SHOWN} more" if len(names) > _SHOWN else ""
    return ", ".join(names[:_SHOWN]) + more


def refuse_lazy(model: nn.Module, what: str) -> None:
    """One line for a model handed in whose lazy modules have not run yet: the caller's model is not run here."""
    names = lazy_names(model)
    if names:
        raise SourceError(f"{what} has lazy modules whose weights are not made yet ({_listed(names)}); run one "
                          "forward at its input shape first (model(torch.zeros(1, C, H, W))), then hand it to splice")


def materialise_lazy_(model: nn.Module, shapes: Sequence[Sequence[int]], what: str) -> nn.Module:
    """Give the lazy modules of ``model``, a model splice built itself, their weights: one all-zeros batch per
    input of ``shapes``, in eval mode without gradients (each module's mode back afterwards). Nothing happens for
    a model without lazy modules or when no shape is known (the caller asks for one). Returns ``model``."""
    names = lazy_names(model)
    if not names or not shapes:
        return model
    made = [t for t in itertools.chain(model.parameters(), model.buffers()) if not is_lazy(t)]
    device = made[0].device if made else torch.device("cpu")
    dtype = next((t.dtype for t in made if t.is_floating_point()), torch.get_default_dtype())
    batch = [torch.zeros((1, *shape), device=device, dtype=dtype) for shape in shapes]
    try:
        with modes_kept(model), torch.no_grad():
            model.eval()(*batch)
    except Exception as e:  # noqa: BLE001 - the model's own code failed on the shape it was given
        raise SourceError(f"{what} has lazy modules ({_listed(names)}); one all-zeros batch at "
                          f"{', '.join(format_shape(s) for s in shapes)} run to make their weights failed "
                          f"({type(e).__name__}: {first_line(e)}); pass the model's input shape "
                          "(--input-shape CxHxW)") from None
    left = lazy_names(model)
    if left:
        raise SourceError(f"{what} has lazy modules that one forward at "
                          f"{', '.join(format_shape(s) for s in shapes)} does not reach ({_listed(left)}); build "
                          "those with ordinary modules (nn.Conv2d for nn.LazyConv2d)")
    return model
