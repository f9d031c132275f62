"""The few facts training, inspection and the demo read from a spliced model's record.

This is the one place outside surgery and the store that reads the
``splice_info`` record a spliced model carries: everything else asks
:func:`splice_facts` (or copies a model with :func:`copy_model`).
"""

from __future__ import annotations

import copy
from dataclasses import dataclass

from torch import nn

__all__ = ["SpliceFacts", "splice_facts", "copy_model"]


@dataclass(frozen=True)
class SpliceFacts:
    """What a spliced model's record says about its input, its classes and its identity check."""

    input_shape: tuple[int, ...]
    normalisation: dict | None
    class_names: list[str] | None
    check_detail: str | None


def splice_facts(model: nn.Module) -> SpliceFacts | None:
    """The facts of a spliced (or loaded) model's record; ``None`` for a model without one."""
    info = getattr(model, "splice_info", None)
    if info is None:
        return None
    return SpliceFacts(
        input_shape=tuple(info["input_shape"]),
        normalisation=info.get("normalisation"),
        class_names=info.get("class_names"),
        check_detail=(info.get("check") or {}).get("detail"),
    )


def copy_model(model: nn.Module) -> nn.Module:
    """A deep copy of ``model`` that keeps its splice record (the caller's module is never trained in place)."""
    twin = copy.deepcopy(model)
    info = getattr(model, "splice_info", None)
    if info is not None:
        twin.splice_info = copy.deepcopy(info)
    return twin
