"""The recorded view: the data flow of one meta-device forward, for models torch.fx cannot trace.

The model runs once on the meta device (no memory, no arithmetic), as Python
runs it: control flow takes the branch the static shapes decide. A
:class:`torch.overrides.TorchFunctionMode` records every torch operation that
reads a tensor computed from the inputs, and forward hooks record each module
call: when it started and ended, and which tensor it returned. That is a
data-flow graph, on which the cut analysis of :mod:`splice.graph.cuts` runs
unchanged.

A point is a tensor that one module call creates and hands back, read by
nothing but the code after the call (so a forward hook that replaces the
call's output replaces the tensor for every consumer): named like fx names a
module call (``layer1_0_relu``; ``_1``, ``_2`` for the second and third call),
innermost call first. Leaf modules (``--leaf``) run for real, alone, on zeros
and count as one operation. A forward that needs real values (``.item()``,
value-dependent branches) cannot run on the meta device: the caller then
tries torch.export.
"""

from __future__ import annotations

import dataclasses
import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import torch
import torch.fx as fx
from torch import nn
from torch.overrides import TorchFunctionMode

from ..compare import SUPPORTED_OUTPUTS
from ..errors import GraphError
from .backward import functions_watched, inside_function
from .cuts import cut_analysis
from .entries import NCHW, Entry, dims_permutation, module_stem, site_name
from .leaves import LeafRule, stepped_leaves
from .rules import meta_rule
from .shapes import META, meta_module, run_for_real, to_meta
from .strides import Stride, call_stride, cumulative, spatial
from .modes import spying

__all__: list[str] = []


class UnsupportedOutput(GraphError):
    """The model's output holds no tensor splice can find (an object of a class it does not look into)."""


_CONVS = frozenset({"conv2d", "conv_transpose2d", "convolution", "_convolution"})


class _Op:
    """One recorded operation: its name, the recorded operations it read, when it ran and in which module."""

    __slots__ = ("index", "name", "inputs", "value", "owner", "layout", "users", "own", "first")

    def __init__(self, index: int, name: str, inputs: list[int], value: Any, owner: str, layout,
                 own: Stride | None = None, first: int | None = None):
        self.index, self.name, self.inputs, self.value, self.owner = index, name, inputs, value, owner
        self.layout = layout
        self.users: list[int] = []
        # the op's own stride where splice knows it, and the op that wrote the tensor it reads (its first argument)
        self.own, self.first = own, first


def _name(func) -> str:
    """``add``, ``add_`` (in place), ``getitem``, ``setitem``: the function's name without dunder marks."""
    name = getattr(func, "__name__", None) or str(func)
    return name[2:-2] if name.startswith("__") and name.endswith("__") and len(name) > 4 else name


def _tensors(value: Any):
    """The tensors in ``value``: itself, or inside tuples, lists and dicts (the containers torch functions take and
    give) and, more slowly, any other mapping, sequence or dataclass (named tuples, a Hugging Face ``ModelOutput``)."""
    if isinstance(value, torch.Tensor):
        yield value
    elif type(value) in (tuple, list):
        for v in value:
            yield from _tensors(v)
    elif type(value) is dict:
        for v in value.values():
            yield from _tensors(v)
    elif isinstance(value, (int, float, str, bytes, bool, type(None), torch.dtype, torch.device)):
        return
    elif isinstance(value, Mapping):
        for v in value.values():
            yield from _tensors(v)
    elif isinstance(value, Sequence):
        for v in value:
            yield from _tensors(v)
    elif dataclasses.is_dataclass(value) and not isinstance(value, type):
        for f in dataclasses.fields(value):
            yield from _tensors(getattr(value, f.name, None))


class _Recording(TorchFunctionMode):
    """Records the operations on tensors computed from the inputs, and the module calls around them."""

    def __init__(self):
        super().__init__()
        self.ops: list[_Op] = []
        self.producer: dict[int, int] = {}  # id(tensor) -> index of the op that last wrote it
        self.born: dict[int, int] = {}  # id(tensor) -> index of the op that first produced that object
        self.keep: list[torch.Tensor] = []  # every recorded tensor stays alive, so no id is reused
        self.stack: list[str] = []
        # (qualname, call, start, end, the op that wrote the output when the call returned, or None, and the op
        # that first produced that tensor object)
        self.calls: list[tuple[str, int, int, int, int | None, int | None]] = []
        # modules inside a leaf (a leaf runs for real, unseen): one called outside it too is counted here fewer
        # times than a hook counts it at run time, so it is no site
        self.in_leaves: set[str] = set()
        # calls made inside a custom autograd Function (a re-entrant checkpoint runs them again in the backward pass,
        # where a hook's warp is not applied): no site
        self.in_functions: set[tuple[str, int]] = set()

    def source(self, t: torch.Tensor) -> int:
        return self._add("input", [], t, NCHW if t.dim() == 4 else None)

    def _add(self, name: str, inputs: list[int], value, layout, own: Stride | None = None,
             first: int | None = None) -> int:
        op = _Op(len(self.ops), name, inputs, value, self.stack[-1] if self.stack else "", layout, own, first)
        self.ops.append(op)
        for i in inputs:
            self.ops[i].users.append(op.index)
        if isinstance(value, torch.Tensor):
            self.producer[id(value)] = op.index
            if id(value) not in self.born:  # an in-place op (relu_) hands back an object that already existed
                self.born[id(value)] = op.index
                self.keep.append(value)
        return op.index

    def record(self, name: str, args: tuple, kwargs: dict, out) -> None:
        read = [self.producer[id(t)] for t in _tensors((args, kwargs)) if id(t) in self.producer]
        if not read:
            return  # constants and parameters only: not data flow from the inputs
        inputs = list(dict.fromkeys(read))
        written = list(_tensors(out))
        if not written and name == "setitem" and args and isinstance(args[0], torch.Tensor):
            written = [args[0]]  # x[...] = y writes into x: its new value reads y
        own = first = None
        if any(t.dim() == 4 for t in written):
            own = call_stride(name, args, kwargs)
            lead = args[0] if args else None
            first = self.producer.get(id(lead)) if isinstance(lead, torch.Tensor) else None
        for t in written:
            self._add(name, inputs, t, self._layout(name, args, inputs, t), own, first)

    def _layout(self, name: str, args: tuple, inputs: list[int], t: torch.Tensor):
        if t.dim() != 4:
            return None
        if name in _CONVS:
            return NCHW
        base = next((self.ops[i].layout for i in inputs if self.ops[i].layout is not None), NCHW)
        perm = dims_permutation(name, args[1:])
        return tuple(base[d] for d in perm) if perm is not None else base

    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        out = meta_rule(func, args, kwargs)
        if out is None:
            out = func(*args, **kwargs)
        self.record(_name(func), args, kwargs, out)
        return out


def _hook_calls(meta: nn.Module, rec: _Recording) -> list:
    names = {m: q for q, m in meta.named_modules() if q}
    counts: dict[int, int] = {}
    starts: list[int] = []

    def before(mod, args):
        rec.stack.append(names[mod])
        starts.append(len(rec.ops))

    def after(mod, args, out):
        rec.stack.pop()
        k = counts.get(id(mod), 0)
        counts[id(mod)] = k + 1
        # the op that wrote the returned tensor now: an in-place op after the call writes the same tensor again
        wrote = born = None
        if isinstance(out, torch.Tensor) and out.dim() == 4:
            wrote, born = rec.producer.get(id(out)), rec.born.get(id(out))
        rec.calls.append((names[mod], k, starts.pop(), len(rec.ops), wrote, born))
        if inside_function():  # run again by the Function's backward (a re-entrant checkpoint), where no hook warps
            rec.in_functions.add((names[mod], k))

    # ``after`` first of the module's forward hooks, as splice's site hook: it sees what the forward returned
    return [h for m in names
            for h in (m.register_forward_pre_hook(before), m.register_forward_hook(after, prepend=True))]


def _opaque_leaves(meta: nn.Module, real: nn.Module, rule: LeafRule, rec: _Recording) -> dict[nn.Module, Any]:
    """Leaves run their real twin on zeros and are recorded as one operation (``--leaf`` reaches this pass).

    Returns each patched module's own instance ``forward`` (``_NONE``: none), to put back after the run.
    """
    real_modules = dict(real.named_modules())
    leaves, rec.in_leaves = stepped_leaves(meta, rule)
    patched: dict[nn.Module, Any] = {}
    for q, m in leaves:
        patched[m] = m.__dict__.get("forward", _NONE)
        m.forward = _leaf_forward(real_modules[q], type(m).__name__, rec)
    return patched


_NONE = object()


def _leaf_forward(original: nn.Module, name: str, rec: _Recording):
    def forward(*args, **kwargs):
        out = run_for_real(original, args, kwargs)  # reads zeros, not recorded tensors: nothing is recorded
        rec.record(name, args, kwargs, out)
        return out
    return forward


def _sites(rec: _Recording) -> dict[int, tuple[str, int]]:
    """op index -> (qualname, call) of the innermost module call that creates it and hands it back alone.

    The tensor object must be born inside the call: a call that hands back one that existed before (an in-place
    ``ReLU(inplace=True)``, an eval-mode ``Dropout``, ``x.contiguous()``) is no site, since a hook replaces only
    the value returned, while older references to that object (``skip = x`` kept before the call) stay unwarped.
    """
    found: dict[int, tuple[str, int]] = {}
    span: dict[int, int] = {}
    for qualname, k, start, end, i, born in rec.calls:
        if i is None or born is None or qualname in rec.in_leaves or (qualname, k) in rec.in_functions:
            continue
        op = rec.ops[i]
        if not (start <= born <= i < end) or any(u < end for u in op.users):
            continue  # made before the call, or also read inside it: a hook would not replace it everywhere
        if end - start < span.get(i, 1 << 62):
            found[i], span[i] = (qualname, k), end - start
    return found


def _graph(rec: _Recording, outputs: list[int]) -> tuple[fx.Graph, dict, dict]:
    """The recorded data flow as an fx graph (for the cut analysis), with each node's meta value."""
    graph = fx.Graph()
    nodes: dict[int, fx.Node] = {}
    values: dict[fx.Node, Any] = {}
    for op in rec.ops:
        args = tuple(nodes[i] for i in op.inputs)
        node = graph.placeholder(f"in{op.index}") if op.name == "input" else graph.call_function(_step, args)
        nodes[op.index] = node
        values[node] = op.value
    graph.output(tuple(nodes[i] for i in outputs))
    return graph, nodes, values


def _step(*args):  # the target of every recorded operation in the analysis graph (never called)
    raise NotImplementedError


def _record(model: nn.Module, args: tuple, kwargs: dict, rule: LeafRule, meta: nn.Module | None = None,
            readers: list[nn.Module] | None = None) -> tuple[_Recording, Any]:
    meta = meta_module(model) if meta is None else meta
    rec = _Recording()
    patched = _opaque_leaves(meta, model, rule, rec)
    handles = _hook_calls(meta, rec)
    args = tuple(to_meta(a) for a in args)
    kwargs = {k: to_meta(v) for k, v in kwargs.items()}
    for t in args:
        if isinstance(t, torch.Tensor):
            rec.source(t)
    mods = list(meta.modules())
    reads: list[nn.Module] = []
    try:
        with spying(mods, reads) as spied, torch.no_grad(), torch.device(META), rec, functions_watched(), \
                warnings.catch_warnings():
            # a re-entrant checkpoint says its inputs need no gradient: splice's own run, not the user's
            warnings.filterwarnings("ignore", message="None of the inputs have requires_grad", category=UserWarning)
            out = meta(*args, **kwargs)
    finally:
        for h in handles:
            h.remove()
        for m, own in patched.items():  # the copy can run again: leaves back to their own forward
            if own is _NONE:
                del m.forward
            else:
                m.forward = own
    if readers is not None:
        readers.extend(dict.fromkeys(reads) if spied else [meta])
    return rec, out


def recorded_entries(model: nn.Module, args: tuple, kwargs: dict, rule: LeafRule,
                      counts: dict[str, int] | None = None, *, meta: nn.Module | None = None,
                      readers: list[nn.Module] | None = None) -> list[Entry]:
    """Entries for the points a forward hook reaches, from one recorded meta forward (raises if it fails).

    ``counts``, when given, receives how often each module (by qualname) was called in that forward.
    ``meta`` is the meta copy of ``model`` to run (default: a new one); ``readers``, when given, receives the
    modules of that copy that read their ``training`` flag (the root alone when the flags could not be watched).
    """
    rec, out = _record(model, args, kwargs, rule, meta, readers)
    if counts is not None:
        for qualname, *_ in rec.calls:
            counts[qualname] = counts.get(qualname, 0) + 1
    found = list(_tensors(out))
    if not found and out is not None and not isinstance(out, (Mapping, Sequence)):
        raise UnsupportedOutput(f"{type(model).__name__} returns {type(out).__name__}, which holds no tensors splice "
                                f"can find; splice supports outputs that are {SUPPORTED_OUTPUTS}: return one of those "
                                f"(make {type(out).__name__} a @dataclass, say)")
    outputs = [rec.producer[id(t)] for t in found if id(t) in rec.producer]
    graph, nodes, values = _graph(rec, list(dict.fromkeys(outputs)))
    cuts, joins = cut_analysis(graph, values)
    sites = _sites(rec)
    conv_up = [False] * len(rec.ops)
    for op in rec.ops:
        conv_up[op.index] = op.name in _CONVS or any(conv_up[i] for i in op.inputs)
    conv_down = [False] * len(rec.ops)
    for op in reversed(rec.ops):
        conv_down[op.index] = any(rec.ops[u].name in _CONVS or conv_down[u] for u in op.users)
    index = {node: i for i, node in nodes.items()}
    names = _names(rec, sites)
    strides = _strides(rec)
    entries = []
    for op in rec.ops:
        is_input = op.index == 0
        if not (is_input or op.index in sites) or op.layout != NCHW:
            continue
        join = joins.get(nodes[op.index])
        join_name = None if join is None else names.get(index[join]) or _owner_name(rec.ops[index[join]])
        entries.append(Entry(
            name="input" if is_input else names[op.index], module="" if is_input else sites[op.index][0],
            kind="input" if is_input else "activation", shape=tuple(int(s) for s in op.value.shape[1:]),
            cut=nodes[op.index] in cuts, join=join_name, between_convs=conv_up[op.index] and conv_down[op.index],
            site=None if is_input else sites[op.index],
            stride=strides[op.index][0] if op.index in strides else None,
        ))
    return entries


def _strides(rec: _Recording) -> dict[int, tuple]:
    """Each recorded op's (stride, (H, W)) from the inputs (:func:`splice.graph.strides.cumulative`)."""
    sources, steps = [], []
    for op in rec.ops:
        hw = spatial(op.value, op.layout) if op.layout is not None else None
        if op.name == "input":
            sources.append((op.index, hw))
        else:
            own = op.own if op.layout == NCHW else None
            steps.append((op.index, op.inputs, hw, own, op.first))
    return cumulative(steps, sources)


def _owner_name(op: _Op) -> str:
    owner = op.owner.replace(".", "_")
    return f"{owner}_{op.name}" if owner else op.name


def _names(rec: _Recording, sites: dict[int, tuple[str, int]]) -> dict[int, str]:
    names: dict[int, str] = {}
    taken = {"input"}
    for i in sorted(sites):
        qualname, k = sites[i]
        names[i] = site_name(module_stem(qualname), k, taken)
    return names
