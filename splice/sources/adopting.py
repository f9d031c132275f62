"""Giving a model (built on the meta device) the tensors of a state dict, without copying them.

:func:`adopt_state` is ``model.load_state_dict(state, strict=True, assign=True)``
with tied tensors kept tied. ``load_state_dict`` walks the tree module by
module and hands each child a dictionary filtered from its parent's (every key
tested against every prefix on the way down), then assigns each tensor. When
nothing in the tree can change how a tensor is loaded, the same assignments
are made directly: one walk over the modules, one lookup per tensor. A tree
that could (a load or state-dict hook anywhere, extra state, a module with its
own ``_load_from_state_dict`` above modules that hold tensors, torch's
swap-tensors mode, keys that are not exactly the tree's tensors) is loaded by
``load_state_dict`` itself. A module with its own ``_load_from_state_dict``
whose children hold no tensor (a batch norm's version upgrade, with an
activation inside) is called just as ``load_state_dict`` would call it: with
the keys under its prefix, its version metadata, and ``assign``.
"""

from __future__ import annotations

from collections.abc import Mapping

import torch
from torch import nn

from .weights import with_metadata

__all__ = ["adopt_state"]

_PLAIN_LOAD = nn.Module._load_from_state_dict


def _tied_groups(model: nn.Module) -> list[list[str]]:
    """The state-dict names that share one tensor (tied weights, a module used twice), group by group."""
    groups: dict[int, list[str]] = {}
    for name, t in model.state_dict(keep_vars=True).items():
        if isinstance(t, torch.Tensor):
            groups.setdefault(id(t), []).append(name)
    return [g for g in groups.values() if len(g) > 1]


def _retie(model: nn.Module, groups: list[list[str]]) -> None:
    """Point every name of each group back at the tensor the group's first name adopted."""
    for names in groups:
        first_owner, _, first_leaf = names[0].rpartition(".")
        keep = getattr(model.get_submodule(first_owner) if first_owner else model, first_leaf)
        for name in names[1:]:
            owner_path, _, leaf = name.rpartition(".")
            owner = model.get_submodule(owner_path) if owner_path else model
            if leaf in owner._parameters:
                owner._parameters[leaf] = keep
            else:
                owner._buffers[leaf] = keep


def _stateless_plain(m: nn.Module) -> bool:
    """``m`` and everything under it hold no tensor and load the plain way."""
    return all(type(d)._load_from_state_dict is _PLAIN_LOAD and not any(v is not None for v in d._parameters.values())
               and not any(v is not None for v in d._buffers.values()) for d in m.modules())


def _loads_directly(m: nn.Module) -> bool:
    """Nothing about ``m`` itself can change how its tensors (or its children's) are loaded, but its own
    ``_load_from_state_dict`` on its own keys when its children hold no tensor."""
    cls = type(m)
    if (m._load_state_dict_pre_hooks or m._load_state_dict_post_hooks or m._state_dict_hooks
            or m._state_dict_pre_hooks or cls.set_extra_state is not nn.Module.set_extra_state
            or cls.get_extra_state is not nn.Module.get_extra_state):
        return False
    return cls._load_from_state_dict is _PLAIN_LOAD or all(
        c is None or _stateless_plain(c) for c in m._modules.values())


def _direct_plan(model: nn.Module, state: Mapping[str, torch.Tensor]):
    """``(modules, groups)`` for a direct adoption, or ``None`` when only ``load_state_dict`` may load the tree.

    ``modules`` lists ``(prefix, module, names)`` for every path to a module
    (a module reached by two paths is loaded twice, as ``load_state_dict``
    does); ``groups`` are the tied names. The names must be exactly the keys
    of ``state``, one tensor of the same shape each.
    """
    if torch.__future__.get_swap_module_params_on_conversion():
        return None
    modules, seen, by_tensor = [], 0, {}
    for prefix, m in model.named_modules(remove_duplicate=False):
        if not _loads_directly(m):
            return None
        dot = prefix + "." if prefix else ""
        names = [n for n, p in m._parameters.items() if p is not None]
        names += [n for n, b in m._buffers.items() if b is not None and n not in m._non_persistent_buffers_set]
        for n in names:
            t = state.get(dot + n)
            if not isinstance(t, torch.Tensor) or t.shape != getattr(m, n).shape:
                return None
            by_tensor.setdefault(id(getattr(m, n)), []).append(dot + n)
        seen += len(names)
        modules.append((dot, m, names))
    if seen != len(state):
        return None
    return modules, [g for g in by_tensor.values() if len(g) > 1]


def _assign(m: nn.Module, name: str, value: torch.Tensor) -> None:
    """What ``load_state_dict(assign=True)`` does for one tensor: a parameter stays a parameter and keeps its
    ``requires_grad``; a buffer becomes ``value``. A 4-D tensor the model holds channels_last (built with
    ``.to(memory_format=torch.channels_last)``) adopts ``value`` in that layout, so that it computes as built."""
    held = m._parameters[name] if name in m._parameters else m._buffers.get(name)
    if (held is not None and held.dim() == 4 and value.dim() == 4 and not held.is_contiguous()
            and held.is_contiguous(memory_format=torch.channels_last)):
        value = value.contiguous(memory_format=torch.channels_last)
    old = m._parameters.get(name)
    if old is not None:
        if isinstance(value, nn.Parameter):
            value.requires_grad_(old.requires_grad)
        else:
            value = nn.Parameter(value, requires_grad=old.requires_grad)
    setattr(m, name, value)


def adopt_state(model: nn.Module, state: Mapping[str, torch.Tensor]) -> None:
    """``model.load_state_dict(state, strict=True, assign=True)``, keeping tied tensors tied.

    Assigning gives every state-dict name a tensor of its own; a tensor that
    sat under several names (tied weights, a module used twice) would come
    out untied. Each such group is pointed back at one adopted tensor.
    """
    plan = _direct_plan(model, state)
    if plan is None:
        groups = _tied_groups(model)
        model.load_state_dict(with_metadata(model, state), strict=True, assign=True)
        _retie(model, groups)
        return
    modules, groups = plan
    metadata = getattr(state, "_metadata", None)
    missing: list[str] = []
    unexpected: list[str] = []
    errors: list[str] = []
    with torch.no_grad():
        for dot, m, names in modules:
            if type(m)._load_from_state_dict is _PLAIN_LOAD:
                for n in names:
                    _assign(m, n, state[dot + n])
                continue
            # as load_state_dict calls it: the keys under its prefix (its own), its version metadata, assign
            local = dict(metadata.get(dot[:-1], {})) if metadata is not None else {"version": m._version}
            local["assign_to_params_buffers"] = True
            keys = {dot + n: state[dot + n] for n in names}
            m._load_from_state_dict(keys, dot, local, True, missing, unexpected, errors)
            # a key it added under a child's prefix is one that child (holding no tensor) does not expect
            unexpected.extend(k for k in keys if any(k.startswith(f"{dot}{c}.") for c in m._modules))
    problems = ([f"missing {missing}"] if missing else []) + ([f"unexpected {unexpected}"] if unexpected else [])
    if problems or errors:
        raise RuntimeError(f"Error(s) in loading state_dict for {type(model).__name__}: "
                           + "; ".join(problems + errors))
    _retie(model, groups)

