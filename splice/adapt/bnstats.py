"""The ``batchnorm-stats`` recipe: AdaBN on the site images, the label-free reference point.

Nothing trains and no label is read: the BatchNorm running statistics of the
model are re-estimated on the site images (:mod:`splice.adapt.batchnorm`) over
``epochs`` passes with batches of ``batch_size``. The run folder is the usual
one: ``metrics.jsonl`` holds a ``start`` row (the model as given) and an
``epoch`` row (after), each with the label-free diagnostics; ``best/`` and
``last/`` hold the result. Every rank processes every site image (the pass is
cheap), so all ranks end with the same statistics. A run stopped before its
end starts again on resume.
"""

from __future__ import annotations

from typing import Any

from ..errors import RecipeError
from ..training.runfolder import read_metrics, truncate_metrics
from .batchnorm import batchnorm_layers, refresh_batchnorm_
from .diagnostics import site_diagnostics
from .record import end, row, save_folder, save_state
from .setup import AdaptRun

__all__ = ["run_batchnorm_stats"]


def _diagnose(run: AdaptRun) -> dict | None:
    if not run.ctx.is_main:
        return None
    return site_diagnostics(run.net, {}, run.site, prepare=run.prepare, seed=run.rec.seed)


def run_batchnorm_stats(run: AdaptRun) -> dict[str, Any]:
    """Re-estimate the BatchNorm statistics on the site images; returns the summary."""
    if not batchnorm_layers(run.net):
        raise RecipeError(
            f"{run.where}: the model has no BatchNorm layer, so there are no statistics to re-estimate; "
            "use the label-free recipe on a spliced model instead"
        )
    for p in run.net.parameters():
        p.requires_grad_(False)
    if run.ckpt is not None and run.ckpt.get("phase") == "done":
        run.net.load_state_dict(run.ckpt["model"], strict=True)
        run.step, run.metrics_rows = int(run.ckpt["step"]), int(run.ckpt["metrics_rows"])
        run.best = dict(run.ckpt["best"])
        return end(run, read_metrics(run.run_dir) if run.ctx.is_main else [])
    if run.ctx.is_main:
        truncate_metrics(run.run_dir, 0)
    run.metrics_rows = 0
    row(run, "start", 0, site=_diagnose(run))
    rec = run.rec

    def on_step(i: int, total: int) -> None:
        if i == 1:
            run.bar.start("batchnorm statistics", total)
        run.bar.update(i)
        run.step = i

    refresh_batchnorm_(run.net, run.site, prepare=run.prepare, batch_size=rec.batch_size, seed=rec.seed,
                       passes=max(1, rec.epochs), on_step=on_step)
    run.bar.finish(run.step)
    diag = _diagnose(run)
    row(run, "epoch", max(1, rec.epochs), site=diag)
    score = diag["agreement"] if diag else None
    run.best = {"score": score if score is not None else -1.0, "epoch": max(1, rec.epochs), "step": run.step}
    for which in ("best", "last"):
        save_folder(run, which, max(1, rec.epochs), score)
    save_state(run, phase="done", epoch=max(1, rec.epochs), batch=0)
    return end(run, read_metrics(run.run_dir) if run.ctx.is_main else [])
