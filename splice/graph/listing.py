"""Listing points: the :class:`Point` record, :func:`points` and its JSON form.

A point is an (N, C, H, W) activation of the traced model. By default
:func:`points` lists ``input`` and the points that sit between convolutions;
``all=True`` lists every 4-D activation. Shapes come from one propagation on
the meta device (batch size 1).

Recommended points
------------------
splice recommends at most two points, both cuts that sit between convs: the
model ``input``, and the first point in graph order whose stride is at least 4
on both axes and whose feature map is at least 8x8. Stride 4 is where the stem
of common CNNs ends (a strided conv followed by a pool or a second strided
conv), so the second warp works on low-level features that still have spatial
detail; a cut means one warp sees the whole signal.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from torch import nn

from ..copies import private_buffers
from ..errors import GraphError, SourceError
from ..sources.specs import parse_input_shape
from .entries import _Entry, _graph_entries
from .fallback import _module_view
from .leaves import _LeafRule
from .naming import _describe_node, _point_names
from .shapes import _propagate, _ShapeFailure
from .tracing import _check_model, _FxFailure, _reason, _trace_owned

__all__ = ["Point", "points", "points_report"]

# the rule in the module docstring, "Recommended points"
_RECOMMEND_MIN_STRIDE = 4
_RECOMMEND_MIN_SIZE = 8


@dataclass(frozen=True)
class Point:
    """One place where a warp can go: a 4-D activation of the traced model.

    ``shape`` is (C, H, W); ``stride`` is input size / point size, an int when
    both axes agree and an exact division, else an ``(sh, sw)`` tuple (floats
    when the division is not exact). ``module`` is the qualname of the module
    that produces the tensor (for functional ops, the module whose forward
    calls them; ``""`` at the top level and for the input). ``warp_params`` and
    ``warp_macs`` are what the default warp would add there.
    """

    name: str
    module: str
    shape: tuple[int, int, int]
    stride: int | float | tuple[int | float, int | float]
    cut: bool
    in_branch: bool
    join: str | None
    warp_params: int
    warp_macs: int
    recommended: bool
    kind: str = "activation"

    def __post_init__(self):
        if len(self.shape) != 3 or not all(isinstance(s, int) and s > 0 for s in self.shape):
            raise ValueError(f"Point.shape must be three positive ints (C, H, W), got {self.shape!r}")
        if self.kind not in ("input", "activation"):
            raise ValueError(f"Point.kind must be 'input' or 'activation', got {self.kind!r}")
        if self.recommended and not self.cut:
            raise ValueError(f"point {self.name!r} is recommended but not a cut; only cuts can be recommended")
        if self.in_branch and self.join is None:
            raise ValueError(f"point {self.name!r} is in a branch but has no join")

    def to_json(self) -> dict:
        return {
            "name": self.name,
            "module": self.module,
            "shape": list(self.shape),
            "stride": list(self.stride) if isinstance(self.stride, tuple) else self.stride,
            "cut": self.cut,
            "in_branch": self.in_branch,
            "join": self.join,
            "warp_params": self.warp_params,
            "warp_macs": self.warp_macs,
            "recommended": self.recommended,
        }


def _stride(in_hw: tuple[int, int], hw: tuple[int, int]) -> int | float | tuple:
    parts = [a // b if a % b == 0 else round(a / b, 4) for a, b in zip(in_hw, hw)]
    return parts[0] if parts[0] == parts[1] else tuple(parts)


def _build_points(entries: list[_Entry], input_shape: tuple[int, int, int], every: bool, warp: str) -> list[Point]:
    from ..warps import WarpConfig, warp_cost

    config = WarpConfig(family=warp)
    in_hw = input_shape[1:]
    chosen = None
    for e in entries:
        h, w = e.shape[1:]
        if (
            e.kind != "input" and e.cut and e.between_convs
            and in_hw[0] >= _RECOMMEND_MIN_STRIDE * h and in_hw[1] >= _RECOMMEND_MIN_STRIDE * w
            and h >= _RECOMMEND_MIN_SIZE and w >= _RECOMMEND_MIN_SIZE
        ):
            chosen = e
            break
    out = []
    costs: dict[tuple[int, int, int], tuple[int, int]] = {}
    for e in entries:
        if not (every or e.kind == "input" or e.between_convs):
            continue
        if e.shape not in costs:
            costs[e.shape] = warp_cost(config, e.shape)
        params, macs = costs[e.shape]
        out.append(Point(
            name=e.name, module=e.module, shape=e.shape, stride=_stride(in_hw, e.shape[1:]),
            cut=e.cut, in_branch=e.join is not None, join=e.join,
            warp_params=int(params), warp_macs=int(macs),
            recommended=e.cut and (e.kind == "input" or e is chosen), kind=e.kind,
        ))
    return out


def _check_input_shape(input_shape: Any) -> tuple[int, int, int]:
    # the one input-shape rule is splice.sources.parse_input_shape; here only tuples, not "CxHxW" text
    try:
        shape = None if isinstance(input_shape, str) else parse_input_shape(input_shape)
    except SourceError:
        shape = None
    if shape is None:
        raise GraphError(
            f"input_shape must be (C, H, W) with three positive ints, got {input_shape!r}; "
            "for example (3, 224, 224)"
        )
    return shape


def points(
    model: nn.Module,
    input_shape: tuple[int, int, int],
    *,
    all: bool = False,
    leaves: Iterable[Any] = (),
    warp: str = "affine",
) -> list[Point]:
    """List the places where a warp can go, in graph order.

    ``input_shape`` is (C, H, W). By default: ``input`` and the 4-D activations
    between convs; ``all=True`` lists every 4-D activation. ``warp`` is the warp
    family whose cost is reported. See the :mod:`splice.graph` docstring for cuts, branches,
    the recommendation rule and the fallback when fx cannot trace the model.
    The model is not changed, and no weight or activation memory is allocated.
    """
    _check_model(model, "points()")
    shape = _check_input_shape(input_shape)
    rule = _LeafRule(leaves)
    root = private_buffers(model)
    try:
        graph = _trace_owned(root, rule)
    except _FxFailure as failure:
        entries = _module_view(model, shape, failure)
        return _build_points(entries, shape, all, warp)
    modules = dict(root.named_modules())
    try:
        values = _propagate(graph, root, modules, shape)
    except _ShapeFailure as failure:
        raise GraphError(
            f"shape propagation on the meta device failed at point {_point_names(graph)[failure.node]!r} "
            f"({_describe_node(failure.node, root)}) for input shape {shape}: {_reason(failure.error)}; "
            "check that the model takes inputs of this (C, H, W), or mark the failing module as a leaf "
            "(--leaf TYPE, Python: leaves=[TYPE])"
        ) from failure.error
    return _build_points(_graph_entries(graph, modules, values), shape, all, warp)


def points_report(model_name: str, input_shape: tuple[int, int, int], pts: Iterable[Point]) -> dict:
    """The JSON form of a listing: ``{"model", "input_shape": [C, H, W], "points": [...]}``."""
    return {
        "model": model_name,
        "input_shape": [int(s) for s in input_shape],
        "points": [p.to_json() for p in pts],
    }
