"""Splicing inside a part of a model (``within``): find the submodule and the inputs it receives.

A detector's backbone or a flow network's feature encoder is called by the
model's own code with tensors the user never sees (resized, or two images
concatenated). :func:`scope_inputs` runs the whole model once on the meta
device (no memory, no arithmetic) until the submodule is called, and keeps
what it was called with; a forward that needs real values falls back to one
CPU run on zeros, stopped at the same place.
"""

from __future__ import annotations

from typing import Any

import torch
from torch import nn

from ..compare import map_tensors
from ..copies import private_buffers
from ..errors import GraphError, suggest
from .rules import ShapeRules
from .shapes import META, input_dtype, meta_empty, meta_module, to_meta
from .tracing import reason

__all__: list[str] = []


class _Reached(Exception):
    """Raised by the scope's pre-hook: the inputs are known, the rest of the forward is not needed."""


def _resolve_scope(model: nn.Module, within: str) -> nn.Module:
    """The submodule called ``within`` (a qualname such as ``backbone.body``), or a one-line error."""
    names = [q for q, _ in model.named_modules() if q]
    try:
        scope = model.get_submodule(within)
    except AttributeError:
        scope = None
    if not isinstance(scope, nn.Module) or not within:
        raise GraphError(f"--within {within!r} is not a submodule of {type(model).__name__}"
                         f"{suggest(within, names) or ';'} Give a module qualname such as "
                         f"{names[0] if names else 'backbone'!r}")
    return scope


def _capture(model: nn.Module, scope_name: str, args: tuple) -> tuple[tuple, dict]:
    """Run ``model(*args)`` until ``model.<scope_name>`` is called; what it was called with."""
    seen: dict[str, Any] = {}

    def stop(module, call_args, call_kwargs):
        seen["args"], seen["kwargs"] = call_args, call_kwargs
        raise _Reached

    handle = model.get_submodule(scope_name).register_forward_pre_hook(stop, with_kwargs=True)
    try:
        with torch.no_grad():
            model(*args)
    except _Reached:
        pass
    finally:
        handle.remove()
    if "args" not in seen:
        raise GraphError(f"--within {scope_name!r}: the model's forward never calls that module; pick one that "
                         "runs (see the module names in print(model))")
    return seen["args"], seen["kwargs"]


def scope_inputs(model: nn.Module, shapes: tuple, within: str) -> tuple[nn.Module, tuple, dict]:
    """``(submodule, example args, example kwargs)`` for a splice ``within`` that submodule."""
    scope = _resolve_scope(model, within)
    dtype = input_dtype(model)
    try:
        meta = meta_module(model)
        with torch.device(META), ShapeRules():
            args, kwargs = _capture(meta, within, tuple(meta_empty((1, *s), dtype) for s in shapes))
    except GraphError:
        raise
    except Exception:
        # the model computes with real values before it reaches the scope: one real run, stopped there
        try:
            args, kwargs = _capture(_eval_copy(model), within,
                                    tuple(torch.zeros((1, *s), dtype=dtype) for s in shapes))
        except GraphError:
            raise
        except Exception as exc:
            raise GraphError(f"--within {within!r}: running {type(model).__name__} up to that module failed "
                             f"({reason(exc)}); check the input shape(s) {list(shapes)}") from exc
    # meta tensors: the listing runs on the meta device, and whatever needs real ones makes its own
    return scope, map_tensors(tuple(args), to_meta), map_tensors(dict(kwargs), to_meta)


def _eval_copy(model: nn.Module) -> nn.Module:
    """An eval-mode twin with its own buffers (the caller's model is never run)."""
    twin = private_buffers(model)
    for m in twin.modules():
        m.__dict__["training"] = False
    return twin
