"""Splicing: put warp modules into a model, by rewriting its fx graph or with forward hooks.

:func:`insert` lists the points (:func:`splice.graph.points`), which says the
mechanism. ``fx``: a *copy* of the model is traced, one
:class:`~splice.warps.Warp` per point is added under the ``splice_warps``
prefix, and every consumer of the point is rewired to read the warped tensor.
``hooks`` (models fx cannot trace, and splices ``within`` a submodule): a copy
of the model gets the warps under the same prefix and forward hooks that
apply them at module outputs (:mod:`splice.hooks`). Either way, base parameter
and buffer names are unchanged, so the spliced model's ``state_dict`` is the
base's plus ``splice_warps.*``. Every warp starts at the exact identity, and
by default the result is checked (shapes and outputs) against the base before
it is returned. :func:`apply_info` re-applies a recorded splice.
"""

from __future__ import annotations

import copy
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import torch
from torch import fx, nn

from .compare import compare_outputs
from .copies import private_buffers, same_draws, tree_copy
from .errors import CheckFailed, PointError, SourceError, SpliceError, SpliceWarning, first_line, suggest
from .graph.tracing import in_package, innermost_frame
from .hooks import WARP_PREFIX, apply_hooks
from .manifest import PointRecord, SpliceInfo, attach_info, info_of, remember_base
from .sources import MODULE_SPEC

__all__ = ["WARP_PREFIX", "SplicePlan", "apply_plan", "apply_info", "insert", "check_unspliced", "warps_of",
           "base_view", "base_state_dict"]


@dataclass(frozen=True)
class SplicePlan:
    """One warp to insert: the point's name and the warp's configuration."""

    point: str
    config: Any  # splice.warps.WarpConfig


def warps_of(model: nn.Module) -> dict[str, nn.Module]:
    """``{point name: Warp}`` for a spliced model (empty for plain models)."""
    container = getattr(model, WARP_PREFIX, None)
    return dict(container.items()) if isinstance(container, nn.ModuleDict) else {}


def base_view(model: nn.Module, warps: Mapping[str, nn.Module] | None = None) -> nn.Module:  # noqa: ARG001
    """A copy of a spliced ``model`` with every warp reset to the identity: the base network's predictions
    (``warps`` is not read: the copy's own warps are reset)."""
    twin = tree_copy(model)
    for w in warps_of(twin).values():
        w.reset_parameters()
    return twin


def base_state_dict(model: nn.Module) -> dict[str, torch.Tensor]:
    """The model's state dict without the warp parameters."""
    return {k: v for k, v in model.state_dict().items() if not k.startswith(WARP_PREFIX + ".")}


def _resolve_points(requested: Sequence[str], listing: Sequence, gm: fx.GraphModule | None) -> list[str]:
    by_name = {p.name: p for p in listing}
    node_names = _node_map(gm) if gm is not None else {}
    names: list[str] = []
    for raw in requested:
        if raw == "recommended":
            rec = [p.name for p in listing if p.recommended]
            if not rec:
                first = by_name.get("input")
                cuts = [p.name for p in listing if p.cut][:3]
                why = "no cut between convs"
                if first is not None and not first.cut:
                    why = "'input' is not a cut" + (f": its paths meet another input's at {first.join!r}"
                                                    if first.join else "")
                raise PointError(f"no recommended point for this model ({why}); choose one with --at NAME"
                                 + (f" (cuts: {', '.join(cuts)})" if cuts else "")
                                 + " from 'splice points MODEL --all'")
            expanded = rec
        else:
            expanded = [raw]
        for name in expanded:
            if name not in by_name:
                if name in node_names:
                    raise PointError(
                        f"point {name!r} is not a 4-D (N, C, H, W) activation, which a warp needs; "
                        "pick one listed by 'splice points MODEL --all'"
                    )
                raise PointError(
                    f"unknown point {name!r}{suggest(name, list(by_name)) or ';'} "
                    "Run 'splice points MODEL' to list them."
                )
            if name in names:
                raise PointError(
                    f"point {name!r} was given twice (--at {name} … --at {name}); "
                    "each point takes at most one warp"
                )
            names.append(name)
    if not names:
        raise PointError("no insertion point given; pass --at NAME (or --at recommended)")
    return names


def _node_map(gm: fx.GraphModule) -> dict[str, fx.Node]:
    from .graph import point_names

    return point_names(gm)


def _restore_missing_state(gm: fx.GraphModule, original: nn.Module) -> None:
    """fx keeps only modules the graph touches; put back any others so names don't change."""
    have = set(gm.state_dict(keep_vars=True))
    want = original.state_dict(keep_vars=True)
    for key in want:
        if key in have:
            continue
        owner_path, _, leaf = key.rpartition(".")
        src_owner = original.get_submodule(owner_path) if owner_path else original
        # rebuild the module chain on the GraphModule side
        parent = gm
        for part in owner_path.split(".") if owner_path else []:
            child = getattr(parent, part, None)
            if child is None:
                child = nn.Module()
                parent.add_module(part, child)
            parent = child
        if not owner_path:
            parent = gm
        value = copy.deepcopy(getattr(src_owner, leaf))  # never share storage with the caller's model
        if isinstance(value, nn.Parameter):
            parent.register_parameter(leaf, value)
        else:
            persistent = leaf not in getattr(src_owner, "_non_persistent_buffers_set", set())
            parent.register_buffer(leaf, value, persistent=persistent)
        have.add(key)


def quick_check(base: nn.Module, spliced: nn.Module, input_shapes, *, tol: float | None = 1e-5) -> dict:
    """Shapes and outputs at the identity, on a seeded N(0,1) batch (float32) per input (``tol=None``: the
    tolerance of the outputs' dtype).

    Both models run as twins with their own buffers and modes
    (:func:`splice.copies.private_buffers`): a forward that counts its calls
    changes neither the caller's model nor the splice about to be saved.
    """
    gen = torch.Generator().manual_seed(0)
    xs = [torch.randn((2, *shape), generator=gen) for shape in input_shapes]
    param = next(iter(base.parameters()), None)
    if param is not None:
        xs = [x.to(device=param.device, dtype=param.dtype) for x in xs]
    base_twin, spliced_twin = private_buffers(base).eval(), private_buffers(spliced).eval()
    with torch.no_grad():
        # each model gets its own copy of the batch: a forward may normalise its input in place
        with same_draws():
            try:
                base_out = base_twin(*[x.clone() for x in xs])
            except Exception as exc:  # the model itself refuses the check's batch: say what it was given
                shapes = ", ".join("x".join(map(str, s)) for s in input_shapes)
                frame = innermost_frame(exc)  # torch's own code (a layer refusing a shape), or the model's
                hint = ("check --input-shape" if frame is not None and in_package(frame.filename, torch) else
                        "the check feeds seeded N(0, 1) values, so a model that needs other values cannot take it")
                raise SpliceError(f"{type(base).__name__} fails on the identity check's batch of two {shapes} inputs "
                                  f"({type(exc).__name__}: {first_line(exc)}); {hint}") from exc
        with same_draws():  # a model that samples in eval mode (Monte Carlo dropout) draws the same masks
            spliced_out = spliced_twin(*[x.clone() for x in xs])
        return compare_outputs(base_out, spliced_out, tol=tol)


def apply_plan(model: nn.Module, plan: Sequence[SplicePlan], input_shape, *, leaves=(), listing=None,
               traced: fx.GraphModule | None = None, factory: dict | None = None,
               shapes: Mapping[str, tuple[int, ...]] | None = None, n_inputs: int | None = None) -> fx.GraphModule:
    """Trace ``model`` (fx works on a private clone) and insert the planned warps (no checks).

    ``traced`` may pass in a fresh, unused result of ``graph.trace(model)``;
    ``shapes`` the ``{point: (C, H, W)}`` of every planned point (and
    localisation input) when they are known, which saves listing the points.
    The warps are built on the device and in the dtype of the model's first
    parameter unless ``factory`` (``{"device", "dtype"}``) says otherwise.
    Without ``traced``, the warps go into the graph as it is traced, so the
    GraphModule's code is generated once.
    """
    from . import graph

    if shapes is None:
        if listing is None:
            listing = graph.points(model, input_shape, all=True, leaves=leaves)
        shapes = {p.name: tuple(p.shape) for p in listing}
    if factory is None:
        param = next(iter(model.parameters()), None)
        factory = {"device": param.device, "dtype": param.dtype} if param is not None else {}
    container = nn.ModuleDict()

    def edit(g: fx.Graph, root: nn.Module) -> None:
        _insert_warps(g, root, container, plan, shapes, factory)

    if traced is not None:
        gm = traced
        edit(gm.graph, gm)
        gm.recompile()
    else:
        gm = graph.trace(model, leaves=leaves, edit=edit, n_inputs=n_inputs)
        gm.add_module(WARP_PREFIX, container)  # fx copied the warps into a plain module: the ModuleDict instead
    gm.graph.lint()
    _restore_missing_state(gm, model)
    gm.train(model.training)
    return gm


def _insert_warps(g: fx.Graph, root: nn.Module, container: nn.ModuleDict, plan: Sequence[SplicePlan],
                  shapes: Mapping[str, tuple[int, ...]], factory: dict) -> None:
    """Add one warp per planned point to ``container`` (a child of ``root``) and rewire ``g`` through them."""
    from . import graph
    from .warps import Warp

    nodes = graph.point_names(g)
    order = {n: i for i, n in enumerate(g.nodes)}
    _check_plan(plan, nodes, shapes, factory.get("dtype"))
    if WARP_PREFIX in dict(root.named_children()):
        raise PointError(f"the model already has a submodule named {WARP_PREFIX!r}; it cannot be spliced again")
    root.add_module(WARP_PREFIX, container)
    for item in sorted(plan, key=lambda it: order[nodes[it.point]]):
        node = nodes[item.point]
        loc_name = item.config.loc_from
        loc_node = None
        loc_shape = None
        if loc_name is not None and loc_name != item.point:
            if loc_name not in nodes or loc_name not in shapes:
                raise PointError(
                    f"--loc-from {loc_name!r} is not a 4-D point of this model"
                    f"{suggest(loc_name, list(shapes))} Run 'splice points MODEL --all' to list them."
                )
            loc_node = nodes[loc_name]
            if order[loc_node] > order[node]:
                raise PointError(
                    f"--loc-from {loc_name!r} comes after point {item.point!r} in the graph; the "
                    "localisation head must read a tensor computed before the warp (e.g. 'input')"
                )
            loc_shape = shapes[loc_name]
        warp = Warp(item.config, shapes[item.point], loc_shape, **factory)
        container[item.point] = warp
        with g.inserting_after(node):
            args = (node,) if loc_node is None else (node, loc_node)
            new = g.call_module(f"{WARP_PREFIX}.{item.point}", args=args)
        node.replace_all_uses_with(new, delete_user_cb=lambda user, new=new: user is not new)
        # a later warp may read this point as its localisation input: it sees the warped tensor


def _check_plan(plan: Sequence[SplicePlan], nodes: Mapping[str, fx.Node], shapes: Mapping[str, tuple[int, ...]],
                dtype) -> None:
    """Every planned point exists in this model, and its warps fit in memory (estimated from the shapes)."""
    from .limits import check_fits
    from .warps import warp_bytes

    for item in plan:
        if item.point not in nodes or item.point not in shapes:
            raise PointError(
                f"point {item.point!r} is not a 4-D point of this model{suggest(item.point, list(nodes)) or ';'} "
                "a splice record that names it was made on another architecture or edited by hand — re-create it "
                "with 'splice insert'"
            )
    need = sum(warp_bytes(it.config, shapes[it.point],
                          shapes.get(it.config.loc_from) if it.config.loc_from not in (None, it.point) else None,
                          dtype) for it in plan)
    check_fits(need, f"the warps at {', '.join(it.point for it in plan)}",
               "pass a smaller --input-shape, a smaller --head-width, or splice at a smaller point")


def _check_forward_fits(model: nn.Module, input_shape, listing, batch: int) -> None:
    """A no-grad forward of ``batch`` samples fits in memory: about three of its largest activations live at once
    (input, output and one skip of a layer; a rule of thumb, common practice, no source), from the meta shapes."""
    from .limits import check_fits, tensor_bytes

    param = next(iter(model.parameters()), None)
    dtype = param.dtype if param is not None else torch.get_default_dtype()
    largest = max((tensor_bytes([p.shape], dtype, batch) for p in listing),
                  default=tensor_bytes([input_shape], dtype, batch))
    check_fits(3 * largest, f"a forward pass of {batch} x {'x'.join(map(str, input_shape))}",
               "pass a smaller --input-shape")


def _warp_config(warp, name: str):
    """The :class:`~splice.warps.WarpConfig` for point ``name``: ``warp``, or its entry for ``name``."""
    from .warps import WarpConfig

    choice = warp.get(name, "affine") if isinstance(warp, Mapping) else warp
    if isinstance(choice, WarpConfig):
        return choice
    if isinstance(choice, str):
        return WarpConfig.from_dict({"family": choice})
    raise TypeError(f"warp must be a family name or WarpConfig, got {type(choice).__name__}")


def _warn_not_cut(point) -> None:
    if point.cut:
        return
    warnings.warn(
        f"point {point.name!r} is not a cut: some path from the input to the output bypasses it"
        + (f" (the paths re-join at {point.join!r})" if point.join else "")
        + ", so the warp will misalign the two paths; prefer a point marked cut",
        SpliceWarning,
        stacklevel=3,
    )


def _hooks_plan(plan: Sequence[SplicePlan], listing: Sequence) -> dict[str, dict]:
    """The sites a hooks splice needs (every planned point and localisation input), checked for order."""
    order = {p.name: i for i, p in enumerate(listing)}
    by_name = {p.name: p for p in listing}
    needed: dict[str, dict] = {}
    for item in plan:
        loc = item.config.loc_from
        names = [item.point] + ([loc] if loc not in (None, item.point) else [])
        for name in names:
            if name not in by_name:
                raise PointError(f"--loc-from {name!r} is not a point a warp can read here"
                                 f"{suggest(name, list(by_name))} Run 'splice points MODEL --all' to list them.")
            p = by_name[name]
            needed[name] = {"module": p.site[0] if p.site else "", "call": p.site[1] if p.site else 0,
                            "shape": list(p.shape)}
            if p.site is not None and p.site_calls:
                needed[name]["calls"] = int(p.site_calls)  # the module's calls per forward, checked at run time
        if loc not in (None, item.point) and order[loc] > order[item.point]:
            raise PointError(
                f"--loc-from {loc!r} comes after point {item.point!r} in the forward pass; the localisation head "
                "must read a tensor computed before the warp (e.g. 'input')"
            )
    return needed


def apply_info(model: nn.Module, info, *, factory: dict | None = None, unfilled: bool = False) -> nn.Module:
    """Re-apply the splice a :class:`~splice.manifest.SpliceInfo` records to ``model`` (the base; not changed).

    A graph splice (``mechanism "fx"``) traces a copy of ``model``; a hooks
    splice copies it and puts the hooks back at the recorded sites. With ``unfilled`` (for a caller about to
    adopt every warp parameter from a saved state) the warps are built on the meta device, where their
    initialisers draw no random numbers, then given CPU memory: their parameters hold no values yet, their
    buffers (grids, pooling bins) are computed again by their own ``_apply``.
    """
    if unfilled:
        from .warps import Warp

        # no initialisers_skipped() here: it would hide a module's in-place buffer update from the trace that
        # re-applies an fx splice (a call counter would be traced through, not kept as a step of its own)
        framed = apply_info(model, info, factory={"device": "meta"})
        for warp in (m for m in framed.modules() if isinstance(m, Warp)):
            warp.to_empty(device="cpu")
        return framed
    plan = [SplicePlan(p.name, p.warp) for p in info.points]
    if info.mechanism == "hooks":
        return _hooks_at(model, plan, info.sites, within=info.within, factory=factory,
                         loc_warped=info.loc_reads == "warped")
    return apply_plan(model, plan, info.input_shape, leaves=info.leaves, factory=factory,
                      shapes=info.recorded_shapes(), n_inputs=1 + len(info.extra_inputs))


def _hooks_at(model: nn.Module, plan: Sequence[SplicePlan], sites: Mapping[str, Mapping], *, within: str,
              factory: dict | None = None, loc_warped: bool = False) -> nn.Module:
    """:func:`~splice.hooks.apply_hooks` at ``sites`` as a record holds them (``{point: {"module", "call",
    "shape"}}``, and ``"calls"`` when known)."""
    return apply_hooks(model, plan, {n: (s["module"], s["call"]) for n, s in sites.items()},
                       {n: tuple(s["shape"]) for n, s in sites.items()}, within=within, factory=factory,
                       calls={n: s["calls"] for n, s in sites.items() if "calls" in s}, loc_warped=loc_warped)


def _splice(base: nn.Module, plan: Sequence[SplicePlan], listing: Sequence, src, *, leaves, traced, within: str):
    """``(spliced model, sites)`` with the mechanism the listing says."""
    if listing[0].mechanism == "hooks":
        sites = _hooks_plan(plan, listing)
        return _hooks_at(base, plan, sites, within=within), sites
    return apply_plan(base, plan, src.input_shape, leaves=leaves, listing=listing, traced=traced), {}


def _base_name(spec: str) -> str:
    return "a module object" if spec == MODULE_SPEC else spec


def check_unspliced(src) -> None:
    """Refuse a model that already holds warps, in a folder or in memory: a splice goes into the original model,
    all its points at once, not into a spliced one."""
    info = info_of(src.model)  # a spliced model in memory carries its record; a folder's is in its manifest
    held = [p["name"] for p in src.manifest["points"]] if src.is_spliced else [p.name for p in info.points] if (
        info is not None) else []
    if held:  # a tuned plain folder carries a record without points: an original model
        raise PointError(f"this model is already spliced (warps at {', '.join(held)}; base {_base_name(src.spec)}); "
                         "list and splice points of the original model instead, all in one insert (--at A --at B)")


def insert(
    model,
    at: str | Sequence[str] = ("recommended",),
    warp: str | Any | Mapping[str, Any] = "affine",
    *,
    input_shape=None,
    leaves: Sequence[str] = (),
    check: bool = True,
    force: bool = False,
    tol: float = 1e-5,
    within: str = "",
) -> nn.Module:
    """Return a copy of ``model`` with identity-initialised warps at the given points.

    ``model`` is an ``nn.Module``, a spec string (``"torchvision:resnet18"``,
    ``"pkg.mod:factory"``, a spliced folder) or a :class:`~splice.sources.Source`.
    ``at`` lists point names from :func:`splice.points`, or ``"recommended"``.
    ``warp`` is a family name, a :class:`~splice.warps.WarpConfig` (for the
    sampler, padding, head width, ``loc_from`` …), or a mapping from point
    name to either. ``within`` restricts the points to a submodule (the whole
    model is returned). The result is a ``torch.fx.GraphModule`` when the
    graph could be rewritten (mechanism ``fx``), else a copy of the model with
    forward hooks at the points (mechanism ``hooks``, see :mod:`splice.hooks`).
    The caller's model is never modified. The result carries its
    :class:`~splice.manifest.SpliceInfo` (``splice_info``).

    >>> import splice
    >>> spliced = splice.insert("torchvision:resnet18", at="layer1", warp="affine")  # doctest: +SKIP
    >>> sorted(spliced.splice_warps)                                                 # doctest: +SKIP
    ['layer1']
    """
    from . import graph
    from .sources import load_source

    src = load_source(model, input_shape=input_shape, leaves=leaves)
    check_unspliced(src)
    if src.input_shape is None:
        raise SourceError("insert needs the model's input shape; pass input_shape=(C, H, W) / --input-shape CxHxW")
    leaves = tuple(leaves) or tuple(src.leaves)
    base = src.model
    listing, traced = graph.trace_points(base, src.input_shapes, leaves=leaves, within=within)
    names = _resolve_points([at] if isinstance(at, str) else list(at), listing, traced)
    by_name = {p.name: p for p in listing}
    plan = [SplicePlan(name, _warp_config(warp, name)) for name in names]
    for item in plan:
        _warn_not_cut(by_name[item.point])
    if check:
        _check_forward_fits(base, src.input_shape, listing, batch=2)
    gm, sites = _splice(base, plan, listing, src, leaves=leaves, traced=traced, within=within)
    result = quick_check(base, gm, src.input_shapes, tol=tol) if check else None
    points = [PointRecord(it.point, it.config, tuple(by_name[it.point].shape), bool(by_name[it.point].cut))
              for it in plan]
    attach_info(gm, SpliceInfo.from_source(src, points=points, leaves=leaves, check=result,
                                           mechanism=listing[0].mechanism, within=within, sites=sites))
    if src.spec == MODULE_SPEC:
        remember_base(gm, base)  # no folder can rebuild it: verify and export compare with it in memory
    if result is not None and not result["passed"] and not force:
        raise CheckFailed(
            f"the spliced model differs from the base at the identity ({result['detail']}); "
            "this is a bug or an unusual model — pass --force (force=True) to keep it anyway"
        )
    return gm
