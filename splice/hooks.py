"""Splicing by forward hooks: warps at module outputs of an otherwise unchanged copy of the model.

When torch.fx cannot trace a model, or the splice lives ``within`` one of its
submodules, the points come from :mod:`splice.graph`'s hooks view: each is
the tensor one call of one module returns (its *site*: the module's qualname
and which call, counted from 0 within one call of the scope). :func:`apply_hooks`
deep-copies the model, adds the warps under ``splice_warps`` at the root, and
registers:

- a forward pre-hook on the root that notes which module tree is running
  (the model itself, or a twin of it that shares these hooks: a copy for
  export, a perturbed copy), so the warps are looked up on the module that
  is actually called;
- a forward pre-hook on the scope (the root, or the ``within`` submodule)
  that resets the per-call counts and warps the scope's first input (the
  point ``input``);
- a forward hook on each site module that counts its calls and, at the
  recorded call, returns ``warp(output)``;
- a forward hook on the scope that drops the activations kept for
  localisation inputs (``loc_from``).

Base parameter and buffer names are unchanged; the model keeps its own class,
so it trains (``.train()``), exports and deep-copies like the original. The
hook objects live in the modules' hook dictionaries: ``copy.deepcopy`` and
pickling carry them along, and the per-forward state is never copied.
"""

from __future__ import annotations

import inspect
import threading
import warnings
from collections.abc import Mapping, Sequence

import torch
from torch import nn

from .copies import tree_copy
from .errors import PointError, SiteMovedWarning, suggest

__all__ = ["WARP_PREFIX", "apply_hooks", "hooks_installed"]

WARP_PREFIX = "splice_warps"  # where every splice keeps its warps (splice.surgery re-exports it)


class _Scope:
    """The per-forward state of one spliced scope, one per thread (two threads may run one model at once, as they
    may run any module in eval mode); never copied or pickled: it holds activations."""

    def __init__(self, root: nn.Module, within: str, expected: Sequence[str] = (), loc_warped: bool = False):
        self.root, self.within, self.expected, self.loc_warped = root, within, tuple(expected), loc_warped
        self.local = threading.local()

    def __getstate__(self):
        return {"root": self.root, "within": self.within, "expected": self.expected, "loc_warped": self.loc_warped}

    def __setstate__(self, state):
        self.__init__(state["root"], state["within"], state.get("expected", ()), state.get("loc_warped", False))

    def mine(self) -> threading.local:
        """This thread's state: ``calls`` (per module), ``seen`` (activations by point), ``active``, ``current``."""
        st = self.local
        if not hasattr(st, "calls"):
            st.calls, st.seen, st.active, st.current, st.batch = {}, {}, False, None, None
        return st

    def warp(self, name: str) -> nn.Module:
        current = self.mine().current
        holder = current if current is not None else self.root
        return getattr(holder, WARP_PREFIX)[name]

    def clear(self) -> None:
        st = self.mine()
        st.calls, st.seen, st.active = {}, {}, False


class _RootHook:
    """Pre-hook on the model: the warps are those of the module tree actually called."""

    def __init__(self, scope: _Scope):
        self.scope = scope

    def __call__(self, module, args):
        self.scope.mine().current = module


def _first_parameter(module: nn.Module) -> str | None:
    """The name of the first parameter of ``module``'s forward, by which a caller may pass the images as a keyword
    (``model(pixel_values=x)``); ``None`` when it takes ``*args`` first or has no signature Python can read."""
    try:
        params = list(inspect.signature(module.forward).parameters.values())
    except (TypeError, ValueError):
        return None
    if not params or params[0].kind not in (inspect.Parameter.POSITIONAL_ONLY,
                                            inspect.Parameter.POSITIONAL_OR_KEYWORD):
        return None
    return params[0].name


class _EnterHook:
    """Pre-hook on the scope module: a new forward of the scope; its first input may be warped, passed by
    position or by its name (``keyword``, the forward's first parameter)."""

    def __init__(self, scope: _Scope, warp: str | None, loc: str | None, keyword: str | None = None):
        self.scope, self.warp, self.loc, self.keyword = scope, warp, loc, keyword

    def __call__(self, module, args, kwargs):
        st = self.scope.mine()
        st.calls, st.seen, st.active, st.batch = {}, {}, True, None
        if args:
            images = args[0]
        elif self.keyword is not None and self.keyword in kwargs:
            images = kwargs[self.keyword]
        else:
            images = None
        listed = _listed_images(images) if self.warp is not None else None  # a list of (C, H, W), as a detector's
        if listed is not None:
            images = listed
        elif _all_images(images):  # no warp to feed: the images are only counted, for the batch guard
            st.batch = len(images)
        if not isinstance(images, torch.Tensor):
            if self.warp is not None:  # running on without the warp would look like a working splice
                raise RuntimeError(f"splice: the warp at 'input' of {type(module).__name__} found no image tensor "
                                   f"in this call (first argument{f' or {self.keyword}=' if self.keyword else ''}); "
                                   "pass the images as the forward's first argument")
            return None
        st.seen["input"] = images
        st.batch = images.shape[0] if images.dim() == 4 else None  # the images of this forward
        if self.warp is None:
            return None
        warp = self.scope.warp(self.warp)
        out = warp(images) if self.loc is None else warp(images, st.seen[self.loc])
        if self.scope.loc_warped:  # an older hooks folder, tuned with heads that read the warped input
            st.seen["input"] = out
        if listed is not None:  # handed back as they came: a list (or tuple) of images
            given = args[0] if args else kwargs[self.keyword]
            out = type(given)(out.unbind(0)) if isinstance(given, tuple) else list(out.unbind(0))
        # seen keeps the unwarped input: a localisation head reads it, as under fx
        return ((out, *args[1:]), kwargs) if args else (args, {**kwargs, self.keyword: out})


def _all_images(value) -> bool:
    """Whether ``value`` is a non-empty list or tuple of (C, H, W) tensors."""
    return isinstance(value, (list, tuple)) and bool(value) and all(
        isinstance(t, torch.Tensor) and t.dim() == 3 for t in value)


def _listed_images(value) -> torch.Tensor | None:
    """A list or tuple of (C, H, W) image tensors stacked into one batch; ``None`` for anything else. Images of
    several sizes are refused: the warp at the input was made for one."""
    if not _all_images(value):
        return None
    sizes = sorted({tuple(t.shape) for t in value})
    if len(sizes) > 1:
        raise RuntimeError(f"splice: the warp at 'input' takes images of one size, and this call passes "
                           f"{len(sizes)} ({', '.join('x'.join(map(str, s)) for s in sizes[:3])}); resize them to "
                           "the spliced input shape first")
    return torch.stack(list(value))


class _ExitHook:
    """Forward hook on the scope module: drops the activations kept for localisation inputs."""

    def __init__(self, scope: _Scope):
        self.scope = scope

    def __call__(self, module, args, output):
        missing = [p for p in self.scope.expected if p not in self.scope.mine().seen]
        self.scope.clear()
        if missing:  # the module calls of these points did not happen (a loop that ran fewer times, at this size)
            warnings.warn(f"the spliced model's forward did not reach point{'s' if len(missing) > 1 else ''} "
                          f"{', '.join(missing)}, so {'their warps' if len(missing) > 1 else 'its warp'} did not "
                          "run: the model calls that module fewer times on this input (another size?) than when "
                          "it was spliced; run it on inputs of the spliced size", SiteMovedWarning, stacklevel=2)


class _SiteHook:
    """Forward hook on one module: its ``call``-th output in a scope forward goes through a warp (or is kept)."""

    def __init__(self, scope: _Scope, sites: Mapping[int, tuple[str, str | None, str | None]],
                 total: int | None = None):
        # sites: {call index: (point, warp name or None, localisation point or None)}; total: the module's calls in
        # one forward when it was spliced (None: not recorded)
        self.scope, self.sites, self.total, self.warned = scope, dict(sites), total, False
        self.warned_alias = False

    def __call__(self, module, args, output):
        st = self.scope.mine()
        if not st.active:
            return None
        k = st.calls.get(id(module), 0)
        st.calls[id(module)] = k + 1
        if k >= (self.total if self.total is not None else 1):  # more calls than recorded (unrecorded: than one)
            self._check_extra_call(output, st.batch)
        site = self.sites.get(k)
        if site is None:
            return None
        point, warp, loc = site
        st.seen[point] = output  # unwarped: what a localisation head reading this point gets, as under fx
        if warp is not None:
            self._check_site(point, output, args)
            if loc is not None and loc not in st.seen:
                raise RuntimeError(f"splice: the localisation input {loc!r} of point {point!r} was not computed "
                                   "before it in this forward")
            w = self.scope.warp(warp)
            output = w(output) if loc is None else w(output, st.seen[loc])
            if self.scope.loc_warped:  # an older hooks folder, tuned with heads that read the warped point
                st.seen[point] = output
        return output

    def _check_extra_call(self, output, batch) -> None:
        """A call beyond those of one forward when the splice was made: on part of the batch it is a loop over images
        or chunks (refused: the warp would see only some of them); otherwise another path (warned once per model)."""
        point = next(iter(self.sites.values()))[0]
        if isinstance(batch, int) and isinstance(output, torch.Tensor) and output.dim() == 4 \
                and not torch.jit.is_tracing() and output.shape[0] < batch:
            raise RuntimeError(f"splice: point {point!r} is reached once per part of the batch (its module ran "
                               f"{(self.total or 1) + 1} times or more, on {output.shape[0]} of the {batch} images), "
                               "so its warp would see only some of them; re-create the splice at another point from "
                               "'splice points'")
        if not self.warned and self.total is not None:  # a folder written before the count was recorded: no count
            self.warned = True  # once per spliced model: the same path repeats on every forward of this size
            points = ", ".join(repr(p) for p, w, _ in self.sites.values() if w is not None) or repr(point)
            warnings.warn(f"the module of point {points} ran more than the {self.total} time"
                          f"{'s' if self.total > 1 else ''} it ran in one forward when it was spliced: the model takes "
                          "another path on this input (another size?), so the warp may sit on another tensor than "
                          "the one it was spliced at; run it on inputs of the spliced size", SiteMovedWarning,
                          stacklevel=3)

    def _check_site(self, point: str, output, args: tuple) -> None:
        """Refuse an output that is no tensor; caution, once, about one that is the module's own input."""
        if not isinstance(output, torch.Tensor):
            raise RuntimeError(f"splice: the module at point {point!r} returned {type(output).__name__}, "
                               "not a tensor; re-create the splice at a point from 'splice points'")
        if not self.warned_alias and any(output is a for a in args):
            # listings no longer offer such a point; a folder made before may hold one, and was right unless the
            # model kept a reference to the tensor from before the call (a skip connection), which stays unwarped
            self.warned_alias = True
            warnings.warn(f"the module at point {point!r} hands back its own input (in place, or unchanged), so its "
                          "warp reaches what the module returns but not a reference to that tensor kept before the "
                          "call (a skip connection taken there stays unwarped); 'splice points' now lists the module "
                          "that computes it instead: re-create the splice there", SiteMovedWarning, stacklevel=3)


def hooks_installed(model: nn.Module) -> bool:
    """True when ``model`` carries the hooks of :func:`apply_hooks`."""
    return any(isinstance(h, _RootHook) for h in model._forward_pre_hooks.values())


def _site_module(scope_module: nn.Module, qualname: str, point: str) -> nn.Module:
    try:
        return scope_module.get_submodule(qualname)
    except AttributeError:
        names = [q for q, _ in scope_module.named_modules() if q]
        raise PointError(f"point {point!r} sits on module {qualname!r}, which the model does not have"
                         f"{suggest(qualname, names) or ';'} Re-create the splice from 'splice points'") from None


class WarpHolder(nn.ModuleDict):
    """The warps of a hooks splice, held under the model as ``splice_warps``. A container's own forward may call
    every child in turn (``nn.Sequential`` does): the holder, its last child, then hands its input on unchanged."""

    def forward(self, x, *args, **kwargs):
        return x


def apply_hooks(model: nn.Module, plan: Sequence, sites: Mapping[str, tuple[str, int]],
                shapes: Mapping[str, tuple[int, ...]], *, within: str = "", factory: dict | None = None,
                calls: Mapping[str, int] | None = None, loc_warped: bool = False) -> nn.Module:
    """A deep copy of ``model`` with the warps of ``plan`` (``SplicePlan`` items) at module outputs.

    ``sites`` maps every planned point (and localisation input) but
    ``input`` to ``(module qualname, call index)`` inside the scope;
    ``shapes`` maps them to ``(C, H, W)``. ``within`` is the scope's
    qualname (``""``: the whole model). The warps are built on the device and
    in the dtype of the model's first parameter unless ``factory`` says
    otherwise. ``calls`` maps a point to how often its module ran in one forward when it was spliced (when
    known): a forward that calls it more often warns once (:class:`~splice.errors.SiteMovedWarning`), since the
    warp's call may then hold another tensor. A localisation head reads the unwarped tensor at its point, as in a
    graph splice; ``loc_warped`` gives it the warped one, as hooks did before splice recorded which (an older
    folder, tuned so). The caller's model is not changed.
    """
    from .warps import Warp

    if WARP_PREFIX in dict(model.named_children()) or hooks_installed(model):
        raise PointError(f"the model already has warps ({WARP_PREFIX!r}); splice the original model instead")
    work = tree_copy(model)
    if factory is None:
        param = next(iter(model.parameters()), None)
        factory = {"device": param.device, "dtype": param.dtype} if param is not None else {}
    scope_module = work.get_submodule(within) if within else work
    container = WarpHolder()
    work.add_module(WARP_PREFIX, container)
    scope = _Scope(work, within, [item.point for item in plan if item.point != "input"], loc_warped)
    per_module: dict[str, dict[int, tuple]] = {}
    input_warp = input_loc = None
    for item in plan:
        point, config = item.point, item.config
        loc = config.loc_from if config.loc_from not in (None, point) else None
        container[point] = Warp(config, shapes[point], shapes[loc] if loc else None, **factory)
        if point == "input":
            input_warp, input_loc = point, loc
        else:
            qualname, call = sites[point]
            per_module.setdefault(qualname, {})[call] = (point, point, loc)
        if loc is not None and loc != "input":
            qualname, call = sites[loc]
            per_module.setdefault(qualname, {}).setdefault(call, (loc, None, None))
    # first of all hooks: the model's own hooks on these modules see the warped tensors, as the code after them does
    # (and the root hook first of those, so the input warp is looked up on the module tree actually called)
    scope_module.register_forward_pre_hook(_EnterHook(scope, input_warp, input_loc, _first_parameter(scope_module)),
                                           prepend=True, with_kwargs=True)
    work.register_forward_pre_hook(_RootHook(scope), prepend=True)
    totals = {sites[name][0]: n for name, n in (calls or {}).items() if name in sites}
    for qualname, by_call in per_module.items():
        point = next(iter(by_call.values()))[0]
        hook = _SiteHook(scope, by_call, totals.get(qualname))
        _site_module(scope_module, qualname, point).register_forward_hook(hook, prepend=True)
    scope_module.register_forward_hook(_ExitHook(scope))
    return work
