"""Noticing, while fx traces a forward, code with a backward of its own, and grad-mode or autocast blocks.

fx traces through Python: a custom :class:`torch.autograd.Function` runs its
``forward`` on proxies and the graph keeps those operations, not the
Function, so its own ``backward`` is gone (a gradient reversal then passes
gradients unreversed); activation checkpointing (``torch.utils.checkpoint``,
re-entrant or not, ``checkpoint_sequential``, timm's
``set_grad_checkpointing``) goes the same way, or through saved-tensor hooks
the graph leaves out, so the traced graph keeps every activation the model
meant to recompute. Both are reached through two public doors of
:mod:`torch.autograd`: ``Function.apply`` and entering a
:class:`torch.autograd.graph.saved_tensors_hooks` block (which also covers
``save_on_cpu``). A block that switches gradients or autocast
(``torch.no_grad``, ``enable_grad``, ``set_grad_enabled``, ``inference_mode``,
``autocast``) is run by the trace and left out of the graph alike: a backbone
the model froze gets gradients, an autocast block computes in float32. Their
doors are entering the block (and ``set_grad_enabled``'s constructor, which
switches at once). While a trace runs in this thread,
:func:`backward_refused` puts stand-ins at those doors that raise a
:class:`~splice.errors.GraphError` saying so (and remember it, for traced code
that catches the error); other threads go through torch's own, and both are
put back when the last trace ends, an exception included.
"""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Iterator
from typing import Any

import torch

from ..errors import GraphError

__all__: list[str] = []

OWN_BACKWARD = ("the forward has code with a backward of its own (activation checkpointing, a custom "
                "torch.autograd.Function, saved-tensor hooks), which a traced graph would drop")
GRAD_MODE = ("the forward switches gradients or autocast in a block of its own (torch.no_grad, enable_grad, "
             "set_grad_enabled, inference_mode, autocast), which a traced graph would drop")
# the public doors of a grad-mode or autocast block: (class, method); no_grad enters through set_grad_enabled's
# __init__ in some torch releases and on its own in others, so both are watched
_MODE_DOORS = (("no_grad", "__enter__"), ("enable_grad", "__enter__"), ("set_grad_enabled", "__init__"),
               ("set_grad_enabled", "__enter__"), ("inference_mode", "__enter__"), ("autocast", "__enter__"))

_lock = threading.Lock()
_tracing = threading.local()  # depth: this thread's traces in progress; seen: whether one met such code
_active = [0]  # traces in progress in every thread, and with them the stand-ins in place
_originals: dict[str, Any] = {}


def _meeting(reason: str = OWN_BACKWARD) -> bool:
    """In a thread that traces: remember the meeting (the first one's ``reason``) and say so."""
    if getattr(_tracing, "depth", 0):
        _tracing.seen = getattr(_tracing, "seen", None) or reason
        return True
    return False


def _mode_door(cls: type, name: str) -> None:
    original = vars(cls)[name]
    _originals[f"{cls.__name__}.{name}"] = (cls, name, original)

    def stand_in(self, *args, **kwargs):
        if _meeting(GRAD_MODE):
            raise GraphError(GRAD_MODE)
        return original(self, *args, **kwargs)

    setattr(cls, name, stand_in)


def _install() -> None:
    function, hooks = torch.autograd.Function, torch.autograd.graph.saved_tensors_hooks
    _originals["apply"] = vars(function)["apply"]  # a classmethod (a C-level one in recent torch)
    _originals["__enter__"] = vars(hooks)["__enter__"]
    apply = _originals["apply"]

    def stand_in_apply(cls, *args, **kwargs):
        if _meeting():
            raise GraphError(OWN_BACKWARD)
        if not getattr(_tracing, "watching", 0):
            return apply.__get__(None, cls)(*args, **kwargs)
        _tracing.inside = getattr(_tracing, "inside", 0) + 1  # a recorded forward: module calls in here are marked
        try:
            return apply.__get__(None, cls)(*args, **kwargs)
        finally:
            _tracing.inside -= 1

    enter = _originals["__enter__"]

    def stand_in_enter(self):
        if _meeting():
            raise GraphError(OWN_BACKWARD)
        return enter(self)

    function.apply = classmethod(stand_in_apply)
    hooks.__enter__ = stand_in_enter
    for cls_name, method in _MODE_DOORS:
        _mode_door(getattr(torch, cls_name), method)


def _restore() -> None:
    torch.autograd.Function.apply = _originals.pop("apply")
    torch.autograd.graph.saved_tensors_hooks.__enter__ = _originals.pop("__enter__")
    for key in [k for k in _originals if "." in k]:
        cls, name, original = _originals.pop(key)
        setattr(cls, name, original)


@contextlib.contextmanager
def _installed() -> Iterator[None]:
    with _lock:
        if _active[0] == 0:
            _install()
        _active[0] += 1
    try:
        yield
    finally:
        with _lock:
            _active[0] -= 1
            if _active[0] == 0:
                _restore()


@contextlib.contextmanager
def functions_watched() -> Iterator[None]:
    """For the length of the block, a custom autograd Function called from this thread runs as usual, and
    :func:`inside_function` says whether this thread is inside one (a re-entrant checkpoint recomputes what it
    runs in the backward pass, where a forward hook's warp is not applied again)."""
    with _installed():
        _tracing.watching = getattr(_tracing, "watching", 0) + 1
        try:
            yield
        finally:
            _tracing.watching -= 1


def inside_function() -> bool:
    """Whether this thread runs inside a custom autograd Function, within :func:`functions_watched`."""
    return getattr(_tracing, "inside", 0) > 0


@contextlib.contextmanager
def backward_refused() -> Iterator[None]:
    """For the length of the block, a call of a custom autograd Function or a saved-tensor hooks block entered from
    this thread raises a :class:`~splice.errors.GraphError`; after the block, :func:`backward_seen` says whether one
    was (even one the traced code caught)."""
    with _installed():
        depth = getattr(_tracing, "depth", 0)
        if depth == 0:
            _tracing.seen = None
        _tracing.depth = depth + 1
        try:
            yield
        finally:
            _tracing.depth = depth


def backward_seen() -> str | None:
    """What the last :func:`backward_refused` block of this thread met (:data:`OWN_BACKWARD` or
    :data:`GRAD_MODE`, the first one), or ``None``."""
    return getattr(_tracing, "seen", None)
