"""Train and eval modes under tracing: spies that record which modules' ``training`` flags traced code reads, the
flags set and put back, and how two traced graphs differ."""

from __future__ import annotations

import inspect
from collections.abc import Iterator
from contextlib import contextmanager

import torch.fx as fx
from torch import nn

__all__ = ["spying", "original_class", "describe_difference", "modes_restored", "set_training", "unspy_meta"]


def _can_spy(cls: type) -> bool:
    # creating a subclass runs __init_subclass__ and metaclass code, which may
    # register the class somewhere: only spy on plain classes
    return type(cls) is type and not any("__init_subclass__" in c.__dict__ for c in cls.__mro__[:-1])


def original_class(cls: type) -> type:
    return cls.__dict__.get("_splice_original", cls)


@contextmanager
def spying(mods: list[nn.Module], reads: list[nn.Module]) -> Iterator[bool]:
    """Temporarily give each module a class whose ``training`` property records reads.

    A read is recorded as the module whose code made it: the nearest caller frame whose ``self`` is one of
    ``mods`` (``Block.forward`` reading ``self.bn.training`` is ``Block``'s read: its own code takes the other
    path), else the module whose flag was read. Yields False (and changes nothing) if some module's class cannot
    take part.
    """
    spied = {id(m) for m in mods}

    def _reader(owner: nn.Module) -> nn.Module:
        frame = inspect.currentframe()
        frame = frame.f_back.f_back if frame is not None and frame.f_back is not None else None  # past _get
        for _ in range(64):
            if frame is None:
                break
            me = frame.f_locals.get("self")
            if isinstance(me, nn.Module) and id(me) in spied:
                return me
            frame = frame.f_back
        return owner

    def _get(self):
        reads.append(_reader(self))
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
    """Each node's name, op, target and arguments; constants the tracer lifted are named by their order in the
    graph, as a second trace of the same root numbers its constants after the first's."""
    renamed: dict[str, str] = {}
    constants = (n for n in graph.nodes if n.op == "get_attr" and n.target.startswith("_tensor_constant"))
    for i, n in enumerate(constants):
        renamed[n.name] = renamed[n.target] = f"<constant {i}>"

    def name(node: fx.Node) -> str:
        return renamed.get(node.name, node.name)

    return [
        (name(n), n.op, renamed.get(n.target, n.target) if isinstance(n.target, str) else n.target,
         fx.node.map_arg(n.args, name), fx.node.map_arg(n.kwargs, name))
        for n in graph.nodes
    ]


def describe_difference(eval_graph: fx.Graph, train_graph: fx.Graph) -> str | None:
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


@contextmanager
def modes_restored(mods: list[nn.Module]) -> Iterator[None]:
    """Every module's ``training`` flag as it was when the block began, whatever the block set."""
    saved = [(m, m.__dict__.get("training", True)) for m in mods]
    try:
        yield
    finally:
        for m, flag in saved:
            m.__dict__["training"] = flag


def set_training(mods: list[nn.Module], flag: bool) -> None:
    for m in mods:
        m.__dict__["training"] = flag


def unspy_meta(graph: fx.Graph) -> None:
    """Put the real classes back into ``nn_module_stack`` metadata (the tracer saw spies)."""
    for n in graph.nodes:
        stack = n.meta.get("nn_module_stack")
        if stack:
            n.meta["nn_module_stack"] = type(stack)(
                (k, (q, original_class(t))) for k, (q, t) in stack.items()
            )
