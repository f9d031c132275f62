"""Where the TorchScript tracer fixed a Python value: is the ONNX graph still right for other inputs?

A traced graph keeps whatever Python branch or number the example gave it. The
exporter's warnings name the places (:func:`~.onnx.exporting`); here they are
judged: from shapes (torch.export traces the model), or else by the graph's
own answers on the probe scaled by :data:`REGIME_SCALES`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

from torch import nn

from ..errors import first_line
from .onnx import input_checks, site_names, value_branch

__all__ = ["REGIME_SCALES", "REGIME_TOLERANCE", "value_regimes", "judge_conversions"]

#: the scales of the extra probes run when the tracer fixed Python values (:data:`~.onnx.CONVERSION_WARNING`): a
#: branch on brightness, contrast or sign taken one way on the N(0,1) probe is taken the other way on one of them
REGIME_SCALES = (8.0, 64.0, 0.125, -1.0)
#: their relative tolerance: a branch the graph fixed changes the outputs by a large part (a sign, a scale); an
#: ill-conditioned scaled probe moves torch float32 itself up to about a tenth from float64 (measured on a
#: Hugging Face RegNet at x64). Common practice, no source.
REGIME_TOLERANCE = 0.25


def value_regimes(batches) -> list[tuple]:
    """The smallest of ``batches`` (one tensor per input each) at each of :data:`REGIME_SCALES`."""
    smallest = min(batches, key=lambda b: b[0].shape[0])
    return [tuple(t * scale for t in smallest) for scale in REGIME_SCALES]


def judge_conversions(summary: dict, model: nn.Module, example, sites: Sequence[str],
                      regimes: Callable[[], dict]) -> dict:
    """``summary`` judged again when the TorchScript tracer turned tensors into Python values at ``sites``.

    The traced graph keeps the branch or number each took on the example. If
    torch.export traces the model (:func:`~.onnx.value_branch`), they came
    from shapes, which the graph fixes anyway; when every place is an input
    check that raises (:func:`~.onnx.input_checks`), the graph computes as the
    model on every input it takes. Otherwise ``regimes()`` runs the graph on
    the probe scaled by :data:`REGIME_SCALES` as well, and a miss there fails
    the check: torch.export finding a branch or number on values (which may
    still come from shapes turned into tensors, as in a detector's resizing),
    or no answer at all, is told in the detail.
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
    # torch.export stops at a check that raises: what comes after it goes unseen
    kind, why = (("unknown", "input checks that raise come first") if checks else value_branch(model, example))
    if kind == "shapes":
        return {**summary, "tracer_conversions": list(sites),
                "detail": f"{summary['detail']}; the tracer fixed Python values at {where}, from shapes only "
                          "(torch.export traced the model with no branch on values)"}
    found = regimes()
    scales = " and ".join(f"{s:g}" for s in REGIME_SCALES)
    if kind == "values":
        fixed = (f"the model takes a Python branch or number from tensor values at {where} ({why}), which the ONNX "
                 "graph fixes at what the probe gave; keep such values tensors (torch.where or torch.cond for a "
                 "branch, no .item() or float() on them) so that the graph computes them")
    else:
        fixed = (f"the tracer fixed Python values at {where}, and torch.export could not tell whether from shapes "
                 f"or values ({why})")
    if found.get("max_abs") is None and "onnxruntime failed" in str(found.get("detail")):
        # onnxruntime cannot run a scaled probe at all (a detector that finds nothing there): no comparison made
        return {**summary, "tracer_conversions": list(sites),
                "detail": f"{summary['detail']}; {fixed}; onnxruntime could not run the probe scaled by {scales} "
                          f"({first_line(str(found['detail']))[:160]}), so other inputs were not compared"}
    if not found["passed"]:
        return {**summary, "passed": False, "tracer_conversions": list(sites), "branch_on_values": kind == "values",
                "detail": f"on the probe scaled by {scales}: {found['detail']}; {fixed}"}
    return {**summary, "tracer_conversions": list(sites),
            "detail": f"{summary['detail']}; {fixed}; the graph also matched on the probe scaled by {scales}, but "
                      "other inputs may still go another way"}
