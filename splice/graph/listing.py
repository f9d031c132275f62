"""Listing points: the :class:`Point` record, :func:`points` and its JSON form.

A point is an (N, C, H, W) activation of the traced model. By default
:func:`points` lists ``input`` and the points that sit between convolutions;
``all=True`` lists every 4-D activation. Shapes come from one propagation on
the meta device (batch size 1).

The recommendation rule (``input``, and the first cut between convs of stride
4 or more and at least 8x8) is told in full in the :mod:`splice.graph` docstring.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import torch
import torch.fx as fx
from torch import nn

from ..copies import collector_paused, private_buffers, same_draws
from ..errors import GraphError, SourceError
from ..sources.specs import parse_input_shapes, volumes_not_images
from .entries import Entry, graph_entries
from ..caches import caches_kept
from .fallback import hooks_view
from .leaves import LeafRule, check_leaves_found
from .naming import describe_node, names_by_node
from .scope import scope_inputs
from .shapes import ShapeFailure, input_dtype, meta_empty, propagate
from .strides import Stride, at_least, input_relative, stride_value
from .tracing import (
    FxFailure,
    check_model,
    fx_failure_hint,
    reason,
    trace_copy,
    trace_owned,
)

__all__ = ["Point", "points", "trace_points", "points_report"]

# the rule in the module docstring, "Recommended points"
_RECOMMEND_MIN_STRIDE = 4
_RECOMMEND_MIN_SIZE = 8


@dataclass(frozen=True)
class Point:
    """One place where a warp can go: a 4-D activation of the traced model.

    ``shape`` is (C, H, W); ``stride`` is the cumulative stride from the input
    (the product of the strides of the ops on the way, the largest over the
    inputs of a join; :mod:`splice.graph.strides`), an int when both axes
    agree, else an ``(sh, sw)`` tuple (a float, to 4 decimals, only when truly
    fractional: after an upsampling by 1.5). ``module`` is the qualname of the module
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
    site: tuple[str, int] | None = None
    site_calls: int | None = None
    mechanism: str = "fx"

    def __post_init__(self):
        if len(self.shape) != 3 or not all(isinstance(s, int) and s > 0 for s in self.shape):
            raise ValueError(f"Point.shape must be three positive ints (C, H, W), got {self.shape!r}")
        if self.kind not in ("input", "activation"):
            raise ValueError(f"Point.kind must be 'input' or 'activation', got {self.kind!r}")
        if self.recommended and not self.cut:
            raise ValueError(f"point {self.name!r} is recommended but not a cut; only cuts can be recommended")
        if self.in_branch and self.join is None:
            raise ValueError(f"point {self.name!r} is in a branch but has no join")
        if self.mechanism not in ("fx", "hooks"):
            raise ValueError(f"Point.mechanism must be 'fx' or 'hooks', got {self.mechanism!r}")
        if self.mechanism == "hooks" and self.kind != "input" and self.site is None:
            raise ValueError(f"point {self.name!r} needs a site (module, call) to be reached by a hook")

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
            "mechanism": self.mechanism,
        }


def _stride(e: Entry, in_hw: tuple[int, int]) -> Stride:
    """The entry's stride from the data flow; a view without one (module outputs alone) reads the sizes."""
    return e.stride if e.stride is not None else input_relative(in_hw, e.shape[1:])


def _build_points(entries: list[Entry], input_shape: tuple[int, int, int], every: bool, warp: str,
                  mechanism: str) -> list[Point]:
    from ..warps import WarpConfig, warp_cost

    config = WarpConfig(family=warp)
    in_hw = input_shape[1:]
    chosen = None
    strides = {id(e): _stride(e, in_hw) for e in entries}
    for e in entries:
        h, w = e.shape[1:]
        if (
            e.kind != "input" and e.cut and e.between_convs and at_least(strides[id(e)], _RECOMMEND_MIN_STRIDE)
            and h >= _RECOMMEND_MIN_SIZE and w >= _RECOMMEND_MIN_SIZE
        ):
            chosen = e
            break
    # the input first: a warp there beat feature-level ones in bench_efficacy, so a feature point is
    # recommended only when the input is not a cut
    input_cut = any(e.kind == "input" and e.cut for e in entries)
    out = []
    costs: dict[tuple[int, int, int], tuple[int, int]] = {}
    for e in entries:
        if not (every or e.kind == "input" or (e.between_convs and e.shape[1:] != (1, 1))):
            continue  # a 1x1 map (a squeeze-and-excitation gate) has nothing a warp could move
        if e.shape not in costs:
            costs[e.shape] = warp_cost(config, e.shape)
        params, macs = costs[e.shape]
        out.append(Point(
            name=e.name, module=e.module, shape=e.shape, stride=stride_value(strides[id(e)]),
            cut=e.cut, in_branch=e.join is not None, join=e.join,
            warp_params=int(params), warp_macs=int(macs),
            recommended=e.cut and (e.kind == "input" or (e is chosen and not input_cut)), kind=e.kind,
            site=e.site, mechanism=mechanism, site_calls=e.calls,
        ))
    return out


_OTHERS = " (each input after the first by its per-sample shape: 4 for a vector of shape (N, 4))"


def _check_input_shapes(input_shape: Any) -> tuple[tuple[int, int, int], ...]:
    # the one input-shape rule is splice.sources.parse_input_shape(s); here only tuples, not "CxHxW" text
    try:
        shapes = None if isinstance(input_shape, str) else parse_input_shapes(input_shape)
    except SourceError as exc:
        if "four dimensions" in str(exc):
            raise GraphError(str(exc)) from None
        shapes = None
    if not shapes:
        raise GraphError(
            f"input_shape must be (C, H, W) with three positive ints, or a list of one shape per input (C, H, W) "
            f"first, got {input_shape!r}; for example (3, 224, 224) or [(3, 224, 224), (4,)]"
        )
    return shapes


def _check_images(model: nn.Module) -> None:
    """A model of volumes or clips (3-D convolutions and no 2-D ones) gets one line, not a shape error."""
    why = volumes_not_images(model)
    if why is not None:
        raise GraphError(why)


def _check_arity(model: nn.Module, shapes: tuple) -> None:
    """One shape per required input of ``forward``, or a one-line error naming the inputs."""
    import inspect

    try:
        params = inspect.signature(model.forward).parameters.values()
    except (TypeError, ValueError):  # a forward without a signature: let the forward itself tell
        return
    kinds = (inspect.Parameter.POSITIONAL_ONLY, inspect.Parameter.POSITIONAL_OR_KEYWORD)
    params = list(params)
    required = [p.name for p in params if p.kind in kinds and p.default is inspect.Parameter.empty]
    positional = [p.name for p in params if p.kind in kinds]
    keyword_only = [p.name for p in params if p.kind is inspect.Parameter.KEYWORD_ONLY and p.default is p.empty]
    if keyword_only and len(shapes) > len(positional):
        raise GraphError(f"{type(model).__name__}'s forward takes its input{'s' if len(keyword_only) > 1 else ''} "
                         f"{', '.join(keyword_only)} by keyword only, which splice does not support; wrap the model "
                         "in a module whose forward takes the image positionally and calls it with that keyword")
    if len(shapes) > len(positional) and not any(p.kind is inspect.Parameter.VAR_POSITIONAL for p in params):
        raise GraphError(f"{type(model).__name__}'s forward takes {len(positional)} input"
                         f"{'' if len(positional) == 1 else 's'} ({', '.join(positional) or 'none'}) and "
                         f"{len(shapes)} shapes were given; give one --input-shape per input")
    if len(required) > len(shapes):
        raise GraphError(f"{type(model).__name__}'s forward takes {len(required)} inputs ({', '.join(required)}) "
                         f"and {len(shapes)} shape{' was' if len(shapes) == 1 else 's were'} given; give one "
                         "--input-shape per input, CxHxW for the images and then each other input's per-sample "
                         "shape, e.g. 4 for a vector (input_shape=[(C, H, W), (4,), ...])")


def _fx_entries(model: nn.Module, shapes: tuple, rule: LeafRule,
                keep: bool = False) -> tuple[list[Entry], fx.GraphModule | None]:
    """Entries of the fx graph, and with ``keep`` the traced GraphModule they name (:func:`trace`'s result);
    raises :class:`FxFailure` when fx cannot trace the model."""
    if keep:
        gm, root = trace_copy(model, rule, n_inputs=len(shapes))
        graph = gm.graph
    else:
        gm, root = None, private_buffers(model)
        graph = trace_owned(root, rule, len(shapes))
    modules = dict(root.named_modules())
    try:
        values = propagate(graph, root, modules, shapes)
    except ShapeFailure as failure:
        raise GraphError(
            f"shape propagation on the meta device failed at point {names_by_node(graph)[failure.node]!r} "
            f"({describe_node(failure.node, root)}) for input shape "
            f"{shapes[0] if len(shapes) == 1 else list(shapes)}: {reason(failure.error)}; "
            f"check that the model takes inputs of this (C, H, W){_OTHERS if len(shapes) > 1 else ''}, or mark the "
            "failing module as a leaf (--leaf TYPE, Python: leaves=[TYPE])"
        ) from failure.error
    return graph_entries(graph, modules, values), gm


def points(
    model: nn.Module,
    input_shape,
    *,
    all: bool = False,
    leaves: Iterable[Any] = (),
    warp: str = "affine",
    within: str = "",
) -> list[Point]:
    """List the places where a warp can go, in graph order.

    ``input_shape`` is (C, H, W), or one such shape per input of a model with
    several. By default: ``input`` and the 4-D activations between convs,
    1x1 maps left out (nothing there for a warp to move); ``all=True`` lists
    every 4-D activation. ``warp`` is the warp family whose
    cost is reported. ``within`` restricts the points to a submodule (a
    qualname such as ``"backbone"``), whose inputs are found by running the
    model on the meta device; its first input is ``input``. Each point says
    which ``mechanism`` puts a warp there: ``"fx"`` (a graph rewrite) or
    ``"hooks"`` (a forward hook on the module that returns it, for models fx
    cannot trace and for ``within``). See the :mod:`splice.graph` docstring
    for cuts, branches, the recommendation rule and the fallbacks. The model
    is not changed, and no weight or activation memory is allocated.
    """
    check_model(model, "points()")
    _check_images(model)  # first: a model of volumes or clips gets its one line whatever shape is given
    shapes = _check_input_shapes(input_shape)
    _check_arity(model, shapes)
    check_leaves_found(leaves, model)
    return _list(model, shapes, LeafRule(leaves), all, warp, within)[0]


def trace_points(model: nn.Module, input_shape, *, leaves: Iterable[Any] = (), warp: str = "affine",
                 within: str = "") -> tuple[list[Point], fx.GraphModule | None]:
    """``points(model, input_shape, all=True, ...)`` and, for mechanism ``fx``, ``trace(model)``, from one trace.

    The GraphModule is :func:`~splice.graph.trace`'s (it owns copies of the
    model's tensors) and its nodes are the ones listed; it is ``None`` when the
    points are reached by hooks.
    """
    check_model(model, "trace_points()")
    _check_images(model)  # first: a model of volumes or clips gets its one line whatever shape is given
    shapes = _check_input_shapes(input_shape)
    _check_arity(model, shapes)
    check_leaves_found(leaves, model)
    return _list(model, shapes, LeafRule(leaves), True, warp, within, keep=True)


def _list(model: nn.Module, shapes: tuple, rule: LeafRule, every: bool, warp: str, within: str,
          keep: bool = False) -> tuple[list[Point], fx.GraphModule | None]:
    # a forward that draws from Python's, NumPy's or torch's generator (layer drop) lists the same points every
    # time, and the caller's generators do not move
    with caches_kept(model), same_draws():  # meta-device and fake passes leave no tensor without data in a cache
        return _listed(model, shapes, rule, every, warp, within, keep)


@collector_paused()
def _listed(model: nn.Module, shapes: tuple, rule: LeafRule, every: bool, warp: str, within: str,
            keep: bool = False) -> tuple[list[Point], fx.GraphModule | None]:
    if within:
        scope, args, kwargs = scope_inputs(model, shapes, within)
        first = next((a for a in args if isinstance(a, torch.Tensor) and a.dim() == 4), None)
        if first is None:
            raise GraphError(f"--within {within!r}: that module is not called with an (N, C, H, W) tensor first; "
                             "pick a module that takes images or feature maps")
        shape = tuple(int(s) for s in first.shape[1:])
        entries = hooks_view(scope, args, kwargs, rule, problem=None, todo=_WITHIN_TODO, input_shape=shape)
        return _build_points(entries, shape, every, warp, "hooks"), None
    try:
        entries, gm = _fx_entries(model, shapes, rule, keep)
    except FxFailure as failure:
        where, todo = fx_failure_hint(failure, model)
        problem = f"torch.fx could not trace {where} ({reason(failure.error)})"
        dtype = input_dtype(model)
        args = tuple(meta_empty((1, *s), dtype) for s in shapes)  # no memory: real tensors only where needed
        entries = hooks_view(model, args, {}, rule, problem=problem, todo=todo, input_shape=shapes[0])
        return _build_points(entries, shapes[0], every, warp, "hooks"), None
    return _build_points(entries, shapes[0], every, warp, "fx"), gm


_WITHIN_TODO = "mark the module that fails as a leaf (--leaf TYPE, Python: leaves=[TYPE])"


def points_report(model_name: str, input_shape: tuple[int, int, int], pts: Iterable[Point]) -> dict:
    """The JSON form of a listing: ``{"model", "input_shape": [C, H, W], "mechanism", "points": [...]}``."""
    pts = list(pts)
    return {
        "model": model_name,
        "input_shape": [int(s) for s in input_shape],
        "mechanism": pts[0].mechanism if pts else "fx",
        "points": [p.to_json() for p in pts],
    }
