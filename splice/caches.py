"""Process-wide caches that a pass on meta or fake tensors must not fill.

Library code keeps some tensors it builds from plain numbers in
``functools.lru_cache``-decorated functions (a relative-position index built
from a window size). Called while splice runs the model on the meta device
(listing points) or under ``torch.export``'s fake tensors, such a function
builds a tensor without data, and the cache hands that tensor to every later
real forward in the process: the caller's own model then computes with it.
:func:`caches_kept` clears every cache near the model (see
:func:`model_caches`) that computed something new during the pass; the next
real call fills it again with real tensors. A model built on the meta device
(weights to be loaded next) may have called such a function while it was built:
:func:`clear_filled_caches` empties every cache near it afterwards.
"""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from torch import nn

__all__ = ["model_caches", "caches_kept", "clear_filled_caches"]


def _is_cache(value: Any) -> bool:
    return callable(value) and callable(getattr(value, "cache_info", None)) and \
        callable(getattr(value, "cache_clear", None))


def _caches_in(value: Any, found: dict[int, Any], depth: int = 2) -> None:
    """The caches ``value`` is or wraps: through static and class methods, ``__wrapped__`` and the cells of a
    wrapper's closure (a decorator that keeps the cached function in its closure), ``depth`` levels down."""
    value = getattr(value, "__func__", value)  # staticmethod, classmethod
    if _is_cache(value):
        found[id(value)] = value
    if depth and callable(value):
        inner = [getattr(value, "__wrapped__", None)]
        inner += [cell.cell_contents for cell in (getattr(value, "__closure__", None) or ())
                  if cell.cell_contents is not None] if not _is_cache(value) else []
        for v in inner:
            if v is not None and callable(v):
                _caches_in(v, found, depth - 1)


def model_caches(model: nn.Module) -> list[Any]:
    """The ``lru_cache``-style caches (anything with ``cache_info`` and ``cache_clear``) in the classes of
    ``model``'s modules and in the module globals those classes are defined in; torch's own are left out."""
    found: dict[int, Any] = {}
    classes = {c for m in model.modules() for c in type(m).__mro__}
    places = [vars(c) for c in classes if not c.__module__.startswith(("torch.", "builtins"))]
    names = {c.__module__ for c in classes if not c.__module__.startswith(("torch.", "builtins"))}
    places += [vars(sys.modules[n]) for n in names if n in sys.modules]
    for place in places:
        for value in list(place.values()):
            try:
                _caches_in(value, found)
            except Exception:  # an attribute that cannot be looked at (a lazy module proxy): not a cache of ours
                continue
    return list(found.values())


@contextmanager
def caches_kept(model: nn.Module) -> Iterator[None]:
    """Run a pass on meta or fake tensors; afterwards clear each of :func:`model_caches` that computed a new entry
    during it (a miss), so that no later real call is handed a tensor without data."""
    caches = model_caches(model)
    before = [c.cache_info().misses for c in caches]
    try:
        yield
    finally:
        for cache, misses in zip(caches, before):
            if cache.cache_info().misses != misses:
                cache.cache_clear()


def clear_filled_caches(model: nn.Module) -> None:
    """Empty every one of :func:`model_caches` that holds an entry (after ``model`` was built on the meta device,
    where an entry made then holds tensors without data); a cleared cache only computes again."""
    for cache in model_caches(model):
        if cache.cache_info().currsize:
            cache.cache_clear()
