"""Noticing activation checkpointing while fx traces a forward.

fx traces through :func:`torch.utils.checkpoint.checkpoint`: the checkpointed
function runs on proxies and its calls land in the graph, so the traced graph
keeps every activation the model's checkpointing meant to recompute (many
times the saved-for-backward memory). Every way into checkpointing (``checkpoint``
with ``use_reentrant`` True or False, ``checkpoint_sequential``, the curried
decorator, a library's wrapper that imported ``checkpoint`` into its own module)
ends in names of the :mod:`torch.utils.checkpoint` module looked up at call
time: ``_checkpoint_impl`` (torch 2.14), the generator of the non-reentrant
variant and ``CheckpointFunction`` (every release splice supports). While a
trace runs in this thread, :func:`checkpointing_refused` puts stand-ins under
those names that raise a :class:`~splice.errors.GraphError` saying so (and
remember it, for traced code that catches the error); other threads get
torch's own, and every name is put back when the last trace ends, an
exception included.
"""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Iterator
from typing import Any

import torch.utils.checkpoint as torch_checkpoint

from ..errors import GraphError

__all__: list[str] = []

# the module-level names of torch.utils.checkpoint every checkpointed call goes through, in one torch release or
# another; those a release lacks are skipped
_ENTRY_NAMES = ("_checkpoint_impl", "_checkpoint_without_reentrant_generator",
                "_checkpoint_without_reentrant_generator_impl")
_FUNCTION_CLASS = "CheckpointFunction"  # the reentrant variant, called as CheckpointFunction.apply(...)

CHECKPOINTING = "the forward uses activation checkpointing, which a traced graph would drop"

_lock = threading.Lock()
_tracing = threading.local()  # depth: this thread's traces in progress; seen: whether one met checkpointing
_active = [0]  # traces in progress in every thread, and with them the stand-ins in place
_originals: dict[str, Any] = {}


def _refused(original: Any) -> Any:
    """``original`` for other threads; in a thread that traces, a GraphError (remembered)."""
    def stand_in(*args, **kwargs):
        if getattr(_tracing, "depth", 0):
            _tracing.seen = True
            raise GraphError(CHECKPOINTING)
        return original(*args, **kwargs)
    return stand_in


def _install() -> None:
    for name in _ENTRY_NAMES:
        if callable(getattr(torch_checkpoint, name, None)):
            _originals[name] = getattr(torch_checkpoint, name)
            setattr(torch_checkpoint, name, _refused(_originals[name]))
    original = getattr(torch_checkpoint, _FUNCTION_CLASS, None)
    if isinstance(original, type):  # torch calls it as CheckpointFunction.apply(...), and nothing else of it
        _originals[_FUNCTION_CLASS] = original
        setattr(torch_checkpoint, _FUNCTION_CLASS,
                type(original.__name__, (), {"apply": staticmethod(_refused(original.apply))}))


def _restore() -> None:
    for name, value in _originals.items():
        setattr(torch_checkpoint, name, value)
    _originals.clear()


@contextlib.contextmanager
def checkpointing_refused() -> Iterator[None]:
    """For the length of the block, a call into activation checkpointing from this thread raises a
    :class:`~splice.errors.GraphError`; after the block, :func:`checkpointing_seen` says whether one did (even one the
    traced code caught)."""
    with _lock:
        if _active[0] == 0:
            _install()
        _active[0] += 1
    depth = getattr(_tracing, "depth", 0)
    if depth == 0:
        _tracing.seen = False
    _tracing.depth = depth + 1
    try:
        yield
    finally:
        _tracing.depth = depth
        with _lock:
            _active[0] -= 1
            if _active[0] == 0:
                _restore()


def checkpointing_seen() -> bool:
    """Whether the last :func:`checkpointing_refused` block of this thread met activation checkpointing."""
    return bool(getattr(_tracing, "seen", False))
