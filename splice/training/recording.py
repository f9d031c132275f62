"""What a run leaves behind: metrics rows, the best/last folders, checkpoints and its end."""

from __future__ import annotations

import os
import shlex
import time
import warnings
from typing import Any

import torch

from ..compare import logits_or_refuse
from ..copies import buffers_kept, modes_kept
from ..fileio import atomic_write_text, state_dict_sha256
from ..errors import TrainingDiverged, UprightChangeWarning
from ..manifest import info_of
from ..surgery import base_view
from . import distributed
from .checkpoint import CHECKPOINT_NAME, rng_state, save_checkpoint
from .loop import evaluate
from .params import is_warp_name
from .runfolder import HASH_ENV, append_metrics, read_metrics, write_run_info, writing
from .state import Run, TuneInterrupted, unwrap

__all__ = ["UPRIGHT_AGREEMENT", "evaluate_val", "record", "checkpoint", "stopped", "announce_stop", "resume_command",
           "resume_line", "epoch_position",
           "reference_predictions", "predicted_classes", "base_predictions", "saved_predictions", "agreement",
           "caution_upright", "finish", "nonfinite", "diverged"]

#: below this share of held-out upright reference images keeping the base's predicted class, a warp run warns that
#: upright accuracy may fall: a rule of thumb, our choice, no source (two points is what a warp should not cost)
UPRIGHT_AGREEMENT = 0.98


def nonfinite(tensors) -> str | None:
    """The name of the first floating-point tensor in ``tensors`` (a mapping) holding a NaN or an Inf, else None."""
    for name, t in tensors.items():
        if isinstance(t, torch.Tensor) and t.is_floating_point() and not bool(torch.isfinite(t).all()):
            return name
    return None


def _optimizer_tensors(optimizer) -> dict:
    return {f"optimizer state {k} of parameter {i}": v
            for i, state in enumerate(optimizer.state.values()) for k, v in state.items()}


def diverged(run: Run, what: str, epoch: int) -> TrainingDiverged:
    """The one-line error of a run that turned non-finite at ``epoch`` (1-based) and the current step."""
    good = run.last_good
    keep = (f"checkpoint.pt and last/ keep the last finite state (epoch {good['epoch']}, step {good['step']})"
            if good else "no checkpoint had been written yet")
    return TrainingDiverged(
        f"{what} at epoch {epoch}/{run.rec.epochs}, step {run.step}; {keep}. Lower the learning rate (--lr) "
        "or set grad_clip in the recipe, then start a new run",
        {"phase": "epoch", "epoch": epoch, "step": run.step, "what": what})


def _check_finite(run: Run, epoch: int, *, optimizer: bool = False) -> None:
    """Raise :class:`TrainingDiverged` if a weight (or optimiser state) is NaN or infinite: never save it."""
    bad = nonfinite(unwrap(run.net_wrapped).state_dict())
    if bad is None and optimizer:
        bad = nonfinite(_optimizer_tensors(run.optimizer))
    if bad is not None:
        raise diverged(run, f"'{bad}' became NaN or infinite", epoch)


def evaluate_val(run: Run) -> tuple[float, float]:
    """Validation loss and accuracy over every rank's share of the val split."""
    ctx = run.ctx
    idx = torch.arange(len(run.val))[ctx.rank::ctx.world_size]
    loss_sum, correct, seen = evaluate(unwrap(run.net_wrapped), run.val, idx, prepare=run.prepare,
                                       device=ctx.device, amp=run.amp, workers=run.workers)
    loss_sum, correct, seen = distributed.all_reduce_sum(ctx, [loss_sum, correct, float(seen)])
    return loss_sum / max(1.0, seen), correct / max(1.0, seen)


def _warp_distances(warps) -> dict[str, float]:
    return {name: round(float(w.identity_distance()), 6) for name, w in warps.items()}


def _reference_distance(run: Run) -> dict[str, float] | None:
    """Each warp's RMS grid displacement in pixels on held-out upright reference images (0: the identity)."""
    from .pretrain import reference_distance

    if not run.warps or run.reference_probe is None:
        return None
    return reference_distance(unwrap(run.net_wrapped), run.warps, run.prepare(run.reference_probe))


def predicted_classes(model, images: torch.Tensor, prepare) -> torch.Tensor:
    """The class ``model`` predicts for each of ``images`` (prepared by ``prepare``), in eval mode; the model's
    modes and buffers are put back."""
    with torch.no_grad(), modes_kept(model), buffers_kept(model):
        model.eval()
        return torch.cat([logits_or_refuse(model(prepare(chunk)), "the model").argmax(1).cpu()
                          for chunk in images.split(256)])


def base_predictions(model, images: torch.Tensor, prepare) -> torch.Tensor:
    """:func:`predicted_classes` of the base of a spliced ``model``: a copy with every warp reset to the identity
    (the starting point every run's ``reference_agreement`` is measured from)."""
    return predicted_classes(base_view(model), images, prepare)


def saved_predictions(ckpt: dict) -> torch.Tensor | None:
    """The base's predictions a checkpoint keeps (``reference_start``; ``None`` in one an older splice wrote)."""
    kept = ckpt.get("reference_start")
    return None if kept is None else torch.tensor(kept, dtype=torch.long)


def reference_predictions(run: Run) -> torch.Tensor | None:
    """:func:`predicted_classes` of the held-out upright reference images (``None`` for a run without warps or
    reference)."""
    if not run.warps or run.reference_probe is None:
        return None
    return predicted_classes(unwrap(run.net_wrapped) if run.net_wrapped is not None else run.net,
                             run.reference_probe, run.prepare)


def agreement(now: torch.Tensor | None, start: torch.Tensor | None) -> float | None:
    """The share of images whose predicted class ``now`` is the one they had at the ``start``."""
    if now is None or start is None:
        return None
    return round(float((now == start).float().mean()), 6)


def caution_upright(share: float | None, images: int, which: str) -> None:
    """An :class:`~splice.errors.UprightChangeWarning` when ``which`` (the model a run leaves, as the user knows it)
    keeps fewer than :data:`UPRIGHT_AGREEMENT` of ``images`` upright reference images at the base's predicted
    class; nothing otherwise. The warning alone (no run line beside it): the command line prints it once."""
    if share is None or share >= UPRIGHT_AGREEMENT:
        return
    text = (f"the warps of {which} change the base's prediction on {100 * (1 - share):.1f} % of {images} upright "
            "reference images: its upright accuracy may be lower by as much; more warp pre-training epochs or a "
            "larger [pretrain] identity_fraction keep upright images nearer the identity")
    warnings.warn(text, UprightChangeWarning, stacklevel=4)


def _caution_upright(run: Run, rows: list[dict]) -> float | None:
    """The upright agreement of the model ``best/`` holds (its metrics row), cautioned by :func:`caution_upright`."""
    best = [r for r in rows if r.get("step") == run.best["step"] and r.get("epoch") == run.best["epoch"]]
    share = best[-1].get("reference_agreement") if best else None
    caution_upright(share, 0 if run.reference_start is None else len(run.reference_start), "best/")
    return share


def base_differs(model, start_sha256: str) -> bool:
    """Whether ``model``'s base differs from the start of a run (``start_sha256``), or from the source its record
    names (a folder tuned before: a warp-only run of a joint-tuned folder leaves a base that is not its source's).
    The one rule of ``base_changed`` for every recipe."""
    now = state_dict_sha256({k: v for k, v in model.state_dict().items() if not is_warp_name(k)})
    info = info_of(model)
    source = info.source_weights_sha256 if info is not None else None
    return now != start_sha256 or (source is not None and now != source)


def tuning_record(model, run_dir, **fields) -> dict:
    """A tuning record for ``splice.json``: ``fields``, the run folder (absolute) and, when ``model`` was tuned
    before, that tuning's record as ``before``."""
    info = info_of(model)
    before = info.tuning if info is not None else None
    return {**fields, "run": os.path.abspath(run_dir), **({"before": before} if before else {})}


def _base_changed(run: Run) -> bool:
    return base_differs(unwrap(run.net_wrapped), run.info["base_sha256_start"])


def _tuning(run: Run, which: str, epoch: int, accuracy: float) -> dict:
    return tuning_record(unwrap(run.net_wrapped), run.run_dir, recipe=run.rec.name, mode=run.rec.mode, which=which,
                         epoch=epoch, step=run.step, val_accuracy=round(accuracy, 6), data=run.data,
                         seed=run.rec.seed, base_changed=_base_changed(run))


def _save_folder(run: Run, which: str, epoch: int, accuracy: float) -> None:
    from ..store import save

    if not run.ctx.is_main:
        return
    model = unwrap(run.net_wrapped)
    kwargs = {"overwrite": True, "tuning": _tuning(run, which, epoch, accuracy),
              "class_names": run.classes, "normalisation": run.norm, "trained_on": run.trained_on}
    if info_of(model) is None:
        kwargs["source"] = run.src
    with writing(run.run_dir / which):
        save(model, run.run_dir / which, **kwargs)


def _line(run: Run, row: dict) -> str:
    phase, epoch = row["phase"], row["epoch"]
    parts = [f"{phase} {epoch}/{run.rec.epochs}" if phase == "epoch" else phase, f"step {row['step']}"]
    if row["loss"] is not None:
        parts.append(f"loss {row['loss']:.4f}")
    parts.append(f"val acc {row['accuracy']:.4f}")
    if row["images_per_s"]:
        parts.append(f"{row['images_per_s']:,.0f} img/s")
    if run.warps:
        parts.append("warp dist " + ", ".join(f"{k} {v:.3f}" for k, v in row["warp_distance"].items()))
    if row.get("reference_distance"):
        parts.append("upright shift px " + ", ".join(f"{k} {v:.2f}" for k, v in row["reference_distance"].items()))
    if row.get("reference_agreement") is not None:
        parts.append(f"upright agree {row['reference_agreement']:.3f}")
    return "  ".join(parts)


def record(run: Run, phase: str, epoch: int, *, loss=None, train_acc=None, ips=None, extra=None) -> bool:
    """Evaluate, append a metrics row, save ``best`` (if better) and ``last``, log a line; True if improved."""
    _check_finite(run, max(epoch, 1))
    val_loss, acc = evaluate_val(run)
    if not torch.isfinite(torch.tensor(val_loss)):
        raise diverged(run, f"the validation loss became {val_loss}", max(epoch, 1))
    row = {"phase": phase, "epoch": epoch, "step": run.step, "loss": loss, "train_accuracy": train_acc,
           "accuracy": round(acc, 6), "val_loss": round(val_loss, 6), "lr": run.optimizer.param_groups[0]["lr"],
           "images_per_s": ips, "warp_distance": _warp_distances(run.warps),
           "reference_distance": _reference_distance(run),
           "reference_agreement": agreement(reference_predictions(run), run.reference_start),
           "base_frozen": run.rec.base_frozen(max(0, epoch - 1)),
           "time_s": round(time.monotonic() - run.t_run, 3), **(extra or {})}
    if run.ctx.is_main:
        append_metrics(run.run_dir, row)
    run.metrics_rows += 1
    improved = acc > run.best["accuracy"]
    if improved:
        run.best = {"accuracy": acc, "epoch": epoch, "step": run.step}
        _save_folder(run, "best", epoch, acc)
    _save_folder(run, "last", epoch, acc)
    run.bar.line(_line(run, row))
    return improved


def checkpoint(run: Run, stepper, *, epoch: int, batch: int, extra: dict | None = None) -> None:
    """Write ``checkpoint.pt`` (rank 0): everything needed to continue at ``(epoch, batch)``.

    The state is checked first: a NaN or infinite weight or optimiser state
    raises :class:`TrainingDiverged` and the previous checkpoint stays as it
    was (it is replaced atomically, and only by a checked state).
    """
    _check_finite(run, max(1, epoch + (1 if batch else 0)), optimizer=True)
    if not run.ctx.is_main:
        run.last_good = {"epoch": epoch, "step": run.step}
        return
    loss_sum, correct, seen = stepper.totals()
    payload = {
        "epoch": epoch, "batch": batch, "step": run.step, "world_size": run.ctx.world_size,
        "model": {k: v.detach().to("cpu") for k, v in unwrap(run.net_wrapped).state_dict().items()},
        "optimizer": run.optimizer.state_dict(),
        "scheduler": {"kind": run.rec.schedule, "step": run.step, "total_steps": run.total_steps,
                      "steps_per_epoch": run.steps_per_epoch, "warmup_steps": run.warmup_steps},
        "scaler": stepper.scaler.state_dict() if stepper.scaler is not None else {},
        "rng": rng_state(),
        "best": dict(run.best),
        "bad_evals": run.bad_evals,
        "metrics_rows": run.metrics_rows,
        "epoch_totals": [loss_sum, correct, float(seen), run.epoch_time],
        "recipe": run.rec.to_dict(),
        "reference_start": None if run.reference_start is None else run.reference_start.tolist(),
    }
    if extra:
        payload.update(extra)
    save_checkpoint(run.run_dir / CHECKPOINT_NAME, payload)
    run.last_good = {"epoch": epoch, "step": run.step}


def resume_line(run_dir, epochs: int, epoch: int, batch: int, step: int) -> str:
    """What a resume says before it goes on: where it continues (``epoch``, 0-based, ``batch``, ``step``), or,
    for a run whose checkpoint is past its last epoch, that it already finished (its summary is returned as a run's
    is, and printed unless quiet)."""
    if epoch >= epochs and not batch:
        return (f"run {run_dir} already finished its {epochs} epoch{'s' if epochs != 1 else ''} (step {step}); "
                "nothing to resume")
    return f"resuming {run_dir} at epoch {epoch + 1}, batch {batch}, step {step}"


def resume_command(run_dir, world_size: int) -> str:
    """The command that continues the run in ``run_dir``: torchrun with as many processes when it ran in several
    (a resume in another number of processes is refused); the folder by its absolute path, quoted for a shell, so
    the command works from any directory."""
    run_dir = shlex.quote(os.path.abspath(os.fspath(run_dir)))
    if world_size > 1:
        local = int(os.environ.get("LOCAL_WORLD_SIZE") or world_size)  # torchrun's processes on this node
        nodes = max(1, world_size // max(1, local))
        command = f"torchrun --nproc-per-node {local} -m splice tune --resume {run_dir}"
        return command if nodes == 1 else f"{command} on each of the {nodes} nodes, with their rendezvous options"
    return f"splice tune --resume {run_dir}"


def epoch_position(epoch: int, batch: int, step: int) -> str:
    """Where a stop inside the epochs is: the epoch and batch, and the optimiser steps so far."""
    return (f"epoch {epoch + 1}, batch {batch}" if batch else f"the end of epoch {epoch}") + f" (step {step})"


def announce_stop(run: Any, where: str) -> None:
    """Say where ``run`` (a tune or label-free run) stopped (``where``, in the steps of the phase it stopped in:
    :func:`epoch_position`, or warp pre-training's own) and how to continue it; raise :class:`TuneInterrupted`
    when a signal asked for the stop."""
    command = resume_command(run.run_dir, run.ctx.world_size)
    run.bar.line(f"stopped at {where}; checkpoint written. Continue with: {command}")
    if run.flag.raised:
        raise TuneInterrupted(f"stopped at {where}; continue with: {command}", run.flag.signal)


def stopped(run: Run, epoch: int, batch: int, where: str | None = None) -> dict[str, Any]:
    """After a stop request: the checkpoint is written; record it, and raise for Ctrl-C / SIGTERM."""
    if run.ctx.is_main:
        write_run_info(run.run_dir, dict(run.info, status="interrupted"))
    announce_stop(run, where if where is not None else epoch_position(epoch, batch, run.step))
    return {"out": str(run.run_dir), "rank": run.ctx.rank, "world_size": run.ctx.world_size,
            "best_accuracy": run.best["accuracy"], "best_epoch": run.best["epoch"], "steps": run.step,
            "epochs": run.rec.epochs, "interrupted": True, "resume_at": {"epoch": epoch, "batch": batch}}


def finish(run: Run, ips, stopped_early: bool) -> dict[str, Any]:
    """The run ended: mark run.json and return the summary."""
    ctx = run.ctx
    final = unwrap(run.net_wrapped)
    base_changed = _base_changed(run)
    if os.environ.get(HASH_ENV):
        atomic_write_text(run.run_dir / f"rank{ctx.rank}.sha256", state_dict_sha256(final.state_dict()) + "\n")
    rows = read_metrics(run.run_dir) if ctx.is_main else []
    last_rows = [r for r in rows if r.get("phase") == "epoch"]
    upright = _caution_upright(run, rows) if ctx.is_main else None
    if ctx.is_main:
        write_run_info(run.run_dir, dict(run.info, status="stopped early" if stopped_early else "finished"))
    return {
        "out": str(run.run_dir), "rank": ctx.rank, "world_size": ctx.world_size,
        "best_accuracy": run.best["accuracy"], "best_epoch": run.best["epoch"],
        "last_accuracy": last_rows[-1]["accuracy"] if last_rows else None,
        "epochs": run.rec.epochs, "steps": run.step, "base_changed": base_changed,
        "images_per_s": ips, "stopped_early": stopped_early, "interrupted": False,
        "best_reference_agreement": upright,
    }
