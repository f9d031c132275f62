"""``splice tune``: fine-tune a model with a recipe, in one process or under torchrun.

>>> from splice.training import tune
>>> summary = tune("out/tray-affine", recipe="joint", data="digits-moved",
...                out="runs/joint")                                 # doctest: +SKIP
>>> summary["best_accuracy"], summary["best_epoch"]                  # doctest: +SKIP

The run folder (``out``)::

    RUN/
      run.json          what was run: model, data, recipe name, world size, status (schema version 1)
      recipe.toml       the resolved recipe, overrides applied (load it with --recipe RUN/recipe.toml)
      metrics.jsonl     one JSON row per evaluation (see below)
      checkpoint.pt     resumable state, rewritten atomically every epoch and every warp pre-training
                        epoch, only by a finite state (torch.load(weights_only=True))
      best/  last/      splice folders (weights.safetensors + splice.json), the best by validation
                        accuracy and the latest; plain folders for ``baseline`` runs
      .splice.lock      while a run writes the folder (see :class:`splice.folders.FolderLock`)

``run.json``'s ``status``: ``running``, ``finished``, ``stopped early``,
``interrupted``, ``diverged`` (a NaN or infinite loss or weight: the run
raises :class:`~splice.errors.TrainingDiverged`, exit 1, and the checkpoint
and ``last/`` keep the last finite state) or ``failed`` (``error`` names why).

A metrics row holds ``phase`` (``start``, ``pretrain`` or ``epoch``), ``epoch``
(epochs completed), ``step`` (optimiser steps so far), ``loss`` (mean training
loss of the epoch; the grid loss for ``pretrain``), ``train_accuracy``,
``accuracy`` and ``val_loss`` (validation split), ``lr`` (base lr, or the warp
lr when the base is frozen), ``images_per_s`` (training images per second over
all processes, evaluation excluded), ``warp_distance`` (each warp's
:meth:`~splice.warps.Warp.identity_distance`), ``base_frozen`` and ``time_s``.

Exact resume: on the CPU, with deterministic algorithms (the default there), a
run interrupted and resumed ends with the same weights, bit for bit, as one
that was not (see :mod:`splice.training.epochs`).

Ctrl-C (SIGINT) or SIGTERM finishes the current step, writes a checkpoint at
that exact batch and stops; ``--resume RUN`` carries on from there.
"""

from __future__ import annotations

import contextlib
import os
import signal
import threading
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import torch

from ..data import first_class_difference, same_classes, shown_classes
from ..errors import DataError, RecipeError, SpliceError, TrainingDiverged, first_line
from ..fileio import name_bytes
from ..graph.shapes import input_dtype
from ..options import ModelOptions, split_keywords
from ..recipes import LABEL_FREE_MODES, Recipe, load_recipe
from . import distributed
from .epochs import train
from .options import RecipeOverrides, RunOptions
from .reference import data_record
from .runfolder import RECIPE_FILE, prepare_folder, start_files, warn_other_data, write_run_info
from .setup import (gate_recorded_model, load_model, normalisation, open_splits, reference, reference_probe,
                    refuse_train_mode_output, resolve, run_info)
from .state import Run, TuneInterrupted

__all__ = ["tune", "tune_keywords"]


class _StopFlag:
    """SIGINT/SIGTERM set a flag; the loop stops at the next step boundary (second Ctrl-C: immediate)."""

    def __init__(self) -> None:
        self.raised = False
        self.signal: int | None = None  # the first signal that asked for the stop
        self._old: dict[int, Any] = {}

    def __enter__(self) -> _StopFlag:
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, signal.SIGTERM):
                self._old[sig] = signal.signal(sig, self._handle)
        return self

    def _handle(self, signum, frame) -> None:  # noqa: ARG002
        if self.raised and signum == signal.SIGINT:
            raise KeyboardInterrupt
        self.raised = True
        self.signal = self.signal or signum

    def __exit__(self, *exc) -> None:
        for sig, old in self._old.items():
            signal.signal(sig, old)


def _remove_if_empty(folder: Path) -> None:
    """Remove a run folder this call created, if nothing but its released lock file is in it."""
    from ..folders import LOCK_FILE

    with contextlib.suppress(OSError):
        if [p.name for p in folder.iterdir()] == [LOCK_FILE]:
            (folder / LOCK_FILE).unlink()
        folder.rmdir()


@contextlib.contextmanager
def _deterministic(mode: bool):
    """Deterministic algorithms on (``mode``) for the run; the caller's three settings come back afterwards.

    Uninitialised memory is not filled with NaN during the run
    (``torch.utils.deterministic.fill_uninitialized_memory = False``). The
    fill only changes what a program that reads memory before writing it
    sees; PyTorch's documentation of that setting says a valid program stays
    deterministic without it, and that the fill costs time. Here it cost 3-4 %
    of a ``tray_net`` training step on the CPU, most of deterministic mode's
    cost (steps with and without it alternated in one process, 2026-12-03).
    """
    previous = (torch.are_deterministic_algorithms_enabled(), torch.is_deterministic_algorithms_warn_only_enabled(),
                torch.utils.deterministic.fill_uninitialized_memory)
    if mode:
        _set_deterministic(True, warn_only=False)
        torch.utils.deterministic.fill_uninitialized_memory = False
    try:
        yield
    finally:
        _set_deterministic(previous[0], warn_only=previous[1])
        torch.utils.deterministic.fill_uninitialized_memory = previous[2]


def _set_deterministic(mode: bool, *, warn_only: bool) -> None:
    """``torch.use_deterministic_algorithms(mode)`` without its side import of torch._inductor.

    The public function also sets ``torch._inductor.config.deterministic``, which
    costs seconds of import time and does not matter here (nothing is compiled).
    """
    setter = getattr(torch._C, "_set_deterministic_algorithms", None)
    if setter is None:  # pragma: no cover - other torch builds
        torch.use_deterministic_algorithms(mode, warn_only=warn_only)
    else:
        setter(mode, warn_only=warn_only)


def tune(
    model: Any = None,
    *,
    recipe: str | os.PathLike | Recipe | Mapping | None = None,
    data: str | os.PathLike | None = None,
    out: str | os.PathLike | None = None,
    resume: str | os.PathLike | None = None,
    overrides: RecipeOverrides | None = None,
    model_options: ModelOptions | None = None,
    run_options: RunOptions | None = None,
    site: str | os.PathLike | None = None,
) -> dict[str, Any]:
    """Fine-tune ``model`` with ``recipe`` on ``data``; write the run folder ``out``.

    ``model`` is any model source (spec string, splice folder, :class:`~splice.sources.Source`,
    module); warp recipes need a spliced model (run ``splice insert`` first),
    ``baseline`` a plain one; ``model_options`` (:class:`~splice.options.ModelOptions`)
    say how to build it. ``recipe`` is a shipped name (``baseline``,
    ``warp-only``, ``joint``, ``staged``), a ``.toml`` path or a
    :class:`~splice.recipes.Recipe`; ``overrides`` (:class:`RecipeOverrides`)
    replace its epochs, lr, batch size, seed or pre-training reference.
    ``resume=RUN`` continues RUN from its checkpoint (``model``, ``recipe`` and
    ``data`` may then be omitted; if given they must match the run). The seed
    also fixes the random init of a model built from a spec without weights,
    so one seed gives one run; the caller's RNG state is restored when the run
    ends. ``run_options`` (:class:`RunOptions`): device, output, workers,
    determinism. :func:`tune_keywords` takes every option as a flat keyword.

    The recipes that read no label, ``label-free`` and ``batchnorm-stats``
    (:mod:`splice.adapt`), take unlabelled ``site`` images instead of ``data``
    (a folder, or ``digits-moved``); ``label-free`` also needs
    ``overrides.reference``, the upright images the base was trained on,
    unless the site is ``digits-moved``. Their summary adds ``ranges``,
    ``site_before`` and ``site_after`` (label-free diagnostics) and has no accuracy.

    Returns a summary dict: ``out``, ``rank``, ``world_size``, ``best_accuracy``,
    ``best_epoch``, ``last_accuracy``, ``epochs``, ``steps``, ``base_changed``,
    ``images_per_s``, ``stopped_early``.
    """
    for name, value, cls in (("overrides", overrides, RecipeOverrides), ("model_options", model_options, ModelOptions),
                             ("run_options", run_options, RunOptions)):
        if value is not None and not isinstance(value, cls):
            raise TypeError(f"tune's {name} must be a {cls.__name__} (got {type(value).__name__}); build one, e.g. "
                            f"{cls.__name__}(...), or pass every option as a keyword to tune_keywords")
    run_options = run_options or RunOptions()
    data, site = (os.fspath(v) if isinstance(v, os.PathLike) else v for v in (data, site))  # recorded as strings
    ctx = distributed.setup(run_options.device)
    try:
        deterministic = run_options.deterministic
        if deterministic is None:
            deterministic = ctx.device.type == "cpu"
        cuda = [ctx.device.index or 0] if ctx.device.type == "cuda" else []
        # the run seeds the global RNG step by step; the caller's RNG state and determinism settings come back
        # afterwards; the run folder's lock is held until the run ends, however it ends
        with _deterministic(deterministic), torch.random.fork_rng(devices=cuda), contextlib.ExitStack() as locks:
            label_free = _mode(recipe, resume) in LABEL_FREE_MODES
            if site is not None and not label_free:
                raise RecipeError(
                    f"site images are read only by the label-free and batchnorm-stats recipes; pass labelled "
                    f"data with --data (given --site {site})"
                )
            fresh = out is not None and resume is None and not Path(out).exists()
            try:
                if label_free:
                    return _adapt(ctx, model=model, recipe=recipe, data=data, site=site, out=out, resume=resume,
                                  overrides=overrides or RecipeOverrides(),
                                  model_options=model_options or ModelOptions(), run_options=run_options,
                                  locks=locks)
                run = _set_up(ctx, model=model, recipe=recipe, data=data, out=out, resume=resume,
                              overrides=overrides or RecipeOverrides(),
                              model_options=model_options or ModelOptions(), run_options=run_options,
                              locks=locks)
            except BaseException:
                if fresh and ctx.is_main:  # a run that never started leaves no folder behind
                    locks.close()
                    _remove_if_empty(Path(out))
                raise
            return _train(run, run_options)
    finally:
        distributed.teardown(ctx)


def tune_keywords(model: Any = None, *, recipe=None, data=None, out=None, resume=None, site=None,
                  **keywords) -> dict[str, Any]:
    """:func:`tune` with the fields of :class:`RecipeOverrides`, :class:`~splice.options.ModelOptions`
    and :class:`RunOptions` as flat keywords (``epochs=``, ``weights=``, ``device=``, …): the CLI's path."""
    overrides, model_options, run_options = split_keywords(
        keywords, (RecipeOverrides, ModelOptions, RunOptions), "tune")
    return tune(model, recipe=recipe, data=data, out=out, resume=resume, overrides=overrides,
                model_options=model_options, run_options=run_options, site=site)


def _mode(recipe, resume) -> str | None:
    """The mode of the recipe a run will use (the recorded one when resuming without a recipe)."""
    if recipe is not None:
        return load_recipe(recipe).mode
    if resume is not None and (Path(resume) / RECIPE_FILE).is_file():
        return load_recipe(Path(resume) / RECIPE_FILE).mode
    return None


def _adapt(ctx, *, model, recipe, data, site, out, resume, overrides: RecipeOverrides, model_options: ModelOptions,
           run_options: RunOptions, locks: contextlib.ExitStack) -> dict[str, Any]:
    """A run that reads no label (:mod:`splice.adapt`), with the same folder, progress and stop handling."""
    from ..adapt.bnstats import run_batchnorm_stats
    from ..adapt.run import run_label_free
    from ..adapt.setup import set_up

    if data is not None:
        raise RecipeError(
            f"the label-free recipes read unlabelled site images, not labelled data; pass --site {data} instead "
            "of --data"
        )
    if site is None and resume is None:
        raise RecipeError(
            "the label-free recipes need unlabelled images from the new site: pass --site SITE (a folder of "
            "images, or digits-moved)"
        )
    run = set_up(ctx, model=model, recipe=recipe, site=site, out=out, resume=resume, overrides=overrides,
                 model_options=model_options, stop_after_steps=run_options.stop_after_steps, locks=locks)
    return _run_marked(run, run_options, run_label_free if run.rec.mode == "label-free" else run_batchnorm_stats)


def _set_up(ctx, *, model, recipe, data, out, resume, overrides: RecipeOverrides, model_options: ModelOptions,
            run_options: RunOptions, locks: contextlib.ExitStack) -> Run:
    """Lock the run folder, resolve the request, build the model and the data, write (or update) the run record."""
    gate_recorded_model(resume, model, model_options)
    run_dir, info = prepare_folder(ctx, Path(out) if out is not None else None,
                                   Path(resume) if resume is not None else None, locks)
    req = resolve(ctx, run_dir, info, model=model, recipe=recipe, data=data, overrides=overrides,
                  model_options=model_options)
    rec = req.recipe
    where = f"recipe '{rec.name}'"
    src, net, warps = load_model(req, where)
    net.to(ctx.device)
    train_set, val_set, classes = open_splits(req.data, src, net, ctx.device)
    refuse_train_mode_output(net, tuple(src.input_shape), rec, ctx.device)
    ref = reference(req, net, overrides.reference)
    if info is not None and ref is not None and "reference" not in info:
        info = dict(info, reference=ref.data, reference_origin=ref.origin)
    if info is not None and info.get("normalisation_origin") == "estimated":
        norm, norm_origin = info["normalisation"], "estimated"  # a resumed run keeps its estimate
    else:
        norm, norm_origin = normalisation(rec, src, train_set)
    dev, dtype = ctx.device, input_dtype(net)  # a float64 model takes float64 batches

    def prepare(x: torch.Tensor) -> torch.Tensor:
        from ..data import normalise

        return normalise(x, norm).to(dev, dtype, non_blocking=True)

    if info is None:
        info = dict(run_info(ctx, req, src, net, classes, norm, norm_origin=norm_origin, ref=ref),
                    train_images=len(train_set), val_images=len(val_set),
                    images_sha256=_image_list_sha256(train_set, val_set))
        if ctx.is_main:
            start_files(run_dir, rec, info)
    else:
        _refuse_other_classes(info, classes, req.data)
        if req.other_copy and info.get("images_sha256") != _image_list_sha256(train_set, val_set):
            raise DataError(f"the run's data folder '{info.get('data_path') or info['data']}' still exists and "
                            f"'{req.data}' holds other image files; omit --data to resume on the run's own data")
        if ctx.is_main:
            _warn_if_data_changed(info, train_set, val_set)
        if ctx.is_main:
            info = {k: v for k, v in info.items() if k not in ("diverged", "error")}
            info["status"] = "running"
            if data_record(req.data) != info.get("data_path"):  # resumed where the data is now
                info.update(data=req.data, data_path=data_record(req.data))
            write_run_info(run_dir, info)
    return Run(ctx=ctx, rec=rec, src=src, net=net, warps=warps, train=train_set, val=val_set, prepare=prepare,
               norm=norm, classes=classes or None, run_dir=run_dir, info=info, data=req.data,
               shape=tuple(src.input_shape), where=where, ckpt=req.ckpt, workers=run_options.workers,
               stop_after_steps=run_options.stop_after_steps,
               stop_after_pretrain_steps=run_options.stop_after_pretrain_steps, reference=ref,
               reference_probe=reference_probe(ref, train_set, val_set, tuple(src.input_shape)),
               trained_on=_trained_on(rec, req.data, net, ref))


def _refuse_other_classes(info: dict, classes, data) -> None:
    """A resumed run whose class folders were renamed or added would go on with each output meaning another class."""
    started = info.get("class_names")
    if not same_classes(started, classes or None):
        raise DataError(f"the run started with classes {shown_classes(started)} but data {data!r} now has "
                        f"{shown_classes(classes)} ({first_class_difference(started, classes)}); restore the class "
                        "folders as they were, or start a new run with another --out")


def _image_list_sha256(*splits) -> str | None:
    """A hash of which image files the splits hold, their sizes in bytes (a file replaced under the same name) and
    their labels (paths relative to each split's root), or ``None`` for splits held in memory (the embedded digits:
    the same images every time)."""
    import hashlib

    if not all(hasattr(s, "samples") for s in splits):
        return None
    h = hashlib.sha256()
    for s in splits:
        for path, label in s.samples:
            size = os.stat(path).st_size if os.path.exists(path) else -1
            # name_bytes: a file name that is not UTF-8 hashed as its bytes; any other as its UTF-8, as always
            h.update(name_bytes(f"{s.split}\t{Path(path).relative_to(s.root).as_posix()}\t{label}\t{size}\n"))
    return h.hexdigest()


def _warn_if_data_changed(info: dict, train_set, val_set) -> None:
    """A resumed run whose splits no longer hold the images it started with (a bad file removed or replaced,
    say) goes on, but its batches from here on are not the ones an uninterrupted run would have drawn: say so."""
    started = (info.get("train_images"), info.get("val_images"))
    now = (len(train_set), len(val_set))
    recorded = info.get("images_sha256")
    same_files = recorded is None or recorded == _image_list_sha256(train_set, val_set)
    if None in started or (started == now and same_files):
        return
    what = (f"{now[0]:,} train and {now[1]:,} val images where the run started with {started[0]:,} and "
            f"{started[1]:,}" if started != now else f"other image files than the run started with ({now[0]:,} "
            f"train and {now[1]:,} val, as before)")
    warn_other_data(what)


def _trained_on(rec, data: str, net, ref) -> str:
    """What the folders this run saves record as the images their base was trained on.

    A ``baseline`` run trains its base on ``data``; a warp run keeps its base's
    record, else the reference it pre-trained on (its own data for ``train``).
    """
    from ..manifest import info_of

    info = info_of(net)
    if rec.uses_warps and info is not None and info.trained_on:
        return info.trained_on
    if rec.uses_warps and ref is not None and not ref.skipped and ref.data != "train":
        return ref.data
    return data_record(data)


def _train(run: Run, run_options: RunOptions) -> dict[str, Any]:
    return _run_marked(run, run_options, train)


def _run_marked(run, run_options: RunOptions, body: Callable[[Any], dict[str, Any]]) -> dict[str, Any]:
    """``body(run)`` with the progress bar and the stop flag; run.json says so when it diverges or fails."""
    from ..progress import Progress

    show = run_options.progress and run.ctx.is_main
    with Progress(enabled=show, quiet=run_options.quiet) as bar, _StopFlag() as flag:
        run.bar, run.flag = bar, flag
        try:
            return body(run)
        except TrainingDiverged as exc:
            _mark(run, "diverged", diverged=exc.where)
            raise
        except TuneInterrupted:
            raise  # run.json says "interrupted" once the checkpoint is written
        except Exception as exc:
            _mark(run, "failed", error=first_line(exc))
            raise


def _mark(run, status: str, **extra) -> None:
    """Record how a run (a :class:`Run` or a label-free run) ended in run.json (rank 0; a failing write must not
    hide the first error)."""
    if run.ctx.is_main:
        with contextlib.suppress(SpliceError, OSError):
            write_run_info(run.run_dir, dict(run.info, status=status, **extra))
