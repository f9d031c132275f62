"""The ``gradients`` row (one backward pass reaches every warp head) and the ``onnx`` row."""

from __future__ import annotations

import math
import time
from typing import Any

import torch
from torch import nn

from ..compare import flatten_outputs
from ..copies import same_draws, tree_copy
from ..errors import CheckFailed, SpliceError
from ..exporting import check_onnx_graph, export_onnx_bytes, onnx_parity
from ..surgery import warps_of
from ..warps.perturb import final_layer
from .probe import error_text, listed_names, reset_copy, short_number
from .report import CheckResult

__all__: list[str] = []


CUT = ("no gradient reaches the input either, though the outputs depend on it: the forward cuts the gradient "
       "(torch.no_grad, inference_mode, .detach(), an integer step) before the outputs, so a warp before the cut "
       "cannot train; splice after it")


def gradients_row(warps, grads: dict[str, dict], error: str | None, input_grad: float | None = None,
                  depends: bool | None = None) -> CheckResult:
    """``depends``: whether the outputs moved when the input did (:func:`outputs_move`), asked only when no
    gradient reaches the input: a zero-initialised head (a warning) or a forward that cuts the gradient (then each
    warp is judged, and one that gets none fails)."""
    numbers: dict[str, Any] = {"warps": grads, "input_grad": input_grad}
    if error is not None:
        return CheckResult("gradients", False, numbers, f"the backward pass failed ({error})", "backward failed")
    if not warps:
        return CheckResult("gradients", True, numbers, "the model has no warps", "no warps")
    cut = input_grad == 0.0 and bool(depends)
    if cut:
        numbers["outputs_depend_on_input"] = True
    if input_grad == 0.0 and not cut:
        # nothing reaches the input either: the outputs do not depend on it (a zero-initialised head, say),
        # so no warp can get a gradient, however well it is spliced
        return CheckResult(
            "gradients", True, numbers,
            "the model's outputs do not depend on its input (zero gradient with respect to the input, and the same "
            "outputs on the other inputs verify drew, or no way to tell: a model that answers otherwise at every "
            "call), as with a zero-initialised final layer, so the warps get none either; train or load the base "
            "first (a model that compares the samples of a batch answers a probe of one alike: --batch 2)",
            "output independent of the input",
            warning="the outputs do not depend on the input: the warps cannot be checked for gradients")
    problems, frozen = [], []
    for name, g in grads.items():
        if not g["finite"]:
            problems.append(f"warp {name!r} gets NaN/Inf gradients")
        elif g["final_weight"] == 0.0 or g["final_bias"] == 0.0:
            if getattr(getattr(warps[name], "config", None), "sampler", None) == "nearest":
                frozen.append(name)  # by design: a nearest sampler is piecewise constant in its grid
                continue
            problems.append(f"the final layer of warp {name!r} gets a zero gradient (weight {g['final_weight']:.3g}, "
                            f"bias {g['final_bias']:.3g}) — the warp does not influence the outputs, or its head is "
                            "cut off from the loss")
    summary = ", ".join(f"{n} {g['final_bias']:.3g}" for n, g in grads.items())
    if problems:
        text = "; ".join(problems) + (f"; {CUT}" if cut else "")
        return CheckResult("gradients", False, numbers, text,
                           "gradient cut before the outputs" if cut else f"|grad| final bias: {summary}")
    if frozen:
        text = (f"warp{'' if len(frozen) == 1 else 's'} {listed_names(frozen)} sample{'s' if len(frozen) == 1 else ''} "
                "with 'nearest', which passes no "
                "gradient to the grid: such a warp is fixed as it is (tune refuses it); splice with --sampler "
                "bilinear or bicubic to train one")
        return CheckResult("gradients", True, numbers, text, f"|grad| final bias: {summary}", warning=text)
    upstream = [n for n, g in grads.items() if g["upstream"] == 0.0]
    note = (f"; earlier head layers of {listed_names(upstream)} get exactly 0, as they must at the identity "
            "(the gradient flows through the zero final weight)") if upstream else ""
    return CheckResult("gradients", True, numbers,
                       f"every warp's final layer gets a finite, non-zero gradient{note}",
                       f"|grad| final bias: {summary}")

def at_identity(spliced: nn.Module, x: tuple, seed: int, tuned_row: CheckResult) -> CheckResult:
    """The row of a tuned model whose warps got no gradient on the probe, checked again on a copy with every warp
    at the identity: a tuned head may send a noise probe's grid off the image (zero samples, zero gradient) or
    leave its hidden units silent on noise, which says nothing of whether the warps are connected to the loss."""
    twin = reset_copy(spliced)
    warps = warps_of(twin)
    heads = warp_head_params(warps)
    for parts in heads.values():
        for ps in parts.values():
            for p in ps:
                p.requires_grad_(True)
    xs = tuple(t.detach().requires_grad_(t.is_floating_point()) for t in x)
    try:
        with torch.enable_grad(), same_draws():
            out = twin(*[t.clone() for t in xs])
    except Exception:  # noqa: BLE001 - the tuned row's own failure stands
        return tuned_row
    again = gradients_row(warps, *gradient_norms(out, heads, seed, xs))
    if not again.passed or again.warning:
        return tuned_row
    return CheckResult("gradients", True, {**tuned_row.numbers, "at_identity": again.numbers},
                       f"at the identity, {again.detail}; at the tuned warps this probe gave none ("
                       f"{tuned_row.detail}), as a tuned head can on noise (a grid sent off the image, hidden units "
                       "silent): the warps are connected to the loss", again.summary)


@torch.no_grad()
def outputs_move(model: nn.Module, x: tuple, out) -> bool:
    """Whether ``model`` (run on twins with their own buffers) answers otherwise on other inputs: its first input
    drawn afresh (seeded; with the probe's mean and spread, brighter, darker: no symmetry of the model, a mirror or
    the order of a batch, hides such a change). ``False`` when it cannot tell: a model that does not
    answer ``x`` again as it did (``out``: a random draw of its own, a counter) moves whatever its input."""
    from ..copies import private_buffers

    first = x[0].detach()
    if not first.is_floating_point() or first.numel() < 2:
        return False
    gen = torch.Generator().manual_seed(1234)
    mean, spread = float(first.double().mean()), float(first.double().std()) or 1.0
    draw = torch.randn(first.shape, generator=gen, dtype=torch.float64)
    # a fresh draw like the probe, one brighter and wider, one darker and narrower (a model may read only the mean
    # or the spread, and a step of it may saturate on one side)
    others = [(draw * spread + mean).to(first.dtype), (draw * 2 * spread + mean + spread).to(first.dtype),
              (draw * spread / 2 + mean - spread).to(first.dtype)]
    rest = [t.detach() for t in x[1:]]

    def run(t: torch.Tensor) -> dict:
        with same_draws():
            return flatten_outputs(private_buffers(model)(t, *rest))
    try:
        again = run(first.clone())
        if _differ(flatten_outputs(out), again):
            return False
        return any(_differ(again, run(t)) for t in others)
    except Exception:  # noqa: BLE001 - a model that cannot run it says nothing either way
        return False


def _differ(before: dict, after: dict) -> bool:
    for key, t in before.items():
        u = after.get(key)
        if (isinstance(u, torch.Tensor) and isinstance(t, torch.Tensor) and t.is_floating_point()
                and u.shape == t.shape and not torch.allclose(t.detach().double(), u.double(), rtol=1e-5, atol=1e-6)):
            return True
    return False


def gradient_norms(out, head_params: dict[str, dict[str, list]], seed: int,
               inputs: tuple = ()) -> tuple[dict, str | None, float | None]:
    """Norms of d(random projection of the outputs)/d(head parameters), per warp, and the norm of the
    gradient with respect to the ``inputs`` that require one (``None`` without such inputs)."""
    gen = torch.Generator().manual_seed(int(seed) + 1)
    flat = [t for t in flatten_outputs(out).values() if t.is_floating_point() and t.requires_grad]
    grads: dict[str, dict] = {}
    inputs = tuple(x for x in inputs if isinstance(x, torch.Tensor) and x.requires_grad)
    if not flat:
        return grads, ("no output depends on the parameters" if head_params else None), (0.0 if inputs else None)
    loss = sum((t * torch.randn(t.shape, generator=gen, dtype=torch.float32).to(t.dtype)).sum() for t in flat)
    order = [(name, part, p) for name, parts in head_params.items() for part, ps in parts.items() for p in ps]
    if not order and not inputs:
        return grads, None, None
    try:
        got = torch.autograd.grad(loss, [p for _, _, p in order] + list(inputs), allow_unused=True)
    except RuntimeError as exc:
        return grads, error_text(exc), None
    in_grads = got[len(order):]
    got = got[:len(order)]
    input_grad = (math.hypot(*(float(g.detach().double().norm()) if g is not None else 0.0 for g in in_grads))
                  if inputs else None)
    for (name, part, p), g in zip(order, got):
        rec = grads.setdefault(name, {"final_weight": 0.0, "final_bias": 0.0, "upstream": 0.0, "finite": True})
        if g is None:
            continue
        g64 = g.detach().double()
        rec["finite"] = rec["finite"] and bool(torch.isfinite(g64).all())
        norm = float(g64.norm())
        rec[part] = math.hypot(rec[part], norm) if part == "upstream" else norm
    for name in head_params:
        grads.setdefault(name, {"final_weight": 0.0, "final_bias": 0.0, "upstream": 0.0, "finite": True})
    return grads, None, input_grad

def warp_head_params(warps) -> dict[str, dict[str, list]]:
    out: dict[str, dict[str, list]] = {}
    for name, warp in warps.items():
        final = final_layer(warp)
        ids = {id(final.weight), id(final.bias) if final.bias is not None else None}
        out[name] = {"final_weight": [final.weight],
                     "final_bias": [final.bias] if final.bias is not None else [],
                     "upstream": [p for p in warp.parameters() if id(p) not in ids]}
    return out

def _on_images(model: nn.Module, result: dict, images: torch.Tensor) -> dict:
    """``result`` judged again on the user's ``images``: the exported graph (fed the model's weights when it takes
    them) against torch, one image at a time (the checking graph has a batch of one), within the parity tolerance.
    A branch the tracer fixed on the probe may go the other way on real images."""
    n = int(images.shape[0])
    try:
        found = onnx_parity(model, result["graph"], [images[i:i + 1].float() for i in range(n)], perturb=False)
    except CheckFailed as exc:
        found = {"passed": False, "detail": str(exc)}
    if found["passed"]:
        return {**result, "detail": f"{result['detail']}; the graph matched torch on the {n} image(s) from --images"}
    return {**result, "passed": False, "unproven": False,
            "detail": f"on the {n} image(s) from --images the graph differs from torch ({found['detail']}); "
                      f"{result['detail']}"}


def onnx_row(model: nn.Module, example: tuple[torch.Tensor, ...], *, opset: int, exporter: str,
              n_outputs: int | None, reference=None, images: torch.Tensor | None = None) -> CheckResult:
    """``example`` holds one tensor per model input; the graph is also run on ``images`` (``verify --images``, one
    input), which must match torch as the probe does (:func:`_on_images`)."""
    twin = model if example[0].dtype == torch.float32 else tree_copy(model).float()
    x = tuple(t.float() for t in example)
    if twin is not model:
        reference = None  # the probe outputs were computed in another dtype
    fed = exporter == "torchscript"
    result = None
    if fed:
        try:
            result = check_onnx_graph(twin, x, opset=opset, reference=reference)
        except SpliceError:
            # a model whose forward reads its tensors in ways the feeding cannot
            # follow (or a graph onnxruntime refuses): check a self-contained graph instead
            fed = False
    if result is None:
        start = time.perf_counter()
        try:
            # constant folding only tidies the graph (onnxruntime folds again when it
            # loads it) and costs more than the export itself on deep nets
            conversions: list[str] = []
            data = export_onnx_bytes(twin, x, opset=opset, exporter=exporter, fold_constants=False,
                                     n_outputs=n_outputs, conversions=conversions)
        except SpliceError as exc:
            return CheckResult("onnx", False, {"opset": opset, "exporter": exporter}, str(exc), "export failed")
        seconds = time.perf_counter() - start
        start = time.perf_counter()
        try:
            parity = onnx_parity(twin, data, x, references=None if reference is None else [reference],
                                 exporter=exporter, conversions=conversions)
        except CheckFailed as exc:
            return CheckResult("onnx", False, {"opset": opset, "exporter": exporter, "export_seconds": seconds},
                               str(exc), "onnxruntime failed")
        except SpliceError as exc:  # the perturbed twin's own export, when its heads could not be fed
            return CheckResult("onnx", False, {"opset": opset, "exporter": exporter, "export_seconds": seconds},
                               str(exc), "export failed")
        result = {**parity, "export_seconds": seconds, "check_seconds": time.perf_counter() - start,
                  "bytes": len(data), "graph": data}
    if images is not None and result["passed"]:
        result = _on_images(twin, result, images)
    seconds = result["export_seconds"]
    numbers = {"opset": opset, "exporter": exporter, "weights_as_inputs": fed,
               **{k: result[k] for k in ("export_seconds", "check_seconds", "bytes", "max_abs", "max_rel",
                                         "max_abs_perturbed", "max_rel_perturbed", "tolerance", "perturbed_by",
                                         "float64_rounding", "batch_sizes")}}
    if example[0].dtype != torch.float32:
        numbers["note"] = "run in float32 (onnxruntime's GridSample is float32)"
    summary = (f"abs {short_number(result['max_abs'])}, perturbed {short_number(result['max_abs_perturbed'])}, "
               f"export {seconds:.2f}s")
    unproven = ("the tracer fixed Python values the graph is not proven to hold for every input (see the detail)"
                if result.get("passed") and result.get("unproven") else "")
    return CheckResult("onnx", bool(result["passed"]), numbers,
                       f"onnxruntime vs torch (opset {opset}, {exporter}{', weights fed as inputs' if fed else ''}): "
                       f"{result['detail']}", summary, warning=unproven)
