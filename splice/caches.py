"""Process-wide caches that a pass on meta or fake tensors must not fill.

Library code keeps some tensors it builds from plain numbers in
``functools.lru_cache``-decorated functions (a relative-position index built
from a window size). Called while splice runs the model on the meta device
(listing points), builds a model there (its weights to be loaded next) or
runs it under ``torch.export``'s fake tensors, such a function builds a
tensor without data, and the cache hands that tensor to every later real call
in the process: the caller's own model then computes with it.

:func:`caches_kept` guards such a pass. Before it, it notes how often each
cache it knows of has computed a new entry (a miss); afterwards it clears each
one that did, and each cache near the model it did not know of that holds
anything (one made during the pass: a module imported by a spec being built,
a cache kept on a module instance). A cleared cache only computes again, with
real tensors, at its next real call.

The caches it knows of are every ``lru_cache`` the garbage collector tracks,
except Python's, torch's and NumPy's own (found at the first pass of the
process, about 50 ms with torch, timm and transformers loaded; in modules
imported later, found module by module), and :func:`model_caches`:
anything with ``cache_info`` and ``cache_clear`` in the classes of the
model's modules, their instances and the globals of the modules that define
them. A plain dict used as a cache cannot be told from any other dict, and is
not guarded.
"""

from __future__ import annotations

import functools
import gc
import sys
import warnings
import weakref
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from torch import nn

__all__ = ["model_caches", "process_caches", "caches_kept"]

_LRU = type(functools.lru_cache(maxsize=1)(lambda: None))
_SCANNED: dict[str, Any] = {"modules": None, "refs": []}


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


def _caches_among(values) -> list[Any]:
    """The caches :func:`_caches_in` finds among ``values`` (an attribute that cannot be looked at is skipped)."""
    found: dict[int, Any] = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a deprecated alias warns when it is looked at
        for value in values:
            try:
                _caches_in(value, found)
            except Exception:  # noqa: BLE001 - a lazy module proxy and the like: not a cache
                continue
    return list(found.values())


def model_caches(model: nn.Module) -> list[Any]:
    """The ``lru_cache``-style caches (anything with ``cache_info`` and ``cache_clear``) in the classes of
    ``model``'s modules, on those modules themselves, and in the module globals those classes are defined in;
    torch's own classes are left out."""
    mods = list(model.modules())
    classes = {c for m in mods for c in type(m).__mro__ if not c.__module__.startswith(("torch.", "builtins"))}
    places = [vars(c) for c in classes] + [m.__dict__ for m in mods]
    places += [vars(sys.modules[n]) for n in {c.__module__ for c in classes} if n in sys.modules]
    return _caches_among(v for place in places for v in list(place.values()))


def _library_cache(cache: Any) -> bool:
    """Not one of Python's own, torch's or NumPy's (their caches hold no model tensors, and some hand out objects
    later compared by identity, which clearing them would break)."""
    top = (getattr(getattr(cache, "__wrapped__", None), "__module__", None) or "").split(".")[0]
    return bool(top) and top not in sys.stdlib_module_names and top not in ("torch", "numpy", "builtins")


def _module_caches(names) -> list[Any]:
    """The library caches in the globals of the modules ``names``, and in the classes those define."""
    values: list[Any] = []
    for name in names:
        module = sys.modules.get(name)
        here = list(vars(module).values()) if module is not None and hasattr(module, "__dict__") else []
        values += here + [v for c in here if isinstance(c, type) and c.__module__ == name for v in vars(c).values()]
    return [c for c in _caches_among(values) if _library_cache(c)]


def process_caches() -> list[Any]:
    """Every ``functools.lru_cache`` of a library (:func:`_library_cache`): those the garbage collector tracks at
    the first call, and those in the globals and classes of modules imported since (found then, module by
    module, which costs far less than another scan of every object)."""
    if _SCANNED["modules"] is None:
        # type(), not isinstance(): an object that answers for its __class__ (a deprecated alias) is not asked
        _SCANNED["refs"] = [weakref.ref(o) for o in gc.get_objects() if type(o) is _LRU and _library_cache(o)]
        _SCANNED["modules"] = set(sys.modules)
    elif _SCANNED["modules"] != sys.modules.keys():
        new = set(sys.modules) - _SCANNED["modules"]
        _SCANNED["refs"] += [weakref.ref(c) for c in _module_caches(new)]
        _SCANNED["modules"] = set(sys.modules)
    return list({id(c): c for c in (r() for r in _SCANNED["refs"]) if c is not None}.values())


@contextmanager
def caches_kept(model: nn.Module | None = None) -> Iterator[dict[str, Any]]:
    """Guard a pass on meta or fake tensors (see the module docstring). Yields a dict whose ``"model"`` a block
    that builds the model sets, so that the caches near it are looked at afterwards too."""
    known = {id(c): c for c in [*process_caches(), *(model_caches(model) if model is not None else [])]}
    misses = {k: c.cache_info().misses for k, c in known.items()}
    holder: dict[str, Any] = {"model": model}
    try:
        yield holder
    finally:
        for k, cache in known.items():
            if cache.cache_info().misses != misses[k]:
                cache.cache_clear()
        if holder["model"] is not None:
            for cache in model_caches(holder["model"]):
                if id(cache) not in known and cache.cache_info().currsize:
                    cache.cache_clear()
