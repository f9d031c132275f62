"""The export view: points from a ``torch.export`` graph, when torch.fx cannot trace the model.

``torch.export`` (non-strict) runs the forward once on fake tensors, so Python
control flow is specialised on the static input shapes instead of failing.
Every node carries ``nn_module_stack``: which module calls it sits in (the
n-th call of a module is keyed ``...@n``). A warp can go where a module call
hands exactly one tensor back to its caller: a forward hook on that module
(:mod:`splice.hooks`) replaces the tensor at run time. Such a node is a point,
named as fx names a module call (``layer1_0_relu``, ``_1``, ``_2`` for the
second and third call); the input is ``input``. Cut analysis is the same
dominator analysis as for fx graphs (:mod:`splice.graph.cuts`), on the
exported data flow.

Forward hooks record what every module call really returned while the
program is exported (the same, single run), so a module that returns a tuple
or a list never becomes a point, however the graph looks.
"""

from __future__ import annotations

import contextlib
import io
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from ..compare import flatten_outputs, map_tensors
from ..errors import debug_shown
from ..copies import private_buffers
from .cuts import cut_analysis
from .entries import NCHW, Entry, dims_permutation, layouts_of, module_stem, path_strides, site_name
from .shapes import model_device
from .strides import call_stride

__all__ = ["export_quietly"]

# the loggers that write a failed torch.export's guard, and the dynamo exporter's steps, on the terminal (the error
# says enough)
_EXPORT_LOGGERS = ("torch.fx.experimental.symbolic_shapes", "torch.export", "torch._export", "torch._dynamo",
                   "torch.onnx")


@contextlib.contextmanager
def _loggers_quiet(names: tuple[str, ...]):
    import logging

    loggers = [logging.getLogger(n) for n in names]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.ERROR)
    try:
        yield
    finally:
        for lg, level in zip(loggers, levels):
            lg.setLevel(level)


@contextlib.contextmanager
def quiet_export(*, always: bool = False):
    """torch.export's (and the dynamo ONNX exporter's) warnings, logs and what they print to stderr kept off the
    terminal: on a forward it cannot export torch logs the guard and prints the graph so far, and the reason
    reaches the user as one line in splice's error instead. Shown under ``--debug`` (:func:`~splice.errors.debugging`)
    unless ``always``."""
    if debug_shown() and not always:
        yield
        return
    with warnings.catch_warnings(), _loggers_quiet(_EXPORT_LOGGERS), contextlib.redirect_stderr(io.StringIO()):
        warnings.simplefilter("ignore")
        yield


def export_quietly(twin: nn.Module, args: tuple, kwargs: dict | None = None, dynamic_shapes=None):
    """``torch.export.export(twin, args, kwargs, strict=False, dynamic_shapes=...)`` with nothing on the terminal
    (:func:`quiet_export`, even under ``--debug``: splice tries it to learn about the model); raises what it raises.
    ``twin`` is splice's own copy (the export runs its forward).
    """
    with quiet_export(always=True):
        return torch.export.export(twin, args, kwargs or {}, strict=False, dynamic_shapes=dynamic_shapes)

_CONV_OPS = frozenset({"conv2d", "convolution", "_convolution", "conv_transpose2d", "cudnn_convolution"})


@dataclass(frozen=True)
class _Site:
    """The ``call``-th call (from 0) of module ``module`` (qualname) in one forward of the scope."""

    module: str
    call: int


class _Recorder:
    """Forward hooks that note, per module call, the shape of a 4-D tensor output (``None`` for anything else).

    A call that hands back a tensor object made outside it (one of its own inputs, an in-place
    ``ReLU(inplace=True)``, an eval-mode ``Dropout``, ``x.contiguous()``, or any tensor a module call took or
    returned before) is noted ``None`` too: a hook replaces only the value returned, and the older references to
    that object would stay unwarped. The exported graph cannot tell: it is functional, without aliases.
    """

    def __init__(self, root: nn.Module):
        self.outputs: dict[tuple[str, int], tuple[int, ...] | None] = {}
        self.calls: dict[int, int] = {}
        self.names = {id(m): q for q, m in root.named_modules() if q}
        # every tensor a module call took or gave: (when it was first seen, itself, kept so no id is reused)
        self.seen: dict[int, tuple[int, torch.Tensor]] = {}
        self.starts: list[int] = []  # how many tensors had been seen when each running call began
        root.register_forward_pre_hook(self._reset)
        for m in root.modules():
            if m is not root:
                m.register_forward_pre_hook(self._enter)
                m.register_forward_hook(self._record, prepend=True)  # first, as splice's site hook

    def _reset(self, module, args):
        self.outputs.clear()
        self.calls.clear()
        self.seen.clear()
        self.starts.clear()
        self._note(args)

    def _note(self, value) -> None:
        for t in flatten_outputs(value).values():
            self.seen.setdefault(id(t), (len(self.seen), t))

    def _enter(self, module, args):
        self._note(args)
        self.starts.append(len(self.seen))

    def _record(self, module, args, output):
        start = self.starts.pop() if self.starts else 0
        k = self.calls.get(id(module), 0)
        self.calls[id(module)] = k + 1
        fresh = isinstance(output, torch.Tensor) and self.seen.get(id(output), (start,))[0] >= start
        shape = tuple(output.shape) if fresh and output.dim() == 4 else None
        self.outputs[(self.names[id(module)], k)] = shape
        self._note(output)


def _op(node) -> str:
    target = node.target
    name = getattr(target, "_opname", None) or getattr(target, "__name__", str(target))
    return name.split(".")[0]


def _calls(node) -> list[tuple[str, int]]:
    out = []
    for key, value in (node.meta.get("nn_module_stack") or {}).items():
        call = int(key.rsplit("@", 1)[1]) if "@" in key else 0
        out.append((value[0], call))
    return out


def _sites(nodes: list, recorded: Mapping) -> dict[Any, _Site]:
    """node -> the innermost module call that hands back exactly that node (and returned a 4-D tensor of its shape)."""
    bodies: dict[tuple[str, int], list] = {}
    for n in nodes:
        for call in _calls(n):
            bodies.setdefault(call, []).append(n)
    found: dict[Any, _Site] = {}
    depth: dict[Any, int] = {}
    for (qualname, call), body in bodies.items():
        if not qualname:
            continue  # the root itself: its outputs are the model outputs
        inside = set(body)
        leaving = [n for n in body if any(u not in inside for u in n.users)]
        if len(leaving) != 1:
            continue
        n = leaving[0]
        val = n.meta.get("val")
        shape = recorded.get((qualname, call))
        if shape is None or not isinstance(val, torch.Tensor) or tuple(val.shape) != shape:
            continue
        d = qualname.count(".") + 1
        if d > depth.get(n, -1):
            found[n], depth[n] = _Site(qualname, call), d
    return found


def _names(nodes: list, user_inputs: set[str], sites: Mapping) -> dict[Any, str]:
    names: dict[Any, str] = {}
    taken: set[str] = set()
    first = True
    for n in nodes:
        if n.op == "placeholder":
            if n.name in user_inputs:
                names[n] = "input" if first else n.name
                taken.add(names[n])
                first = False
            continue
        site = sites.get(n)
        if site is None:
            continue
        names[n] = site_name(module_stem(site.module), site.call, taken)
    return names


def _node_name(n) -> str:
    """A readable name for a node that is not a point (a join): its owner module and op, ``layer1_0_add``."""
    calls = _calls(n)
    owner = calls[-1][0].replace(".", "_") if calls and calls[-1][0] else ""
    return f"{owner}_{_op(n)}" if owner else _op(n)


def _permutation(n) -> tuple[int, ...] | None:
    return dims_permutation(_op(n), n.args[1:])


def _export(model: nn.Module, args: tuple, kwargs: dict):
    """(program, recorded module outputs) of an eval-mode twin of ``model``; raises what torch.export raises."""
    twin = private_buffers(model)
    for m in twin.modules():
        m.__dict__["training"] = False
    recorder = _Recorder(twin)
    return export_quietly(twin, _as_examples(args, twin), _as_examples(kwargs, twin)), recorder.outputs


def _as_examples(value: Any, model: nn.Module) -> Any:
    """Meta tensors as uninitialised real ones of the same shape and dtype on ``model``'s device (torch.export
    needs real example inputs, but reads only their shapes and dtypes); anything else as it is."""
    device = model_device(model)
    return map_tensors(value, lambda v: torch.empty(v.shape, dtype=v.dtype, device=device) if v.is_meta else v)


def _flows(nodes: list, is_conv: Mapping) -> tuple[dict, dict]:
    up: dict = {}  # a conv upstream, or the node itself
    for n in nodes:
        up[n] = is_conv[n] or any(up[p] for p in n.all_input_nodes)
    down: dict = {}  # a conv strictly downstream
    for n in reversed(nodes):
        down[n] = any(is_conv[u] or down[u] for u in n.users)
    return up, down


def export_entries(model: nn.Module, args: tuple, kwargs: dict, counts: dict[str, int] | None = None) -> list[Entry]:
    """Entries for the points of ``model`` a forward hook can reach, from its exported program.

    ``counts``, when given, receives how often each module (by qualname) was called in that forward.
    """
    program, recorded = _export(model, args, kwargs)
    if counts is not None:
        for qualname, _ in recorded:
            counts[qualname] = counts.get(qualname, 0) + 1
    graph = program.graph
    nodes = list(graph.nodes)
    user_inputs = set(program.graph_signature.user_inputs)
    # parameters and buffers are placeholders too: only the user's inputs start the data flow
    values = {n: n.meta.get("val") for n in nodes if n.op != "placeholder" or n.name in user_inputs}
    sites = _sites(nodes, recorded)
    names = _names(nodes, user_inputs, sites)
    is_conv = {n: n.op == "call_function" and _op(n) in _CONV_OPS for n in nodes}
    up, down = _flows(nodes, is_conv)
    cuts, joins = cut_analysis(graph, values)
    layouts = layouts_of(nodes, values, is_conv, _permutation)
    strides = _strides(nodes, values, layouts)
    entries = []
    for n in nodes:
        if n not in names or layouts.get(n) != NCHW:
            continue
        is_input = names[n] == "input"
        if not is_input and n not in sites:
            continue  # another input of the model: a hook cannot reach it
        join = joins.get(n)
        site = None if is_input else sites[n]
        entries.append(Entry(
            name=names[n], module="" if is_input else site.module, kind="input" if is_input else "activation",
            shape=tuple(int(s) for s in values[n].shape[1:]), cut=n in cuts,
            join=None if join is None else names.get(join) or _node_name(join),
            between_convs=up[n] and down[n], site=None if site is None else (site.module, site.call),
            stride=strides[n][0] if n in strides else None,
        ))
    return entries


def _strides(nodes: list, values: Mapping, layouts: Mapping) -> dict:
    """Each exported node's (stride, (H, W)) from the user's inputs (:func:`splice.graph.strides.cumulative`);
    parameters and buffers are no sources."""
    def own_of(n) -> tuple:
        return (call_stride(_op(n), n.args, n.kwargs),
                n.args[0] if n.args and isinstance(n.args[0], torch.fx.Node) else None)

    return path_strides(nodes, values, layouts, own_of=own_of,
                        skip=lambda n: n.op == "output" or (n.op == "placeholder" and n not in values))
