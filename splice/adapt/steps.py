"""One epoch of label-free adaptation: the site objective plus the reference anchor, heads only.

Every batch of site images (in the epoch's seeded order, sharded over
ranks) adds ``[site] weight`` times the objective of
:mod:`splice.adapt.objective` to ``[site] anchor`` times the pre-training
loss on a batch of reference images (seeded indices, moved within the
estimated ranges, an ``[site] unmoved`` share left as it is). One optimiser
step on the warp heads follows, with the recipe's schedule and gradient clip.
Every random draw is a pure function of ``(seed, epoch, batch, rank)``, so a
stopped run resumes to the same weights.
"""

from __future__ import annotations

import time

import torch

from ..compare import logits_or_refuse
from ..errors import RecipeError, TrainingDiverged
from ..training import batches as _b
from ..training import distributed
from ..training.params import grad_reducer
from ..training.pretrain import finite_step
from ..training.schedule import lr_factor
from .objective import consistency_loss, entropy_loss
from .regress import regression_loss, upright_safe
from .setup import AdaptRun

__all__ = ["Epochs", "check_objective", "adapt_epoch"]


class Epochs:
    """Step counts of the adaptation phase for this process."""

    def __init__(self, run: AdaptRun) -> None:
        ctx, rec = run.ctx, run.rec
        self.per_rank = max(1, rec.batch_size // ctx.world_size)
        mine = _b.shard(torch.arange(len(run.site)), ctx.rank, ctx.world_size)
        self.steps_per_epoch = len(_b.index_batches(mine, self.per_rank))
        self.total = self.steps_per_epoch * rec.epochs
        self.warmup = round(rec.warmup_epochs * self.steps_per_epoch)


def check_objective(run: AdaptRun) -> None:
    """The consistency objective reads the input warp's matrix: the model must have one."""
    if run.rec.site.objective != "consistency":
        return
    warp = run.warps.get("input")
    if warp is None or warp.family == "tps":
        raise RecipeError(
            f"{run.where}: [site] objective = \"consistency\" needs a warp with a matrix family at 'input'; "
            f"the model has {', '.join(f'{n} ({w.family})' for n, w in run.warps.items())}. Use objective = "
            "\"entropy\", or splice an affine warp at the input"
        )


def _site_loss(run: AdaptRun, images: torch.Tensor, gen: torch.Generator) -> torch.Tensor:
    site = run.rec.site
    if site.objective == "entropy":
        return entropy_loss(logits_or_refuse(run.net(run.prepare(images)), "the model"))
    if site.objective == "consistency":
        return consistency_loss(run.warps["input"], images, run.prepare, gen)
    return torch.zeros((), device=run.ctx.device)


def _anchor_loss(run: AdaptRun, order: list[str], n: int, gen: torch.Generator) -> torch.Tensor:
    idx = torch.randint(0, len(run.reference), (n,), generator=gen)
    draw = upright_safe(run.estimate.to_range(), run.rec.site.unmoved)
    moved, matrix = draw(run.reference.batch(idx), gen)
    return regression_loss(run.net, run.warps, order, run.prepare(moved), matrix)


def adapt_epoch(run: AdaptRun, plan: Epochs, order: list[str], epoch: int, first: int,
                totals: tuple[float, int] = (0.0, 0)) -> tuple[bool, int | None, tuple[float, int]]:
    """Train the heads on ``epoch``'s site batches from ``first``.

    ``totals`` are the loss sum and image count of the batches before
    ``first`` (a resumed epoch). Returns ``(stop requested, batch, totals)``:
    ``batch`` is set when the run stopped mid-epoch (the caller checkpoints
    it); a stop on the last batch lets the epoch finish first.
    """
    ctx, rec = run.ctx, run.rec
    batches = _b.index_batches(_b.shard(_b.epoch_order(rec.seed, epoch, len(run.site), tag="site"),
                                        ctx.rank, ctx.world_size), plan.per_rank)
    params = [p for w in run.warps.values() for p in w.parameters() if p.requires_grad]
    reduce = grad_reducer(ctx)
    run.bar.start(f"adapt {epoch + 1}/{rec.epochs}", len(batches))
    (total, seen), t0 = totals, time.perf_counter()
    for b in range(first, len(batches)):
        gen = _b.generator(rec.seed, "adapt", epoch, b, ctx.rank)
        images = run.site.batch(batches[b])
        loss = rec.site.weight * _site_loss(run, images, gen)
        if rec.site.anchor > 0:
            loss = loss + rec.site.anchor * _anchor_loss(run, order, len(images), gen)
        factor = lr_factor(rec.schedule, run.step, steps_per_epoch=plan.steps_per_epoch, total_steps=plan.total,
                           warmup_steps=plan.warmup, step_epochs=rec.step_epochs, step_gamma=rec.step_gamma)
        for g in run.optimizer.param_groups:
            g["lr"] = rec.lr * factor
        run.optimizer.zero_grad(set_to_none=True)
        loss.backward()
        if reduce is not None:
            reduce([p.grad for p in params if p.grad is not None])
        if not finite_step(loss, params):  # before the step: the heads keep their last finite state
            raise TrainingDiverged(
                f"label-free adaptation diverged: the loss or its gradient became {float(loss.detach())} at epoch "
                f"{epoch + 1}/{rec.epochs}, step {run.step + 1}; checkpoint.pt, best/ and last/ keep the last finite "
                "state. Lower the learning rate (--lr) or set grad_clip in the recipe, then start a new run",
                {"phase": "adapt", "epoch": epoch + 1, "step": run.step + 1, "what": "loss"})
        if rec.grad_clip > 0:
            torch.nn.utils.clip_grad_norm_(params, rec.grad_clip)
        run.optimizer.step()
        run.step += 1
        total += float(loss.detach()) * len(images)
        seen += len(images)
        run.bar.update(b + 1, loss=total / max(1, seen), **{"img/s": seen / max(time.perf_counter() - t0, 1e-9)})
        wanted = run.flag.raised or (run.stop_after_steps is not None and run.step >= run.stop_after_steps)
        if distributed.broadcast_flag(ctx, wanted) if ctx.distributed else wanted:
            return True, (b + 1 if b + 1 < len(batches) else None), (total, seen)
    return False, None, (total, seen)
