"""Pausing Python's cyclic garbage collector while splice builds many short-lived objects.

Tracing a model with torch.fx, or recording a meta-device forward, creates
hundreds of thousands of small objects (nodes, proxies, argument tuples) that
all stay alive until the pass ends. The cyclic collector runs every few
hundred allocations, and each full collection walks every live object of the
process, the model's modules and tensors included: on a deep network that
walk costs more than the pass itself, and frees nothing. :func:`gc_paused`
switches the collector off for the length of a ``with`` block and back on
(only if it was on) afterwards; reference counting still frees everything
that is not in a cycle, and the next collection after the block finds the rest.

Layer: the bottom floor; imports only the standard library.
"""

from __future__ import annotations

import gc
from collections.abc import Iterator
from contextlib import contextmanager

__all__ = ["gc_paused"]


@contextmanager
def gc_paused() -> Iterator[None]:
    """Switch the cyclic garbage collector off inside the block; put it back as it was on leaving.

    Nested blocks are fine: only the outermost one that found the collector
    on switches it back on, also when the block raises.
    """
    was_on = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_on:
            gc.enable()
