"""Where a warp can go: fx tracing, meta-device shapes and cut analysis.

Tracing
-------
:func:`trace` runs :mod:`torch.fx` with a tracer that keeps two kinds of module
as single steps (*leaves*): fx's own rule (modules defined in ``torch.nn``,
except containers) and a registry of leaf types, which starts as
:data:`DEFAULT_LEAVES`, grows with :func:`register_leaf`, and can be extended
per call with ``leaves=``. A leaf is given as a class or as a dotted
``"pkg.mod.ClassName"`` string (a bare ``"ClassName"`` also matches), so that
naming a leaf never has to import its package.

The graph is traced in eval mode. Whenever traced code reads a module's
``training`` flag, the model is traced again in train mode and a
:class:`TraceModeWarning` is raised if the two graphs differ. Tracing works on
a private clone of the module tree; the caller's model is never changed.

Points
------
A *point* is an fx node that produces an (N, C, H, W) tensor (tensors that a
permute or transpose turned channels-last, as in convnext blocks, are not
points). It is named
after the node, which fx derives from the module qualname (``layer1_0_relu``,
with ``_1``, ``_2`` for repeated calls); the model input is always ``input``.
By default :func:`points` lists ``input`` and the points that sit between
convolutions (a conv upstream or the point itself, and a conv downstream);
``all=True`` lists every 4-D activation. Shapes come from one propagation on
the meta device (batch size 1): no activation memory, no arithmetic. Common
layers use closed-form shape rules; everything else runs its meta kernel. A
user-registered leaf that cannot run on the meta device (value-dependent
control flow) is run once, alone, on a CPU copy with an all-zeros input.

Cuts and branches
-----------------
The data-flow graph runs from the input to the output node (which gathers
every model output). A point is a *cut* when every path from the input to the
outputs passes through it: it dominates the output node and post-dominates
the input (Cooper, Harvey & Kennedy's iterative dominator algorithm, forwards
and backwards). A point that is not a cut but lies between a fork and the cut
where the paths meet again is *in a branch*; ``join`` names that meeting node
(the ``add`` of a residual block, the ``cat`` of a dense block). A point whose
paths only meet at the model outputs (one head of a two-headed model) is
neither.

Recommended points
------------------
splice recommends at most two points, both cuts that sit between convs: the
model ``input``, and the first point in graph order whose stride is at least 4
on both axes and whose feature map is at least 8x8. Stride 4 is where the stem
of common CNNs ends (a strided conv followed by a pool or a second strided
conv), so the second warp works on low-level features that still have spatial
detail; a cut means one warp sees the whole signal.

Fallback view
-------------
If fx cannot trace the model, :func:`points` warns (:class:`TraceFallbackWarning`)
and lists module outputs instead, recorded by forward hooks during a meta
forward pass. Names come from module qualnames (dots become underscores, with
``_1``, ``_2`` for repeat calls); there is no data-flow graph, so only ``input``
is marked as a cut. If that forward fails too, :class:`~splice.errors.GraphError`
names the failing module and how to mark it as a leaf.
"""

from __future__ import annotations

import copy
import difflib
import importlib
import itertools
import math
import operator
import re
import os.path
import sys
import warnings
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import torch
import torch.fx as fx
from torch import nn

from .errors import GraphError, PointError, suggest

__all__ = [
    "DEFAULT_LEAVES",
    "GraphWarning",
    "TraceModeWarning",
    "TraceFallbackWarning",
    "Point",
    "register_leaf",
    "trace",
    "points",
    "find_point",
    "point_names",
    "points_report",
]


class GraphWarning(UserWarning):
    """Something about the traced graph the user should know."""


class TraceModeWarning(GraphWarning):
    """The train-mode and eval-mode graphs of a model differ; splice uses eval mode."""


class TraceFallbackWarning(GraphWarning):
    """fx could not trace the model; points come from module boundaries instead."""


# ----------------------------------------------------------------------------- leaf registry

# Default leaves are named, not imported, so that tracing never imports torchvision.
# DEFAULT_LEAVES (the types themselves) is resolved on first access, see __getattr__.
_DEFAULT_LEAF_NAMES = (
    # decides per sample whether to drop, from self.training at run time; traced
    # through, the flag would be frozen into the graph
    "torchvision.ops.stochastic_depth.StochasticDepth",
    # one normalisation step, like nn.BatchNorm2d
    "torchvision.ops.misc.FrozenBatchNorm2d",
    # a spliced model lists its warps as single steps
    "splice.warps.module.Warp",
)

_registered_types: set[type] = set()
_registered_names: set[str] = set()


def __getattr__(name: str):
    if name == "DEFAULT_LEAVES":
        found = []
        for path in _DEFAULT_LEAF_NAMES:
            module_name, _, cls_name = path.rpartition(".")
            try:
                found.append(getattr(importlib.import_module(module_name), cls_name))
            except (ImportError, AttributeError):
                continue  # the package is not installed: nothing to keep opaque
        value = tuple(found)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def _split_leaves(items: Iterable[Any], what: str) -> tuple[set[type], set[str]]:
    if isinstance(items, (str, type)):
        items = (items,)
    types: set[type] = set()
    names: set[str] = set()
    for item in items:
        if isinstance(item, type) and issubclass(item, nn.Module):
            types.add(item)
        elif isinstance(item, str) and item and all(part.isidentifier() for part in item.split(".")):
            names.add(item)
        else:
            raise GraphError(
                f"{what}: a leaf must be an nn.Module subclass or a class name such as "
                f"'pkg.mod.ClassName', got {item!r} ({type(item).__name__}); "
                "pass the module class or its dotted name"
            )
    return types, names


def register_leaf(*types: type | str) -> None:
    """Keep modules of these types as single steps in every later trace.

    Each argument is an ``nn.Module`` subclass or a ``"pkg.mod.ClassName"``
    string (a bare ``"ClassName"`` matches any class of that name). Subclasses
    of a registered type are leaves too.
    """
    new_types, new_names = _split_leaves(types, "register_leaf")
    _registered_types.update(new_types)
    _registered_names.update(new_names)


def _class_path(cls: type) -> str:
    return f"{cls.__module__}.{cls.__qualname__}"


class _LeafRule:
    """Decides whether a module class is a leaf (registry + per-call leaves), with a cache."""

    def __init__(self, leaves: Iterable[Any]):
        types, names = _split_leaves(leaves, "leaves")
        self.names = frozenset(_DEFAULT_LEAF_NAMES) | frozenset(_registered_names) | frozenset(names)
        # a dotted name may be a re-export ('torchvision.ops.StochasticDepth'): if its
        # module is already imported, match the class it names too
        for name in self.names:
            module_name, _, cls_name = name.rpartition(".")
            found = getattr(sys.modules.get(module_name), cls_name, None) if module_name else None
            if isinstance(found, type) and issubclass(found, nn.Module):
                types.add(found)
        self.types = tuple(_registered_types | types)
        self._cache: dict[type, bool] = {}

    def __call__(self, cls: type) -> bool:
        hit = self._cache.get(cls)
        if hit is None:
            hit = issubclass(cls, self.types) or any(
                _class_path(c) in self.names or c.__name__ in self.names
                for c in cls.__mro__
                if c is not nn.Module and c is not object
            )
            self._cache[cls] = hit
        return hit


def _is_torch_builtin(cls: type) -> bool:
    return cls.__module__.startswith(("torch.nn", "torch.ao.nn"))


# ----------------------------------------------------------------------------- tracing


class _Tracer(fx.Tracer):
    def __init__(self, rule: _LeafRule):
        super().__init__()
        self._rule = rule
        self.failed_in: tuple[str, type] | None = None  # innermost module whose tracing raised

    def is_leaf_module(self, m: nn.Module, module_qualified_name: str) -> bool:
        return self._rule(type(m)) or super().is_leaf_module(m, module_qualified_name)

    def call_module(self, m, forward, args, kwargs):
        try:
            return super().call_module(m, forward, args, kwargs)
        except Exception:
            if self.failed_in is None:
                try:
                    qualname = self.path_of_module(m)
                except Exception:
                    qualname = "?"
                self.failed_in = (qualname, _original_class(type(m)))
            raise


class _FxFailure(Exception):
    def __init__(self, error: BaseException, failed_in: tuple[str, type] | None):
        super().__init__(str(error))
        self.error = error
        self.failed_in = failed_in


def _run_tracer(root: nn.Module, rule: _LeafRule) -> fx.Graph:
    tracer = _Tracer(rule)
    try:
        return tracer.trace(root)
    except Exception as exc:
        raise _FxFailure(exc, tracer.failed_in) from exc


def _shadow(model: nn.Module) -> nn.Module:
    """A clone of the module tree that shares every tensor with ``model``.

    Each module gets its own ``__dict__`` (so flags, class and attributes fx
    adds can be changed freely) and its own ``_modules`` dict; parameters,
    buffers and hooks are the caller's objects and are only read.
    """
    memo: dict[int, nn.Module] = {}

    def clone(m: nn.Module) -> nn.Module:
        c = memo.get(id(m))
        if c is None:
            c = object.__new__(type(m))
            c.__dict__.update(m.__dict__)
            memo[id(m)] = c
            c.__dict__["_modules"] = {k: (None if v is None else clone(v)) for k, v in m._modules.items()}
        return c

    return clone(model)


def _can_spy(cls: type) -> bool:
    # creating a subclass runs __init_subclass__ and metaclass code, which may
    # register the class somewhere: only spy on plain classes
    return type(cls) is type and not any("__init_subclass__" in c.__dict__ for c in cls.__mro__[:-1])


def _original_class(cls: type) -> type:
    return cls.__dict__.get("_splice_original", cls)


@contextmanager
def _spying(mods: list[nn.Module], reads: list[nn.Module]) -> Iterator[bool]:
    """Temporarily give each module a class whose ``training`` property records reads.

    Yields False (and changes nothing) if some module's class cannot take part.
    """

    def _get(self):
        reads.append(self)
        return self.__dict__["training"]

    def _set(self, value):
        self.__dict__["training"] = value

    classes: dict[type, type] = {}
    swapped: list[tuple[nn.Module, type]] = []
    try:
        ok = all(_can_spy(cls) for cls in {type(m) for m in mods})
        if ok:
            for m in mods:
                cls = type(m)
                spy = classes.get(cls)
                if spy is None:
                    ns = {
                        "training": property(_get, _set),
                        "__module__": cls.__module__,
                        "__qualname__": cls.__qualname__,
                        "_splice_original": cls,
                    }
                    spy = classes[cls] = type(cls.__name__, (cls,), ns)
                m.__class__ = spy
                swapped.append((m, cls))
    except TypeError:  # __class__ assignment refused (layout differs)
        ok = False
        for m, cls in swapped:
            m.__class__ = cls
        swapped.clear()
    try:
        yield ok
    finally:
        for m, cls in swapped:
            m.__class__ = cls


def _signature(graph: fx.Graph) -> list[tuple]:
    name = operator.attrgetter("name")
    return [
        (n.name, n.op, n.target, fx.node.map_arg(n.args, name), fx.node.map_arg(n.kwargs, name))
        for n in graph.nodes
    ]


def _describe_difference(eval_graph: fx.Graph, train_graph: fx.Graph) -> str | None:
    a, b = _signature(eval_graph), _signature(train_graph)
    if a == b:
        return None
    in_eval, in_train = [x[0] for x in a], [y[0] for y in b]
    eval_names, train_names = set(in_eval), set(in_train)
    added = [n for n in in_train if n not in eval_names]
    dropped = [n for n in in_eval if n not in train_names]

    def some(names):
        return ", ".join(repr(n) for n in names[:3]) + (", ..." if len(names) > 3 else "")

    parts = []
    if added:
        parts.append(f"train mode adds node {some(added)}")
    if dropped:
        parts.append(f"eval mode adds node {some(dropped)}")
    if not parts:
        first = next(x for x, y in zip(a, b) if x != y)
        parts.append(f"node {first[0]!r} differs")
    return "; ".join(parts)


def _trace_owned(root: nn.Module, rule: _LeafRule) -> fx.Graph:
    """Trace ``root``, a module tree splice owns, in eval mode; check train mode when it could differ."""
    mods = list(root.modules())
    saved = [(m, m.__dict__.get("training", True)) for m in mods]
    try:
        for m in mods:
            m.__dict__["training"] = False
        reads: list[nn.Module] = []
        with _spying(mods, reads) as spied:
            graph = _run_tracer(root, rule)
        # if no traced code read a `training` flag, a train-mode trace takes the same path
        if not spied or reads:
            for m in mods:
                m.__dict__["training"] = True
            try:
                difference = _describe_difference(graph, _run_tracer(root, rule))
            except _FxFailure as failure:
                difference = f"the train-mode trace fails: {_first_line(failure.error)}"
            if difference is not None:
                warnings.warn(
                    f"the train-mode and eval-mode graphs of {type(root).__name__} differ "
                    f"({difference}); splice uses the eval-mode graph. Code outside leaf modules "
                    "reads self.training; mark such modules as leaves (leaves=[...], --leaf TYPE) "
                    "to keep the check at run time.",
                    TraceModeWarning,
                    stacklevel=3,
                )
    finally:
        for m, flag in saved:
            m.__dict__["training"] = flag
    return graph


def _unspy_meta(graph: fx.Graph) -> None:
    """Put the real classes back into ``nn_module_stack`` metadata (the tracer saw spies)."""
    for n in graph.nodes:
        stack = n.meta.get("nn_module_stack")
        if stack:
            n.meta["nn_module_stack"] = type(stack)(
                (k, (q, _original_class(t))) for k, (q, t) in stack.items()
            )


def _fx_failure_hint(failure: _FxFailure, model: nn.Module) -> tuple[str, str]:
    """(where, what to do) for an fx failure."""
    if failure.failed_in is not None and failure.failed_in[0] not in ("", "?"):
        qualname, cls = failure.failed_in
        where = f"module '{qualname}' ({cls.__name__})"
        todo = (
            f"mark it opaque with --leaf {_class_path(cls)} (Python: leaves=[{cls.__name__}]) "
            "so the tracer keeps it as one step"
        )
    else:
        where = f"the forward of {type(model).__name__} itself"
        todo = (
            "move the Python control flow into a submodule and mark that submodule opaque "
            "with --leaf TYPE (Python: leaves=[TYPE])"
        )
    return where, todo


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0] if text else ''}".rstrip(": ")


def _check_model(model: Any, what: str) -> None:
    if not isinstance(model, nn.Module):
        raise GraphError(f"{what} needs a torch.nn.Module, got {type(model).__name__}; pass the model object")


def trace(model: nn.Module, *, leaves: Iterable[Any] = ()) -> fx.GraphModule:
    """Trace a copy of ``model`` with torch.fx and return it as a new GraphModule.

    The GraphModule owns deep copies of the model's parameters and buffers; the
    caller's model is not changed and shares no tensors with the result. The
    graph is the eval-mode graph (see the module docstring); node names are
    stable from run to run. Raises :class:`~splice.errors.GraphError` naming the
    module fx could not trace.
    """
    _check_model(model, "trace()")
    rule = _LeafRule(leaves)
    try:
        work = copy.deepcopy(model)
    except Exception as exc:
        raise GraphError(
            f"cannot copy {type(model).__name__} for tracing ({_first_line(exc)}); "
            "splice never traces the caller's model in place: make the model deep-copyable"
        ) from exc
    try:
        graph = _trace_owned(work, rule)
    except _FxFailure as failure:
        where, todo = _fx_failure_hint(failure, model)
        raise GraphError(f"torch.fx cannot trace {where}: {_first_line(failure.error)}; {todo}") from failure.error
    _unspy_meta(graph)
    gm = fx.GraphModule(work, graph, class_name=type(model).__name__)
    gm.training = model.training  # submodules keep their own (copied) flags
    return gm


# ----------------------------------------------------------------------------- shapes on the meta device

_META = torch.device("meta")


class _ShapeFailure(Exception):
    def __init__(self, node: fx.Node, error: BaseException):
        super().__init__(str(error))
        self.node = node
        self.error = error


def _meta_module(mod: nn.Module) -> nn.Module:
    """An eval-mode copy of ``mod`` whose parameters and buffers live on the meta device.

    Tensors are swapped for meta tensors through deepcopy's memo, so no weight
    data is copied.
    """
    memo: dict[int, Any] = {}
    for t in itertools.chain(mod.parameters(), mod.buffers()):
        if isinstance(t, (nn.parameter.UninitializedParameter, nn.parameter.UninitializedBuffer)):
            continue
        meta = _meta_empty(t.shape, t.dtype)
        memo[id(t)] = nn.Parameter(meta, requires_grad=t.requires_grad) if isinstance(t, nn.Parameter) else meta
    copied = copy.deepcopy(mod, memo)
    copied.eval()
    return copied


def _meta_empty(shape, dtype: torch.dtype) -> torch.Tensor:
    # torch.empty is a C++ call on meta; torch.empty_like goes through a Python reference and costs ten times more
    return torch.empty(shape, dtype=dtype, device=_META)


def _to_meta(value: Any) -> Any:
    return _meta_empty(value.shape, value.dtype) if isinstance(value, torch.Tensor) else value


def _input_dtype(model: nn.Module) -> torch.dtype:
    """The dtype of the model's first floating-point parameter or buffer (float32 if none)."""
    for t in itertools.chain(model.parameters(), model.buffers()):
        if t.is_floating_point():
            return t.dtype
    return torch.float32


def _fetch_attr(root: nn.Module, target: str) -> Any:
    obj: Any = root
    for part in target.split("."):
        obj = getattr(obj, part)
    return obj


# Closed-form shape rules for the layers that dominate CNN graphs; their meta
# kernels are Python decompositions and cost more than the layer's real work at
# batch size 1. A rule returns None when it does not apply, and the meta kernel
# runs instead (and reports any error in its own words).

_SAME_SHAPE_MODULES = frozenset({
    nn.ReLU, nn.ReLU6, nn.SiLU, nn.GELU, nn.Hardswish, nn.Hardsigmoid, nn.Sigmoid, nn.Tanh,
    nn.LeakyReLU, nn.ELU, nn.Mish, nn.Identity, nn.Dropout, nn.Dropout2d,
})


def _conv2d_rule(mod: nn.Conv2d, x: torch.Tensor) -> torch.Tensor | None:
    if x.dim() != 4 or x.shape[1] != mod.in_channels or x.dtype != mod.weight.dtype:
        return None
    n, _, h, w = x.shape
    if mod.padding == "same":
        return _meta_empty((n, mod.out_channels, h, w), x.dtype)
    padding = (0, 0) if mod.padding == "valid" else mod.padding
    out = []
    # output size of a convolution: floor((size + 2 pad - dilation (kernel - 1) - 1) / stride) + 1
    for size, k, s, p, d in zip((h, w), mod.kernel_size, mod.stride, padding, mod.dilation):
        o = (size + 2 * p - d * (k - 1) - 1) // s + 1
        if o <= 0:
            return None
        out.append(o)
    return _meta_empty((n, mod.out_channels, *out), x.dtype)


def _module_rule(mod: nn.Module, args: tuple, kwargs: dict) -> torch.Tensor | None:
    if kwargs or len(args) != 1 or not isinstance(args[0], torch.Tensor):
        return None
    x = args[0]
    cls = type(mod)
    if cls in _SAME_SHAPE_MODULES:
        return _meta_empty(x.shape, x.dtype)
    if cls is nn.Conv2d:
        return _conv2d_rule(mod, x)
    if cls is nn.BatchNorm2d:
        ok = x.dim() == 4 and x.shape[1] == mod.num_features
    elif cls is nn.GroupNorm:
        ok = x.dim() >= 2 and x.shape[1] == mod.num_channels
    elif cls is nn.LayerNorm:
        k = len(mod.normalized_shape)
        ok = x.dim() >= k and tuple(x.shape[x.dim() - k:]) == tuple(mod.normalized_shape)
    elif cls is nn.Linear:
        if x.dim() >= 1 and x.shape[-1] == mod.in_features and x.dtype == mod.weight.dtype:
            return _meta_empty((*x.shape[:-1], mod.out_features), x.dtype)
        return None
    elif cls is nn.AdaptiveAvgPool2d and x.dim() in (3, 4):
        size = mod.output_size
        size = (size, size) if isinstance(size, int) else size
        h, w = (o if o is not None else i for o, i in zip(size, x.shape[-2:]))
        return _meta_empty((*x.shape[:-2], h, w), x.dtype)
    else:
        return None
    return _meta_empty(x.shape, x.dtype) if ok else None


def _broadcast(a: tuple[int, ...], b: tuple[int, ...]) -> tuple[int, ...] | None:
    out = []
    for x, y in itertools.zip_longest(reversed(a), reversed(b), fillvalue=1):
        if x != y and x != 1 and y != 1:
            return None
        out.append(y if x == 1 else x)
    return tuple(reversed(out))


def _elementwise_rule(args: tuple, kwargs: dict) -> torch.Tensor | None:
    """Out-of-place add, sub, mul: broadcast shape, promoted dtype."""
    if kwargs or len(args) != 2:
        return None
    a, b = args
    for v in args:
        if not isinstance(v, (torch.Tensor, int, float, bool)):
            return None
    if not (isinstance(a, torch.Tensor) or isinstance(b, torch.Tensor)):
        return None
    shape = _broadcast(
        tuple(a.shape) if isinstance(a, torch.Tensor) else (),
        tuple(b.shape) if isinstance(b, torch.Tensor) else (),
    )
    if shape is None:
        return None
    return _meta_empty(shape, torch.result_type(a, b))


def _cat_rule(args: tuple, kwargs: dict) -> torch.Tensor | None:
    if not args or set(kwargs) - {"dim"} or len(args) > 2:
        return None
    tensors = args[0]
    dim = args[1] if len(args) > 1 else kwargs.get("dim", 0)
    if not isinstance(tensors, (list, tuple)) or not tensors or not isinstance(dim, int):
        return None
    first = tensors[0]
    if not all(isinstance(t, torch.Tensor) and t.dim() == first.dim() and t.dtype == first.dtype for t in tensors):
        return None
    ndim = first.dim()
    if ndim == 0 or not -ndim <= dim < ndim:
        return None
    dim %= ndim
    shape = list(first.shape)
    for t in tensors[1:]:
        if any(a != b for i, (a, b) in enumerate(zip(shape, t.shape)) if i != dim):
            return None
        shape[dim] += t.shape[dim]
    return _meta_empty(shape, first.dtype)


_FUNCTION_RULES: dict[Any, Callable[[tuple, dict], torch.Tensor | None]] = {
    torch.cat: _cat_rule,
    **dict.fromkeys((operator.add, operator.sub, operator.mul, torch.add, torch.sub, torch.mul), _elementwise_rule),
}
_METHOD_RULES: dict[str, Callable[[tuple, dict], torch.Tensor | None]] = dict.fromkeys(
    ("add", "sub", "mul"), _elementwise_rule
)


def _run_for_real(mod: nn.Module, args: tuple, kwargs: dict) -> Any:
    """Run a copy of ``mod`` once on all-zeros inputs of the given meta shapes; return meta outputs."""
    tensor = next(itertools.chain(mod.parameters(), mod.buffers()), None)
    device = tensor.device if tensor is not None else torch.device("cpu")

    def real(v):
        return torch.zeros(v.shape, dtype=v.dtype, device=device) if isinstance(v, torch.Tensor) else v

    with torch.device(device):
        work = copy.deepcopy(mod)
        work.eval()
        out = work(*fx.node.map_aggregate(args, real), **fx.node.map_aggregate(kwargs, real))
    return fx.node.map_aggregate(out, _to_meta)


def _run_module(mod: nn.Module, target: str, args: tuple, kwargs: dict, cache: dict[str, nn.Module]) -> Any:
    meta_mod = cache.get(target)
    if meta_mod is None:
        meta_mod = cache[target] = _meta_module(mod)
    try:
        return meta_mod(*args, **kwargs)
    except Exception:
        if _is_torch_builtin(type(mod)):
            raise
        # a user leaf whose forward needs real values (value-dependent control flow)
        try:
            return _run_for_real(mod, args, kwargs)
        except Exception:
            pass
        raise


def _propagate(
    graph: fx.Graph, root: nn.Module, modules: dict[str, nn.Module], input_shape: tuple[int, int, int]
) -> dict[fx.Node, Any]:
    """Run ``graph`` on a batch-1 meta tensor; return every node's (meta) value.

    ``modules`` maps qualnames to the modules of ``root``.
    """
    meta_modules: dict[str, nn.Module] = {}
    values: dict[fx.Node, Any] = {}
    load = values.__getitem__
    seen_input = False
    with torch.no_grad():
        for node in graph.nodes:
            op = node.op
            try:
                if op == "placeholder":
                    if not seen_input:
                        value = _meta_empty((1, *input_shape), _input_dtype(root))
                        seen_input = True
                    elif node.args:
                        value = node.args[0]  # an optional argument: its default
                    else:
                        raise GraphError(
                            f"the model's forward takes more than one input (also {node.target!r}); "
                            "splice lists points of single-input models: wrap the model so that "
                            "forward(x) takes one tensor"
                        )
                elif op == "get_attr":
                    value = _to_meta(_fetch_attr(root, node.target))
                elif op == "output":
                    value = fx.node.map_arg(node.args[0], load)
                else:
                    args = fx.node.map_arg(node.args, load)
                    kwargs = fx.node.map_arg(node.kwargs, load)
                    if op == "call_module":
                        mod = modules[node.target]
                        value = _module_rule(mod, args, kwargs)
                        if value is None:
                            value = _run_module(mod, node.target, args, kwargs, meta_modules)
                    else:
                        rules = _FUNCTION_RULES if op == "call_function" else _METHOD_RULES
                        rule = rules.get(node.target)
                        value = rule(args, kwargs) if rule is not None else None
                        if value is None:
                            value = _call(node, args, kwargs)
            except GraphError:
                raise
            except Exception as exc:
                raise _ShapeFailure(node, exc) from exc
            values[node] = value
    return values


def _call(node: fx.Node, args: tuple, kwargs: dict) -> Any:
    fn = node.target if node.op == "call_function" else getattr(args[0], node.target)
    if node.op == "call_method":
        args = args[1:]
    try:
        return fn(*args, **kwargs)
    except Exception:
        # a factory call (torch.zeros(...), torch.arange(...)) made a CPU tensor
        # that then met a meta one: run the node again with meta as the default device
        with torch.device(_META):
            return fn(*args, **kwargs)


def _describe_node(node: fx.Node, root: nn.Module) -> str:
    if node.op == "call_module":
        return f"module '{node.target}' ({type(root.get_submodule(node.target)).__name__})"
    where = _enclosing_module(node)
    fn = getattr(node.target, "__name__", str(node.target))
    return f"{node.op.replace('call_', '')} {fn!r}" + (f" in module '{where}'" if where else "")


def _enclosing_module(node: fx.Node) -> str:
    stack = node.meta.get("nn_module_stack")
    if not stack:
        return ""
    return next(reversed(stack.values()))[0]


# ----------------------------------------------------------------------------- cuts and branches

_SOURCE = object()  # virtual source when a graph has several tensor inputs


def _has_tensor(value: Any) -> bool:
    if isinstance(value, torch.Tensor):
        return True
    if isinstance(value, (list, tuple)):
        return any(_has_tensor(v) for v in value)
    if isinstance(value, dict):
        return any(_has_tensor(v) for v in value.values())
    return False


def _dominators(order: list, preds: dict, root: Any) -> dict:
    """Immediate dominators over a DAG given in topological order (Cooper, Harvey & Kennedy).

    The topological index plays the role of the reverse-postorder number: a
    dominator always comes earlier, so ``intersect`` walks the later finger up.
    """
    index = {n: i for i, n in enumerate(order)}
    idom = {root: root}

    def intersect(a, b):
        while a is not b:
            while index[a] > index[b]:
                a = idom[a]
            while index[b] > index[a]:
                b = idom[b]
        return a

    changed = True
    while changed:
        changed = False
        for n in order:
            if n is root:
                continue
            done = [p for p in preds[n] if p in idom]
            new = done[0]
            for p in done[1:]:
                new = intersect(p, new)
            if idom.get(n) is not new:
                idom[n] = new
                changed = True
    return idom


def _cut_analysis(graph: fx.Graph, values: dict[fx.Node, Any]) -> tuple[set[fx.Node], dict[fx.Node, fx.Node]]:
    """Return the cut nodes and, for each non-cut node on an input-to-output path, its join.

    Only nodes that carry tensors count (shape queries such as ``x.size(0)`` are
    not data flow), get_attr constants are ignored, and so are nodes that are
    not reachable from an input or do not reach the output node (the sink).
    """
    sink = next(n for n in reversed(graph.nodes) if n.op == "output")
    carries = {n for n in graph.nodes if n.op not in ("get_attr", "output") and _has_tensor(values.get(n))}
    sources = [n for n in graph.nodes if n.op == "placeholder" and n in carries]
    reach = set(sources)
    for n in graph.nodes:
        if n in carries and n not in reach and any(p in reach for p in n.all_input_nodes):
            reach.add(n)
    live = {sink}
    for n in reversed(graph.nodes):
        if n in reach and any(u in live for u in n.users):
            live.add(n)
    order: list[Any] = [n for n in graph.nodes if n in reach and n in live]
    if not order or not any(p in live for p in sink.all_input_nodes):
        return set(), {}
    members = set(order)
    preds: dict[Any, list] = {n: [p for p in n.all_input_nodes if p in members] for n in order}
    preds[sink] = [p for p in sink.all_input_nodes if p in members]
    order.append(sink)
    roots = [n for n in order if n.op == "placeholder"]
    if len(roots) == 1:
        root = roots[0]
    else:
        root = _SOURCE
        order.insert(0, _SOURCE)
        preds[_SOURCE] = []
        for r in roots:
            preds[r] = [_SOURCE]
    succs: dict[Any, list] = {n: [] for n in order}
    for n in order:
        for p in preds[n]:
            succs[p].append(n)

    idom = _dominators(order, preds, root)
    ipdom = _dominators(order[::-1], succs, sink)
    dominate_sink = {sink}
    n = sink
    while n is not root:
        n = idom[n]
        dominate_sink.add(n)
    postdominate_source = {root}
    n = root
    while n is not sink:
        n = ipdom[n]
        postdominate_source.add(n)
    cuts = (dominate_sink & postdominate_source) - {_SOURCE}
    cuts.add(sink)

    joins: dict[fx.Node, fx.Node] = {}
    for n in order:
        if n is _SOURCE or n in cuts:
            continue
        p = ipdom[n]
        while p not in cuts:
            p = ipdom[p]
        if p is not sink:
            joins[n] = p
    cuts.discard(sink)
    return cuts, joins


# ----------------------------------------------------------------------------- points

_CONV_MODULES = (nn.Conv2d, nn.ConvTranspose2d)
_CONV_FUNCTIONS = frozenset({torch.conv2d, torch.nn.functional.conv2d, torch.conv_transpose2d,
                             torch.nn.functional.conv_transpose2d})

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


@dataclass
class _Entry:
    name: str
    module: str
    kind: str
    shape: tuple[int, int, int]
    cut: bool
    join: str | None
    between_convs: bool


def _build_points(entries: list[_Entry], input_shape: tuple[int, int, int], every: bool, warp: str) -> list[Point]:
    from .warps import WarpConfig, warp_cost

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


def _is_conv_node(node: fx.Node, modules: dict[str, nn.Module]) -> bool:
    if node.op == "call_module":
        mod = modules[node.target]
        # a leaf that contains a conv counts as one
        return isinstance(mod, _CONV_MODULES) or (
            bool(mod._modules) and any(isinstance(m, _CONV_MODULES) for m in mod.modules())
        )
    return node.op == "call_function" and node.target in _CONV_FUNCTIONS


def _point_names(graph: fx.Graph) -> dict[fx.Node, str]:
    """Stable point names: module qualnames, ``_1``, ``_2`` for repeats.

    Module calls keep fx's names (``layer1_0_relu``, ``layer1_0_relu_1``).
    Functions and methods called inside a module's ``forward`` (the ``+`` of a
    residual block, a ``torch.cat``) are named after that module too:
    ``layer1_0_add`` rather than fx's global ``add_3``. The input is ``input``.
    """
    names: dict[fx.Node, str] = {}
    taken = {n.name for n in graph.nodes if n.op not in ("call_function", "call_method")}
    counts: dict[str, int] = {}
    for n in graph.nodes:
        if n.op in ("call_function", "call_method"):
            stack = n.meta.get("nn_module_stack") or {}
            owner = next(reversed(stack), None) if stack else None
            if owner:
                owner = owner.split("@")[0].replace(".", "_")
                base = re.sub(r"_\d+$", "", n.name)
                stem = f"{owner}_{base}"
                k = counts.get(stem, 0)
                name = stem if k == 0 else f"{stem}_{k}"
                while name in taken:
                    k += 1
                    name = f"{stem}_{k}"
                counts[stem] = k + 1
                taken.add(name)
                names[n] = name
                continue
        names[n] = n.name
    first = next((n for n in graph.nodes if n.op == "placeholder"), None)
    if first is not None:
        names[first] = "input"  # fx never names another node 'input' (a Python builtin)
    return names


def point_names(gm: fx.GraphModule) -> dict[str, fx.Node]:
    """``{point name: fx node}`` for a traced module (the names :func:`points` prints)."""
    return {name: node for node, name in _point_names(gm.graph).items() if node.op not in ("get_attr", "output")}


_NCHW = (0, 1, 2, 3)


def _permutation(node: fx.Node) -> tuple[int, ...] | None:
    """The dims of a permute/transpose node (output dim j = input dim perm[j]), else None."""
    if node.op not in ("call_method", "call_function"):
        return None
    name = node.target if node.op == "call_method" else getattr(node.target, "__name__", "")
    args = node.args[1:]
    if name == "permute":
        dims = args[0] if len(args) == 1 and isinstance(args[0], (list, tuple)) else args
        if len(dims) == 4 and all(isinstance(d, int) for d in dims):
            return tuple(d % 4 for d in dims)
    elif name in ("transpose", "swapaxes", "swapdims") and len(args) == 2 and all(isinstance(d, int) for d in args):
        perm = list(_NCHW)
        a, b = args[0] % 4, args[1] % 4
        perm[a], perm[b] = perm[b], perm[a]
        return tuple(perm)
    return None


def _layouts(nodes: list[fx.Node], values: dict[fx.Node, Any], is_conv: dict[fx.Node, bool]) -> dict:
    """For each 4-D node, which input axis each of its axes holds (``_NCHW`` when unpermuted).

    Follows permute/transpose through the graph so that channels-last tensors
    (a convnext block permutes to N, H, W, C around its LayerNorm and Linear
    layers) are not taken for (N, C, H, W) points. A conv's output is NCHW.
    """
    layout: dict[fx.Node, tuple[int, ...]] = {}
    for n in nodes:
        v = values.get(n)
        if not (isinstance(v, torch.Tensor) and v.dim() == 4):
            continue
        source = next((p for p in n.all_input_nodes if p in layout), None)
        base = layout[source] if source is not None and not is_conv[n] else _NCHW
        perm = _permutation(n) if source is not None else None
        layout[n] = tuple(base[d] for d in perm) if perm is not None else base
    return layout


def _graph_entries(graph: fx.Graph, modules: dict[str, nn.Module], values: dict[fx.Node, Any]) -> list[_Entry]:
    nodes = list(graph.nodes)
    is_conv = {n: _is_conv_node(n, modules) for n in nodes}
    conv_up: dict[fx.Node, bool] = {}  # a conv upstream, or the node itself
    for n in nodes:
        conv_up[n] = is_conv[n] or any(conv_up[p] for p in n.all_input_nodes)
    conv_down: dict[fx.Node, bool] = {}  # a conv strictly downstream
    for n in reversed(nodes):
        conv_down[n] = any(is_conv[u] or conv_down[u] for u in n.users)
    cuts, joins = _cut_analysis(graph, values)
    names = _point_names(graph)
    layouts = _layouts(nodes, values, is_conv)
    entries = []
    for n in nodes:
        if n.op in ("get_attr", "output") or layouts.get(n) != _NCHW:
            continue
        v = values[n]
        is_input = n.op == "placeholder" and names[n] == "input"
        module = n.target if n.op == "call_module" else ("" if is_input else _enclosing_module(n))
        join = joins.get(n)
        entries.append(_Entry(
            name=names[n], module=module, kind="input" if is_input else "activation",
            shape=tuple(int(s) for s in v.shape[1:]), cut=n in cuts,
            join=None if join is None else names[join],
            between_convs=conv_up[n] and conv_down[n],
        ))
    return entries


def _check_input_shape(input_shape: Any) -> tuple[int, int, int]:
    try:
        shape = tuple(operator.index(s) for s in input_shape)
    except TypeError:
        shape = ()
    if len(shape) != 3 or any(s <= 0 for s in shape) or any(isinstance(s, bool) for s in input_shape):
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
    family whose cost is reported. See the module docstring for cuts, branches,
    the recommendation rule and the fallback when fx cannot trace the model.
    The model is not changed, and no weight or activation memory is allocated.
    """
    _check_model(model, "points()")
    shape = _check_input_shape(input_shape)
    rule = _LeafRule(leaves)
    root = _shadow(model)
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
            f"({_describe_node(failure.node, root)}) for input shape {shape}: {_first_line(failure.error)}; "
            "check that the model takes inputs of this (C, H, W), or mark the failing module as a leaf "
            "(--leaf TYPE, Python: leaves=[TYPE])"
        ) from failure.error
    return _build_points(_graph_entries(graph, modules, values), shape, all, warp)


# ----------------------------------------------------------------------------- fallback: module boundaries


def _module_view(model: nn.Module, shape: tuple[int, int, int], failure: _FxFailure) -> list[_Entry]:
    """Entries for module outputs seen by forward hooks during a meta forward pass."""
    where, todo = _fx_failure_hint(failure, model)
    fx_problem = f"torch.fx could not trace {where} ({_first_line(failure.error)})"
    try:
        meta = _meta_module(model)
    except Exception as exc:
        raise GraphError(
            f"cannot list points of {type(model).__name__}: {fx_problem}, and copying it to the meta "
            f"device failed ({_first_line(exc)}); {todo}"
        ) from exc
    qualnames = {m: q for q, m in meta.named_modules() if q}
    stack: list[nn.Module] = []
    records: list[tuple[int, str, tuple[int, int, int]]] = []
    conv_starts: list[int] = []
    conv_ends: list[int] = []
    calls: dict[str, int] = {}
    clock = itertools.count()

    def before(mod, args):
        stack.append(mod)
        if isinstance(mod, _CONV_MODULES):
            conv_starts.append(next(clock))

    def after(mod, args, out):
        stack.pop()
        t = next(clock)
        if isinstance(mod, _CONV_MODULES):
            conv_ends.append(t)
        if isinstance(out, torch.Tensor) and out.dim() == 4:
            qualname = qualnames[mod]
            k = calls.get(qualname, 0)
            calls[qualname] = k + 1
            base = qualname.replace(".", "_")
            records.append((t, base if k == 0 else f"{base}_{k}", qualname, tuple(int(s) for s in out.shape[1:])))

    handles = []
    for mod in qualnames:
        handles.append(mod.register_forward_pre_hook(before))
        handles.append(mod.register_forward_hook(after))
    try:
        with torch.no_grad(), torch.device(_META):
            meta(_meta_empty((1, *shape), _input_dtype(model)))
    except Exception as exc:
        if stack:
            failing = stack[-1]
            cls = type(failing)
            here = f"module '{qualnames[failing]}' ({cls.__name__})"
            advice = (
                f"mark '{qualnames[failing]}' opaque with --leaf {_class_path(cls)} "
                f"(Python: leaves=[{cls.__name__}]) and try again"
            )
            if _is_torch_builtin(cls):
                advice = f"check that the model takes inputs of shape (C, H, W) = {shape}"
        else:
            here = f"the forward of {type(model).__name__} itself"
            advice = todo
        raise GraphError(
            f"cannot list points of {type(model).__name__}: {fx_problem}, and a meta-device forward "
            f"failed in {here} ({_first_line(exc)}); {advice}"
        ) from exc
    finally:
        for h in handles:
            h.remove()
    warnings.warn(
        f"{fx_problem}; listing module outputs instead, without cut analysis (only 'input' is "
        f"marked as a cut). To get the full analysis, {todo}.",
        TraceFallbackWarning,
        stacklevel=3,
    )
    first_conv_end = min(conv_ends, default=math.inf)
    last_conv_start = max(conv_starts, default=-math.inf)
    entries = [_Entry("input", "", "input", shape, True, None, True)]
    for t, name, qualname, out_shape in records:
        entries.append(_Entry(name, qualname, "activation", out_shape, False, None,
                              first_conv_end <= t < last_conv_start))
    return entries


# ----------------------------------------------------------------------------- lookup and report


def find_point(model_or_gm: nn.Module, name: str, *, leaves: Iterable[Any] = ()) -> fx.Node:
    """Return the fx node of point ``name`` in a traced graph.

    A GraphModule is searched as it is (``leaves`` is then ignored); any other
    module is traced first with :func:`trace`. ``"input"`` is the first
    placeholder. Unknown names raise :class:`~splice.errors.PointError` with the
    closest matches.
    """
    _check_model(model_or_gm, "find_point()")
    gm = model_or_gm if isinstance(model_or_gm, fx.GraphModule) else trace(model_or_gm, leaves=leaves)
    names = {v: k for k, v in _point_names(gm.graph).items() if k.op not in ("get_attr", "output")}
    node = names.get(name) if isinstance(name, str) else None
    if node is None:
        hint = suggest(str(name), _closest(str(name), list(names)))
        raise PointError(
            f"unknown point {name!r}{hint if hint else ';'} Run 'splice points MODEL' to list them."
        )
    return node


def _closest(word: str, names: list[str], n: int = 3) -> list[str]:
    """The ``n`` names most like ``word``; ties go to the longer shared prefix, then graph order.

    (difflib alone breaks ties alphabetically, so 'layer1_relu' would suggest
    'layer4_1_relu' before 'layer1_0_relu'.)
    """
    def score(item):
        index, candidate = item
        ratio = difflib.SequenceMatcher(None, word, candidate).ratio()
        return (-ratio, -len(os.path.commonprefix([word, candidate])), index)

    return [c for _, c in sorted(enumerate(names), key=score)[:n]]


def points_report(model_name: str, input_shape: tuple[int, int, int], pts: Iterable[Point]) -> dict:
    """The JSON form of a listing: ``{"model", "input_shape": [C, H, W], "points": [...]}``."""
    return {
        "model": model_name,
        "input_shape": [int(s) for s in input_shape],
        "points": [p.to_json() for p in pts],
    }
