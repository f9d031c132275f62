"""Where the TorchScript tracer fixed a Python value: is the ONNX graph still right for other inputs?

A traced graph keeps whatever Python branch or number the example gave it. The
exporter's warnings name the places (:func:`~.onnx.exporting`); here they are
judged: from shapes (torch.export traces the model), or else by the graph's
own answers on the probe scaled by :data:`REGIME_SCALES` and on inputs in an
image's own ranges (:data:`NATURAL_PROBES`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import torch
from torch import nn

from ..errors import first_line
from .onnx import input_checks, site_names, value_branch

__all__ = ["REGIME_SCALES", "NATURAL_PROBES", "REGIME_TOLERANCE", "REGIME_TOLERANCE_NEAR", "regime_tolerance",
           "value_regimes", "judge_conversions"]

#: the scales of the extra probes run when the tracer fixed Python values (:data:`~.onnx.CONVERSION_WARNING`): a
#: branch on brightness, contrast or sign taken one way on the N(0,1) probe is taken the other way on one of them
REGIME_SCALES = (8.0, 64.0, 0.125, -1.0)
#: the probes in an image's own ranges, each input of the batch alike (``(name, high)``: uniform in [0, high), or
#: all zeros for 0). Scaled N(0,1) noise never has a mean far from 0, is never all non-negative and never all zero,
#: so a branch such as ``if x.mean() > 0.5: x = 1 - x`` (light photos) or ``if meta.abs().sum() > 0`` (no
#: metadata) is never taken the other way on it
NATURAL_PROBES = (("uniform [0, 1) inputs", 1.0), ("uniform [0, 255) inputs", 255.0), ("all-zero inputs", 0.0))
#: their relative tolerance on the probes scaled up: a branch the graph fixed changes the outputs by a large part
#: (a sign, a scale); an ill-conditioned probe scaled up moves torch float32 itself up to about a tenth from float64
#: (measured on a Hugging Face RegNet at x64). Common practice, no source.
REGIME_TOLERANCE = 0.25
#: on the probes no larger than the checked one (scaled by 0.125 and -1, uniform [0, 1), all zeros), where float32
#: stays as well conditioned as on the probe itself: a baked-in `if x.max() > 1: x = x / 255` moved a
#: random-weight classifier's outputs by 4 % of their largest there (measured), far inside REGIME_TOLERANCE.
#: Common practice, no source.
REGIME_TOLERANCE_NEAR = 0.01
#: the seed of the uniform probes (drawn from a generator of their own: the caller's generators are not touched)
_NATURAL_SEED = 0


def regime_tolerance(scale: float) -> float:
    """The relative tolerance of a probe reaching ``scale`` times the checked probe's range."""
    return REGIME_TOLERANCE if abs(scale) > 1 else REGIME_TOLERANCE_NEAR


def _natural(batch: tuple, high: float, gen: torch.Generator) -> tuple:
    """``batch`` as uniform [0, ``high``) values (all zeros for 0); a tensor that is not floating point stays."""
    if not high:
        return tuple(torch.zeros_like(t) for t in batch)
    return tuple(torch.rand(t.shape, generator=gen, dtype=torch.float32).mul_(high).to(t.dtype)
                 if t.is_floating_point() else t for t in batch)


def value_regimes(batch: tuple) -> list[tuple[str, tuple, float]]:
    """``(name, probe, tolerance)`` of each probe run from ``batch`` (one tensor per input): ``batch`` at each of
    :data:`REGIME_SCALES` ("the probe scaled by 8"), then each of :data:`NATURAL_PROBES` in its shapes."""
    gen = torch.Generator().manual_seed(_NATURAL_SEED)
    scaled = [(f"the probe scaled by {scale:g}", tuple(t * scale for t in batch), regime_tolerance(scale))
              for scale in REGIME_SCALES]
    return scaled + [(name, _natural(batch, high, gen), regime_tolerance(high)) for name, high in NATURAL_PROBES]


def _matched(names: Sequence[str]) -> str:
    """"the probe scaled by 8, 64, on uniform [0, 1) inputs and on all-zero inputs" from the probes' names."""
    prefix = "the probe scaled by "
    scales = [n[len(prefix):] for n in names if n.startswith(prefix)]
    parts = ([prefix + ", ".join(scales)] if scales else []) + [n for n in names if not n.startswith(prefix)]
    if not parts:
        return "none"
    return parts[0] if len(parts) == 1 else ", on ".join(parts[:-1]) + " and on " + parts[-1]


def _probe(run: Callable[[tuple, float], dict], batch: tuple, tol: float) -> tuple[str, str]:
    """``(outcome, detail)`` of one probe: ``"match"``, ``"miss"`` (the graph answers otherwise),
    ``"crash"`` (onnxruntime cannot run it), or ``"outside"`` (torch itself refuses it or answers NaN/Inf: an
    input outside the model's range, which judges nothing)."""
    try:
        found = run(batch, tol)
    except Exception as exc:  # the model's own check refused the probe
        return "outside", f"torch refuses it ({type(exc).__name__}: {first_line(exc)})"
    detail = str(found.get("detail", ""))
    # a match of NaN with NaN shows nothing either (all-zero inputs over their std)
    if found.get("nonfinite") or "NaN or Inf" in detail:
        return "outside", "torch's own output is not finite there"
    if found["passed"]:
        return "match", ""
    if found.get("max_abs") is None and "onnxruntime failed" in detail:
        return "crash", first_line(detail)[:160]
    return "miss", detail


def judge_conversions(summary: dict, model: nn.Module, batches: Sequence[tuple], sites: Sequence[str],
                      run: Callable[[tuple, float], dict]) -> dict:
    """``summary`` judged again when the TorchScript tracer turned tensors into Python values at ``sites``.

    The traced graph keeps the branch or number each took on the example.
    ``batches`` are the batches checked (one tensor per input each); the
    smallest is the probe torch.export and the scaled probes start from.
    When every place is an input check that raises (:func:`~.onnx.input_checks`),
    the graph computes as the model on every input it takes. Otherwise the
    graph runs on each probe of :func:`value_regimes` (``run``
    compares one batch within a relative tolerance, :func:`regime_tolerance`),
    and any miss fails the check, except behind input
    checks, which stop torch.export before it can tell (a miss is then told,
    and the pass is not proven). A pass is proven only
    when torch.export traces the model (:func:`~.onnx.value_branch`: the
    places came from shapes) and every probe ran; else it passes with
    ``unproven`` set and says why, since a few probes cannot
    show every input the other way.
    """
    if not sites:
        return summary
    checks = input_checks(sites)
    where = site_names(sites)
    if len(checks) == len(sites):  # each place only refuses inputs: the graph computes as the model on the rest
        return {**summary, "tracer_conversions": list(sites),
                "detail": f"{summary['detail']}; the tracer fixed Python values at {where}, input checks that raise, "
                          "which the ONNX graph does not carry (it computes as the model on every input the model "
                          "takes)"}
    example = min(batches, key=lambda b: b[0].shape[0])
    # torch.export stops at a check that raises: what comes after it goes unseen
    kind, why = (("unknown", "input checks that raise come first") if checks else value_branch(model, example))
    outcomes = [(name, *_probe(run, batch, tol)) for name, batch, tol in value_regimes(example)]
    if kind == "values":
        fixed = (f"the model takes a Python branch or number from tensor values at {where} ({why}), which the ONNX "
                 "graph fixes at what the probe gave; keep such values tensors (torch.where or torch.cond for a "
                 "branch, no .item() or float() on them) so that the graph computes them")
    elif kind == "shapes":
        fixed = f"the tracer fixed Python values at {where}, from shapes only (torch.export traced the model)"
    else:
        fixed = (f"the tracer fixed Python values at {where}, and torch.export could not tell whether from shapes "
                 f"or values ({why})")
    misses = [(name, detail) for name, outcome, detail in outcomes if outcome == "miss"]
    if misses and checks:  # torch.export stopped at a check: no evidence either way, and whole detectors with
        # uncalibrated weights miss on far probes by their own ill-conditioning (a Faster R-CNN's boxes at x-1)
        outcomes = [(name, "differs", "told above") if outcome == "miss" else (name, outcome, detail)
                    for name, outcome, detail in outcomes]
        fixed += f"; on {misses[0][0]} the graph answered otherwise ({misses[0][1][:160]})"
        misses = []
    if misses:
        # a miss on the checked batches themselves comes first: the scaled probes only add to it
        first = (summary["detail"] if not summary["passed"]
                 else f"on {misses[0][0]}: {misses[0][1]}")
        return {**summary, "passed": False, "tracer_conversions": list(sites), "branch_on_values": kind == "values",
                "detail": f"{first}; {fixed}"}
    ran = [name for name, outcome, _ in outcomes if outcome == "match"]
    others = "; ".join(f"{name}: {outcome}, {detail}" for name, outcome, detail in outcomes if outcome != "match")
    unproven = kind != "shapes" or len(ran) < len(outcomes)
    note = (f"the graph matched on {_matched(ran)}" + (f" ({others})" if others else "")
            + ("; not proven for other inputs" if unproven else ""))
    return {**summary, "tracer_conversions": list(sites), "unproven": unproven,
            "detail": f"{summary['detail']}; {fixed}; {note}"}
