"""What a label-free run leaves behind: metrics rows, best/last folders, checkpoints, ranges.json, its end.

A metrics row of a label-free run holds ``phase`` (``start``, ``estimate``,
``pretrain`` or ``epoch``), ``epoch``, ``step``, ``loss`` (the grid loss
after pre-training, the mean objective + anchor loss of an epoch), ``lr``,
``warp_distance``, ``base_frozen`` (always true), ``time_s``, ``accuracy``
(always ``null``: no label is read) and ``site``, the label-free diagnostics
of :mod:`splice.adapt.diagnostics`. The ``start`` row describes the base
network alone (every warp at the identity), the later ones the model as it is
then; the ``estimate`` row holds ``ranges``.

``best/`` and ``last/`` both hold the latest state. Choosing ``best/`` by a
diagnostic was measured and dropped (README, "Adapting without labels: the
digits"): across models the diagnostics track the test error closely
(rank correlation 0.9 and more), but between the checkpoints of one run they
move by less than their own noise, and the checkpoint with the highest
agreement was worse than the last one in 5 of 6 runs.
"""

from __future__ import annotations

import json
import os
import time
from typing import Any

from ..fileio import atomic_write_json, atomic_write_text, state_dict_sha256
from ..training.checkpoint import CHECKPOINT_NAME, rng_state, save_checkpoint
from ..training.recording import agreement, base_differs, caution_upright, predicted_classes, tuning_record
from ..training.runfolder import HASH_ENV, append_metrics, write_run_info, writing
from .setup import AdaptRun

__all__ = ["RANGES_FILE", "row", "save_folder", "save_state", "write_ranges", "site_ranges", "base_changed", "end"]

RANGES_FILE = "ranges.json"


def base_changed(run: AdaptRun) -> bool:
    """Whether the base's tensors differ from the start of the run (label-free never moves them, batchnorm-stats
    only its statistics), or from the source its record names (:func:`splice.training.recording.base_differs`)."""
    return base_differs(run.net, run.info["base_sha256_start"])


def row(run: AdaptRun, phase: str, epoch: int, *, site: dict | None, loss=None, extra: dict | None = None) -> dict:
    """Append one metrics row (rank 0) and print its line."""
    lr = run.optimizer.param_groups[0]["lr"] if run.optimizer is not None else None
    upright = None
    if run.reference_start is not None:
        upright = agreement(predicted_classes(run.net, run.reference_probe, run.prepare), run.reference_start)
    data = {"phase": phase, "epoch": epoch, "step": run.step, "loss": loss, "lr": lr, "accuracy": None,
            "warp_distance": {n: round(float(w.identity_distance()), 6) for n, w in run.warps.items()},
            "base_frozen": True, "time_s": round(time.monotonic() - run.t_run, 3), "site": site,
            "reference_agreement": upright, **(extra or {})}
    if run.ctx.is_main:
        append_metrics(run.run_dir, data)
    run.metrics_rows += 1
    parts = [f"{phase} {epoch}/{run.rec.epochs}" if phase == "epoch" else phase, f"step {run.step}"]
    if loss is not None:
        parts.append(f"loss {loss:.4f}")
    if site:
        parts.append(f"site confidence {site['confidence']:.3f}  entropy {site['entropy']:.3f}  "
                      f"agreement {site['agreement']:.3f}")
    if upright is not None:
        parts.append(f"upright agree {upright:.3f}")
    run.bar.line("  ".join(parts))
    return data


def _tuning(run: AdaptRun, which: str, epoch: int, score: float | None) -> dict:
    return tuning_record(run.net, run.run_dir, recipe=run.rec.name, mode=run.rec.mode, which=which, epoch=epoch,
                         step=run.step, val_accuracy=None, site_agreement=score, data=run.info["data"],
                         reference=run.info.get("reference"), seed=run.rec.seed, base_changed=base_changed(run))


def save_folder(run: AdaptRun, which: str, epoch: int, score: float | None) -> None:
    """Save the model as a splice folder ``RUN/which`` (rank 0)."""
    from ..manifest import info_of
    from ..store import save

    if not run.ctx.is_main:
        return
    kwargs: dict[str, Any] = {"overwrite": True, "tuning": _tuning(run, which, epoch, score),
                              "class_names": run.classes, "normalisation": run.norm}
    if info_of(run.net) is None:
        kwargs["source"] = run.src
    with writing(run.run_dir / which):
        save(run.net, run.run_dir / which, **kwargs)


def save_state(run: AdaptRun, *, phase: str, epoch: int, batch: int, extra: dict | None = None) -> None:
    """Write ``checkpoint.pt`` (rank 0): enough to continue at ``(phase, epoch, batch)``."""
    if not run.ctx.is_main:
        return
    payload = {
        "phase": phase, "epoch": epoch, "batch": batch, "step": run.step, "world_size": run.ctx.world_size,
        "model": {k: v.detach().to("cpu") for k, v in run.net.state_dict().items()},
        "optimizer": run.optimizer.state_dict() if run.optimizer is not None else {},
        "scheduler": {"kind": run.rec.schedule, "step": run.step}, "rng": rng_state(), "best": dict(run.best),
        "metrics_rows": run.metrics_rows, "recipe": run.rec.to_dict(),
        "estimate": run.estimate.to_dict(exact=True) if run.estimate is not None else None,
        "site_ranges": run.site_ranges.to_dict(exact=True) if run.site_ranges is not None else None,
        "reference_start": None if run.reference_start is None else run.reference_start.tolist(),
    }
    if extra:
        payload.update(extra)
    save_checkpoint(run.run_dir / CHECKPOINT_NAME, payload)


def write_ranges(run: AdaptRun, payload: dict) -> None:
    """``RUN/ranges.json``: the estimated ranges, what they were read with, and the ranges pre-training used."""
    if run.ctx.is_main:
        with writing(run.run_dir / RANGES_FILE):
            atomic_write_json(run.run_dir / RANGES_FILE, payload)


def site_ranges(run: AdaptRun, ckpt: dict):
    """The ranges the site was read as, for a resumed run: from its checkpoint; for a checkpoint an older splice
    wrote (which kept only the ranges pre-training used), from ``ranges.json``'s ``estimate``, else those."""
    from .ranges import RangeEstimate

    if ckpt.get("site_ranges"):
        return RangeEstimate.from_dict(ckpt["site_ranges"])
    try:
        return RangeEstimate.from_dict(json.loads((run.run_dir / RANGES_FILE).read_text())["estimate"])
    except (OSError, ValueError, KeyError, TypeError, IndexError):
        return run.estimate


def end(run: AdaptRun, rows: list[dict], *, interrupted: bool = False) -> dict[str, Any]:
    """Mark run.json, print the summary, and return it."""
    before = next((r["site"] for r in rows if r["phase"] == "start"), None)
    after = rows[-1]["site"] if rows else None
    if os.environ.get(HASH_ENV):
        atomic_write_text(run.run_dir / f"rank{run.ctx.rank}.sha256", state_dict_sha256(run.net.state_dict()) + "\n")
    if run.ctx.is_main:
        write_run_info(run.run_dir, dict(run.info, status="interrupted" if interrupted else "finished"))
    summary = {"out": str(run.run_dir), "rank": run.ctx.rank, "world_size": run.ctx.world_size,
               "recipe": run.rec.name, "mode": run.rec.mode, "epochs": run.rec.epochs, "steps": run.step,
               "best_accuracy": None, "best_epoch": run.best["epoch"], "best_agreement": run.best["score"],
               "base_changed": base_changed(run), "interrupted": interrupted,
               "ranges": run.site_ranges.to_dict() if run.site_ranges is not None else None,
               "pretrain_ranges": run.estimate.to_dict() if run.estimate is not None else None,
               "site_before": before, "site_after": after,
               "reference_agreement": rows[-1].get("reference_agreement") if rows else None}
    _print_summary(run, summary)
    if run.ctx.is_main and not interrupted:
        images = 0 if run.reference_start is None else len(run.reference_start)
        caution_upright(summary["reference_agreement"], images, "best/ and last/")
    return summary


def _print_summary(run: AdaptRun, s: dict) -> None:
    b, a = s["site_before"], s["site_after"]
    if s["ranges"]:
        r = s["ranges"]
        seen = [p for p, ok in r["observable"].items() if ok]
        run.bar.line(f"site ranges: rotation ±{r['rotation']:.1f}°, scale {r['scale'][0]:.3f}–{r['scale'][1]:.3f}, "
                     f"shift ±{r['shift']:.3f}, perspective {r['perspective']:.3f} "
                     f"(estimated: {', '.join(seen) or 'none'}; the rest as typed)")
        site = r.get("statistics", {}).get("site", {})
        if "angle_mean" in site:
            run.bar.line(f"site images read on average as turned {site['angle_mean']:+.1f}° (+ = clockwise, as "
                         f"--distort turns them) and shifted {site['shift_mean_x']:+.3f}, {site['shift_mean_y']:+.3f} "
                         "of the image (right, down): the probe's raw readings, which it pulls towards no motion "
                         "where unsure; the ranges above are symmetric and contain them")
        used = s["pretrain_ranges"]
        if used and used["scale"] != r["scale"]:
            run.bar.line(f"pre-training ranges: scale {used['scale'][0]:.3f}–{used['scale'][1]:.3f}, the site's "
                         "widened to contain no scaling (1)")
    if b and a:
        run.bar.line(f"on site images, base → adapted: confidence {b['confidence']:.3f} → {a['confidence']:.3f}, "
                     f"entropy {b['entropy']:.3f} → {a['entropy']:.3f}, agreement under re-warps "
                     f"{b['agreement']:.3f} → {a['agreement']:.3f}, class balance {b['class_balance']:.3f} → "
                     f"{a['class_balance']:.3f}")
    for name, sp in (a or {}).get("warp_spread", {}).items():
        mean = (f"rotation {sp['rotation_mean']:+.1f}° ± {sp['rotation_std']:.1f}°" if "rotation_mean" in sp
                else f"rotation std {sp['rotation_std']:.1f}°")
        run.bar.line(f"warp {name} on site images: {mean}, scale "
                     f"{sp['scale_mean']:.3f} ± {sp['scale_std']:.3f}, shift std {sp['shift_std']:.3f}")
