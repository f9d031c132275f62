"""The rows about the weights and the forward pass: integrity, finite, shapes, outputs, images, warps."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import torch

from ..compare import flatten_outputs
from .probe import WarpProbe, listed_names, short_number
from .report import CheckResult

__all__: list[str] = []


def integrity_row(path: Path, recorded: str, actual: str, edited: Sequence[str] = ()) -> CheckResult:
    """The weights file against its recorded sha256; ``edited``: the fields of splice.json that are not those the
    file was written with (:func:`splice.manifest.edited_fields`)."""
    ok = recorded == actual
    numbers = {"file": str(path), "recorded_sha256": recorded, "actual_sha256": actual}
    if ok and edited:
        return CheckResult(
            "integrity", False, {**numbers, "edited_fields": list(edited)},
            f"splice.json's {', '.join(edited)} are not those the weights were written with: splice.json was edited "
            "after saving, which changes what the model computes or what its outputs mean; restore it from a good "
            "copy", f"{', '.join(edited)} edited")
    if ok:
        return CheckResult("integrity", True, numbers, f"'{path.name}' matches its recorded sha256",
                           f"sha256 {actual[:12]}…")
    return CheckResult(
        "integrity", False, numbers,
        f"'{path}' does not match the sha256 recorded in splice.json (recorded {recorded[:12]}…, found "
        f"{actual[:12]}…): the weights were changed or damaged after saving; restore the folder from a good copy",
        "hash mismatch")

def _all_finite(t: torch.Tensor) -> bool:
    # A NaN or an Inf anywhere makes the sum NaN or Inf; a finite sum needs no
    # element-wise pass. Only an overflowing sum of finite values is re-checked.
    if t.numel() == 0:
        return True
    total = t.detach().double().sum() if t.dtype in (torch.float16, torch.bfloat16) else t.detach().sum()
    return bool(torch.isfinite(total)) or bool(torch.isfinite(t).all())

def finite_row(state: Mapping[str, torch.Tensor], where: str) -> CheckResult:
    bad = sorted(k for k, v in state.items() if v.is_floating_point() and not _all_finite(v))
    numbers = {"tensors": len(state), "non_finite": bad}
    if not bad:
        return CheckResult("finite", True, numbers, f"all {len(state)} tensors are finite", f"{len(state)} tensors")
    return CheckResult("finite", False, numbers,
                       f"{where} has NaN or Inf values in {len(bad)} tensor(s): {listed_names(bad, 6)}; the "
                       "checkpoint is "
                       "damaged or diverged — use an earlier one", f"{len(bad)} non-finite")

def shapes_row(probe: WarpProbe, warps, points: Mapping[str, Sequence[int]], ref_out, out,
                error: str | None) -> CheckResult:
    per: dict[str, dict] = {}
    problems: list[str] = []
    for name in warps:
        rec = probe.seen.get(name)
        if rec is None:
            per[name] = {"input": None, "output": None}
            problems.append(f"warp {name!r} never ran")
            continue
        per[name] = {"input": list(rec["in"] or []), "output": list(rec["out"] or [])}
        if rec["in"] != rec["out"]:
            problems.append(f"warp {name!r} turns {rec['in']} into {rec['out']}")
        want = points.get(name)
        if want is not None and rec["in"] is not None and tuple(rec["in"][1:]) != tuple(want):
            problems.append(f"point {name!r} has shape {tuple(rec['in'][1:])}, the manifest records {tuple(want)}")
    outputs: dict[str, Any] = {}
    if out is not None:
        ref_flat, flat = flatten_outputs(ref_out), flatten_outputs(out)
        for key in ref_flat:
            outputs[key] = {"base": list(ref_flat[key].shape),
                            "spliced": list(flat[key].shape) if key in flat else None}
            if key not in flat:
                problems.append(f"output {key} is missing")
            elif flat[key].shape != ref_flat[key].shape:
                problems.append(f"output {key} is {tuple(flat[key].shape)}, "
                                f"the base gives {tuple(ref_flat[key].shape)}")
        problems.extend(f"output {k} is new" for k in flat if k not in ref_flat)
    if error is not None:
        problems.append(f"the spliced model fails on the probe ({error})")
    numbers = {"warps": per, "outputs": outputs}
    n = len(warps)
    if problems:
        return CheckResult("shapes", False, numbers, "; ".join(problems), f"{len(problems)} problem(s)")
    return CheckResult("shapes", True, numbers,
                       f"{n} warp(s) keep their input shape; {len(outputs)} output(s) keep the base's shapes",
                       f"{n} warps, {len(outputs)} outputs")

def outputs_row(name: str, cmp: dict, reset: bool, what: str) -> CheckResult:
    numbers = {k: cmp.get(k) for k in ("max_abs", "max_rel", "top1", "tolerance", "shapes_equal")}
    numbers["warps_reset"] = reset
    numbers["probe"] = what
    where = " (warps reset to the identity on a copy)" if reset else ""
    summary = f"abs {short_number(cmp.get('max_abs'))}, rel {short_number(cmp.get('max_rel'))}"
    if cmp.get("top1") is not None:
        summary += f", top-1 {cmp['top1']:.0%}"
    empty = ("every output is empty on this probe, so no value was compared: give --images on which the model "
             "answers") if cmp.get("compared") == 0 and cmp["passed"] else ""
    return CheckResult(name, bool(cmp["passed"]), numbers, f"{what}{where}: {cmp['detail']}", summary, warning=empty)

def merge_compares(results: list[dict]) -> dict:
    if not results:
        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None, "detail": "no images"}
    failed = [r for r in results if not r["passed"]]
    top = [r["top1"] for r in results if r.get("top1") is not None]
    have = [r for r in results if r.get("max_abs") is not None]
    merged = {"passed": not failed,
              "max_abs": max((r["max_abs"] for r in have), default=None),
              "max_rel": max((r["max_rel"] for r in have), default=None),
              "top1": sum(top) / len(top) if top else None,
              "tolerance": results[0].get("tolerance"),
              "shapes_equal": all(r.get("shapes_equal", True) for r in results),
              "compared": sum(r.get("compared", 0) for r in results)}
    merged["detail"] = failed[0]["detail"] if failed else (
        f"max abs error {short_number(merged['max_abs'])}, max relative error {short_number(merged['max_rel'])} "
        f"(tolerance {merged['tolerance']:g})")
    return merged

def warps_row(warps, distances: dict[str, float], probe: WarpProbe, tuned_declared: bool,
               deviation: dict | None, per_warp_model: dict[str, dict]) -> CheckResult:
    per = {}
    for name, warp in warps.items():
        rec = probe.seen.get(name, {})
        per[name] = {"family": getattr(getattr(warp, "config", None), "family", None),
                     "distance": distances[name],
                     "point_max_abs": rec.get("max_abs"), "point_max_rel": rec.get("max_rel")}
        if name in per_warp_model:
            per[name]["output_max_abs"] = per_warp_model[name]["max_abs"]
            per[name]["output_max_rel"] = per_warp_model[name]["max_rel"]
    moved = [n for n, d in distances.items() if d > 0]
    numbers: dict[str, Any] = {"warps": per, "moved": moved, "tuning_recorded": tuned_declared}
    if deviation is not None:
        numbers.update({"output_max_abs": deviation.get("max_abs"), "output_max_rel": deviation.get("max_rel"),
                        "output_top1": deviation.get("top1")})
    if not warps:
        return CheckResult("warps", True, numbers, "the model has no warps", "no warps")
    summary = ", ".join(f"{n} {distances[n]:.3g}" for n in warps)
    if not moved:
        return CheckResult("warps", True, numbers, f"all {len(warps)} warp(s) are exactly at the identity (distance 0)",
                           f"distance {summary}")
    dev = (f"; they move the model output by up to {short_number(deviation.get('max_abs'))} "
           f"({short_number(deviation.get('max_rel'))} of its scale)") if deviation else ""
    moved_text = ", ".join(f"{n!r} distance {distances[n]:.3g} (shifts its point by up to "
                           f"{short_number(per[n]['point_max_abs'])})" for n in moved)
    if not tuned_declared:
        return CheckResult(
            "warps", False, numbers,
            f"the manifest records no tuning, yet {moved_text}{dev}: a fresh splice must start at the exact identity "
            "(the head's final layer zero weight, identity bias); re-create it with 'splice insert'",
            f"moved: {listed_names(moved)}")
    return CheckResult("warps", True, numbers, f"tuned model: {moved_text}{dev}", f"distance {summary}")
