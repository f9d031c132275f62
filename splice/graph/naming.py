"""Stable point names and lookup by name.

A point is named after its fx node, which fx derives from the module qualname
(``layer1_0_relu``, with ``_1``, ``_2`` for repeated calls); functions called
inside a module's ``forward`` are named after that module; the model input is
always ``input``.
"""

from __future__ import annotations

import re
from collections.abc import Iterable
from typing import Any

import torch.fx as fx
from torch import nn

from ..errors import PointError, suggest
from .tracing import check_model, trace

__all__ = ["point_names", "find_point"]


def names_by_node(graph: fx.Graph) -> dict[fx.Node, str]:
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


def point_names(gm: fx.GraphModule | fx.Graph) -> dict[str, fx.Node]:
    """``{point name: fx node}`` for a traced module or its graph (the names :func:`points` prints)."""
    graph = gm if isinstance(gm, fx.Graph) else gm.graph
    return {name: node for node, name in names_by_node(graph).items() if node.op not in ("get_attr", "output")}


def find_point(model_or_gm: nn.Module, name: str, *, leaves: Iterable[Any] = ()) -> fx.Node:
    """Return the fx node of point ``name`` in a traced graph.

    A GraphModule is searched as it is (``leaves`` is then ignored); any other
    module is traced first with :func:`trace`. ``"input"`` is the first
    placeholder. Unknown names raise :class:`~splice.errors.PointError` with the
    closest matches.
    """
    check_model(model_or_gm, "find_point()")
    gm = model_or_gm if isinstance(model_or_gm, fx.GraphModule) else trace(model_or_gm, leaves=leaves)
    names = point_names(gm)
    node = names.get(name) if isinstance(name, str) else None
    if node is None:
        hint = suggest(str(name), names)
        raise PointError(
            f"unknown point {name!r}{hint if hint else ';'} Run 'splice points MODEL' to list them."
        )
    return node


def describe_node(node: fx.Node, root: nn.Module) -> str:
    if node.op == "call_module":
        return f"module '{node.target}' ({type(root.get_submodule(node.target)).__name__})"
    where = enclosing_module(node)
    fn = getattr(node.target, "__name__", str(node.target))
    return f"{node.op.replace('call_', '')} {fn!r}" + (f" in module '{where}'" if where else "")


def enclosing_module(node: fx.Node) -> str:
    stack = node.meta.get("nn_module_stack")
    if not stack:
        return ""
    return next(reversed(stack.values()))[0]
