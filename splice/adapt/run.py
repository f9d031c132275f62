"""The ``label-free`` recipe: adapt the warp heads to a new site without reading a label.

Phases, each recorded in ``metrics.jsonl`` (see :mod:`splice.adapt.record`):

1. ``start``: the base network alone on the site images (label-free diagnostics);
2. ``estimate``: a probe reads how the site images are moved
   (:mod:`splice.adapt.probe`, :mod:`splice.adapt.ranges`); the estimate goes to
   ``ranges.json`` and, stretched to contain the identity, into the
   ``[pretrain]`` ranges of the resolved ``recipe.toml``;
3. ``pretrain``: the model's warp heads are pre-trained on the reference
   images within those ranges, an ``[site] unmoved`` share left unmoved;
4. ``epoch`` 1..E: the heads learn from the site images themselves
   (``[site] objective``) beside the pre-training loss (:mod:`splice.adapt.steps`).

The base stays bit-for-bit frozen (``requires_grad`` off, eval mode). A
checkpoint follows the estimate, every pre-training epoch, the pre-training and
every epoch (and a stop request mid-epoch, at that batch); ``--resume``
continues from it, to the same weights as a run that was not stopped. A stop
during the probe resumes at the start of the estimate; one during
pre-training, at the start of the pre-training epoch it stopped in.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import torch

from ..fileio import atomic_write_text
from ..graph.shapes import input_dtype
from ..recipes import recipe_to_toml
from ..training.checkpoint import set_rng_state
from ..training.params import grad_reducer
from ..training.pretrain import execution_order
from ..training.recording import (announce_stop, epoch_position, base_predictions, predicted_classes, resume_command,
                                  resume_line, saved_predictions)
from ..training.runfolder import RECIPE_FILE, read_metrics, truncate_metrics, write_run_info, writing
from ..training.state import TuneInterrupted
from .diagnostics import base_view, site_diagnostics
from .probe import build_probe, estimate_ranges, train_probe
from .ranges import RangeEstimate
from .record import end, row, save_folder, save_state, site_ranges, write_ranges
from .regress import regress_warps_, upright_safe
from .setup import AdaptRun
from .steps import Epochs, adapt_epoch, check_objective

__all__ = ["run_label_free"]


def _freeze(run: AdaptRun) -> list[torch.nn.Parameter]:
    """Base frozen, heads trainable; the whole model in eval mode (the base's BatchNorm never moves)."""
    from ..training.params import is_warp_name

    for name, p in run.net.named_parameters():
        p.requires_grad_(is_warp_name(name))
    run.net.eval()
    return [p for w in run.warps.values() for p in w.parameters()]


def _optimizer(run: AdaptRun, params) -> torch.optim.Optimizer:
    rec = run.rec
    if rec.optimizer == "sgd":
        return torch.optim.SGD(params, lr=rec.lr, momentum=rec.momentum, weight_decay=rec.weight_decay)
    return torch.optim.AdamW(params, lr=rec.lr, weight_decay=rec.weight_decay)


def _diagnose(run: AdaptRun, model=None) -> dict | None:
    if not run.ctx.is_main:
        return None
    model = model if model is not None else run.net
    return site_diagnostics(model, run.warps if model is run.net else {}, run.site, prepare=run.prepare,
                            seed=run.rec.seed)


def _on_step(run: AdaptRun, title: str):
    from ..training import distributed

    def on_step(i: int, total: int, loss: float) -> None:
        if i == 1:
            run.bar.start(title, total)
        run.bar.update(i, **{"grid loss": loss})
        if distributed.broadcast_flag(run.ctx, run.flag.raised):  # every rank stops at the same step
            raise TuneInterrupted(f"interrupted during {title}", run.flag.signal)
    return on_step


def _estimate(run: AdaptRun) -> None:
    """Phase 2: read the site's ranges (or keep the typed ones), record them, re-centre ``[pretrain]``."""
    rec, ctx = run.rec, run.ctx
    site, pre = rec.site, rec.pretrain
    typed = RangeEstimate.of_ranges(pre)
    probe_info: dict[str, Any] = {}
    if site.estimate:
        probe = build_probe(run.src.input_shape, site.probe_width, rec.seed, ctx.device, input_dtype(run.net))
        held, res = train_probe(probe, run.reference, site, seed=rec.seed, prepare=run.prepare,
                                batch_size=pre.batch_size, lr=pre.lr, rank=ctx.rank, world=ctx.world_size,
                                reduce_grads=grad_reducer(ctx), on_step=_on_step(run, "probe"))
        run.bar.finish(res["steps"])
        est = estimate_ranges(probe, run.site, held, outer=RangeEstimate.of_ranges(site), fallback=typed,
                              seed=rec.seed, prepare=run.prepare)
        probe_info = {"steps": res["steps"], "grid_loss": round(res["grid_loss"], 6), "held_out": len(held)}
    else:
        est = typed
        est.observable = {p: False for p in ("rotation", "scale", "shift", "perspective")}
    run.site_ranges, run.estimate = est, est.covering_identity()
    used = run.estimate
    write_ranges(run, {"estimate": est.to_dict(), "pretrain": used.to_dict() | {"statistics": {}},
                       "outer_limits": RangeEstimate.of_ranges(site).to_dict(), "typed": typed.to_dict(),
                       "probe": probe_info})
    if site.estimate:
        ranges = {"rotation": used.rotation, "scale": tuple(used.scale), "shift": used.shift,
                  "perspective": used.perspective}
        run.rec = dataclasses.replace(rec, pretrain=dataclasses.replace(pre, **ranges))
        if ctx.is_main:
            with writing(run.run_dir / RECIPE_FILE):
                atomic_write_text(run.run_dir / RECIPE_FILE, recipe_to_toml(run.rec))
    shown = est.to_dict()
    shown.pop("statistics")
    row(run, "estimate", 0, site=None, extra={"ranges": shown, "probe": probe_info or None})
    save_state(run, phase="pretrain", epoch=0, batch=0)


def _pretrain(run: AdaptRun) -> None:
    """Phase 3: pre-train the model's heads within the estimated ranges; record, save, checkpoint."""
    rec, ctx = run.rec, run.ctx
    pre = rec.pretrain
    result = {"steps": 0, "grid_loss": None}
    resume = run.ckpt.get("pretrain") if run.ckpt is not None and run.ckpt.get("phase") == "pretrain" else None

    def on_epoch(state: dict) -> None:  # the heads are in the model; the loop's state rides along
        save_state(run, phase="pretrain", epoch=0, batch=0, extra={"pretrain": state})

    if pre.epochs > 0:
        result = regress_warps_(run.net, run.warps, run.reference, upright_safe(run.estimate.to_range(),
                                rec.site.unmoved), epochs=pre.epochs, lr=pre.lr, batch_size=pre.batch_size,
                                seed=rec.seed, prepare=run.prepare, tag="pretrain", weight_decay=pre.weight_decay,
                                rank=ctx.rank, world=ctx.world_size, reduce_grads=grad_reducer(ctx),
                                on_step=_on_step(run, "pre-train warps"), on_epoch=on_epoch, resume=resume)
        run.bar.finish(result["steps"])
    loss = round(result["grid_loss"], 6) if result["grid_loss"] is not None else None
    _checkpointed_row(run, "pretrain", 0, loss, extra={"pretrain_steps": result["steps"],
                                                        "reference": run.info.get("reference")})


def _checkpointed_row(run: AdaptRun, phase: str, epoch: int, loss, extra=None) -> None:
    """Diagnose, write the row, save best and last, checkpoint at the start of the next epoch.

    ``best/`` is the latest state, like ``last/``: without labels nothing told
    the checkpoints of one run apart (see :mod:`splice.adapt.record`).
    """
    diag = _diagnose(run)
    row(run, phase, epoch, site=diag, loss=loss, extra=extra)
    score = diag["agreement"] if diag else None
    run.best = {"score": score if score is not None else -1.0, "epoch": epoch, "step": run.step}
    for which in ("best", "last"):
        save_folder(run, which, epoch, score)
    save_state(run, phase="adapt", epoch=epoch, batch=0)


def _restore(run: AdaptRun) -> tuple[str, int, int]:
    ckpt = run.ckpt
    run.net.load_state_dict(ckpt["model"], strict=True)
    if ckpt.get("optimizer"):
        run.optimizer.load_state_dict(ckpt["optimizer"])
    set_rng_state(ckpt["rng"])
    run.step, run.best, run.metrics_rows = int(ckpt["step"]), dict(ckpt["best"]), int(ckpt["metrics_rows"])
    run.estimate = RangeEstimate.from_dict(ckpt["estimate"]) if ckpt.get("estimate") else None
    run.site_ranges = site_ranges(run, ckpt)
    run.reference_start = saved_predictions(ckpt)
    if run.reference_start is None and run.reference_probe is not None:  # an older splice's: the base never moves
        run.reference_start = base_predictions(run.net, run.reference_probe, run.prepare)
    if run.ctx.is_main:
        truncate_metrics(run.run_dir, run.metrics_rows)
    phase, epoch, batch = str(ckpt["phase"]), int(ckpt["epoch"]), int(ckpt["batch"])
    pre = ckpt.get("pretrain") if phase == "pretrain" else None
    if phase == "pretrain":  # the heads' pre-training resumes at an epoch's start
        run.bar.line(f"resuming {run.run_dir} in warp pre-training at epoch {int(pre['epoch']) + 1 if pre else 1}, "
                     f"batch 0, step {int(pre['step']) if pre else 0}")
    else:
        run.bar.line(resume_line(run.run_dir, run.rec.epochs, epoch, batch, run.step))
    return phase, epoch, batch


def _stopped(run: AdaptRun, epoch: int, batch: int) -> dict[str, Any]:
    if run.ctx.is_main:
        write_run_info(run.run_dir, dict(run.info, status="interrupted"))
    announce_stop(run, epoch_position(epoch, batch, run.step))
    return {"out": str(run.run_dir), "rank": run.ctx.rank, "world_size": run.ctx.world_size, "steps": run.step,
            "epochs": run.rec.epochs, "best_accuracy": None, "best_epoch": run.best["epoch"], "interrupted": True,
            "resume_at": {"epoch": epoch, "batch": batch}}


def run_label_free(run: AdaptRun) -> dict[str, Any]:
    """Run (or resume) a label-free run to its end or to a stop request; returns the summary."""
    check_objective(run)
    run.optimizer = _optimizer(run, _freeze(run))
    phase, start_epoch, start_batch = _restore(run) if run.ckpt is not None else ("start", 0, 0)
    try:
        if phase == "start":
            if run.ctx.is_main:
                truncate_metrics(run.run_dir, 0)
            ref = (f"; reference {run.info.get('reference')}: {len(run.reference):,}"
                   if run.reference is not None else "")
            run.bar.line(f"site {run.info['data']}: {len(run.site):,} images{ref}")
            base = base_view(run.net, run.warps)
            if run.reference_probe is not None:  # what the base predicts for upright images
                run.reference_start = predicted_classes(base, run.reference_probe, run.prepare)
            row(run, "start", 0, site=_diagnose(run, base))
            _estimate(run)
            phase = "pretrain"
        if phase == "pretrain":
            _pretrain(run)
    except TuneInterrupted:
        if run.ctx.is_main:
            write_run_info(run.run_dir, dict(run.info, status="interrupted"))
        run.bar.line(f"interrupted during the {'range estimate' if phase == 'start' else 'pre-training'}; "
                     f"'{resume_command(run.run_dir, run.ctx.world_size)}' continues "
                     f"{'that phase from its start' if phase == 'start' else 'from its last finished epoch'}")
        raise
    plan = Epochs(run)
    order = execution_order(run.net, run.warps, run.prepare(run.site.batch(torch.arange(min(2, len(run.site))))))
    resumed = tuple(run.ckpt.get("epoch_totals", (0.0, 0))) if run.ckpt is not None else (0.0, 0)
    for epoch in range(start_epoch, run.rec.epochs):
        first = start_batch if epoch == start_epoch else 0
        stop, batch, (total, seen) = adapt_epoch(run, plan, order, epoch, first, resumed if first else (0.0, 0))
        if batch is not None:
            save_state(run, phase="adapt", epoch=epoch, batch=batch, extra={"epoch_totals": [total, seen]})
            return _stopped(run, epoch, batch)
        _checkpointed_row(run, "epoch", epoch + 1, round(total / max(1, seen), 6))
        if stop:
            return _stopped(run, epoch + 1, 0)
    return end(run, read_metrics(run.run_dir) if run.ctx.is_main else [])
