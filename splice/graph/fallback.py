"""The fallback view: module outputs, when torch.fx cannot trace the model.

:func:`~splice.graph.points` then warns (:class:`TraceFallbackWarning`) and
lists module outputs instead, recorded by forward hooks during a meta forward
pass. Names come from module qualnames (dots become underscores, with ``_1``,
``_2`` for repeat calls); there is no data-flow graph, so only ``input`` is
marked as a cut. If that forward fails too, :class:`~splice.errors.GraphError`
names the failing module and how to mark it as a leaf.
"""

from __future__ import annotations

import itertools
import math
import warnings

import torch
from torch import nn

from ..errors import GraphError
from .entries import _CONV_MODULES, _Entry
from .leaves import _class_path, _is_torch_builtin
from .shapes import _META, _input_dtype, _meta_empty, _meta_module
from .tracing import GraphWarning, _FxFailure, _fx_failure_hint, _reason

__all__ = ["TraceFallbackWarning"]


class TraceFallbackWarning(GraphWarning):
    """fx could not trace the model; points come from module boundaries instead."""


def _module_view(model: nn.Module, shape: tuple[int, int, int], failure: _FxFailure) -> list[_Entry]:
    """Entries for module outputs seen by forward hooks during a meta forward pass."""
    where, todo = _fx_failure_hint(failure, model)
    fx_problem = f"torch.fx could not trace {where} ({_reason(failure.error)})"
    try:
        meta = _meta_module(model)
    except Exception as exc:
        raise GraphError(
            f"cannot list points of {type(model).__name__}: {fx_problem}, and copying it to the meta "
            f"device failed ({_reason(exc)}); {todo}"
        ) from exc
    qualnames = {m: q for q, m in meta.named_modules() if q}
    stack: list[nn.Module] = []
    records: list[tuple[int, str, tuple[int, int, int]]] = []
    conv_starts: list[int] = []
    conv_ends: list[int] = []
    calls: dict[str, int] = {}
    clock = itertools.count()

    def before(mod, args):
        stack.append(mod)
        if isinstance(mod, _CONV_MODULES):
            conv_starts.append(next(clock))

    def after(mod, args, out):
        stack.pop()
        t = next(clock)
        if isinstance(mod, _CONV_MODULES):
            conv_ends.append(t)
        if isinstance(out, torch.Tensor) and out.dim() == 4:
            qualname = qualnames[mod]
            k = calls.get(qualname, 0)
            calls[qualname] = k + 1
            base = qualname.replace(".", "_")
            records.append((t, base if k == 0 else f"{base}_{k}", qualname, tuple(int(s) for s in out.shape[1:])))

    handles = []
    for mod in qualnames:
        handles.append(mod.register_forward_pre_hook(before))
        handles.append(mod.register_forward_hook(after))
    try:
        with torch.no_grad(), torch.device(_META):
            meta(_meta_empty((1, *shape), _input_dtype(model)))
    except Exception as exc:
        if stack:
            failing = stack[-1]
            cls = type(failing)
            here = f"module '{qualnames[failing]}' ({cls.__name__})"
            advice = (
                f"mark '{qualnames[failing]}' opaque with --leaf {_class_path(cls)} "
                f"(Python: leaves=[{cls.__name__}]) and try again"
            )
            if _is_torch_builtin(cls):
                advice = f"check that the model takes inputs of shape (C, H, W) = {shape}"
        else:
            here = f"the forward of {type(model).__name__} itself"
            advice = todo
        raise GraphError(
            f"cannot list points of {type(model).__name__}: {fx_problem}, and a meta-device forward "
            f"failed in {here} ({_reason(exc)}); {advice}"
        ) from exc
    finally:
        for h in handles:
            h.remove()
    warnings.warn(
        f"{fx_problem}; listing module outputs instead, without cut analysis (only 'input' is "
        f"marked as a cut). To get the full analysis, {todo}.",
        TraceFallbackWarning,
        stacklevel=3,
    )
    first_conv_end = min(conv_ends, default=math.inf)
    last_conv_start = max(conv_starts, default=-math.inf)
    entries = [_Entry("input", "", "input", shape, True, None, True)]
    for t, name, qualname, out_shape in records:
        entries.append(_Entry(name, qualname, "activation", out_shape, False, None,
                              first_conv_end <= t < last_conv_start))
    return entries
