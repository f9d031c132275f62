"""Tracing with torch.fx: the leaf-aware tracer, eval/train comparison, shadow copies.

:func:`trace` runs :mod:`torch.fx` with a tracer that keeps two kinds of module
as single steps (*leaves*): fx's own rule (modules defined in ``torch.nn``,
except containers) and the leaf registry (:mod:`splice.graph.leaves`).

The graph is traced in eval mode. Whenever traced code reads a module's
``training`` flag, the model is traced again in train mode and a
:class:`TraceModeWarning` is raised if the two graphs differ. Tracing works on
a private clone of the module tree that owns copies of the buffers
(:func:`splice.copies.private_buffers`): code that updates a buffer while it
is traced (a fused BatchNorm counting batches) never changes the caller's model.
"""

from __future__ import annotations

import functools
import inspect
import warnings
from collections.abc import Callable, Iterable
from typing import Any

import torch
import torch.fx as fx
from torch import nn

from ..copies import private_buffers, tree_copy
from ..errors import GraphError, SpliceWarning, first_line
from .backward import backward_refused, backward_seen
from .leaves import LeafRule, class_path, has_call_hooks, is_torch_builtin
from .modes import describe_difference, modes_restored, original_class, set_training, spying, unspy_meta
from .lifted import (adopt_lifted, buffer_states, keep_view_sources, module_state, plain_tensor_targets,
                     state_back)

__all__ = ["GraphWarning", "TraceModeWarning", "trace"]


class GraphWarning(SpliceWarning):
    """Something about the traced graph the user should know."""


class TraceModeWarning(GraphWarning):
    """The train-mode and eval-mode graphs of a model differ; splice uses eval mode."""


class _Tracer(fx.Tracer):
    def __init__(self, rule: LeafRule | None = None, leaf_buffers: bool = True):
        # ``rule`` has a default because a pickled GraphModule records its tracer class and torch.load re-traces
        # the module with an instance made without arguments (a subclass that keeps every module a leaf)
        super().__init__()
        self._rule = rule if rule is not None else LeafRule(())
        self._leaf_buffers = leaf_buffers  # read a leaf's buffers as nodes (see getattr)
        self.read_leaf_buffer = False  # whether this trace did
        self.failed_in: tuple[str, type] | None = None  # innermost module whose tracing raised
        # id(tensor) -> (tensor, its first name), for the root's parameters and its buffers, made on the first
        # lookup: fx's own getattr searches every parameter, then every buffer, of the root on each read
        self._params: dict[int, tuple[torch.Tensor, str]] | None = None
        self._buffers: dict[int, tuple[torch.Tensor, str]] = {}

    def trace(self, root, concrete_args=None):
        self._params, self._buffers = None, {}
        return super().trace(root, concrete_args)

    def _tables(self) -> tuple[dict, dict]:
        if self._params is None:
            self._params = {}
            if isinstance(getattr(self, "root", None), nn.Module):
                for table, items in ((self._params, self.root.named_parameters()),
                                     (self._buffers, self.root.named_buffers())):
                    for name, t in items:
                        table.setdefault(id(t), (t, name))
        return self._params, self._buffers

    def _root_name(self, value: Any) -> str | None:
        """The name fx's search would find for ``value`` (parameters first, then buffers), or None; a buffer of a
        leaf is found too (see :meth:`getattr`)."""
        params, buffers = self._tables()
        if isinstance(value, nn.Parameter):
            found = params.get(id(value))
            if found is not None and found[0] is value:
                return found[1]
        found = buffers.get(id(value))
        if found is None or found[0] is not value:
            return None
        if self.proxy_buffer_attributes:
            return found[1]
        if self._leaf_buffers and self._in_a_leaf(found[1]):
            self.read_leaf_buffer = True
            return found[1]
        return None

    def _in_a_leaf(self, name: str) -> bool:
        """Whether buffer ``name`` belongs to a leaf (or a module inside one), whose own forward may change it."""
        path = name.rpartition(".")[0]
        parts = path.split(".") if path else []
        module = self.root
        for i, part in enumerate(parts):
            module = module._modules.get(part)
            if module is None:
                return False
            if self.is_leaf_module(module, ".".join(parts[:i + 1])):
                return True
        return False

    def getattr(self, attr: str, attr_val: Any, parameter_proxy_cache: dict[str, Any]) -> Any:
        """fx's rule (a parameter or buffer of the root becomes one ``get_attr`` node, shared by every read),
        with the root's tensors looked up by identity instead of searched; anything else is fx's own.

        fx hands traced code a buffer's value, not a node, so whatever the code computes from it becomes a
        constant of the graph. That is right for a buffer no forward changes, but not for one a leaf's own
        forward updates (a call counter, a batch norm's statistics in train mode) read by code outside it: such
        a buffer is read as a node, so the graph computes from its value at each call."""
        name = self._root_name(attr_val) if isinstance(attr_val, torch.Tensor) else None
        if name is None or self.param_shapes_constant:
            return super().getattr(attr, attr_val, parameter_proxy_cache)
        proxy = parameter_proxy_cache.get(name)
        if proxy is None:
            proxy = parameter_proxy_cache[name] = self.create_proxy("get_attr", name, (), {})
        return proxy

    def create_arg(self, a: Any) -> Any:
        """fx's rule (a tensor of the root is a ``get_attr`` node), with the same identity lookup."""
        if isinstance(a, torch.Tensor):
            params, buffers = self._tables()
            found = (params if isinstance(a, nn.Parameter) else buffers).get(id(a))
            if found is not None and found[0] is a:
                return self.create_node("get_attr", found[1], (), {})
        return super().create_arg(a)

    def is_leaf_module(self, m: nn.Module, module_qualified_name: str) -> bool:
        # a module with hooks of its own stays one call: a graph traced through it would drop them
        return self._rule(type(m)) or has_call_hooks(m) or super().is_leaf_module(m, module_qualified_name)

    def call_module(self, m, forward, args, kwargs):
        try:
            return super().call_module(m, forward, args, kwargs)
        except Exception:
            if self.failed_in is None:
                try:
                    qualname = self.path_of_module(m)
                except Exception:
                    qualname = "?"
                self.failed_in = (qualname, original_class(type(m)))
            raise


class FxFailure(Exception):
    def __init__(self, error: BaseException, failed_in: tuple[str, type] | None):
        super().__init__(str(error))
        self.error = error
        self.failed_in = failed_in


def specialised_options(root: nn.Module, n_inputs: int | None) -> dict[str, Any] | None:
    """The forward's options after its ``n_inputs`` inputs (by default, after the ones without a default) whose
    default is ``None``, a bool, a number or a string, each at that default: the graph is traced for a call with
    the inputs alone, as splice makes it. A Proxy for ``mask=None`` is not None, so ``if mask is not None:``
    would trace the branch the call never takes."""
    try:
        params = list(inspect.signature(root.forward).parameters.values())
    except (TypeError, ValueError):
        return None
    kinds = (inspect.Parameter.POSITIONAL_ONLY, inspect.Parameter.POSITIONAL_OR_KEYWORD, inspect.Parameter.KEYWORD_ONLY)
    params = [p for p in params if p.kind in kinds]
    skip = n_inputs if n_inputs is not None else sum(1 for p in params if p.default is inspect.Parameter.empty)
    found = {p.name: p.default for p in params[skip:]
             if p.default is None or type(p.default) in (bool, int, float, str)}
    return found or None


def _run_tracer(root: nn.Module, rule: LeafRule, n_inputs: int | None = None, whole: bool = True,
                changed: set[type] | None = None) -> fx.Graph:
    """One fx trace of ``root``. What it changed on a module (an update that ran once, while tracing) is put back,
    and the module's class goes to ``changed`` (a leaf); a change on the root, a draw from Python's or NumPy's
    generator, hooks on the root, a ``*args`` or ``**kwargs`` forward or code with a backward of its own (activation
    checkpointing, a custom autograd Function: the graph would drop that backward) fail it: hooks then run the real
    forward."""
    import random

    import numpy as np

    tracer = _Tracer(rule)
    state = module_state(root, lambda m: is_torch_builtin(type(m)) or rule(type(m)))
    draws = (random.getstate(), np.random.get_state()[1].tobytes())
    concrete = specialised_options(root, n_inputs) if whole else None
    try:
        # code with a backward of its own fails the trace: the graph would keep its forward's operations only
        with backward_refused():
            try:
                graph = tracer.trace(root, concrete_args=concrete)
            except Exception:
                if not tracer.read_leaf_buffer or backward_seen():
                    raise
                # code that takes a Python value from a leaf's buffer (len(), int(), a branch) cannot read it as a
                # node: it is traced as fx reads buffers, as values (verify's buffers row compares later calls)
                state_back(state)
                tracer = _Tracer(rule, leaf_buffers=False)
                graph = tracer.trace(root, concrete_args=concrete)
    except Exception as exc:
        error = GraphError(backward_seen()) if backward_seen() else exc  # the cause, not what code made of it
        raise FxFailure(error, tracer.failed_in) from exc
    finally:
        updated = state_back(state)
    if backward_seen():  # the traced code caught the error and went on
        raise FxFailure(GraphError(backward_seen()), tracer.failed_in)
    if changed is not None:
        changed.update(original_class(type(m)) for m in updated if m is not root)
    if whole and root in updated:
        raise FxFailure(GraphError(f"the forward of {type(root).__name__} changes its {updated[root]} as it runs, "
                                   "which a traced graph would do once, while tracing"), None)
    if whole and draws != (random.getstate(), np.random.get_state()[1].tobytes()):
        raise FxFailure(GraphError(f"the forward of {type(root).__name__} draws from Python's or NumPy's random "
                                   "generator, whose draw a traced graph would fix"), None)
    if whole and has_call_hooks(root):  # the graph replaces the root's forward, and with it the root's hooks
        raise FxFailure(GraphError("the model itself carries hooks, which a traced graph would drop"), None)
    first = next((n for n in graph.nodes if n.op == "placeholder"), None)
    if whole and first is not None and str(first.target).startswith("*"):  # a tuple, not an image to warp
        raise FxFailure(GraphError(f"the forward takes its inputs as {first.target}, not as named tensors"), None)
    extra = next((n.target for n in graph.nodes if n.op == "placeholder" and str(n.target).startswith("**")), None)
    if whole and extra is not None:  # a keyword the graph does not know lands there, and nothing reads it
        raise FxFailure(GraphError(f"the forward takes keywords as {extra}, which a traced graph would accept and "
                                   "drop (an option such as labels= or return_dict= would be ignored)"), None)
    return graph


def _trace_modes(root: nn.Module, rule: LeafRule, n_inputs: int | None = None,
                 changed: set[type] | None = None, reads: list[nn.Module] | None = None) -> tuple[fx.Graph, str | None]:
    """The eval-mode graph of ``root``, and how the train-mode graph differs (``None``: it does not); ``reads``
    collects the modules whose ``training`` flag the traced code read."""
    mods = list(root.modules())
    difference = None
    reads = [] if reads is None else reads
    with modes_restored(mods):
        set_training(mods, False)
        with spying(mods, reads) as spied:
            graph = _run_tracer(root, rule, n_inputs, changed=changed)
        # if no traced code read a `training` flag, a train-mode trace takes the same path
        if not spied or reads:
            set_training(mods, True)
            try:
                difference = describe_difference(graph, _run_tracer(root, rule, n_inputs, changed=changed))
            except FxFailure as failure:
                difference = f"the train-mode trace fails: {reason(failure.error)}"
    return graph, difference


def _updating_classes(root: nn.Module, before: dict) -> set[type]:
    """Classes of the modules (not the root) whose buffers a trace updated in place or replaced."""
    found = set()
    for key, (m, b, version) in before.items():
        now = m._buffers.get(key[1])
        if now is not b or (now is not None and now._version != version):
            if m is not root:
                found.add(original_class(type(m)))
    return found


_BATCH_NORMS = (nn.BatchNorm1d, nn.BatchNorm2d, nn.BatchNorm3d, nn.SyncBatchNorm,  # torch's, by public class
                nn.LazyBatchNorm1d, nn.LazyBatchNorm2d, nn.LazyBatchNorm3d)


def _traced_through_norms(root: nn.Module, rule: LeafRule) -> dict[type, nn.Module]:
    """One instance of each batch norm class in ``root`` that tracks statistics and that the tracer would trace
    through (not a leaf, not torch's own), by class."""
    found: dict[type, nn.Module] = {}
    for m in root.modules():
        cls = original_class(type(m))
        if (m is not root and isinstance(m, _BATCH_NORMS) and m.track_running_stats and not rule(cls)
                and not is_torch_builtin(cls)):
            found.setdefault(cls, m)
    return found


def _counting_norm_classes(root: nn.Module, rule: LeafRule, norms: dict[type, nn.Module],
                           n_inputs: int | None = None) -> set[type]:
    """The classes of ``norms`` that update their buffers when traced in train mode.

    Each class is traced alone, one instance, in train mode (a few nodes, not the whole tree); if one of
    them cannot be traced alone, the whole tree is traced once in train mode instead. A failure is left
    to the eval-mode rounds, which find any updating module the way they always do.
    """
    def traces(module: nn.Module) -> bool:
        try:
            _run_tracer(module, rule, n_inputs, whole=module is root)
        except FxFailure:
            return False
        return True

    before = buffer_states(root)
    mods = list(root.modules())
    with modes_restored(mods):
        set_training(mods, True)
        if not all(traces(m) for m in norms.values()):
            traces(root)
    return {c for c in _updating_classes(root, before) if not rule(c)}


@functools.lru_cache(maxsize=1)
def _graph_module_names() -> frozenset[str]:
    """What a graph module keeps under its own names: its class's attributes and those its ``__init__`` sets
    (``meta``, ``shape_env``), which a parameter, buffer or submodule of the same name would clash with."""
    instance = fx.GraphModule(nn.Module(), fx.Graph())
    return frozenset(n for n in (*dir(fx.GraphModule), *vars(instance)) if not n.startswith("_"))


def trace_owned(root: nn.Module, rule: LeafRule, n_inputs: int | None = None) -> fx.Graph:
    """Trace ``root``, a module tree splice owns, in eval mode; check train mode when it could differ.

    A module whose forward updates its own buffers (a BatchNorm fused with an
    activation counting batches, a call counter) would run that update once,
    while tracing, and never again in the traced graph. Such modules are kept
    as leaves (opaque steps that run their own forward), found by the buffers'
    version counters, which works on the meta device too; the tracer then runs
    again. ``rule`` keeps them (see :meth:`LeafRule.add`).

    A batch norm that fx traces through (a subclass fused with its activation)
    counts batches only in train mode, which the eval-mode trace cannot see:
    one instance of each such class is traced alone in train mode first, so
    that the tree is traced once with the updating ones as leaves.
    """
    own = _graph_module_names()
    clash = sorted(n for n in (*root._parameters, *root._buffers, *root._modules) if n in own)
    if clash:  # a traced graph module would shadow them (a parameter named 'code' broke fx's own code attribute)
        raise FxFailure(GraphError(f"the model's own {', '.join(map(repr, clash))} share a name with what a traced "
                                   "graph module keeps"), None)
    norms = _traced_through_norms(root, rule)
    counting = _counting_norm_classes(root, rule, norms, n_inputs) if norms else set()
    rule.add(counting)
    try:
        for _ in range(4):
            before = buffer_states(root)
            changed: set[type] = set()
            reads: list[nn.Module] = []
            graph, difference = _trace_modes(root, rule, n_inputs, changed, reads)
            updating = {c for c in _updating_classes(root, before) | changed if not rule(c)}
            if difference is not None:
                # code that reads a `training` flag takes another path in train mode: the modules whose flag it
                # reads run their own forward (leaves), so tuning in train mode runs what the model's code runs
                _refuse_root_reading_training(root, reads, difference)
                updating |= {original_class(type(m)) for m in reads if not rule(original_class(type(m)))}
            if not updating:
                break
            rule.add(updating)
    except FxFailure:
        # the norms were made leaves for this trace only; a fallback that does not trace keeps the leaves
        # it had before, and any the eval-mode rounds found
        rule.discard(counting)
        raise
    if difference is not None:
        warnings.warn(
            f"the train-mode and eval-mode graphs of {type(root).__name__} differ "
            f"({difference}); splice uses the eval-mode graph. Code outside leaf modules "
            "reads self.training; mark such modules as leaves (leaves=[...], --leaf TYPE) "
            "to keep the check at run time.",
            TraceModeWarning,
            stacklevel=3,
        )
    return graph


def _refuse_root_reading_training(root: nn.Module, reads: list[nn.Module], difference: str) -> None:
    """An :class:`FxFailure` when the model's own forward reads ``self.training`` on a path that changes the
    graph: the root cannot be a leaf, so its points are reached by hooks (its own forward keeps the check)."""
    if any(m is root for m in reads):
        raise FxFailure(GraphError(f"the forward of {type(root).__name__} takes another path in train mode "
                                   f"({difference}), which a traced graph would fix to eval mode"), None)


def fx_failure_hint(failure: FxFailure, model: nn.Module) -> tuple[str, str]:
    """(where, what to do) for an fx failure."""
    if failure.failed_in is not None and failure.failed_in[0] not in ("", "?"):
        qualname, cls = failure.failed_in
        where = f"module '{qualname}' ({cls.__name__})"
        todo = (
            f"mark it opaque with --leaf {class_path(cls)} (Python: leaves=[{cls.__name__}]) "
            "so the tracer keeps it as one step"
        )
    else:
        where = f"the forward of {type(model).__name__} itself"
        todo = (
            "move the Python control flow into a submodule and mark that submodule opaque "
            "with --leaf TYPE (Python: leaves=[TYPE])"
        )
    return where, todo


def reason(exc: BaseException) -> str:
    """``"TypeError: first line of the message"`` (the class name alone when there is no message), as
    :func:`~splice.errors.first_line` shortens it, without a closing full stop: it goes inside splice's sentence."""
    name = type(exc).__name__
    if not str(exc).strip():
        return name
    line = first_line(exc)
    return f"{name}: {line[:-1] if line.endswith('.') and not line.endswith('..') else line}"


def innermost_frame(exc: BaseException, skipping: Callable[[str], bool] = lambda path: False):
    """The innermost frame of ``exc``'s traceback (a ``traceback.FrameSummary``) whose absolute file path
    ``skipping`` does not pass over, or ``None``."""
    import os
    import traceback

    frames = [f for f in traceback.extract_tb(exc.__traceback__) if not skipping(os.path.abspath(f.filename))]
    return frames[-1] if frames else None


def in_package(path: str, module: Any) -> bool:
    """Whether the file ``path`` lies in the package of ``module`` (``torch``, ``splice``)."""
    import os

    return os.path.abspath(path).startswith(os.path.dirname(os.path.abspath(module.__file__)) + os.sep)


def check_model(model: Any, what: str) -> None:
    if not isinstance(model, nn.Module):
        raise GraphError(f"{what} needs a torch.nn.Module, got {type(model).__name__}; pass the model object")


def trace(model: nn.Module, *, leaves: Iterable[Any] = (),
          edit: Callable[[fx.Graph, nn.Module], None] | None = None, n_inputs: int | None = None) -> fx.GraphModule:
    """Trace a copy of ``model`` with torch.fx and return it as a new GraphModule.

    The GraphModule owns deep copies of the model's parameters and buffers; the
    caller's model is not changed and shares no tensors with the result. The
    tracer runs on a twin with its own buffers (:func:`splice.copies.private_buffers`),
    so code that updates a buffer while it is traced changes neither the caller's
    model nor the result. Constants the tracer lifts (``_tensor_constant0``, ...)
    are non-persistent buffers of the result. The graph is the eval-mode graph
    (see the module docstring); node names are stable from run to run. Raises
    :class:`~splice.errors.GraphError` naming the module fx could not trace.

    ``edit(graph, root)``, when given, changes the graph before the GraphModule
    is made from it, so that its code is generated once, not once for the trace
    and again for the edit. ``root`` is the private copy the GraphModule takes
    its modules from; a module the edit adds to it under a dotted target
    (``"box.item"``) reaches the GraphModule inside a plain ``nn.Module``
    container ``box``, as fx copies any target.
    """
    check_model(model, "trace()")
    try:
        gm, _ = trace_copy(model, LeafRule(leaves), edit, n_inputs)
    except FxFailure as failure:
        where, todo = fx_failure_hint(failure, model)
        raise GraphError(f"torch.fx cannot trace {where}: {reason(failure.error)}; {todo}") from failure.error
    return gm


def trace_copy(model: nn.Module, rule: LeafRule, edit: Callable[[fx.Graph, nn.Module], None] | None = None,
               n_inputs: int | None = None) -> tuple[fx.GraphModule, nn.Module]:
    """:func:`trace`'s GraphModule (its graph changed by ``edit`` first), and the twin the tracer ran on (whose
    modules the graph's nodes name).

    Raises :class:`FxFailure` when fx cannot trace the model.
    """
    try:
        work = tree_copy(model)
    except Exception as exc:
        raise GraphError(
            f"cannot copy {type(model).__name__} for tracing ({reason(exc)}); "
            "splice never traces the caller's model in place: make the model deep-copyable"
        ) from exc
    twin = private_buffers(work)
    graph = trace_owned(twin, rule, n_inputs)
    unspy_meta(graph)
    plain = plain_tensor_targets(graph, work)
    lifted = adopt_lifted(graph, twin, work)
    if edit is not None:
        edit(graph, work)
    gm = fx.GraphModule(work, graph, class_name=type(model).__name__)
    for name in lifted:
        gm._non_persistent_buffers_set.add(name)
    for target in plain:
        owner_path, _, leaf = target.rpartition(".")
        gm.get_submodule(owner_path)._non_persistent_buffers_set.add(leaf)
    keep_view_sources(gm, work, twin, lifted)
    gm.training = model.training  # submodules keep their own (copied) flags
    return gm, twin
