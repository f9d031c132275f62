"""Resolving what a tune run trains: the recipe (fresh or resumed), the model, the data, the run record."""

from __future__ import annotations

import dataclasses
import datetime as _dt
import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from torch import nn

from ..compare import logits_or_refuse
from ..copies import modes_kept, rng_kept, tree_copy
from ..fileio import state_dict_sha256
from ..graph.shapes import input_dtype
from ..errors import DataError, DataWarning, RecipeError, SpliceError, SpliceWarning
from ..manifest import copy_model, info_of
from ..options import ModelOptions, refuse_several_inputs, refuse_unfit_inputs
from ..recipes import Recipe, load_recipe
from ..objects import made_from_object
from ..sources import MODULE_SPEC
from ..surgery import WARP_PREFIX, warps_of
from .batches import mix
from .checkpoint import CHECKPOINT_NAME, load_checkpoint
from .normalisation import estimate_normalisation
from .options import RecipeOverrides
from .params import frozen_by_model
from .reference import Reference, data_record, gone_text, resolve_reference
from .runfolder import (RECIPE_FILE, RUN_FILE, RUN_FORMAT, RUN_SCHEMA_VERSION, check_same, describe, read_run_info,
                        resumed_data)

__all__ = ["refuse_train_mode_output",
           "gate_recorded_model", "Request", "resolve", "load_model", "open_splits", "reference", "reference_images",
           "reference_probe", "normalisation", "run_info"]


@dataclass
class Request:
    """What was asked for, completed from the run folder when resuming (``info``: its run.json)."""

    model: Any
    recipe: Recipe
    data: str
    model_options: ModelOptions
    info: dict | None
    ckpt: dict | None
    other_copy: bool = False  # resumed on another folder than the recorded one, which still exists



def resolve(ctx, run_dir: Path, info: dict | None, *, model, recipe, data, overrides: RecipeOverrides,
            model_options: ModelOptions, data_flag: str = "--data") -> Request:
    """The recipe, model and data of a fresh run, or of a resumed one (whose run folder is the authority;
    ``data_flag`` is how its messages name the data option)."""
    if info is None:
        if recipe is None:
            raise RecipeError("tune needs a recipe: baseline, warp-only, joint, staged, label-free, batchnorm-stats, "
                              "or a .toml file")
        if model is None:
            raise SpliceError("tune needs a model: a spec such as splice.models:tray_net or a splice folder")
        rec = load_recipe(recipe).with_overrides(**overrides.recipe_keys())
        # recipe.toml is the resolved recipe: passed back, from any directory, it runs the same (a folder by its
        # absolute path, a built-in data set by its name)
        given = overrides.reference if overrides.reference is not None else rec.pretrain.reference
        if given not in ("auto", "train"):
            rec = dataclasses.replace(rec, pretrain=dataclasses.replace(rec.pretrain, reference=data_record(given)))
        req = Request(model, rec, "digits" if data is None else data, model_options, None, None)
    else:
        req = _resumed(run_dir, info, model=model, recipe=recipe, data=data, overrides=overrides,
                       model_options=model_options, data_flag=data_flag)
    if ctx.world_size > 1 and req.recipe.batch_size % ctx.world_size:
        raise RecipeError(
            f"batch_size {req.recipe.batch_size} does not split evenly over {ctx.world_size} processes; the "
            "recipe's batch size is the global batch — pick a multiple of the process count (--batch-size)"
        )
    return req


def gate_recorded_model(resume, model, model_options: ModelOptions) -> None:
    """On a resume that takes its model from run.json, pass that spec through the code gate
    (:func:`splice.sources.check_spec`) before the run folder is locked or anything is written.
    A folder is left to the store's own gate on its manifest."""
    if resume is None or model is not None:
        return
    from ..sources import check_spec
    recorded = read_run_info(Path(resume))
    if recorded["model"] != MODULE_SPEC and not Path(recorded["model"]).is_dir():
        check_spec(recorded["model"], recorded.get("model_kwargs"), origin=Path(resume) / RUN_FILE,
                   trust_code=model_options.trust_code)


def _without_reference(recipe: dict) -> dict:
    return {**recipe, "name": "", "pretrain": {k: v for k, v in recipe["pretrain"].items() if k != "reference"}}


def _resumed(run_dir: Path, info: dict, *, model, recipe, data, overrides: RecipeOverrides,
             model_options: ModelOptions, data_flag: str) -> Request:
    recorded = load_recipe(run_dir / RECIPE_FILE)
    if recipe is not None or overrides.any_recipe_key:
        given = load_recipe(recipe if recipe is not None else run_dir / RECIPE_FILE)
        given = given.with_overrides(**overrides.recipe_keys())
        # the reference a run started with is run.json's (checked on its own); the recipe file may name it
        mine, theirs = _without_reference(given.to_dict()), _without_reference(recorded.to_dict())
        if mine != theirs:
            diff = [k for k, v in mine.items() if theirs.get(k) != v]
            raise RecipeError(
                f"run '{run_dir}' was started with a different recipe (differs in {', '.join(diff)}); "
                f"resume without --recipe and overrides, or with the same ones"
            )
    check_same("model", describe(model) if model is not None else None, info["model"], run_dir)
    data, other_copy = resumed_data(data, info, run_dir, data_flag)
    if model is None and info["model"] == MODULE_SPEC:
        raise SpliceError(f"run '{run_dir}' was started from an nn.Module object; pass the same model again to resume")
    # the architecture must be rebuilt exactly as it was: reuse the recorded builder options. A model taken
    # from run.json names code from a file, so it passes the gate of splice.sources.check_spec
    mo = model_options
    mo = dataclasses.replace(
        mo, kwargs=mo.kwargs if mo.kwargs is not None else info.get("model_kwargs") or None,
        input_shape=mo.input_shape if mo.input_shape is not None else info.get("input_shape"),
        weights=mo.weights if mo.weights is not None else _in_run(info.get("model_weights"), run_dir),
        origin=run_dir / RUN_FILE if model is None else mo.origin)
    ckpt = load_checkpoint(run_dir / CHECKPOINT_NAME) if (run_dir / CHECKPOINT_NAME).is_file() else None
    return Request(model if model is not None else info["model"], recorded, data, mo, info, ckpt, other_copy)


def _in_run(path: str | None, run_dir: Path) -> str | None:
    """run.json's ``model_weights`` as a path to open: splice writes it absolute; a relative one is the run
    folder's, never the current directory's."""
    return path if path is None or os.path.isabs(path) else str(Path(run_dir).resolve() / path)


def load_model(req: Request, where: str):
    """``(source, a module of our own to train, its warps)``; the recipe and the model must fit each other."""
    rec, model = req.recipe, req.model
    with torch.random.fork_rng(devices=[]):
        # a model built from a spec without weights starts from the recipe seed's
        # random init, so one seed gives one run; the rest of the run does not see
        # this seeding (tune() restores the caller's RNG when the run ends)
        torch.manual_seed(mix(rec.seed, "init"))
        src = req.model_options.load(model, warn_random=req.ckpt is None and req.info is None)
    net = src.model if isinstance(model, (str, os.PathLike)) else copy_model(src.model)  # never the caller's module
    warps = warps_of(net)
    if rec.uses_warps and not warps:
        raise RecipeError(
            f"{where} trains warps, but {describe(model)} has none; splice it first, e.g. "
            f"'splice insert {describe(model)}{req.model_options.as_flags()} --at input --warp affine "
            "--out SPLICED', then tune SPLICED (Python: splice.insert(model, at='input', warp='affine'), then "
            "tune what it returns)"
        )
    nearest = [n for n, w in warps.items() if getattr(w.config, "sampler", None) == "nearest"]
    if rec.uses_warps and nearest:
        raise RecipeError(
            f"{where} trains warps, but the warp at {', '.join(nearest)} samples with 'nearest', which passes no "
            "gradient to its grid, so it cannot learn; splice again with --sampler bilinear (or bicubic) and tune that"
        )
    if not rec.uses_warps and warps:
        raise RecipeError(
            f"{where} ({rec.mode}) trains plain models, but {describe(model)} holds warps at "
            f"{', '.join(warps)}; use 'joint', 'warp-only' or 'staged' (with labels), 'label-free' (site images "
            "without labels), or tune the model before splicing"
        )
    if not warps and info_of(net) is None and getattr(src, "spec", MODULE_SPEC) == MODULE_SPEC:
        raise SpliceError(
            "tune cannot save a plain nn.Module: nothing says how to rebuild its architecture; pass a spec string "
            "(e.g. 'splice.models:tray_net' or 'path/file.py:factory') or a Source loaded from one "
            "(splice.load_source(spec))"
        )
    if src.input_shape is None:
        raise SpliceError("tune needs the model's input shape; pass --input-shape CxHxW (input_shape=...)")
    refuse_several_inputs("tune", src.input_shapes)
    refuse_unfit_inputs(net, src.input_shapes)
    if made_from_object(net) and req.ckpt is None:
        warnings.warn("this splice was made from a module object: the run's folders keep its weights, but load and "
                      "verify cannot rebuild them; load their weights into the spliced model (load_state_dict), or "
                      "splice a spec (pkg.module:factory)", SpliceWarning, stacklevel=4)
    return src, net, warps


def _num_outputs(model: nn.Module, input_shape, device) -> int | None:
    try:
        with modes_kept(model), torch.no_grad():
            out = model.eval()(torch.zeros((2, *input_shape), device=device))
    except Exception:  # noqa: BLE001 - a model that cannot run on zeros is reported later, by the loop
        return None
    return int(logits_or_refuse(out, "the model").shape[1])  # a model whose output holds no logits: refused now


def refuse_train_mode_output(net: nn.Module, input_shape, rec: Recipe, device) -> None:
    """A recipe that trains the base runs it in train mode, where some models return more (an auxiliary head
    beside the logits): one train-mode forward of a twin (its buffers its own) checks the output before any work,
    warp pre-training included, and refuses it in one line."""
    if all(rec.base_frozen(e) for e in range(rec.epochs)):
        return
    twin = tree_copy(net)
    try:
        with torch.no_grad(), rng_kept():  # a dropout's draws here must not move the run's
            out = twin.train()(torch.zeros((2, *input_shape), device=device, dtype=input_dtype(net)))
    except Exception:  # noqa: BLE001 - a model that cannot run on zeros in train mode is reported by the loop
        return
    logits_or_refuse(out, "in train mode (the mode the recipe trains the base in), the model")


def open_splits(data: str, src, net: nn.Module, device) -> tuple[Any, Any, list[str]]:
    """The train and val splits and their class names, checked against the model's outputs and classes."""
    from ..data import (ImageFolderSet, first_class_difference, open_data, refuse_unreadable, same_classes,
                        shown_classes)

    shape = tuple(src.input_shape)
    train = open_data(data, "train", input_shape=shape)
    val = open_data(data, "val", input_shape=shape)
    if len(train) == 0 or len(val) == 0:
        raise DataError(f"data {data!r} has an empty train or val split; add images to both")
    # every unreadable file of both splits named at once, before the run starts, not one per run
    bad = [b for split in (train, val) if isinstance(split, ImageFolderSet) for b in split.bad_headers()]
    refuse_unreadable(bad, len(train) + len(val), f"of data {data!r}")
    classes = list(getattr(train, "classes", []) or [])
    n_out = _num_outputs(net, shape, device)
    if n_out is not None and classes and n_out != len(classes):
        raise DataError(
            f"the model has {n_out} outputs but data {data!r} has {len(classes)} classes; build the model "
            f"with that many, e.g. --kwargs '{{\"num_classes\": {len(classes)}}}'"
        )
    if src.class_names and classes and not same_classes(src.class_names, classes):
        raise DataError(
            f"the model was trained on classes {shown_classes(src.class_names)} but data {data!r} has "
            f"{shown_classes(classes)} ({first_class_difference(src.class_names, classes)}); "
            "class folders must match the model's classes (same names, same order: the folders are read in sorted "
            "order, so name them to sort as the model's outputs do)"
        )
    return train, val, classes


def reference(req: Request, net: nn.Module, override: str | None) -> Reference | None:
    """The upright reference of a warp run (``None`` for ``baseline``), resolved once and kept in run.json.

    A resumed run keeps the reference it started with. When pre-training is
    off (``[pretrain] epochs = 0``) a missing reference is no error: the run
    then only lacks the ``reference_distance`` metric.
    """
    rec = req.recipe
    if not rec.uses_warps:
        return None
    if req.info is not None and "reference" in req.info:
        return Reference(req.info["reference"], req.info.get("reference_origin") or "recorded")
    record = info_of(net)
    given = override or rec.pretrain.reference
    if_missing = rec.pretrain.if_no_reference if rec.pretrain.epochs > 0 else "skip"
    ref = resolve_reference(req.data, given=given, trained_on=record.trained_on if record else None,
                            if_missing=if_missing)
    if ref.missing is not None:
        warnings.warn(f"{gone_text(ref.missing)}: the run goes on without a reference; pass --reference DATA to "
                      "use other upright images", DataWarning, stacklevel=3)
    return ref


def reference_images(ref: Reference, train, input_shape, split: str = "train"):
    """The images of ``ref`` (``"train"``: the run's own training split ``train``)."""
    from ..data import open_data

    if ref.data == "train":
        return train
    return open_data(ref.data, split, input_shape=input_shape)


def reference_probe(ref: Reference | None, train, val, input_shape, n: int = 256) -> torch.Tensor | None:
    """Up to ``n`` held-out reference images (its val split, else its train split) for ``reference_distance``."""
    from . import batches as _b

    if ref is None or ref.skipped:
        return None
    if ref.data == "train":
        images = val
    else:
        try:
            images = reference_images(ref, train, input_shape, split="val")
        except DataError:
            images = reference_images(ref, train, input_shape)
    k = min(n, len(images))
    pick = torch.randperm(len(images), generator=_b.generator(0, "reference-probe"))[:k]
    return _b.fetch(images, pick)[0]


def normalisation(recipe: Recipe, src, train) -> tuple[dict | None, str]:
    """The input normalisation of a run and where it came from (``recipe``, ``model``, ``estimated``, ``none``).

    ``"auto"`` takes the model's (its factory's declaration or its folder's
    record). A model built from a spec whose factory declares nothing, with a
    random init, gets the per-channel mean and std of the training split
    (:func:`splice.training.normalisation.estimate_normalisation`): plain CNNs without batch
    norm barely train on raw [0, 1] images (measured in bench_efficacy). A
    run without a labelled training split (``train=None``: the label-free
    recipes, whose base is frozen) never estimates.
    """
    if recipe.normalisation == "none":
        return None, "none"
    if recipe.normalisation != "auto":
        return dict(recipe.normalisation), "recipe"
    if src.normalisation is not None:
        return src.normalisation, "model"
    if not src.declares_normalisation and src.random_init and src.manifest is None and train is not None:
        return estimate_normalisation(train), "estimated"
    return None, "model"


def _frozen_by_model(net: nn.Module) -> dict | None:
    """What the run record says of the base parameters the model froze itself (kept frozen by the run)."""
    names, modules = frozen_by_model(net)
    return {"parameters": len(names), "modules": [q for q, _ in modules]} if names else None


def run_info(ctx, req: Request, src, net: nn.Module, classes: list[str], norm, *, norm_origin: str,
             ref: Reference | None) -> dict:
    """The run.json record of a fresh run."""
    base = {k: v for k, v in net.state_dict().items() if not k.startswith(WARP_PREFIX + ".")}
    weights = req.model_options.weights
    return {
        "schema_version": RUN_SCHEMA_VERSION, "format": RUN_FORMAT, "model": describe(req.model),
        "model_kwargs": dict(src.kwargs), "model_weights": os.path.abspath(weights) if weights is not None else None,
        "data": req.data, "recipe": req.recipe.name, "mode": req.recipe.mode, "world_size": ctx.world_size,
        "device": str(ctx.device), "input_shape": list(src.input_shape), "class_names": classes or None,
        "data_path": data_record(req.data), "normalisation": norm, "normalisation_origin": norm_origin,
        "reference": None if ref is None else ref.data, "reference_origin": None if ref is None else ref.origin,
        "base_sha256_start": state_dict_sha256(base), "status": "running",
        "frozen_by_model": _frozen_by_model(net),
        "created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
    }
