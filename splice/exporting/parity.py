"""Parity of an export with the eager model, as stored and with every warp perturbed.

Tolerances (:data:`EXPORT_TOLERANCES`) are the max error relative to the
output's scale (max ``|y|``), as in :func:`splice.compare.compare_outputs`:
float32 1e-3, float64 1e-9. onnxruntime picks other convolution algorithms
and summation orders than torch, and the exporter folds BatchNorm into the
convolutions: relative errors of 1e-7..1e-5 on small nets, about 1e-4 on a
ResNet-50 segmentation net whose BatchNorms carry real statistics (measured).
1e-3 is the relative tolerance PyTorch's own ONNX Runtime tutorial compares
with (``np.testing.assert_allclose(..., rtol=1e-03, atol=1e-05)``, "Exporting
a model from PyTorch to ONNX and running it using ONNX Runtime"); a
mis-lowered op or a warp applied in the wrong place differs by 1e-1 or more.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

import torch
from torch import Tensor, nn

from ..compare import compare_outputs, detached, flatten_outputs
from ..copies import private_buffers, tree_copy
from ..errors import CheckFailed, SpliceError, first_line
from .onnx import (
    MIN_OPSET,
    as_inputs,
    check_opset,
    export_onnx_bytes,
    exporting,
    input_names,
    onnx_output_names,
    torchscript,
)
from .branches import judge_conversions
from .weights import WeightsAsInputs, perturbed_copy, perturbed_tensors

__all__ = ["EXPORT_TOLERANCES", "JUDGED_QUANTILES", "ROUNDING_LIMIT", "onnx_parity", "check_onnx_graph"]

EXPORT_TOLERANCES = {torch.float32: 1e-3, torch.float64: 1e-9}
#: the largest float32 miss that can be put down to rounding (see :func:`_judged_exactly`): a rule of thumb, our
#: choice, no source. A GridSample lowered with another mode or align_corners differs by 0.26-0.40 on the
#: tray model with the perturbed warp, another padding mode by 0.013-0.02 (measured); on a well-conditioned
#: probe those fail anyway, as torch float32 is then within 1e-6 of float64
ROUNDING_LIMIT = 0.02


def as_batches(inputs) -> list[tuple[torch.Tensor, ...]]:
    """Batches as tuples of one tensor per model input, from a tensor, a tuple (one batch) or a list of either."""
    if isinstance(inputs, (torch.Tensor, tuple)):
        return [as_inputs(inputs)]
    return [as_inputs(b) for b in inputs]

def _load_onnx(onnx_model):
    import onnx

    if isinstance(onnx_model, onnx.ModelProto):
        return onnx_model
    if isinstance(onnx_model, (bytes, bytearray)):
        return onnx.load_from_string(bytes(onnx_model))
    path = Path(onnx_model)
    if not path.is_file():
        raise SpliceError(f"ONNX file '{path}' does not exist; check the path")
    try:
        return onnx.load(str(path))
    except Exception as exc:  # protobuf DecodeError and friends
        raise SpliceError(f"'{path}' is not a readable ONNX file ({type(exc).__name__}); it may be damaged") from None

def _ort_session(model, *, optimise: bool = True):
    """A quiet onnxruntime CPU session for a ``ModelProto`` or serialised bytes.

    ``optimise=False`` runs the graph's operators as exported, without
    onnxruntime's graph rewrites (which need stored weights to fold anything).
    """
    import onnxruntime as ort

    data = bytes(model) if isinstance(model, (bytes, bytearray)) else model.SerializeToString()
    opts = ort.SessionOptions()
    opts.log_severity_level = 4  # fatal only: a failing run is reported through its exception, once
    if not optimise:
        opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    try:
        return ort.InferenceSession(data, opts, providers=["CPUExecutionProvider"])
    except Exception as exc:  # onnxruntime raises its own exception types
        first = first_line(exc)
        raise CheckFailed(f"onnxruntime cannot load the exported graph ({first}); try another --opset, "
                          "or report the model") from None

def _run_batches(torch_model, session, feed_names: Sequence[str], batches, extra: dict, tol, known=None,
                 model_of: Callable[[], nn.Module] | None = None, judged: bool = True) -> dict:
    """Compare ``session`` with ``torch_model`` on every batch (``known``: torch outputs already at hand).

    ``model_of`` gives the torch model (``torch_model`` by default) for a
    float64 re-run when a float32 batch misses the tolerance (:func:`_judged_exactly`); not with ``judged``
    false (a tolerance the caller set is kept as it is).
    """
    model_of = model_of or (None if torch_model is None else (lambda: torch_model))
    exact_of = _float64_once(model_of) if judged and model_of is not None else None
    results = []
    for i, xs in enumerate(batches):
        if known is not None and known[i] is not None:
            ref = known[i]
        else:
            with torch.no_grad():
                ref = torch_model(*[x.clone() for x in xs])  # a forward may change its input in place
        feeds = {name: x.detach().cpu().numpy() for name, x in zip(feed_names, xs)}
        try:
            outs = session.run(None, {**feeds, **extra})
        except Exception as exc:  # onnxruntime raises its own exception types
            first = first_line(exc)
            return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                    "detail": f"onnxruntime failed on a batch of {xs[0].shape[0]}: {first}"}
        judged = _judged_exactly(compare_flat(ref, outs, tol), ref, outs, xs, exact_of)
        results.append(judged if judged["passed"] else _unsteady(judged, torch_model, ref, xs, tol))
    return merge_parities(results)


def _unsteady(result: dict, torch_model: nn.Module, ref, xs: tuple, tol: float) -> dict:
    """A failed comparison, said of torch itself when the model answers otherwise on a second run of the same
    input (dropout left on, a random draw in forward, state that moves at every call): no export can match it."""
    try:
        with torch.no_grad():
            again = torch_model(*[x.clone() for x in xs])
        flat = [t.detach().cpu().numpy() for t in flatten_outputs(again).values()]
        steady = compare_flat(ref, flat, tol)
    except Exception:  # noqa: BLE001 - a second run that fails says nothing of the first comparison
        return result
    if steady["passed"] or steady.get("max_abs") is None:
        return result
    return {**result, "detail": f"torch itself answers otherwise when run twice on the same input (up to "
                                f"{steady['max_abs']:.3g}: a random draw in its forward, dropout left on, or state "
                                f"that moves at every call), so no export can match it; {result['detail']}"}

def _float64_once(model_of: Callable[[], nn.Module]) -> Callable[[], nn.Module]:
    """A float64 copy of ``model_of()``, made on the first call and reused for every later batch."""
    made: list[nn.Module] = []

    def exact() -> nn.Module:
        if not made:
            made.append(tree_copy(model_of()).double().eval())
        return made[0]
    return exact

#: the quantiles of each output's errors against float64 that :func:`_judged_exactly` compares
JUDGED_QUANTILES = (0.5, 0.9, 0.99, 1.0)


def _quantiles(values: Tensor) -> list[float]:
    ordered = values.flatten().sort().values
    return [float(ordered[round(q * (ordered.numel() - 1))]) for q in JUDGED_QUANTILES]


def _judged_exactly(result: dict, ref, outs: list, xs: tuple, exact_of) -> dict:
    """A float32 comparison that missed its tolerance, judged against the model run in float64.

    A probe can be ill-conditioned in float32: a LayerNorm over channels that
    are zero in exact arithmetic but rounding noise in float32 (a warp whose
    grid lands a hair inside the image, a zero-initialised conv bias) turns
    rounding into output. There torch float32 is far from exact arithmetic,
    and onnxruntime, rounding in its own order, cannot agree with torch more
    closely than that. The comparison passes when, for every output, the
    export's errors against float64 are at most twice torch float32's plus
    the tolerance at each of :data:`JUDGED_QUANTILES` (the median, 90th and
    99th percentiles and the maximum: two float32 runs round about alike, in
    the same places or not), and the export is nowhere more than
    :data:`ROUNDING_LIMIT` of the output's scale from torch. An error where
    torch is exact moves the export's median or percentiles, and rounding in
    one output excuses nothing in another.
    """
    if result["passed"] or result.get("max_rel") is None or not result.get("shapes_equal") or exact_of is None:
        return result
    if any(not (x.is_floating_point() and x.dtype == torch.float32) for x in xs):
        return result
    try:
        with torch.no_grad():
            exact = flatten_outputs(exact_of()(*[x.double() for x in xs]))
    except Exception:  # a model that cannot run in float64: the float32 verdict stands
        return result
    torch32 = flatten_outputs(ref)
    if list(exact) != list(torch32) or any(exact[k].shape != torch32[k].shape for k in exact):
        return result
    tol, miss = result["tolerance"], result["max_rel"]
    rounding, worse = 0.0, False
    for key, out in zip(torch32, outs):
        t, e = torch32[key].detach().double().cpu(), exact[key].detach().double().cpu()
        if not t.numel():
            continue
        o = torch.as_tensor(out).double()
        scale = float(e.abs().max()) or 1.0  # the output's true scale
        theirs, ours = _quantiles((o - e).abs()), _quantiles((t - e).abs())
        rounding = max(rounding, ours[-1] / scale)
        worse = worse or any(a > 2 * b + tol * scale for a, b in zip(theirs, ours))
    if worse or miss > ROUNDING_LIMIT:
        if rounding <= tol:
            return result
        why = ("more than rounding explains" if worse
               else f"too large to put down to rounding (limit {ROUNDING_LIMIT:g})")
        return {**result, "detail": f"{result['detail']}; torch float32 itself is up to {rounding:.3g} from float64 "
                                    f"on this probe, but the difference is {why}"}
    return {**result, "passed": True, "float64_rounding": rounding,
            "detail": (f"max abs error {result['max_abs']:.3g}, max relative error {miss:.3g}: above the tolerance "
                       f"{tol:g}, and within this probe's float32 rounding (torch float32 is up to {rounding:.3g} "
                       "from float64, the export no more than twice as far at any percentile)")}

def _overridable(proto, names: Sequence[str]):
    """Declare the named initializers overridable graph inputs (values unchanged), in place.

    Feeding such an input replaces the tensor for one run, so the perturbed
    check needs no second export and no second session. The TorchScript
    exporter merges equal initializers (two zero-initialised heads of one
    shape share one tensor; the other names become Identity outputs): each
    merged name gets its own copy back first, so overriding one head's tensor
    changes nothing else. Returns ``None`` (leaving ``proto`` unusable) when a
    name is missing or is shared by several consumers.
    """
    from onnx import helper

    graph = proto.graph
    inits = {init.name: init for init in graph.initializer}
    aliases = {n.output[0]: n for n in graph.node
               if n.op_type == "Identity" and len(n.input) == 1 and n.input[0] in inits}
    wanted = set(names)
    if any(n not in inits and n not in aliases for n in wanted):
        return None
    roots = {name if name in inits else aliases[name].input[0] for name in wanted}
    # every alias of a root being touched becomes a standalone copy of the root
    for out, node in list(aliases.items()):
        if node.input[0] in roots and (out in wanted or node.input[0] in wanted):
            copy_ = graph.initializer.add()
            copy_.CopyFrom(inits[node.input[0]])
            copy_.name = out
            graph.node.remove(node)
            inits[out] = copy_
    direct = {}
    for node in graph.node:
        for name in node.input:
            direct[name] = direct.get(name, 0) + 1
    if any(direct.get(name, 0) != 1 for name in wanted):
        return None
    declared = {i.name for i in graph.input}
    for name in sorted(wanted - declared):
        graph.input.append(helper.make_tensor_value_info(name, inits[name].data_type, list(inits[name].dims)))
    return proto

def merge_parities(results: list[dict]) -> dict:
    ok = all(r["passed"] for r in results)
    nums = [r for r in results if r.get("max_abs") is not None]
    worst = max(nums, key=lambda r: r["max_rel"]) if nums else results[0]
    top1 = [r["top1"] for r in results if r.get("top1") is not None]
    rounding = [r["float64_rounding"] for r in results if r.get("float64_rounding") is not None]
    return {"passed": ok, "max_abs": max((r["max_abs"] for r in nums), default=None),
            "max_rel": max((r["max_rel"] for r in nums), default=None), "top1": min(top1) if top1 else None,
            "float64_rounding": max(rounding, default=None),
            "shapes_equal": all(r.get("shapes_equal", True) for r in results),
            "nonfinite": sum(r.get("nonfinite", 0) for r in results),
            "detail": next((r["detail"] for r in results if not r["passed"]), worst["detail"])}

def compare_flat(reference, outputs: list, tol: float) -> dict:
    ref = flatten_outputs(reference)
    if len(outputs) != len(ref):
        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                "detail": f"the export returns {len(outputs)} outputs, the model {len(ref)} ({', '.join(ref)})"}
    cand = {k: torch.as_tensor(v) for k, v in zip(ref, outputs)}
    ref = {k: v.to(cand[k].dtype) if v.dtype != cand[k].dtype else v for k, v in ref.items()}
    return compare_outputs(ref, cand, tol=tol)

def parity_tolerance(model: nn.Module, tol: float | None) -> float:
    if tol is not None:
        return tol
    p = next(iter(model.parameters()), None)
    return EXPORT_TOLERANCES.get(p.dtype if p is not None else torch.float32, EXPORT_TOLERANCES[torch.float32])

def model_dtype(model: nn.Module) -> torch.dtype:
    p = next(iter(model.parameters()), None)
    return p.dtype if p is not None else torch.float32

def parity_summary(stored: dict, perturbed: dict | None, tol: float, sizes: list[int], how: str | None) -> dict:
    passed = stored["passed"] and (perturbed is None or perturbed["passed"])
    if not stored["passed"]:
        detail = f"as stored: {stored['detail']}"
    elif perturbed is not None and not perturbed["passed"]:
        detail = f"with the perturbed warp: {perturbed['detail']}"
    else:
        detail = (f"max abs error {stored['max_abs']:.3g} as stored"
                  + (f", {perturbed['max_abs']:.3g} with a perturbed warp" if perturbed else ", no warps to perturb")
                  + f" (relative tolerance {tol:g})")
        lenient = [(what, r) for what, r in (("as stored", stored), ("perturbed", perturbed))
                   if r is not None and r.get("float64_rounding") is not None]
        for what, r in lenient:
            detail += (f"; {what}, relative error {r['max_rel']:.3g} is within the probe's float32 rounding (torch "
                       f"float32 is {r['float64_rounding']:.3g} from float64)")
    return {
        "passed": passed,
        "max_abs": stored["max_abs"], "max_rel": stored["max_rel"], "top1": stored["top1"],
        "max_abs_perturbed": perturbed["max_abs"] if perturbed else None,
        "max_rel_perturbed": perturbed["max_rel"] if perturbed else None,
        "tolerance": tol, "batch_sizes": sizes, "perturbed_by": how, "detail": detail,
        "nonfinite": stored.get("nonfinite", 0),
        "shapes_equal": all(r.get("shapes_equal", True) for r in (stored, perturbed) if r is not None),
        "float64_rounding": max((r["float64_rounding"] for r in (stored, perturbed)
                                 if r is not None and r.get("float64_rounding") is not None), default=None),
    }

def onnx_parity(model: nn.Module, onnx_model, inputs, *, perturb: bool = True, tol: float | None = None,
                references: Sequence | None = None, exporter: str = "torchscript",
                conversions: Sequence[str] = ()) -> dict:
    """Run an ONNX model in onnxruntime (CPU) and compare it with ``model`` in torch.

    ``onnx_model`` is a path, serialised bytes or an ``onnx.ModelProto``;
    ``inputs`` is one batch or a list of batches (e.g. two batch sizes for a
    dynamic-batch export). With ``perturb`` (and warps present) the check runs
    again with every warp set to :func:`perturbation_theta`. Returns
    ``{passed, max_abs, max_rel, top1, max_abs_perturbed, max_rel_perturbed,
    tolerance, batch_sizes, perturbed_by, detail}``; never changes ``model``.
    ``references`` may hold ``model``'s outputs for ``inputs`` when the caller
    has them already (one per batch); they are used for the as-stored check.
    A graph from ``export_onnx_bytes(weights_as_inputs=True)`` is recognised by
    its inputs and fed ``model``'s own tensors, then the perturbed head tensors.
    When the perturbed heads cannot be fed to the graph (the exporter merged
    their tensors), the perturbed twin is exported again with ``exporter``,
    the one that wrote ``onnx_model``. ``conversions`` are the places where
    the exporter's tracer turned a tensor into a Python value, judged by
    :func:`judge_conversions`.
    """
    import onnx

    model = private_buffers(model)  # evaluated in eval mode on a twin: the caller's modes and buffers stay
    proto = _load_onnx(onnx_model)
    judged, tol = tol is None, parity_tolerance(model, tol)
    batches = as_batches(inputs)
    if references is not None and len(references) != len(batches):
        raise SpliceError(f"onnx_parity got {len(references)} references for {len(batches)} input batches")
    if _weight_inputs(proto, model):
        result = _parity_with_weight_inputs(model, proto, batches, perturb=perturb, tol=tol, references=references,
                                            judged=judged)
        return judge_conversions(result, model, batches, conversions, lambda batch, within: _parity_with_weight_inputs(
            model, proto, [batch], perturb=False, tol=within, references=None, judged=False))
    if isinstance(onnx_model, onnx.ModelProto):  # the caller's proto stays as it was
        proto = onnx.ModelProto()
        proto.CopyFrom(onnx_model)
    values = perturbed_tensors(model) if perturb else {}
    n_outputs = len(proto.graph.output)
    opset = next((o.version for o in proto.opset_import if o.domain in ("", "ai.onnx")), 17)
    checked = _overridable(proto, list(values)) if values else proto
    how = "feeds" if values and checked is not None else ("re-export" if values else None)
    if checked is None:  # the exporter merged the head tensors beyond repair: the original graph is used
        proto = _load_onnx(onnx_model)
        checked = proto
    model.eval()  # a twin of the caller's model
    session = _ort_session(checked)

    def run(torch_model, sess, extra: dict, known=None, on=batches, within=tol) -> dict:
        names = [i.name for i in sess.get_inputs()[:len(batches[0])]]
        return _run_batches(torch_model, sess, names, on, extra, within, known, judged=judged and within == tol)

    stored = run(model, session, {}, references)
    perturbed = None
    if values:
        twin = perturbed_copy(model)
        if how == "feeds":
            perturbed = run(twin, session, {k: v.detach().cpu().numpy() for k, v in values.items()})
        else:
            # traced on the biggest batch: torch.export specialises a dynamic batch of 1 to that size
            again = export_onnx_bytes(twin, max(batches, key=lambda b: b[0].shape[0]), opset=max(opset, MIN_OPSET),
                                      dynamic_batch=len({b[0].shape[0] for b in batches}) > 1,
                                      fold_constants=False, n_outputs=n_outputs, exporter=exporter)
            perturbed = run(twin, _ort_session(_load_onnx(again)), {})
    summary = parity_summary(stored, perturbed, tol, [int(b[0].shape[0]) for b in batches], how)
    return judge_conversions(summary, model, batches, conversions,
                             lambda batch, within: run(model, session, {}, on=[batch], within=within))

def _perturbed_feeds(own: dict, values: Mapping[str, torch.Tensor]) -> dict:
    """``own`` (graph input -> array) with the warp heads' tensors replaced by the perturbed ``values``."""
    missing = sorted(set(values) - set(own))
    if missing:
        raise SpliceError(f"the ONNX graph does not take the warp head tensor(s) {', '.join(missing)} as inputs; "
                          "export it with export_onnx_bytes(weights_as_inputs=True), or check a self-contained "
                          "export with onnx_parity")
    return {**own, **{k: v.detach().cpu().numpy() for k, v in values.items()}}

def _weight_inputs(proto, model: nn.Module) -> list[str]:
    """The graph inputs after the model's own inputs, if they are all ``model``'s state entries; else ``[]``."""
    inits = {init.name for init in proto.graph.initializer}
    state = model.state_dict(keep_vars=True)
    graph_inputs = [i.name for i in proto.graph.input if i.name not in inits]
    images = [n for n in graph_inputs if n not in state]
    extra = graph_inputs[len(images):]
    if not extra or graph_inputs[:len(images)] != images or images != input_names(len(images)):
        return []
    return extra

def _parity_with_weight_inputs(model, graph, batches, *, perturb: bool, tol, references,
                               perturbed_references=None, optimise: bool = True, judged: bool = True) -> dict:
    """One session of a weights-as-inputs graph, fed ``model``'s tensors, then the perturbed head tensors.

    ``perturbed_references`` may hold the perturbed model's outputs when the
    caller has them (the tracer's pass in :func:`check_onnx_graph`).
    """
    session = _ort_session(graph, optimise=optimise)
    images = [i.name for i in session.get_inputs()[:len(batches[0])]]
    state = model.state_dict(keep_vars=True)
    own = {i.name: state[i.name].detach().cpu().numpy() for i in session.get_inputs()[len(images):]
           if i.name in state}
    model.eval()  # a twin of the caller's model
    stored = _run_batches(model, session, images, batches, own, tol, references, judged=judged)
    perturbed = None
    values = perturbed_tensors(model) if perturb else {}
    if values:
        twin = perturbed_copy(model) if perturbed_references is None else None
        perturbed = _run_batches(twin, session, images, batches, _perturbed_feeds(own, values), tol,
                                 perturbed_references, judged=judged,
                                 model_of=None if twin is not None else (lambda: perturbed_copy(model)))
    return parity_summary(stored, perturbed, tol, [int(b[0].shape[0]) for b in batches], "feeds" if perturbed else None)

def check_onnx_graph(model: nn.Module, example, *, opset: int = 17, reference=None,
                     tol: float | None = None, perturb: bool = True) -> dict:
    """Export a checking graph of ``model`` and compare it in onnxruntime, as stored and perturbed.

    The graph takes the weights as inputs (``export_onnx_bytes(weights_as_inputs=True)``,
    TorchScript exporter, no constant folding) and is traced with the warp
    heads' final tensors set to the perturbation, so the tracer's own forward
    pass is the torch side of the perturbed comparison; one session is then
    run fed the model's own tensors (compared with ``reference``, the
    model's output for ``example``, computed when not given) and fed the
    perturbed ones. ``example`` is one batch (a tensor, or a tuple of one
    tensor per model input). Returns the
    :func:`onnx_parity` summary plus ``export_seconds``, ``check_seconds``,
    ``bytes`` and ``graph`` (the serialised checking graph); raises :class:`SpliceError` when the export fails. Used by
    ``splice verify --onnx``; ``splice export`` checks the file it ships.
    """
    check_opset(opset, "torchscript")
    plain = model
    model = private_buffers(model)  # traced and run in eval mode on a twin: the caller's modes and buffers stay
    judged, tol = tol is None, parity_tolerance(model, tol)
    swapped = perturbed_tensors(model) if perturb else {}
    start = time.perf_counter()
    xs = as_inputs(example)
    conversions: list[str] = []
    with exporting(model, "torchscript", opset, conversions):
        target = WeightsAsInputs(model, keep_output=True, n_inputs=len(xs))
        missing = sorted(set(swapped) - set(target.names))
        if missing:
            raise SpliceError(f"the warp head tensor(s) {', '.join(missing)} are not state-dict entries of their "
                              "own; check the graph with onnx_parity on a self-contained export instead")
        values = [swapped.get(name, v) for name, v in zip(target.names, target.values)]
        names = (onnx_output_names(model, xs, None) if reference is None
                 else [f"output_{i}" for i in range(len(flatten_outputs(reference)))])
        data = torchscript(target, (*xs, *values), [*input_names(len(xs)), *target.names], names, opset=opset,
                            dynamic_batch=False, fold_constants=False, n_images=len(xs))
        traced = detached(target.output)
    seconds = time.perf_counter() - start
    start = time.perf_counter()
    if not swapped and reference is None:
        reference = traced  # traced as stored: the tracer's pass is the stored model's output
    # op for op: with the weights fed there is nothing for onnxruntime to fold
    # or fuse ahead of time, and the file that ships is checked by export()
    result = _parity_with_weight_inputs(model, data, [xs], perturb=bool(swapped), tol=tol,
                                        references=None if reference is None else [reference],
                                        perturbed_references=[traced], optimise=False, judged=judged)
    # the graph was traced on the very batch it is checked on: a branch on values is judged apart
    result = judge_conversions(result, plain, [xs], conversions, lambda batch, within: _parity_with_weight_inputs(
        private_buffers(plain), data, [batch], perturb=False, tol=within, references=None,
        optimise=False, judged=False))
    return {**result, "export_seconds": seconds, "check_seconds": time.perf_counter() - start, "bytes": len(data),
            "graph": data}
