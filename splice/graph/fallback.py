"""The views for models torch.fx cannot trace: recorded, exported, else module outputs.

:func:`~splice.graph.points` then lists the points a forward hook can reach
(:mod:`splice.hooks` puts the warps there), with the full cut analysis: first
from the data flow of one meta-device forward (:mod:`splice.graph.recorded`),
else, for a forward that needs real values, from a ``torch.export`` graph
(:mod:`splice.graph.exported`); if torch.export fails too, from module outputs
recorded by forward hooks during a meta-device forward pass, without a
data-flow graph (only ``input`` is then marked as a cut). A point whose module
is called more often at batch 3 than at batch 1 (a loop over the images of the
batch, or over chunks of two) is left out: a hook counts calls, and would warp
part of the batch only; when no forward at batch 3 runs, a module called more
than once is left out. Names
come from module qualnames as fx names a module's call (dots become
underscores, a leading digit gets ``_``, with ``_1``, ``_2`` for repeat calls)
in both. Leaf modules (``--leaf``) run
for real, alone, on zeros during the meta pass, so a module whose forward
needs real values can be stepped over. If that forward fails as well,
:class:`~splice.errors.GraphError` names the failing module and how to mark
it as a leaf.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import warnings
from collections.abc import Callable

import torch
from torch import nn

from ..compare import map_tensors
from ..errors import GraphError
from .entries import CONV_MODULES, Entry, module_stem
from .exported import export_entries
from .leaves import LeafRule, class_path, is_torch_builtin, stepped_leaves
from .recorded import UnsupportedOutput, recorded_entries
from .rules import ShapeRules
from .shapes import META, meta_module, run_for_real, set_mode, to_meta
from .tracing import GraphWarning, in_package, innermost_frame, reason

__all__ = ["TraceFallbackWarning"]


class TraceFallbackWarning(GraphWarning):
    """fx could not trace the model; points come from torch.export or module boundaries instead."""


class _Timeline:
    """Forward hooks on a meta copy: module outputs in completion order, and when convs start and end."""

    def __init__(self, meta: nn.Module):
        self.qualnames = {m: q for q, m in meta.named_modules() if q}
        self.stack: list[nn.Module] = []
        self.records: list[tuple[int, str, str, tuple[int, int, int], int]] = []
        self.conv_starts: list[int] = []
        self.conv_ends: list[int] = []
        self.calls: dict[str, int] = {}
        # modules with children of their own (not single layers), at any depth, that ran to the end after being
        # called with an (N, C, H, W) tensor first: where --within can list points when the whole model fails
        self.take_images: list[str] = []
        self.clock = itertools.count()
        self.handles = []
        for mod in self.qualnames:
            self.handles.append(mod.register_forward_pre_hook(self.before))
            self.handles.append(mod.register_forward_hook(self.after, prepend=True))  # first, as splice's site hook

    def before(self, mod, args):
        self.stack.append(mod)
        if isinstance(mod, CONV_MODULES):
            self.conv_starts.append(next(self.clock))

    def after(self, mod, args, out):
        self.stack.pop()
        name = self.qualnames[mod]
        if (args and isinstance(args[0], torch.Tensor) and args[0].dim() == 4 and next(mod.children(), None) is not None
                and name not in self.take_images):
            self.take_images.append(name)
        t = next(self.clock)
        if isinstance(mod, CONV_MODULES):
            self.conv_ends.append(t)
        if isinstance(out, torch.Tensor) and out.dim() == 4:
            qualname = self.qualnames[mod]
            k = self.calls.get(qualname, 0)
            self.calls[qualname] = k + 1
            base = module_stem(qualname)
            self.records.append((t, base if k == 0 else f"{base}_{k}", qualname,
                                 tuple(int(s) for s in out.shape[1:]), k))

    def remove(self) -> None:
        for h in self.handles:
            h.remove()


def _step_over_leaves(meta: nn.Module, real: nn.Module, rule: LeafRule) -> set[str]:
    """Let every leaf of ``meta`` run its real twin on zeros (meta outputs back): ``--leaf`` reaches this pass.
    Returns the qualnames of the modules inside the leaves, whose calls there go unseen (no site)."""
    real_modules = dict(real.named_modules())
    leaves, inside = stepped_leaves(meta, rule)
    for q, m in leaves:
        m.forward = _real_forward(real_modules[q])
    return inside


def _real_forward(original: nn.Module) -> Callable:
    def forward(*args, **kwargs):
        return run_for_real(original, args, kwargs)
    return forward


def _module_view(model: nn.Module, args: tuple, kwargs: dict, rule: LeafRule, problem: str, todo: str,
                 input_shape: tuple[int, int, int]) -> tuple[list[Entry], str | None]:
    """Entries for module outputs seen by forward hooks during a meta forward pass.

    When that forward fails in the model's own Python rather than in one of torch's modules (a branch on a
    tensor's value, ``.item()``), the input alone is listed, with the reason as :func:`_failure` words it: a warp
    at the input needs no graph, and the splice's identity check runs the model for real. A failure inside one of
    torch's own modules (a shape the model does not take) is raised.
    """
    try:
        meta = meta_module(model)
    except Exception as exc:
        raise GraphError(
            f"cannot list points of {type(model).__name__}: {problem}, and copying it to the meta "
            f"device failed ({reason(exc)}); {todo}"
        ) from exc
    inside = _step_over_leaves(meta, model, rule)
    timeline = _Timeline(meta)
    try:
        with torch.no_grad(), torch.device(META), ShapeRules():
            meta(*[to_meta(a) for a in args], **{k: to_meta(v) for k, v in kwargs.items()})
    except Exception as exc:
        if timeline.stack and is_torch_builtin(type(timeline.stack[-1])):
            raise _failure(model, timeline, exc, problem, todo, input_shape) from exc
        only = "only 'input' is listed (a warp there needs no graph), no point inside"
        return ([Entry("input", "", "input", input_shape, True, None, True)],
                str(_failure(model, timeline, exc, problem, todo, input_shape, head=only)))
    finally:
        timeline.remove()
    first_conv_end = min(timeline.conv_ends, default=math.inf)
    last_conv_start = max(timeline.conv_starts, default=-math.inf)
    entries = [Entry("input", "", "input", input_shape, True, None, True)]
    for t, name, qualname, out_shape, k in timeline.records:
        if qualname in inside:
            continue
        entries.append(Entry(name, qualname, "activation", out_shape, False, None,
                              first_conv_end <= t < last_conv_start, (qualname, k)))
    return entries, None


def _user_line(exc: BaseException) -> str:
    """`` at FILE:LINE`` of the innermost frame of ``exc``'s traceback outside torch, splice and Python's own
    library (the model's line that needed real values), or ``""``."""
    import os
    import sys
    import sysconfig

    stdlib = os.path.abspath(sysconfig.get_paths()["stdlib"]) + os.sep
    frame = innermost_frame(exc, lambda path: in_package(path, torch) or in_package(path, sys.modules["splice"]) or (
        path.startswith(stdlib) and "-packages" not in path))
    return f" at {os.path.basename(frame.filename)}:{frame.lineno}" if frame is not None else ""


def _failure(model, timeline: _Timeline, exc: BaseException, problem: str, todo: str, input_shape,
             head: str | None = None) -> GraphError:
    if timeline.stack:
        failing = timeline.stack[-1]
        cls = type(failing)
        name = timeline.qualnames[failing]
        here = f"module '{name}' ({cls.__name__})"
        advice = (f"mark '{name}' opaque with --leaf {class_path(cls)} (Python: leaves=[{cls.__name__}]) "
                  "so that it runs alone, for real, and try again")
        if is_torch_builtin(cls):
            advice = f"check that the model takes inputs of shape (C, H, W) = {input_shape}"
    else:
        here = f"the forward of {type(model).__name__} itself"
        advice = todo
    # the outermost of them, outside the module that failed (a part inside another is listed within it)
    failed = timeline.qualnames[timeline.stack[-1]] if timeline.stack else None
    done = [n for n in timeline.take_images if failed is None or not n.startswith(f"{failed}.")]
    parts = [n for n in done if not any(n.startswith(f"{other}.") for other in done)]
    if parts:  # a part of the model may be listed where the whole is not (a detector's backbone)
        advice += (f"; or splice inside one part with --within NAME (Python: within='NAME'), NAME being a part that "
                   f"ran on an (N, C, H, W) tensor: {', '.join(parts)}")
    return GraphError(f"{head or 'cannot list points of'} {type(model).__name__}: {problem}, and a meta-device "
                      f"forward failed in {here}{_user_line(exc)} ({reason(exc)}); {advice}")


def _tripled(value):
    """Every tensor of ``value`` with its batch repeated three times (a batch of 3 from a batch of 1: odd, so a loop
    over chunks of two images is called more often too, as a loop over the images is)."""
    return map_tensors(value, lambda v: torch.cat([v, v, v]) if v.dim() else v)


def _call_counts(meta: nn.Module, model: nn.Module, args: tuple, kwargs: dict, rule: LeafRule,
                 train: bool = False) -> dict[str, int] | None:
    """How often each module is called in one forward of ``meta`` (a :func:`meta_module` copy of ``model``; in
    train mode with ``train``), or ``None`` when that forward fails."""
    _step_over_leaves(meta, model, rule)
    names = {m: q for q, m in meta.named_modules() if q}
    counts: dict[str, int] = {}

    def count(mod, call_args, out):
        counts[names[mod]] = counts.get(names[mod], 0) + 1

    handles = [m.register_forward_hook(count) for m in names]
    try:
        set_mode(meta, train)
        with torch.no_grad(), torch.device(META), ShapeRules():
            meta(*[to_meta(a) for a in args], **{k: to_meta(v) for k, v in kwargs.items()})
    except Exception:  # the forward does not run at this batch size, or in this mode: nothing to compare
        return None
    finally:
        for h in handles:
            h.remove()
        set_mode(meta, False)
    return counts


def _batch_stable(meta: nn.Module, model: nn.Module, args: tuple, kwargs: dict, rule: LeafRule,
                  entries: list[Entry], one: dict[str, int], train: bool) -> list[Entry]:
    """The entries whose module is called as often at batch 3 (in train mode with ``train``) as at batch 1 in eval
    mode (``one``); when the batch-3 forward fails, those whose module is called once.

    A hook counts the calls of its module within one forward. A module called
    once per image (a loop over the batch) is called more often for a bigger
    batch, and a module called only while training shifts the count during
    training, so the recorded call would reach another tensor: such points are
    not listed. ``train`` is set when a module that calls others read its
    ``training`` flag in the recorded forward (only then can train mode call
    other modules); one batch-3 forward then checks both at once, unless it
    fails in train mode, when an eval-mode one checks the batch alone. A loop over chunks of three images or more
    passes; the hooks refuse it when it runs (its warp would see part of the batch).
    """
    three = None if meta is None else _call_counts(meta, model, _tripled(args), _tripled(kwargs), rule, train=train)
    if three is None and train and meta is not None:
        three = _call_counts(meta, model, _tripled(args), _tripled(kwargs), rule)
    if three is None:  # not countable at another batch: a module called once is the one kind a loop cannot move
        return [e for e in entries if e.site is None or one.get(e.site[0], 2) == 1]
    return [e for e in entries if e.site is None or one.get(e.site[0]) == three.get(e.site[0])]


def hooks_view(model: nn.Module, args: tuple, kwargs: dict, rule: LeafRule, *, problem: str | None, todo: str,
                input_shape: tuple[int, int, int]) -> list[Entry]:
    """The points a forward hook reaches that hold at any batch size (see :func:`_batch_stable`).

    One meta copy of the model serves the recorded forward (batch 1, eval mode,
    which also counts the calls and watches the ``training`` flags) and the
    counting one (batch 3). When the recorded forward fails, torch.export's run counts the calls at batch 1, else
    a fresh meta copy, else the listed sites themselves (their highest call index).
    """
    try:
        meta = meta_module(model)
    except Exception:  # the recorded view fails the same way and says why; the fallbacks take over
        meta = None
    counts: dict[str, int] = {}
    readers: list[nn.Module] = []
    exact = True
    entries = _hooks_entries(model, args, kwargs, rule, problem=problem, todo=todo, input_shape=input_shape,
                             counts=counts, meta=meta, readers=readers)
    if not counts:  # neither the recorded forward nor torch.export ran: a fresh copy counts the calls at batch 1
        try:
            meta = meta_module(model)
        except Exception:  # no meta copy
            meta = None
        counts = None if meta is None else _call_counts(meta, model, args, kwargs, rule)
        if counts is None:  # counted from the sites listed: a module with a second call listed is called again
            counts = {}
            for e in entries:
                if e.site is not None:
                    counts[e.site[0]] = max(counts.get(e.site[0], 0), e.site[1] + 1)
            exact = False  # a lower bound only: no total is recorded
        readers = [meta] if meta is not None else []  # unwatched: assume train mode may call other modules
    train = any(next(iter(m.children()), None) is not None for m in readers)
    stable = _batch_stable(meta, model, args, kwargs, rule, entries, counts, train)
    # each site's total calls in one forward, which the hooks compare with at run time (another path: another size)
    return [dataclasses.replace(e, calls=counts.get(e.site[0])) if e.site is not None and exact else e
            for e in stable]


def _hooks_entries(model: nn.Module, args: tuple, kwargs: dict, rule: LeafRule, *, problem: str | None, todo: str,
                   input_shape: tuple[int, int, int], counts: dict[str, int] | None = None,
                   meta: nn.Module | None = None, readers: list[nn.Module] | None = None) -> list[Entry]:
    """The points a forward hook reaches: recorded on the meta device, else by torch.export, else module outputs.

    ``problem`` says why fx was not used (``None``: hooks were asked for, with ``within``); a warning tells it.
    ``counts``, ``meta`` and ``readers`` go to :func:`~splice.graph.recorded.recorded_entries`.
    """
    shapes = "x".join(map(str, input_shape))
    try:
        entries = recorded_entries(model, args, kwargs, rule, counts, meta=meta, readers=readers)
        how = f"a meta-device run of the forward (specialised to input {shapes})"
    except UnsupportedOutput:  # no other view finds the outputs either
        raise
    except Exception as exc:  # a forward that needs real values: torch.export may still manage
        recorded_problem = reason(exc)
        try:
            entries = export_entries(model, args, kwargs, counts)
            how = f"torch.export (specialised to input {shapes})"
        except Exception as exc2:  # whatever torch.export cannot handle either: module outputs
            export_problem = (f"recording a meta-device forward failed ({recorded_problem}) and torch.export failed "
                              f"too ({reason(exc2)})")
            why = f"{problem}; {export_problem}" if problem else export_problem
            entries, failed = _module_view(model, args, kwargs, rule, why, todo, input_shape)
            if failed is not None:
                warnings.warn(failed, TraceFallbackWarning, stacklevel=6)
                return entries
            warnings.warn(f"{why}; listing module outputs instead, without cut analysis (only 'input' is marked "
                          f"as a cut). To get the full analysis, {todo}.", TraceFallbackWarning, stacklevel=6)
            return entries
    if problem:
        warnings.warn(f"{problem}; points come from {how} and warps go in by forward hooks at module outputs "
                      "(mechanism 'hooks')", TraceFallbackWarning, stacklevel=6)
    return entries
