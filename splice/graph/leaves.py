"""The leaf registry: module types the tracer keeps as single steps.

A leaf is given as a class or as a dotted ``"pkg.mod.ClassName"`` string (a
bare ``"ClassName"`` also matches), so that naming a leaf never has to import
its package. The registry starts as :data:`DEFAULT_LEAVES`, grows with
:func:`register_leaf` for the rest of the process, or for the length of a
``with`` block with :func:`leaves_added`; ``leaves=`` extends it for one call.
"""

from __future__ import annotations

import importlib
import sys
import warnings
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from typing import Any

from torch import nn

from ..errors import GraphError, SpliceWarning, suggest
from ..sources.specs import FILE_MODULE_PREFIX

__all__ = ["DEFAULT_LEAVES", "register_leaf", "leaves_added"]

# Default leaves are named, not imported, so that tracing never imports torchvision.
# DEFAULT_LEAVES (the types themselves) is resolved on first access, see __getattr__.
_DEFAULT_LEAF_NAMES = (
    # decides per sample whether to drop, from self.training at run time; traced
    # through, the flag would be frozen into the graph
    "torchvision.ops.stochastic_depth.StochasticDepth",
    # one normalisation step, like nn.BatchNorm2d
    "torchvision.ops.misc.FrozenBatchNorm2d",
    # a spliced model lists its warps as single steps
    "splice.warps.module.Warp",
)

_registered_types: set[type] = set()
_registered_names: set[str] = set()


def _default_leaves() -> tuple[type, ...]:
    """The types named by ``_DEFAULT_LEAF_NAMES`` whose packages are installed (imports them)."""
    found = []
    for path in _DEFAULT_LEAF_NAMES:
        module_name, _, cls_name = path.rpartition(".")
        try:
            found.append(getattr(importlib.import_module(module_name), cls_name))
        except (ImportError, AttributeError):
            continue  # the package is not installed: nothing to keep opaque
    return tuple(found)


def __getattr__(name: str):
    if name == "DEFAULT_LEAVES":
        value = globals()[name] = _default_leaves()
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def _split_leaves(items: Iterable[Any], what: str) -> tuple[set[type], set[str]]:
    if isinstance(items, (str, type)):
        items = (items,)
    types: set[type] = set()
    names: set[str] = set()
    for item in items:
        if isinstance(item, type) and issubclass(item, nn.Module):
            types.add(item)
        elif isinstance(item, str) and item and all(part.isidentifier() for part in item.split(".")):
            names.add(item)
        else:
            raise GraphError(
                f"{what}: a leaf must be an nn.Module subclass or a class name such as "
                f"'pkg.mod.ClassName', got {item!r} ({type(item).__name__}); "
                "pass the module class or its dotted name"
            )
    return types, names


def register_leaf(*types: type | str) -> None:
    """Keep modules of these types as single steps in every later trace.

    Each argument is an ``nn.Module`` subclass or a ``"pkg.mod.ClassName"``
    string (a bare ``"ClassName"`` matches any class of that name). Subclasses
    of a registered type are leaves too.
    """
    new_types, new_names = _split_leaves(types, "register_leaf")
    _registered_types.update(new_types)
    _registered_names.update(new_names)


@contextmanager
def leaves_added(*types: type | str) -> Iterator[None]:
    """Register these leaf types (as :func:`register_leaf` does) for the length of a ``with`` block.

    On leaving the block the registry is put back exactly as it was on
    entering it; leaves registered inside the block are dropped too.
    """
    new_types, new_names = _split_leaves(types, "leaves_added")
    saved_types, saved_names = set(_registered_types), set(_registered_names)
    _registered_types.update(new_types)
    _registered_names.update(new_names)
    try:
        yield
    finally:
        _registered_types.clear()
        _registered_types.update(saved_types)
        _registered_names.clear()
        _registered_names.update(saved_names)


def class_path(cls: type) -> str:
    """How ``--leaf`` names ``cls``: its dotted path, or its bare name for a class of a model file (a spec
    ``path/to/file.py:factory``), whose module name is splice's own and means nothing to the user."""
    if cls.__module__.startswith(FILE_MODULE_PREFIX):
        return cls.__qualname__
    return f"{cls.__module__}.{cls.__qualname__}"


class LeafRule:
    """Decides whether a module class is a leaf (registry + per-call leaves), with a cache."""

    def __init__(self, leaves: Iterable[Any]):
        types, names = _split_leaves(leaves, "leaves")
        self.names = frozenset(_DEFAULT_LEAF_NAMES) | frozenset(_registered_names) | frozenset(names)
        # a dotted name may be a re-export ('torchvision.ops.StochasticDepth'): if its
        # module is already imported, match the class it names too
        for name in self.names:
            module_name, _, cls_name = name.rpartition(".")
            found = getattr(sys.modules.get(module_name), cls_name, None) if module_name else None
            if isinstance(found, type) and issubclass(found, nn.Module):
                types.add(found)
        self.types = tuple(_registered_types | types)
        self._cache: dict[type, bool] = {}

    def add(self, types: Iterable[type]) -> None:
        """Keep these module classes (and their subclasses) as leaves too, for this rule only."""
        self.types = (*self.types, *types)
        self._cache.clear()

    def discard(self, types: Iterable[type]) -> None:
        """Undo an :meth:`add` of these classes (the classes this rule held before stay)."""
        gone = set(types)
        self.types = tuple(t for t in self.types if t not in gone)
        self._cache.clear()

    def __call__(self, cls: type) -> bool:
        hit = self._cache.get(cls)
        if hit is None:
            hit = issubclass(cls, self.types) or any(
                class_path(c) in self.names or c.__name__ in self.names
                for c in cls.__mro__
                if c is not nn.Module and c is not object
            )
            self._cache[cls] = hit
        return hit


def is_torch_builtin(cls: type) -> bool:
    return cls.__module__.startswith(("torch.nn", "torch.ao.nn"))


def stepped_leaves(model: nn.Module, rule: LeafRule) -> tuple[list[tuple[str, nn.Module]], set[str]]:
    """The leaves a meta-device pass over ``model`` steps over (``rule``'s, not torch's own modules), with their
    qualnames, and the qualnames of the modules inside them, whose calls there go unseen (no site)."""
    names = {m: q for q, m in model.named_modules()}
    found = [(q, m) for q, m in model.named_modules() if q and rule(type(m)) and not is_torch_builtin(type(m))]
    return found, {names[sub] for _, m in found for sub in m.modules() if sub is not m}


def has_call_hooks(m: nn.Module) -> bool:
    """Whether ``m`` has forward, forward-pre or backward hooks of its own: they run only when it is called."""
    return any(getattr(m, name, None) for name in ("_forward_hooks", "_forward_pre_hooks", "_backward_hooks",
                                                    "_backward_pre_hooks"))


def check_leaves_found(leaves: Iterable[Any], model: nn.Module) -> None:
    """Warn, in one line with a suggestion, of a leaf given for this call that names no module class of ``model``
    (a typo would otherwise pass unseen, and the trace fail where the leaf was meant to help; a list of leaves
    kept for several models is not an error)."""
    types, names = _split_leaves(leaves, "leaves")
    classes = {c for m in model.modules() for c in type(m).__mro__ if c is not nn.Module and c is not object
               and isinstance(c, type) and issubclass(c, nn.Module)}
    missing = [t.__name__ for t in types if not any(issubclass(c, t) for c in classes)]
    missing += [n for n in sorted(names) if not any(class_path(c) == n or c.__name__ == n for c in classes)]
    if missing:
        known = sorted({c.__name__ for c in classes} | {class_path(c) for c in classes})
        hint = suggest(missing[0], known)
        warnings.warn(f"leaf {missing[0]!r} names no module class of {type(model).__name__}{hint}; it changes "
                      "nothing: give a class the model holds, by its name or dotted path (--leaf pkg.mod.ClassName)",
                      SpliceWarning, stacklevel=3)
