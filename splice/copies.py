"""Twins of a module tree that keep the caller's model unchanged while splice runs it.

Running a model can change it even in eval mode: a BatchNorm fused with an
activation counts ``num_batches_tracked`` in a train-mode forward, a module
may count its own calls in a buffer, and torch.fx runs such code while it
traces. splice therefore runs, traces and exports *twins*:
:func:`private_buffers` clones the module tree (each module gets its own
``__dict__``, child, parameter, buffer and hook mappings), shares the
parameters (read, never written) and gives every twin its own copy of each
buffer and of the Python state a forward may change (a dict it caches grids
in, a list it logs to). A buffer registered under several names stays one
tensor in the twin, and an object shared by several modules stays shared.

:func:`tree_copy` is ``copy.deepcopy`` for a module tree, without the generic
machinery for every module and every empty hook mapping.

:func:`collector_paused` holds Python's cyclic garbage collector off while
a pass builds twins and runs them.

:func:`buffers_equal` is the bit-for-bit comparison of two buffer snapshots
(:func:`buffer_snapshot`) that the checks use to prove nothing changed.

Layer: the bottom floor; imports only torch.
"""

from __future__ import annotations

import collections
import copy
import copyreg
import gc
import itertools
from collections import OrderedDict
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import Any

import torch
from torch import fx, nn

__all__ = ["private_buffers", "own_buffers_", "tree_copy", "buffer_snapshot", "changed_buffers", "bitwise_equal",
           "collector_paused", "modes_kept", "rng_kept", "same_draws", "buffers_kept"]

# the per-module mappings a twin must own so that adding a hook, a flag or an
# attribute to it never reaches the caller's module
_OWNED_DICTS = (
    "_modules", "_parameters", "_buffers", "_non_persistent_buffers_set",
    "_forward_hooks", "_forward_hooks_with_kwargs", "_forward_hooks_always_called",
    "_forward_pre_hooks", "_forward_pre_hooks_with_kwargs", "_backward_hooks", "_backward_pre_hooks",
    "_state_dict_hooks", "_state_dict_pre_hooks", "_load_state_dict_pre_hooks", "_load_state_dict_post_hooks",
)

# a module's own mappings, which private_buffers copies itself
_TREE_KEYS = frozenset({*_OWNED_DICTS, "_modules", "_buffers"})

# immutable values deepcopy returns as they are (flags, sizes, names, dtypes)
_ATOMS = frozenset({type(None), bool, int, float, complex, str, bytes, torch.dtype})


def _atomic(value: Any) -> bool:
    """An immutable value, or a tuple of them, that ``copy.deepcopy`` would hand back as it is."""
    t = type(value)
    return t in _ATOMS or (t is tuple and all(type(v) in _ATOMS for v in value))


def private_buffers(model: nn.Module) -> nn.Module:
    """A twin of ``model`` that shares its parameters and owns copies of its buffers and of its Python state.

    Each module of the twin has its own ``__dict__`` (flags and attributes can
    be set freely), its own child/parameter/buffer/hook mappings, and its own
    buffer tensors (``detach().clone()``); parameters are the caller's objects.
    Any other attribute that is not immutable (a dict a forward caches grids
    in, a list it appends to, a config object) is deep-copied, with the
    tree's modules, parameters and buffers mapped to the twin's, so that
    shared objects stay shared within the twin. Plain tensor attributes are
    copied too, except views of a parameter or buffer (a view must stay one)
    and tensors of an autograd graph, which stay shared; so do a GraphModule's
    graph, which running it never touches, and an object that cannot be
    deep-copied. Running, tracing or exporting the twin leaves
    ``model`` bit for bit as it was. The twin is for one job: it is not a copy
    to train or keep.
    """
    modules: dict[int, nn.Module] = {}
    buffers: dict[int, torch.Tensor] = {}
    pairs: list[tuple[nn.Module, nn.Module]] = []

    def own(t):
        if t is None:
            return None
        c = buffers.get(id(t))
        if c is None:
            c = buffers[id(t)] = t.detach().clone()
        return c

    def clone(m: nn.Module) -> nn.Module:
        c = modules.get(id(m))
        if c is not None:
            return c
        c = object.__new__(type(m))
        c.__dict__.update(m.__dict__)
        modules[id(m)] = c
        pairs.append((m, c))
        for key in _OWNED_DICTS:
            value = m.__dict__.get(key)
            if value is not None:
                c.__dict__[key] = type(value)(value)
        c.__dict__["_buffers"] = {k: own(v) for k, v in m._buffers.items()}
        c.__dict__["_modules"] = {k: (None if v is None else clone(v)) for k, v in m._modules.items()}
        return c

    twin = clone(model)
    memo: dict[int, Any] = {**modules, **buffers}
    for t in model.parameters():
        memo[id(t)] = t
    # a plain tensor attribute (a counter kept as a tensor, self.seen += n) is the twin's own copy, unless it is
    # a view of a parameter or buffer (which must stay one) or part of an autograd graph (a weight recomputed from
    # parameters by a hook): those stay shared, as before
    tree = {_storage(t) for t in itertools.chain(model.parameters(), model.buffers())}
    for m, c in pairs:
        for key, value in m.__dict__.items():
            if (type(value) is torch.Tensor and key not in _TREE_KEYS and not value.requires_grad
                    and _storage(value) not in tree):
                if id(value) not in memo:
                    memo[id(value)] = value.clone()
                c.__dict__[key] = memo[id(value)]
    for m, c in pairs:
        for key, value in m.__dict__.items():
            if key not in _TREE_KEYS and not _immutable(value):
                c.__dict__[key] = _own_copy(value, memo)
    return twin


def _storage(t: torch.Tensor) -> int | None:
    """Where ``t``'s storage lives (``None`` for a tensor without one, on the meta device or a subclass)."""
    try:
        return t.untyped_storage().data_ptr() or None
    except Exception:  # noqa: BLE001 - a tensor subclass or a device without storage: nothing to compare
        return None


def own_buffers_(model: nn.Module) -> dict[str, torch.Tensor]:
    """Give each module of ``model``, a model the caller built for one job, its own copy of every buffer, in place.

    Returns the buffers it held before, by name (``named_buffers()``): they
    are never written afterwards, so they are the snapshot to compare the
    copies with. A tensor under several names stays one tensor. Cheaper than
    a :func:`private_buffers` twin, and only for a model nobody else holds:
    its Python state and modes are the model's own to change.
    """
    before = dict(model.named_buffers())
    copies: dict[int, torch.Tensor] = {}
    for m in model.modules():
        for key, b in m._buffers.items():
            if b is not None:
                c = copies.get(id(b))
                if c is None:
                    c = copies[id(b)] = b.detach().clone()
                m._buffers[key] = c
    return before


def _immutable(value: Any) -> bool:
    """Kept as it is by a twin: an atomic value, a tensor, a module, a callable without state of its own, or a
    GraphModule's ``fx.Graph`` (its forward runs the code generated from the graph and never reads or edits it;
    copying the graph was half the cost of a spliced model's twin)."""
    return (_atomic(value) or isinstance(value, (torch.Tensor, nn.Module, fx.Graph))
            or (callable(value) and not hasattr(value, "__dict__")))


def _own_copy(value: Any, memo: dict[int, Any]) -> Any:
    """A deep copy of ``value`` through ``memo``; the value itself when it cannot be copied."""
    try:
        return copy.deepcopy(value, memo)
    except Exception:  # a lock, a handle, a generator: shared, as before
        return value


def _plain_module_class(cls: type) -> bool:
    """Deep-copied by nn.Module's own state protocol: made by ``cls.__new__(cls)`` and handed a deep copy of
    ``__getstate__()`` by its ``__setstate__`` (its own, as convolutions have, is called just as deepcopy calls
    it); nothing of its own in the way (no reduce, deepcopy, new-arguments or slots)."""
    return (cls.__getstate__ is nn.Module.__getstate__ and callable(getattr(cls, "__setstate__", None))
            and cls.__reduce_ex__ is object.__reduce_ex__ and cls.__reduce__ is object.__reduce__
            and getattr(cls, "__deepcopy__", None) is None and getattr(cls, "__getnewargs_ex__", None) is None
            and getattr(cls, "__getnewargs__", None) is None and not copyreg._slotnames(cls))


def _kept_tensors(values, seen: set[int] | None = None) -> Iterator[torch.Tensor]:
    """The tensors among ``values`` and, at any depth, inside the sequences, sets and mappings among them (named
    tuples and deques too; each container once, so a cycle ends)."""
    seen = set() if seen is None else seen
    for value in values:
        if isinstance(value, torch.Tensor):
            yield value
        elif isinstance(value, (tuple, list, set, frozenset, Mapping, collections.deque)) and not isinstance(
                value, (str, bytes)) and id(value) not in seen:
            seen.add(id(value))
            yield from _kept_tensors(value.values() if isinstance(value, Mapping) else value, seen)


def tree_copy(model: nn.Module, memo: dict[int, Any] | None = None) -> nn.Module:
    """``copy.deepcopy(model, memo)``, faster on a deep tree: the same copy, built the same way.

    deepcopy rebuilds a module from ``__getstate__`` with ``__setstate__``;
    this does too, but walks child modules and empty mappings (most of a
    module's hook dictionaries) directly. Any value it does not know, and any
    module whose class copies itself its own way, goes to ``copy.deepcopy``
    with the same ``memo``, so shared objects stay shared. A tensor attribute
    computed from parameters (not a leaf of autograd), which deepcopy
    refuses, is copied detached, wherever it sits in the tree: such tensors
    go into ``memo`` first, so a module that copies itself its own way (a
    GraphModule around a pruned convolution) finds them there.
    """
    memo = {} if memo is None else memo
    # a tensor computed from parameters and kept on a module (the weight a pruning or classic weight_norm hook
    # recomputes before every forward, a cache of attention biases filled by a train-mode forward): deepcopy
    # refuses it; the copy holds its value, detached
    for m in model.modules():
        for value in _kept_tensors(m.__dict__.values()):
            if not value.is_leaf and id(value) not in memo:
                memo[id(value)] = value.detach().clone()

    def walk(m: Any) -> Any:
        done = memo.get(id(m))
        if done is not None:
            return done
        cls = type(m)
        if not isinstance(m, nn.Module) or not _plain_module_class(cls):
            return copy.deepcopy(m, memo)
        c = cls.__new__(cls)
        memo[id(m)] = c
        state = {}
        for key, value in m.__getstate__().items():
            if key == "_modules" and type(value) is dict:
                state[key] = memo[id(value)] = {k: (None if v is None else walk(v)) for k, v in value.items()}
            elif type(value) in (dict, OrderedDict, set) and not value:
                state[key] = memo.get(id(value)) or memo.setdefault(id(value), type(value)())
            elif _atomic(value):
                state[key] = value  # what deepcopy hands back for these, without its dispatch
            else:
                state[key] = copy.deepcopy(value, memo)
        c.__setstate__(state)
        return c

    return walk(model)


def buffer_snapshot(model: nn.Module) -> dict[str, torch.Tensor]:
    """``{name: copy}`` of every buffer (persistent or not, ``num_batches_tracked`` included)."""
    return {name: b.detach().clone() for name, b in model.named_buffers(remove_duplicate=False)}


def bitwise_equal(a: torch.Tensor, b: torch.Tensor) -> bool:
    """Same shape, dtype and bytes (NaN payloads and signed zeros included)."""
    if a.shape != b.shape or a.dtype != b.dtype:
        return False
    if a.numel() == 0:
        return True
    return torch.equal(a.detach().contiguous().reshape(-1).view(torch.uint8),
                       b.detach().contiguous().reshape(-1).view(torch.uint8))


def changed_buffers(before: Mapping[str, torch.Tensor], model: nn.Module) -> list[str]:
    """Names of the buffers of ``model`` that differ from ``before`` (a :func:`buffer_snapshot`), or that appeared
    or vanished."""
    now = dict(model.named_buffers(remove_duplicate=False))
    names = set(before) | set(now)
    return sorted(k for k in names if k not in before or k not in now or not bitwise_equal(before[k], now[k]))


@contextmanager
def buffers_kept(model: nn.Module) -> Iterator[nn.Module]:
    """Every buffer back as it was when the block began: the same tensor in each slot (a forward that rebinds one,
    ``self.n = self.n + 1``, gets its own back) holding the same values (one updated in place is copied back)."""
    saved = [(m, k, b, b.detach().clone()) for m in model.modules() for k, b in m._buffers.items() if b is not None]
    try:
        yield model
    finally:
        with torch.no_grad():
            for m, k, b, value in saved:
                m._buffers[k] = b
                b.copy_(value)


@contextmanager
def modes_kept(model: nn.Module) -> Iterator[nn.Module]:
    """Every module's own train/eval flag back as it was when the block began, whatever the block set.

    ``model.train(was_training)`` would give every module the root's flag, so a norm the caller keeps
    frozen in a training model would come back in train mode.
    """
    saved = [(m, m.training) for m in model.modules()]
    try:
        yield model
    finally:
        for m, flag in saved:
            m.training = flag


@contextmanager
def collector_paused() -> Iterator[None]:
    """Python's cyclic garbage collector held off for the block (as it was before, after it); also a decorator.

    Building twins and running them on the meta device makes tens of
    thousands of objects that live until the pass ends; their allocations
    trigger collections that cannot free them, and a full one walks the
    whole heap (torch, timm and transformers loaded: 100 to 400 ms on the
    zoo's models, several times the pass itself). Nothing is lost: cycles
    made in the block are collected at the next collection after it. Eight
    verifies of a spliced efficientnet_b0 and of a mobilevit_xxs in a row
    took 20-22 % less time in all with the collector paused, the collections
    that ran after each block included (measured 2026-12-03, one thread).
    """
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


@contextmanager
def rng_kept() -> Iterator[None]:
    """The caller's random number generators as they were before the block, whatever it drew; also a decorator.

    The CPU generator always, and each CUDA device's once CUDA is initialised
    (forking them earlier would initialise it); Python's ``random`` and
    NumPy's global generator too. A check or an export draws
    numbers (a warp's initial weights while a model is rebuilt, a probe
    batch); the caller's next draw is the one it would have been without it.
    """
    import random

    import numpy as np

    devices = list(range(torch.cuda.device_count())) if torch.cuda.is_initialized() else []
    python, numpy = random.getstate(), np.random.get_state()
    try:
        with torch.random.fork_rng(devices=devices):
            yield
    finally:
        random.setstate(python)
        np.random.set_state(numpy)


#: the seed of :func:`same_draws`: any fixed number would do
DRAWS_SEED = 20151


@contextmanager
def same_draws() -> Iterator[None]:
    """The block draws the same random numbers every time it runs, and the caller's generators come back as they
    were (:func:`rng_kept`).

    A model that keeps dropout (or any sampling) active in eval mode, as
    Monte Carlo dropout does, gives another output on every call; a base and
    its splice each run under this draw the same masks, since a warp draws no
    random numbers, so comparing them compares the splice and not the dice.
    """
    import random

    import numpy as np

    with rng_kept():
        torch.random.default_generator.manual_seed(DRAWS_SEED)
        if torch.cuda.is_initialized():  # torch.manual_seed would queue a seed for a CUDA not yet started
            torch.cuda.manual_seed_all(DRAWS_SEED)
        random.seed(DRAWS_SEED)  # a forward that draws from Python's or NumPy's generator (test-time flips)
        np.random.seed(DRAWS_SEED)
        yield
