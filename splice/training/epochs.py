"""The training loop of ``splice tune``: start or resume, pre-train the warps, run the epochs.

Exact resume: the data order and every random draw are pure functions of
``(seed, epoch, batch)`` (see :mod:`splice.training.batches`), the learning
rate a pure function of the step, and the checkpoint holds the model,
optimiser, gradient scaler and RNG states.
"""

from __future__ import annotations

import math
import time
import warnings
from typing import Any

import torch

from ..distort import random_distort
from ..errors import RecipeError, SpliceError, SpliceWarning, first_line
from . import batches as _b
from . import distributed
from .checkpoint import set_rng_state
from .head import confidently_wrong, final_layer, zero_final_layer_
from .loop import Stepper, ThetaTap
from .params import frozen_by_model, frozen_modules, frozen_names, grad_reducer, make_optimizer, param_groups, \
    set_modes, set_requires_grad, set_warp_lr
from .pretrain import pretrain_warps_
from .recording import (base_predictions, checkpoint, diverged, evaluate_val, finish, record, resume_line,
                        saved_predictions, stopped)
from .runfolder import truncate_metrics
from .schedule import lr_factor
from .setup import reference_images
from .state import Run

__all__ = ["train"]


class _Frozen:
    """The recipe's frozen parameter names and modules, and which base state the net is in now."""

    def __init__(self, run: Run) -> None:
        # parameters the model's own code froze (requires_grad=False) stay frozen, as if 'freeze' named them
        self.by_model, by_model_modules = frozen_by_model(run.net)
        self.names = frozen_names(run.net, run.rec.freeze, run.where) | self.by_model
        self.modules = frozen_modules(run.net, run.rec.freeze) + [m for _, m in by_model_modules]
        self.by_model_modules = [q for q, _ in by_model_modules]
        self.base: bool | None = None

    def told(self) -> str | None:
        """The line a run prints about the parameters the model froze, or ``None``."""
        if not self.by_model:
            return None
        n, mods = len(self.by_model), self.by_model_modules
        shown = ", ".join(mods[:6]) + (" ..." if len(mods) > 6 else "")
        return (f"{n} base parameter{'s' if n > 1 else ''} the model sets requires_grad=False stay frozen, as if the "
                f"recipe's 'freeze' named them" + (f"; module{'s' if len(mods) > 1 else ''} {shown} in eval mode"
                                                   if mods else ""))


def train(run: Run) -> dict[str, Any]:
    """Train ``run`` to the end (or to a stop request); returns the summary."""
    frozen = _Frozen(run)
    stepper, tap = _set_up(run, frozen)
    if frozen.told() is not None:
        run.bar.line(frozen.told())
    try:
        start_epoch, start_batch = _restore(run, stepper) if run.ckpt is not None else (0, 0)
        if run.ckpt is None and run.ctx.is_main:
            truncate_metrics(run.run_dir, 0)
        run.t_run = time.monotonic()
        pretraining = run.ckpt.get("pretrain") if run.ckpt is not None else None
        if run.ckpt is None or pretraining is not None:
            summary = _start(run, stepper, frozen, pretraining)
            if summary is not None:  # stopped during pre-training
                return summary
        return _epochs(run, stepper, frozen, start_epoch, start_batch)
    finally:
        if tap is not None:
            tap.close()


def _set_up(run: Run, frozen: _Frozen) -> tuple[Stepper, ThetaTap | None]:
    """Optimiser, step counts and the stepper (with the identity regulariser's tap when the recipe asks)."""
    ctx, rec = run.ctx, run.rec
    run.amp = ctx.device.type == "cuda"
    groups = param_groups(run.net, rec, frozen.names)
    if not groups:
        raise RecipeError(f"{run.where}: nothing left to train (every parameter is frozen); shorten 'freeze'")
    run.optimizer = make_optimizer(groups, rec)
    run.per_rank = rec.batch_size // ctx.world_size
    mine = _b.shard(torch.arange(len(run.train)), ctx.rank, ctx.world_size)
    run.steps_per_epoch = len(_b.index_batches(mine, run.per_rank))
    run.total_steps = run.steps_per_epoch * rec.epochs
    run.warmup_steps = round(rec.warmup_epochs * run.steps_per_epoch)
    tap = ThetaTap(run.warps) if run.warps and rec.identity_reg > 0 else None
    stepper = Stepper(run.net, run.optimizer, device=ctx.device, label_smoothing=rec.label_smoothing,
                      grad_clip=rec.grad_clip, amp=run.amp, tap=tap)
    run.net_wrapped = run.net
    return stepper, tap


def _restore(run: Run, stepper: Stepper) -> tuple[int, int]:
    """Load the checkpoint into the model, optimiser, scaler and RNG; returns ``(epoch, batch)`` to start at."""
    ctx, ckpt = run.ctx, run.ckpt
    if ckpt["world_size"] != ctx.world_size and ckpt["batch"] != 0:
        raise SpliceError(
            f"the checkpoint in '{run.run_dir}' was written mid-epoch by {ckpt['world_size']} process(es); "
            f"resume it with the same number of processes (now {ctx.world_size})"
        )
    try:
        run.net.load_state_dict(ckpt["model"], strict=True)
    except RuntimeError as exc:
        raise SpliceError(
            f"the checkpoint in '{run.run_dir}' does not fit the model ({first_line(exc)}); resume with the "
            "model, --kwargs and --input-shape the run was started with"
        ) from None
    run.optimizer.load_state_dict(ckpt["optimizer"])
    if stepper.scaler is not None and ckpt.get("scaler"):
        stepper.scaler.load_state_dict(ckpt["scaler"])
    set_rng_state(ckpt["rng"])
    start_epoch, start_batch, run.step = int(ckpt["epoch"]), int(ckpt["batch"]), int(ckpt["step"])
    run.best, run.bad_evals = dict(ckpt["best"]), int(ckpt["bad_evals"])
    run.metrics_rows = int(ckpt["metrics_rows"])
    run.reference_start = saved_predictions(ckpt)
    if run.reference_start is None and run.warps and run.reference_probe is not None:  # an older splice's
        if all(run.rec.base_frozen(e) for e in range(run.rec.epochs)):  # the base is as it started: read it again
            run.reference_start = base_predictions(run.net, run.reference_probe, run.prepare)
        else:
            run.bar.line("upright agreement is not recorded for this run: an older splice started it, and the "
                         "base it started from has changed since")
    if ctx.is_main:
        truncate_metrics(run.run_dir, run.metrics_rows)
    run.last_good = {"epoch": start_epoch, "step": run.step}
    if start_batch and ctx.is_main:  # the partial epoch's totals (summed over ranks) live on rank 0
        ls, cor, seen, run.epoch_time = ckpt["epoch_totals"]
        stepper.loss_sum.fill_(ls)
        stepper.correct.fill_(cor)
        stepper.seen = int(seen)
    elif start_batch:
        run.epoch_time = float(ckpt["epoch_totals"][3])
    pre = ckpt.get("pretrain")
    if pre is not None:
        run.bar.line(f"resuming {run.run_dir} in warp pre-training at epoch {int(pre['epoch']) + 1}, "
                     f"batch {int(pre['batch'])}, step {int(pre['step'])}")
    else:
        run.bar.line(resume_line(run.run_dir, run.rec.epochs, start_epoch, start_batch, run.step))
    return start_epoch, start_batch


def _warn_if_still(run: Run) -> None:
    """Pre-training whose ranges move nothing (a recipe that leaves out every range of ``[pretrain]``, which then
    default to no motion) teaches the heads the identity alone: say so before it runs."""
    pre = run.rec.pretrain
    if pre.rotation == 0 and tuple(pre.scale) == (1.0, 1.0) and pre.shift == 0 and pre.perspective == 0:
        text = (f"recipe {run.rec.name!r}: [pretrain] has {pre.epochs} epochs but no rotation, scale, shift or "
                "perspective range, so warp pre-training draws no motion and teaches the identity only; give the "
                "ranges the site's images move by (e.g. rotation = 30.0), or set [pretrain] epochs = 0")
        warnings.warn(text, SpliceWarning, stacklevel=4)  # the warning alone: the command line prints it once


def _start(run: Run, stepper: Stepper, frozen: _Frozen, resume: dict | None = None) -> dict[str, Any] | None:
    """A fresh run: pre-train the warp heads (if the recipe does; ``resume`` continues a pre-training
    checkpoint), record the starting point, checkpoint. Returns a summary if stopped during pre-training."""
    ctx, rec = run.ctx, run.rec
    kinds = f" in {len(run.classes)} classes" if run.classes else ""
    run.bar.line(f"data {run.data}: {len(run.train):,} train and {len(run.val):,} val images{kinds}")
    if resume is None and run.warps and run.reference_probe is not None:
        # what the base (every warp at the identity) predicts for the upright reference
        run.reference_start = base_predictions(run.net, run.reference_probe, run.prepare)
    if not (run.warps and rec.pretrain.epochs > 0) or run.reference.skipped:
        if run.warps and rec.pretrain.epochs > 0:
            run.bar.line(f"no upright reference for {run.data!r} ([pretrain] if_no_reference = \"skip\"): "
                         "warp pre-training skipped")
        head = _head_to_reset(run)
        record(run, "start", 0, extra={"head_reset": head} if rec.mode == "baseline" else None)
        if head is not None:  # after the start was recorded: best/ keeps the unchanged model until beaten
            zero_final_layer_(run.net, head)
        checkpoint(run, stepper, epoch=0, batch=0)
        return None
    ref = reference_images(run.reference, run.train, run.shape)
    set_requires_grad(run.net, frozen.names, base_frozen=True)
    _warn_if_still(run)
    shown = []

    def on_step(i, total, loss) -> bool:
        if not shown:
            run.bar.start("pre-train warps", total)
            shown.append(total)
        run.bar.update(i, **{"grid loss": loss})
        wanted = run.flag.raised or (run.stop_after_pretrain_steps is not None and i >= run.stop_after_pretrain_steps)
        return distributed.broadcast_flag(ctx, wanted)  # every rank stops at the same step

    def on_checkpoint(state: dict) -> None:  # the pre-training loop's state; the heads are in the model
        checkpoint(run, stepper, epoch=0, batch=0, extra={"pretrain": state})

    res = pretrain_warps_(run.net, run.warps, ref, rec.pretrain, seed=rec.seed, prepare=run.prepare,
                          rank=ctx.rank, world=ctx.world_size, reduce_grads=grad_reducer(ctx),
                          on_step=on_step, workers=run.workers, resume=resume, on_checkpoint=on_checkpoint)
    if res["stopped"]:
        # in pre-training's own steps: no optimiser step of the task has run yet
        of = f" of {shown[0]}" if shown else ""
        return stopped(run, 0, 0, where=f"warp pre-training step {res['steps']}{of}")
    run.bar.finish(res["steps"])
    record(run, "pretrain", 0, loss=round(res["grid_loss"], 6),  # lr: the pre-training's peak, not the task's
           extra={"reference": run.reference.data, "pretrain_steps": res["steps"], "lr": rec.pretrain.lr})
    checkpoint(run, stepper, epoch=0, batch=0)
    return None


def _head_to_reset(run: Run) -> str | None:
    """The final layer to zero before a ``baseline`` fine-tune (recipe ``reset_head``), else ``None``."""
    rec = run.rec
    if rec.mode != "baseline" or rec.reset_head == "never":
        return None
    if rec.reset_head == "auto":
        if (run.src.random_init and run.src.manifest is None) or not run.classes:
            return None  # a random init has nothing to forget
        val_loss, _ = evaluate_val(run)
        if not confidently_wrong(val_loss, len(run.classes)):
            return None
    head = final_layer(run.net, run.prepare(_b.fetch(run.val, torch.arange(min(2, len(run.val))))[0]))
    if head is None:
        run.bar.line("reset_head: the model's output is not the output of one layer with parameters; nothing reset")
        return None
    why = "recipe reset_head = always" if rec.reset_head == "always" else (
        f"its validation loss {val_loss:.2f} is above ln {len(run.classes)} = {math.log(len(run.classes)):.2f}, "
        "a uniform guess's")
    run.bar.line(f"final layer '{head}' zeroed before fine-tuning ({why}); see splice.training.head")
    return head


def _wrap(run: Run, base_frozen: bool) -> None:
    """(Re)build the DDP wrapper for the current set of trainable parameters."""
    if not run.ctx.distributed:
        run.net_wrapped = run.net
        return
    run.net_wrapped = distributed.data_parallel(run.net, run.ctx, run.shape, sync_buffers_in_forward=not base_frozen)


def _enter_epoch(run: Run, stepper: Stepper, frozen: _Frozen, epoch: int) -> None:
    """Freeze or thaw the base for ``epoch``, set train/eval modes and the regulariser weight."""
    rec = run.rec
    base_frozen = rec.base_frozen(epoch)
    if base_frozen != frozen.base:
        set_requires_grad(run.net, frozen.names, base_frozen)
        _wrap(run, base_frozen)
        stepper.model = run.net_wrapped
        frozen.base = base_frozen
    set_warp_lr(run.optimizer, rec, base_frozen)
    set_modes(run.net, run.warps, base_frozen, frozen.modules)
    stepper.reg_weight = rec.identity_reg * rec.identity_reg_decay ** epoch if run.warps else 0.0


def _epochs(run: Run, stepper: Stepper, frozen: _Frozen, start_epoch: int, start_batch: int) -> dict[str, Any]:
    rec = run.rec
    ips = None
    for epoch in range(start_epoch, rec.epochs):
        _enter_epoch(run, stepper, frozen, epoch)
        first = start_batch if epoch == start_epoch else 0
        if first == 0:
            stepper.reset_totals()
            run.epoch_time = 0.0
        stop, batch = _batches(run, stepper, epoch, first)
        if batch is not None:  # stopped mid-epoch, checkpoint written at that batch
            return stopped(run, epoch, batch)
        ips = _end_epoch(run, stepper, epoch)
        if stop:
            return stopped(run, epoch + 1, 0)
        if rec.patience and run.bad_evals >= rec.patience and epoch + 1 < rec.epochs:
            run.bar.line(f"no better validation accuracy for {rec.patience} evaluations: stopping early")
            return finish(run, ips, stopped_early=True)
    return finish(run, ips, stopped_early=False)


def _batches(run: Run, stepper: Stepper, epoch: int, first: int) -> tuple[bool, int | None]:
    """Train on the batches of ``epoch`` from ``first``.

    Returns ``(stop requested, batch)``: ``batch`` is set when the run stopped
    mid-epoch (checkpoint written at that batch); a stop on the epoch's last
    batch lets the epoch finish (evaluation, checkpoint) first.
    """
    ctx, rec = run.ctx, run.rec
    order = _b.shard(_b.epoch_order(rec.seed, epoch, len(run.train)), ctx.rank, ctx.world_size)
    batches = _b.index_batches(order, run.per_rank)
    aug_range = None if rec.augment.is_identity else rec.augment.to_range()
    run.bar.start(f"epoch {epoch + 1}/{rec.epochs}", len(batches))
    t0 = time.perf_counter()
    stop = False
    for b, (x, y) in enumerate(_b.iterate(run.train, batches[first:], workers=run.workers), start=first):
        if aug_range is not None:
            x, _ = random_distort(x, aug_range, _b.generator(rec.seed, "augment", epoch, b, ctx.rank))
        _set_lr(run)
        torch.manual_seed(_b.mix(rec.seed, "step", epoch, b, ctx.rank))
        stepper.step(run.prepare(x), y.to(ctx.device, non_blocking=True))
        run.step += 1
        if run.bar.rich:
            _show(run, stepper, b, run.epoch_time + time.perf_counter() - t0)
        wanted = run.flag.raised or (run.stop_after_steps is not None and run.step >= run.stop_after_steps)
        bad = not stepper.finite
        if ctx.distributed:  # one collective for both: every rank stops (or fails) at the same step
            bad, wanted = (v > 0 for v in distributed.all_reduce_sum(ctx, [float(bad), float(wanted)]))
        if bad:
            loss = stepper.last_loss if stepper.last_loss is not None else "NaN or infinite on another process"
            raise diverged(run, f"the training loss became {loss}", epoch + 1)
        if wanted:
            stop = True
            if b + 1 < len(batches):  # mid-epoch: checkpoint this exact batch and stop
                run.epoch_time += time.perf_counter() - t0
                totals = distributed.all_reduce_sum(ctx, list(stepper.totals()))  # over every rank
                checkpoint(run, stepper, epoch=epoch, batch=b + 1, extra={"epoch_totals": [*totals, run.epoch_time]})
                return stop, b + 1
    run.epoch_time += time.perf_counter() - t0
    return stop, None


def _set_lr(run: Run) -> None:
    rec = run.rec
    factor = lr_factor(rec.schedule, run.step, steps_per_epoch=run.steps_per_epoch, total_steps=run.total_steps,
                       warmup_steps=run.warmup_steps, step_epochs=rec.step_epochs, step_gamma=rec.step_gamma)
    for g in run.optimizer.param_groups:
        g["lr"] = g["base_lr"] * factor


def _show(run: Run, stepper: Stepper, b: int, elapsed: float) -> None:
    seen = stepper.seen
    run.bar.update(b + 1, loss=float(stepper.loss_sum) / max(1, seen), acc=float(stepper.correct) / max(1, seen),
                   **{"img/s": seen * run.ctx.world_size / max(elapsed, 1e-9)})


def _end_epoch(run: Run, stepper: Stepper, epoch: int) -> float:
    """Sync buffers, evaluate when due, checkpoint; returns the epoch's images per second."""
    ctx, rec = run.ctx, run.rec
    distributed.sync_buffers(ctx, run.net)
    loss_sum, correct, seen = distributed.all_reduce_sum(ctx, list(stepper.totals()))
    ips = seen / max(run.epoch_time, 1e-9)
    if (epoch + 1) % rec.eval_every == 0 or epoch + 1 == rec.epochs:
        improved = record(run, "epoch", epoch + 1, loss=round(loss_sum / max(1, seen), 6),
                          train_acc=round(correct / max(1, seen), 6), ips=round(ips, 1))
        run.bad_evals = 0 if improved else run.bad_evals + 1
    checkpoint(run, stepper, epoch=epoch + 1, batch=0)
    return ips
