"""From a traced graph with meta values to point entries: 4-D NCHW activations, convs around them.

An entry is an (N, C, H, W) activation (tensors that a permute or transpose
turned channels-last, as in convnext blocks, are not entries) with its cut
and join, and whether it sits between convolutions (a conv upstream or the
node itself, and a conv downstream). :mod:`splice.graph.listing` turns
entries into :class:`~splice.graph.Point` records.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import torch
import torch.fx as fx
from torch import nn

from .cuts import cut_analysis
from .naming import enclosing_module, names_by_node
from .strides import Stride, call_stride, cumulative, holds_tensor, module_stride, spatial

__all__: list[str] = []

CONV_MODULES = (nn.Conv2d, nn.ConvTranspose2d)
_CONV_FUNCTIONS = frozenset({torch.conv2d, torch.nn.functional.conv2d, torch.conv_transpose2d,
                             torch.nn.functional.conv_transpose2d})


@dataclass
class Entry:
    name: str
    module: str
    kind: str
    shape: tuple[int, int, int]
    cut: bool
    join: str | None
    between_convs: bool
    site: tuple[str, int] | None = None  # hooks: (module qualname, call index); None for fx and the input
    stride: Stride | None = None  # the cumulative stride from the input (splice.graph.strides); None: not followed
    calls: int | None = None  # hooks: how often the site's module runs in one forward at this input; None: unknown


def _is_conv_node(node: fx.Node, modules: dict[str, nn.Module]) -> bool:
    if node.op == "call_module":
        mod = modules[node.target]
        # a leaf that contains a conv counts as one
        return isinstance(mod, CONV_MODULES) or (
            bool(mod._modules) and any(isinstance(m, CONV_MODULES) for m in mod.modules())
        )
    return node.op == "call_function" and node.target in _CONV_FUNCTIONS


NCHW = (0, 1, 2, 3)


def dims_permutation(name: str, dims: tuple) -> tuple[int, ...] | None:
    """Output dim j = input dim perm[j] for a 4-D ``permute`` or a ``transpose`` (``dims``: the call's arguments
    after the tensor), else None. The fx, recorded and exported views all name their ops this way."""
    if name == "permute":
        dims = dims[0] if len(dims) == 1 and isinstance(dims[0], (list, tuple)) else dims
        if len(dims) == 4 and all(isinstance(d, int) for d in dims):
            return tuple(d % 4 for d in dims)
    elif name in ("transpose", "swapaxes", "swapdims") and len(dims) == 2 and all(isinstance(d, int) for d in dims):
        perm = list(NCHW)
        a, b = dims[0] % 4, dims[1] % 4
        perm[a], perm[b] = perm[b], perm[a]
        return tuple(perm)
    return None


def _permutation(node: fx.Node) -> tuple[int, ...] | None:
    """The dims of a permute/transpose node (output dim j = input dim perm[j]), else None."""
    if node.op not in ("call_method", "call_function"):
        return None
    name = node.target if node.op == "call_method" else getattr(node.target, "__name__", "")
    return dims_permutation(name, node.args[1:])


def layouts_of(nodes: list, values: Mapping, is_conv: Mapping, permutation: Callable = _permutation) -> dict:
    """For each 4-D node, which input axis each of its axes holds (``NCHW`` when unpermuted).

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
        base = layout[source] if source is not None and not is_conv[n] else NCHW
        perm = permutation(n) if source is not None else None
        layout[n] = tuple(base[d] for d in perm) if perm is not None else base
    return layout


def module_stem(qualname: str) -> str:
    """The point name of a module's output, as fx names a call of it: dots become underscores, and a name that
    would start with a digit (a Sequential's ``0.1``) starts with ``_`` (``_0_1``), so that the hooks mechanism
    and the graph rewrite name the same module alike."""
    stem = qualname.replace(".", "_")
    return f"_{stem}" if stem[:1].isdigit() else stem


def site_name(stem: str, call: int, taken: set[str]) -> str:
    """``stem`` for a module's first call, ``stem_K`` for call K; ``stem_K_J`` when another qualname took that
    (``a_1`` and the second call of ``a`` meet). Adds the name to ``taken``."""
    name = stem if call == 0 else f"{stem}_{call}"
    j = 1
    while name in taken:
        name, j = f"{stem}_{call}_{j}", j + 1
    taken.add(name)
    return name


def op_name(target: Any) -> str:
    """``max_pool2d``, ``getitem``: a function's or method's name without dunder marks, as the stride rules key it."""
    name = target if isinstance(target, str) else getattr(target, "__name__", "")
    return name[2:-2] if name.startswith("__") and name.endswith("__") and len(name) > 4 else name


def _own_stride(n: fx.Node, modules: dict[str, nn.Module]) -> Stride | None:
    if n.op == "call_module":
        return module_stride(modules[n.target])
    if n.op in ("call_function", "call_method"):
        return call_stride(op_name(n.target), n.args, n.kwargs)
    return None


def node_strides(nodes: list[fx.Node], modules: dict[str, nn.Module], values: Mapping, layouts: Mapping) -> dict:
    """Each fx node's (stride, (H, W)) from the graph's inputs (:func:`splice.graph.strides.cumulative`)."""
    def own_of(n: fx.Node) -> tuple:
        own = _own_stride(n, modules)
        return own, (n.args[0] if own is not None and n.args else None)

    return path_strides(nodes, values, layouts, skip=lambda n: n.op in ("get_attr", "output"), own_of=own_of)


def path_strides(nodes: list, values: Mapping, layouts: Mapping, *, skip: Callable[[Any], bool],
                 own_of: Callable[[Any], tuple]) -> dict:
    """Each node's (stride, (H, W)) along the graph (:func:`splice.graph.strides.cumulative`): the placeholders
    that hold tensors start it, ``own_of(node)`` gives an (N, C, H, W) node's own stride and the input it applies
    to (``(None, None)``: none known), and nodes that ``skip`` names take no part."""
    sources, steps = [], []
    for n in nodes:
        if skip(n):
            continue
        value = values.get(n)
        if not holds_tensor(value):
            continue
        layout = layouts.get(n)
        hw = spatial(value, layout)
        if n.op == "placeholder":
            sources.append((n, hw))
            continue
        own, first = own_of(n) if hw is not None and layout in (None, NCHW) else (None, None)
        steps.append((n, n.all_input_nodes, hw, own, first))
    return cumulative(steps, sources)


def graph_entries(graph: fx.Graph, modules: dict[str, nn.Module], values: dict[fx.Node, Any]) -> list[Entry]:
    nodes = list(graph.nodes)
    is_conv = {n: _is_conv_node(n, modules) for n in nodes}
    conv_up: dict[fx.Node, bool] = {}  # a conv upstream, or the node itself
    for n in nodes:
        conv_up[n] = is_conv[n] or any(conv_up[p] for p in n.all_input_nodes)
    conv_down: dict[fx.Node, bool] = {}  # a conv strictly downstream
    for n in reversed(nodes):
        conv_down[n] = any(is_conv[u] or conv_down[u] for u in n.users)
    cuts, joins = cut_analysis(graph, values)
    names = names_by_node(graph)
    layouts = layouts_of(nodes, values, is_conv)
    strides = node_strides(nodes, modules, values, layouts)
    entries = []
    for n in nodes:
        if n.op in ("get_attr", "output") or layouts.get(n) != NCHW:
            continue
        v = values[n]
        is_input = n.op == "placeholder" and names[n] == "input"
        module = n.target if n.op == "call_module" else ("" if is_input else enclosing_module(n))
        join = joins.get(n)
        entries.append(Entry(
            name=names[n], module=module, kind="input" if is_input else "activation",
            shape=tuple(int(s) for s in v.shape[1:]), cut=n in cuts,
            join=None if join is None else names[join],
            between_convs=conv_up[n] and conv_down[n], stride=strides[n][0] if n in strides else None,
        ))
    return entries
