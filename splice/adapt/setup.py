"""Setting up a run that reads no label: the recipe (fresh or resumed), the model, the site and the reference.

The run folder is the one every ``splice tune`` run writes (run.json,
recipe.toml, metrics.jsonl, checkpoint.pt, best/, last/), through the same
helpers (:mod:`splice.training.runfolder`, :mod:`splice.training.setup`).
``run.json`` records ``data`` = the site and ``reference``; the label-free
run adds ``ranges.json`` (the estimated ranges) and rewrites ``recipe.toml``
with the re-centred ``[pretrain]`` ranges.
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import torch
from torch import Tensor, nn

from ..errors import DataError, DataWarning, RecipeError
from ..graph.shapes import input_dtype
from ..manifest import info_of
from ..options import ModelOptions
from ..recipes import Recipe, load_recipe
from ..training.options import RecipeOverrides
from ..training.reference import data_record
from ..training.runfolder import (RECIPE_FILE, check_same, prepare_folder, start_files, warn_other_data,
                                  write_run_info)
from ..training.setup import gate_recorded_model, load_model, normalisation, resolve, run_info
from .diagnostics import sample_indices
from .images import Images, files_sha256, open_images
from .probe import check_reference_size, check_site_size

__all__ = ["AdaptRun", "set_up", "reference_for_site", "REFERENCE_PROBE"]

#: reference images whose predicted class a label-free run follows (as many as a supervised warp run holds out)
REFERENCE_PROBE = 256


@dataclass
class AdaptRun:
    """One label-free or batchnorm-stats run (one per process)."""

    ctx: Any  # splice.training.distributed.Context
    rec: Recipe
    src: Any
    net: nn.Module
    warps: dict[str, nn.Module]
    site: Images
    reference: Images | None
    prepare: Callable[[Tensor], Tensor]
    norm: dict | None
    classes: list[str] | None
    run_dir: Path
    info: dict
    where: str
    ckpt: dict | None = None
    stop_after_steps: int | None = None
    bar: Any = None
    flag: Any = None
    optimizer: torch.optim.Optimizer | None = None
    estimate: Any = None  # splice.adapt.ranges.RangeEstimate: the ranges pre-training draws from
    site_ranges: Any = None  # the ranges the site was read as (``estimate`` before it was widened to contain 1)
    reference_probe: Tensor | None = None  # up to 256 reference images whose predictions the run follows
    reference_start: Tensor | None = None  # the base's predicted class for each of them
    step: int = 0
    metrics_rows: int = 0
    best: dict = field(default_factory=lambda: {"score": -1.0, "epoch": -1, "step": 0})
    t_run: float = field(default_factory=time.monotonic)


def reference_for_site(rec: Recipe, site: str, override: str | None, trained_on: str | None = None) -> str:
    """The reference images' spec, by the one rule of :func:`splice.training.reference.resolve_reference`
    (``--reference``, else ``[pretrain] reference``, else the site's upright counterpart, else what the base
    was trained on); the site's own images are never the reference: they are the moved ones."""
    from ..training.reference import gone_text, resolve_reference

    ref = resolve_reference(site, given=override or rec.pretrain.reference, trained_on=trained_on, if_missing="skip")
    if ref.missing is not None:
        raise RecipeError(f"the label-free recipe needs upright reference images, and {gone_text(ref.missing)}; "
                          "pass --reference REF (in Python, overrides=RecipeOverrides(reference=REF)): an ImageFolder, "
                          "a flat folder of images, or digits")
    if ref.data is None or ref.data == "train":
        raise RecipeError(
            f"the label-free recipe needs upright reference images (the kind the base was trained on) and none "
            f"is known for site {site!r}; pass --reference REF (in Python, overrides=RecipeOverrides(reference=REF)): "
            "an ImageFolder, a flat folder of images, or digits"
        )
    return ref.data


def _warn_same(site: str) -> None:
    warnings.warn(f"the site {site!r} is also the reference: the range estimate reads no motion against the "
                  "images themselves and the run learns next to nothing; pass --reference the upright images "
                  "the base was trained on", DataWarning, stacklevel=4)


def _resolve(ctx, run_dir: Path, info: dict | None, *, model, recipe, site: str, overrides: RecipeOverrides,
             model_options: ModelOptions):
    """:func:`splice.training.setup.resolve`, except that on resume an estimated ``[pretrain]`` range is not a
    change."""
    if info is not None and (recipe is not None or overrides.any_recipe_key):
        recorded = load_recipe(run_dir / RECIPE_FILE)
        given = load_recipe(recipe if recipe is not None else run_dir / RECIPE_FILE)
        given = given.with_overrides(**overrides.recipe_keys())
        if given.site.estimate:  # the run replaced the ranges by its estimate
            keep = {k: getattr(recorded.pretrain, k) for k in ("rotation", "scale", "shift", "perspective")}
            given = dataclasses.replace(given, pretrain=dataclasses.replace(given.pretrain, **keep))
        if given.to_dict() | {"name": ""} != recorded.to_dict() | {"name": ""}:
            diff = [k for k, v in given.to_dict().items() if recorded.to_dict().get(k) != v and k != "name"]
            raise RecipeError(
                f"run '{run_dir}' was started with a different recipe (differs in {', '.join(diff)}); "
                "resume without --recipe and overrides, or with the same ones"
            )
        recipe, overrides = None, RecipeOverrides(reference=overrides.reference)
    return resolve(ctx, run_dir, info, model=model, recipe=recipe, data=site, overrides=overrides,
                   model_options=model_options, data_flag="--site")


def _resumed_site(ctx, req, info: dict, run_dir: Path, now: tuple) -> dict:
    """run.json of a resumed run, which goes on with the site images it started with: another copy of the site
    folder (while the recorded one still exists) only if it holds the same files; fewer, more or other files (a
    bad file removed, a folder moved and changed) with a warning."""
    recorded = info.get("data_path") or info["data"]
    fingerprint = files_sha256(req.data)
    if req.other_copy and (info.get("site_sha256") is None or fingerprint != info["site_sha256"]):
        raise DataError(f"the run's site folder '{recorded}' still exists and '{req.data}' holds other image files; "
                        "omit --site to resume on the run's own site images")
    if ctx.is_main:
        started = (info.get("site_images"), info.get("reference_images"))
        if started[0] is not None and started != now:
            warn_other_data(f"{now[0]:,} site and {now[1] or 0:,} reference images where the run started with "
                            f"{started[0]:,} and {started[1] or 0:,}")
        elif info.get("site_sha256") not in (None, fingerprint):
            warn_other_data(f"other site image files than the run started with ({now[0]:,}, as before)")
        info["status"] = "running"
        if data_record(req.data) != info.get("data_path"):  # resumed where the site images are now
            info.update(data=req.data, data_path=data_record(req.data))
        write_run_info(run_dir, info)
    return info


def set_up(ctx, *, model, recipe, site: str, out, resume, overrides: RecipeOverrides,
           model_options: ModelOptions, stop_after_steps: int | None = None, locks=None) -> AdaptRun:
    """Lock the run folder (held until ``locks``, an ``ExitStack``, closes), resolve the request, build the
    model, open the images, write (or update) the run record."""
    gate_recorded_model(resume, model, model_options)
    run_dir, info = prepare_folder(ctx, Path(out) if out is not None else None,
                                   Path(resume) if resume is not None else None, locks)
    req = _resolve(ctx, run_dir, info, model=model, recipe=recipe, site=site, overrides=overrides,
                   model_options=model_options)
    rec = req.recipe
    where = f"recipe '{rec.name}'"
    src, net, warps = load_model(req, where)
    net.to(ctx.device)
    shape = tuple(src.input_shape)
    norm, _ = normalisation(rec, src, None)  # the frozen base's own normalisation, never an estimate
    dev, dtype = ctx.device, input_dtype(net)  # a float64 model takes float64 batches

    def prepare(x: Tensor) -> Tensor:
        from ..data import normalise

        return normalise(x, norm).to(dev, dtype, non_blocking=True)

    ref_name = None
    if rec.mode == "label-free" and info is not None:  # resuming: the run folder says which
        given = overrides.reference  # the recorded folder typed otherwise (relative, a trailing slash) is the same
        check_same("reference", None if given is None or data_record(given) == info.get("reference") else given,
                   info.get("reference"), run_dir)
        ref_name = info.get("reference")
    if rec.mode == "label-free" and ref_name is None:
        record = info_of(net)
        ref_name = reference_for_site(rec, req.data, overrides.reference, record.trained_on if record else None)
    if info is None and ref_name is not None and data_record(ref_name) == data_record(req.data):
        _warn_same(req.data)
    site_images = open_images(req.data, shape, what="site")
    reference = open_images(ref_name, shape, what="reference") if ref_name else None
    if reference is not None and rec.site.estimate:
        check_site_size(len(site_images))
        check_reference_size(len(reference), rec.site.holdout)
    classes = list(src.class_names) if src.class_names else []
    if info is None:
        info = dict(run_info(ctx, req, src, net, classes, norm, norm_origin="model", ref=None), reference=ref_name,
                    site_images=len(site_images), reference_images=None if reference is None else len(reference),
                    site_sha256=files_sha256(req.data))
        if ctx.is_main:
            start_files(run_dir, rec, info)
    else:
        info = _resumed_site(ctx, req, info, run_dir, (len(site_images), None if reference is None else len(reference)))
    probe = None
    if reference is not None and warps:
        probe = reference.batch(sample_indices(len(reference), 0, REFERENCE_PROBE))
    return AdaptRun(ctx=ctx, rec=rec, src=src, net=net, warps=warps, site=site_images, reference=reference,
                    prepare=prepare, norm=norm, classes=classes or None, run_dir=run_dir, info=info, where=where,
                    ckpt=req.ckpt, stop_after_steps=stop_after_steps, reference_probe=probe)
