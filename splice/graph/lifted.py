"""Constants the fx tracer lifts (``_tensor_constant0``, ...): adopted by the GraphModule, and those that are
views of a buffer kept linked to it.

Code that reads ``self.index.view(-1)`` hands the tracer a real tensor, which it lifts as a constant. Traced on
the meta device (a folder rebuilt before its weights are adopted), that constant is a meta tensor; once the
buffers hold the folder's tensors, :func:`relink_lifted` takes the view again from them. The GraphModule keeps
only the attributes its graph reads, so the buffer a view came from is kept in it too (:func:`keep_view_sources`).
"""

from __future__ import annotations

from typing import Any

import torch
import torch.fx as fx
from torch import nn

__all__ = ["relink_lifted"]


def adopt_lifted(graph: fx.Graph, traced: nn.Module, work: nn.Module) -> list[str]:
    """Copy the constants the tracer lifted onto ``traced`` (``_tensor_constant0``, ...) onto ``work``.

    Returns the names of the lifted tensors: the GraphModule registers them as
    buffers, and they must stay out of its state dict (every trace makes them
    again, so a folder rebuilds them and its base part is the source's state).
    """
    lifted = []
    for node, owner_path, owner, leaf in _attribute_reads(graph, work):
        if hasattr(owner, leaf):
            continue
        value = getattr(traced.get_submodule(owner_path) if owner_path else traced, leaf)
        setattr(owner, leaf, value)
        if isinstance(value, torch.Tensor) and not owner_path:
            lifted.append(leaf)
    return lifted


def plain_tensor_targets(graph: fx.Graph, work: nn.Module) -> list[str]:
    """The ``get_attr`` targets of ``graph`` that are plain tensor attributes of ``work`` (``self.seen``, a counter
    kept as a tensor, not a buffer): the GraphModule registers them as buffers, and they must stay out of its state
    dict as they are out of the model's."""
    return [node.target for node, _, owner, leaf in _attribute_reads(graph, work)
            if isinstance(owner.__dict__.get(leaf), torch.Tensor)]


def _attribute_reads(graph: fx.Graph, work: nn.Module):
    """``(node, owner path, owner module of work, attribute name)`` for each ``get_attr`` node whose owner
    ``work`` has."""
    for node in graph.nodes:
        if node.op != "get_attr":
            continue
        owner_path, _, leaf = node.target.rpartition(".")
        try:
            owner = work.get_submodule(owner_path) if owner_path else work
        except AttributeError:
            continue
        yield node, owner_path, owner, leaf


_VIEWS = "_splice_lifted_views"  # on a GraphModule: {constant: (buffer, size, stride, offset in the buffer)}


def _buffer_views(twin: nn.Module, constants: dict[str, Any]) -> dict[str, tuple]:
    """The lifted constants that are views of one of ``twin``'s buffers (code that reads ``self.index.view(-1)``
    hands the tracer a real tensor), each with where it sits in that buffer."""
    owners = {id(b): (name, b) for name, b in twin.named_buffers()}
    views = {}
    for name, c in constants.items():
        base = c._base if isinstance(c, torch.Tensor) else None
        found = owners.get(id(base)) if base is not None else None
        if found is not None and found[1] is base:
            views[name] = (found[0], tuple(c.shape), tuple(c.stride()), c.storage_offset() - base.storage_offset())
    return views


def relink_lifted(gm: nn.Module) -> None:
    """Make each lifted constant that was a view of a buffer a view of that buffer again.

    A graph traced on the meta device lifts such a view as a meta tensor; once
    the buffers hold real tensors (a folder's weights adopted), the view is
    taken again from them, with the same size, stride and offset, so it holds
    what a trace of the real model would have lifted.
    """
    for name, (buffer, size, stride, offset) in getattr(gm, _VIEWS, {}).items():
        source = gm.get_buffer(buffer)
        if not source.is_meta and gm._buffers.get(name) is not None and gm._buffers[name].is_meta:
            gm._buffers[name] = source.as_strided(size, stride, source.storage_offset() + offset)


def keep_view_sources(gm: fx.GraphModule, work: nn.Module, twin: nn.Module, lifted: list[str]) -> None:
    """Record which of ``gm``'s ``lifted`` constants are views of one of ``twin``'s buffers, and give ``gm`` each
    such buffer (``work``'s, under the same name and persistence) that fx left out because the graph never reads
    it by name."""
    views = _buffer_views(twin, {name: getattr(gm, name) for name in lifted})
    if not views:
        return
    gm.__dict__[_VIEWS] = views
    for buffer, *_ in views.values():
        owner_path, _, leaf = buffer.rpartition(".")
        source = work.get_submodule(owner_path) if owner_path else work
        owner = gm
        for part in owner_path.split(".") if owner_path else ():
            child = owner._modules.get(part)
            if child is None:
                child = nn.Module()  # as fx does for a path it copies only part of
                owner.add_module(part, child)
            owner = child
        if owner._buffers.get(leaf) is None:
            owner.register_buffer(leaf, source._buffers[leaf],
                                  persistent=leaf not in source._non_persistent_buffers_set)


def buffer_states(root: nn.Module) -> dict[tuple[int, str], tuple[nn.Module, object, int]]:
    """Each buffer slot of ``root``'s modules: the module, the tensor and its version."""
    return {(id(m), name): (m, b, b._version if b is not None else -1)
            for m in root.modules() for name, b in m._buffers.items()}


_ATOMS = (int, float, bool, str, bytes, type(None))


def module_state(root: nn.Module, opaque=None) -> list:
    """What a trace could change on each module of ``root`` the tracer runs (``opaque(module)`` says it does not:
    a leaf is one call in the graph): its buffer slots, its tensor attributes, and its plain Python values (a step
    counter, a flag), with the version of each buffer."""
    state = []
    for m in root.modules():
        if opaque is not None and m is not root and opaque(m):
            continue
        tensors, plain = {}, {}
        for k, v in m.__dict__.items():
            if type(v) in _ATOMS:
                if k != "training":
                    plain[k] = v
            elif isinstance(v, torch.Tensor):
                tensors[k] = v
        buffers = {k: (b, -1 if b is None else b._version) for k, b in m._buffers.items()}
        state.append((m, buffers, tensors, plain))
    return state


def state_back(state: list) -> dict[nn.Module, str]:
    """Put back every buffer and tensor attribute a trace replaced (``self.seen += n`` leaves the Proxy of the
    update there), and name, per module, what the trace changed: a slot replaced, a buffer updated in place for
    real, a Python value changed. Such a change ran once, while tracing; the graph may not hold it."""
    changed: dict[nn.Module, str] = {}
    for m, buffers, tensors, plain in state:
        for k, (b, version) in buffers.items():
            if m._buffers.get(k) is not b:
                m._buffers[k] = b
                changed.setdefault(m, f"buffer {k!r}")
            elif b is not None and b._version != version:
                changed.setdefault(m, f"buffer {k!r}")
        for k, v in tensors.items():
            if m.__dict__.get(k) is not v:
                m.__dict__[k] = v
                changed.setdefault(m, f"attribute {k!r}")
        for k, v in plain.items():
            now = m.__dict__.get(k, v)
            if type(now) is not type(v) or (now is not v and now != v):
                m.__dict__[k] = v
                changed.setdefault(m, f"attribute {k!r}")
    return changed
