"""Cut analysis: which points every input-to-output path passes through.

The data-flow graph runs from the input to the output node (which gathers
every model output). A point is a *cut* when every path from the input to the
outputs passes through it (for a model with several inputs: the first,
``input``, whose images the warps move, and the paths of the others into
them; a second input that reaches the outputs apart from the first's paths,
such as a detector backbone's pixel mask, does not take the cuts of the first
away; nor does a vector per sample, (N, K): metadata added to the pooled
features has no pixels a warp could misalign, while a mask (N, H, W) or a
second image has; and another input's path that meets the first's only where
those hold no pixels any more, (N, C) after a pooling, is not counted
either): it dominates the output node and post-dominates
the input (Cooper, Harvey & Kennedy's iterative dominator algorithm, forwards
and backwards). A point that is not a cut but lies between a fork and the cut
where the paths meet again is *in a branch*; its *join* is that meeting node
(the ``add`` of a residual block, the ``cat`` of a dense block). A point whose
paths only meet at the model outputs (one head of a two-headed model) is
neither.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import torch
import torch.fx as fx

from ..compare import is_dataclass_instance

__all__: list[str] = []

_SOURCE = object()  # virtual source when paths from several inputs meet those of the first


def _reached(graph: fx.Graph, sources: list, carries: set) -> set:
    """The tensor-carrying nodes reachable from ``sources`` (themselves included)."""
    reach = set(sources)
    for n in graph.nodes:
        if n in carries and n not in reach and any(p in reach for p in n.all_input_nodes):
            reach.add(n)
    return reach


def _has_tensor(value: Any) -> bool:
    if isinstance(value, torch.Tensor):
        return True
    if isinstance(value, (list, tuple)):
        return any(_has_tensor(v) for v in value)
    if isinstance(value, dict):
        return any(_has_tensor(v) for v in value.values())
    if is_dataclass_instance(value):  # a model output such as @dataclass class Out: logits: Tensor
        return any(_has_tensor(getattr(value, f.name, None)) for f in dataclasses.fields(value))
    return False


def _has_pixels(value: Any) -> bool:
    """Whether an input may be laid out in pixels: two or more dimensions per sample (a mask, an image)."""
    return not isinstance(value, torch.Tensor) or value.dim() >= 3


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


def cut_analysis(graph: fx.Graph, values: dict[fx.Node, Any]) -> tuple[set[fx.Node], dict[fx.Node, fx.Node]]:
    """Return the cut nodes and, for each non-cut node on an input-to-output path, its join.

    Only nodes that carry tensors count (shape queries such as ``x.size(0)`` are
    not data flow), get_attr constants are ignored, and so are nodes that are
    neither on the first input's paths to the output node (the sink) nor on
    another input's paths into them.
    """
    sink = next(n for n in reversed(graph.nodes) if n.op == "output")
    carries = {n for n in graph.nodes if n.op not in ("get_attr", "output") and _has_tensor(values.get(n))}
    sources = [n for n in graph.nodes if n.op == "placeholder" and n in carries]
    # after the first, a vector per sample (N, K) does not count: a warp cannot misalign what has no pixels
    sources = sources[:1] + [n for n in sources[1:] if _has_pixels(values.get(n))]
    live = {sink}  # reaches the outputs
    for n in reversed(graph.nodes):
        if n in carries and any(u in live for u in n.users):
            live.add(n)
    first = _reached(graph, sources[:1], carries) & live  # on the first input's paths to the outputs
    # every input's paths into those (the other image of a pair, a skip tensor), not what reaches the outputs
    # apart from them (a detection backbone's pixel mask), nor what meets them once they hold no pixels (metadata
    # added to pooled features, (N, C))
    keep = set(first)
    for n in reversed(graph.nodes):
        if n not in keep and n in carries and n in live and any(
                u in keep and (u not in first or any(p in first and _has_pixels(values.get(p))
                                                     for p in u.all_input_nodes)) for u in n.users):
            keep.add(n)
    keep &= _reached(graph, sources, carries)
    order: list[Any] = [n for n in graph.nodes if n in keep]
    if not first or not any(p in first for p in sink.all_input_nodes):
        return set(), {}
    preds: dict[Any, list] = {n: [p for p in n.all_input_nodes if p in keep] for n in order}
    preds[sink] = [p for p in sink.all_input_nodes if p in first]  # the outputs the first input reaches
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
