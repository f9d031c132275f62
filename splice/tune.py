"""``splice tune``: fine-tune a model with a recipe, in one process or under torchrun.

>>> summary = splice.tune("out/tray-affine", recipe="joint", data="digits-moved",
...                       out="runs/joint")                        # doctest: +SKIP
>>> summary["best_accuracy"], summary["best_epoch"]                # doctest: +SKIP

The run folder (``out``)::

    RUN/
      run.json          what was run: model, data, recipe name, world size, status (schema version 1)
      recipe.toml       the resolved recipe, overrides applied (load it with --recipe RUN/recipe.toml)
      metrics.jsonl     one JSON row per evaluation (see below)
      checkpoint.pt     resumable state, rewritten atomically every epoch (torch.load(weights_only=True))
      best/  last/      splice folders (weights.safetensors + splice.json), the best by validation
                        accuracy and the latest; plain folders for ``baseline`` runs

A metrics row holds ``phase`` (``start``, ``pretrain`` or ``epoch``), ``epoch``
(epochs completed), ``step`` (optimiser steps so far), ``loss`` (mean training
loss of the epoch; the grid loss for ``pretrain``), ``train_accuracy``,
``accuracy`` and ``val_loss`` (validation split), ``lr`` (base lr, or the warp
lr when the base is frozen), ``images_per_s`` (training images per second over
all processes, evaluation excluded), ``warp_distance`` (each warp's
:meth:`~splice.warps.Warp.identity_distance`), ``base_frozen`` and ``time_s``.

Exact resume: the data order and every random draw are pure functions of
``(seed, epoch, batch)`` (see :mod:`splice.training.batches`), the learning
rate a pure function of the step, and the checkpoint holds the model,
optimiser, gradient scaler and RNG states. On the CPU, with deterministic
algorithms (the default there), a run interrupted and resumed ends with the
same weights, bit for bit, as one that was not.

Ctrl-C (SIGINT) or SIGTERM finishes the current step, writes a checkpoint at
that exact batch and stops; ``--resume RUN`` carries on from there.
"""

from __future__ import annotations

import contextlib
import copy
import datetime as _dt
import fnmatch
import json
import os
import signal
import threading
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import torch
from torch import nn

from ._io import atomic_write_json, atomic_write_text, state_dict_sha256
from .errors import DataError, RecipeError, SpliceError
from .recipes import Recipe, load_recipe, recipe_to_toml

__all__ = ["RUN_SCHEMA_VERSION", "tune", "read_metrics", "TuneInterrupted"]

RUN_SCHEMA_VERSION = 1
_RUN_FORMAT = "splice-run"
_RUN_FILE = "run.json"
_RECIPE_FILE = "recipe.toml"
_METRICS_FILE = "metrics.jsonl"
# Debug aid for the distributed tests: when set, every rank writes the sha256 of
# its final state dict to RUN/rank<r>.sha256.
_HASH_ENV = "SPLICE_TUNE_RANK_HASHES"


class TuneInterrupted(KeyboardInterrupt):
    """Raised after Ctrl-C / SIGTERM once the checkpoint is safely written."""


# ----------------------------------------------------------------------------- small helpers


def read_metrics(run: str | os.PathLike) -> list[dict]:
    """The rows of ``RUN/metrics.jsonl`` (a torn last line, from a crash, is skipped)."""
    path = Path(run) / _METRICS_FILE
    if not path.is_file():
        return []
    rows = []
    for line in path.read_text(encoding="utf-8").splitlines():
        with contextlib.suppress(json.JSONDecodeError):
            rows.append(json.loads(line))
    return rows


def _truncate_metrics(run: Path, keep: int) -> None:
    rows = read_metrics(run)[:keep]
    atomic_write_text(run / _METRICS_FILE, "".join(json.dumps(r, sort_keys=True) + "\n" for r in rows))


def _append_metrics(run: Path, row: dict) -> None:
    with open(run / _METRICS_FILE, "a", encoding="utf-8") as fh:
        fh.write(json.dumps(row, sort_keys=True) + "\n")
        fh.flush()
        os.fsync(fh.fileno())


@contextlib.contextmanager
def _writing(what: Path):
    """Turn a failed write (read-only folder, full disk) into one clear error; atomic writes keep the old file."""
    try:
        yield
    except OSError as exc:
        raise SpliceError(
            f"could not write '{what}' ({exc.strerror or exc}); the previous version, if any, is intact. "
            "Free disk space or make the run folder writable, then continue with --resume"
        ) from exc


def _unwrap(model: nn.Module) -> nn.Module:
    return model.module if isinstance(model, nn.parallel.DistributedDataParallel) else model


class _StopFlag:
    """SIGINT/SIGTERM set a flag; the loop stops at the next step boundary (second Ctrl-C: immediate)."""

    def __init__(self) -> None:
        self.raised = False
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

    def __exit__(self, *exc) -> None:
        for sig, old in self._old.items():
            signal.signal(sig, old)


def _set_deterministic(mode: bool) -> None:
    """``torch.use_deterministic_algorithms(mode)`` without its side import of torch._inductor.

    The public function also sets ``torch._inductor.config.deterministic``, which
    costs seconds of import time and does not matter here (nothing is compiled).
    """
    setter = getattr(torch._C, "_set_deterministic_algorithms", None)
    if setter is None:  # pragma: no cover - other torch builds
        torch.use_deterministic_algorithms(mode)
    else:
        setter(mode, warn_only=False)


def _describe(model: Any) -> str:
    if isinstance(model, (str, os.PathLike)):
        text = os.fspath(model)
        p = Path(text)
        return str(p.resolve()) if p.exists() else text
    return getattr(model, "spec", "<module>")


# ----------------------------------------------------------------------------- set-up pieces


def _resolve_normalisation(recipe: Recipe, src) -> dict | None:
    if recipe.normalisation == "none":
        return None
    if recipe.normalisation == "auto":
        return src.normalisation
    return dict(recipe.normalisation)


def _open_splits(data: str, input_shape):
    from .data import open_data

    train = open_data(data, "train", input_shape=input_shape)
    val = open_data(data, "val", input_shape=input_shape)
    if len(train) == 0 or len(val) == 0:
        raise DataError(f"data {data!r} has an empty train or val split; add images to both")
    return train, val


def _reference(recipe: Recipe, data: str, train, input_shape, override: str | None):
    from .data import open_data, upright_counterpart

    choice = override or recipe.pretrain.reference
    if choice == "train":
        return train, "train"
    if choice == "auto":
        upright = getattr(train, "reference", None) or upright_counterpart(data)
        if upright is None:
            return train, "train"
        return open_data(upright, "train", input_shape=input_shape), upright
    return open_data(choice, "train", input_shape=input_shape), choice


def _frozen_names(model: nn.Module, patterns: Sequence[str], where: str) -> set[str]:
    """Parameter names frozen by ``freeze`` glob patterns (a pattern matching nothing is an error)."""
    frozen: set[str] = set()
    modules = [name for name, _ in model.named_modules() if name]
    for pat in patterns:
        hit = {m for m in modules if fnmatch.fnmatchcase(m, pat)}
        params = {n for n, _ in model.named_parameters()
                  if fnmatch.fnmatchcase(n, pat) or any(n.startswith(m + ".") for m in hit)}
        if not params:
            shown = ", ".join(modules[:8]) + (", …" if len(modules) > 8 else "")
            raise RecipeError(
                f"{where}: freeze pattern {pat!r} matches no module or parameter of the model; "
                f"module names look like: {shown}"
            )
        frozen |= params
    return frozen


def _frozen_modules(model: nn.Module, patterns: Sequence[str]) -> list[nn.Module]:
    return [m for name, m in model.named_modules() if name and any(fnmatch.fnmatchcase(name, p) for p in patterns)]


def _param_groups(model: nn.Module, recipe: Recipe, frozen: set[str]) -> list[dict]:
    """Base and warp groups, each split into decayed (matrices, kernels) and undecayed (biases, norms)."""
    from .surgery import WARP_PREFIX

    groups: dict[tuple[str, bool], list] = {}
    for name, p in model.named_parameters():
        if name in frozen:
            continue
        is_warp = name.startswith(WARP_PREFIX + ".")
        if recipe.mode == "warp-only" and not is_warp:
            continue
        # weight decay on weight matrices and kernels only (common practice, no source)
        groups.setdefault(("warps" if is_warp else "base", p.dim() > 1), []).append(p)
    out = []
    for (kind, decay), params in sorted(groups.items()):
        base_lr = recipe.lr * (recipe.warp_lr_scale if kind == "warps" else 1.0)
        out.append({"params": params, "lr": base_lr, "base_lr": base_lr, "kind": kind,
                    "weight_decay": recipe.weight_decay if decay else 0.0})
    return out


def _optimizer(groups: list[dict], recipe: Recipe) -> torch.optim.Optimizer:
    if recipe.optimizer == "sgd":
        return torch.optim.SGD(groups, lr=recipe.lr, momentum=recipe.momentum)
    return torch.optim.AdamW(groups, lr=recipe.lr)


def _num_outputs(model: nn.Module, input_shape, device) -> int | None:
    was = {m: m.training for m in model.modules()}
    model.eval()
    try:
        with torch.no_grad():
            out = model(torch.zeros((2, *input_shape), device=device))
    except Exception:  # noqa: BLE001 - a model that cannot run on zeros is reported later, by the loop
        return None
    finally:
        for m, mode in was.items():
            m.training = mode
    return int(out.shape[-1]) if isinstance(out, torch.Tensor) and out.dim() == 2 else None


# ----------------------------------------------------------------------------- the run


class _Run:
    """State of one tune run (one per process)."""

    def __init__(self, **kw: Any) -> None:
        self.__dict__.update(kw)


def tune(
    model: Any = None,
    *,
    recipe: str | os.PathLike | Recipe | Mapping | None = None,
    data: str | None = None,
    out: str | os.PathLike | None = None,
    resume: str | os.PathLike | None = None,
    epochs: int | None = None,
    lr: float | None = None,
    batch_size: int | None = None,
    seed: int | None = None,
    device: str | None = None,
    quiet: bool = False,
    weights: str | os.PathLike | None = None,
    kwargs: Mapping | str | None = None,
    input_shape=None,
    allow_partial: bool = False,
    trust_pickle: bool = False,
    leaves: Sequence[str] = (),
    workers: int = 0,
    reference: str | None = None,
    deterministic: bool | None = None,
    progress: bool = True,
    stop_after_steps: int | None = None,
) -> dict[str, Any]:
    """Fine-tune ``model`` with ``recipe`` on ``data``; write the run folder ``out``.

    ``model`` is any model source (spec string, splice folder, :class:`~splice.sources.Source`,
    module); warp recipes need a spliced model (run ``splice insert`` first),
    ``baseline`` a plain one. ``recipe`` is a shipped name (``baseline``,
    ``warp-only``, ``joint``, ``staged``), a ``.toml`` path or a
    :class:`~splice.recipes.Recipe`; ``epochs``/``lr``/``batch_size``/``seed``
    override it. ``resume=RUN`` continues RUN from its checkpoint (``model``,
    ``recipe`` and ``data`` may then be omitted; if given they must match the run).
    The seed also fixes the random init of a model built from a spec without
    weights, so one seed gives one run; the caller's RNG state is restored
    when the run ends. ``reference`` overrides ``[pretrain] reference``. ``deterministic``
    (default: on for the CPU) turns on ``torch.use_deterministic_algorithms``
    for the run. ``progress=False`` prints nothing. ``stop_after_steps`` stops
    like Ctrl-C after that many optimiser steps (for tests and debugging).

    Returns a summary dict: ``out``, ``rank``, ``world_size``, ``best_accuracy``,
    ``best_epoch``, ``last_accuracy``, ``epochs``, ``steps``, ``base_changed``,
    ``images_per_s``, ``stopped_early``.
    """
    from .training import distributed

    ctx = distributed.setup(device)
    try:
        if deterministic is None:
            deterministic = ctx.device.type == "cpu"
        previous = torch.are_deterministic_algorithms_enabled()
        if deterministic:
            _set_deterministic(True)
        cuda = [ctx.device.index or 0] if ctx.device.type == "cuda" else []
        try:
            # the run seeds the global RNG step by step; the caller's RNG state comes back afterwards
            with torch.random.fork_rng(devices=cuda):
                return _tune(ctx, model=model, recipe=recipe, data=data, out=out, resume=resume, epochs=epochs,
                             lr=lr, batch_size=batch_size, seed=seed, quiet=quiet, weights=weights, kwargs=kwargs,
                             input_shape=input_shape, allow_partial=allow_partial, trust_pickle=trust_pickle,
                             leaves=leaves, workers=workers, reference=reference, progress=progress,
                             stop_after_steps=stop_after_steps)
        finally:
            _set_deterministic(previous)
    finally:
        distributed.teardown(ctx)


def _prepare_folder(ctx, out: Path | None, resume: Path | None) -> tuple[Path, dict | None]:
    """The run folder, and its run.json when resuming."""
    from .training import distributed

    if resume is not None:
        if out is not None and Path(out).resolve() != Path(resume).resolve():
            raise SpliceError(
                f"--out {out} and --resume {resume} name different folders; a resumed run writes into "
                "its own folder, so drop --out"
            )
        run_file = resume / _RUN_FILE
        if not run_file.is_file():
            raise SpliceError(
                f"'{resume}' is not a splice tune run folder (no {_RUN_FILE}); pass the --out folder of an "
                "earlier 'splice tune'"
            )
        try:
            info = json.loads(run_file.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise SpliceError(f"'{run_file}' is not valid JSON ({exc}); the run folder is damaged") from None
        if not isinstance(info, dict) or info.get("format") != _RUN_FORMAT or \
                info.get("schema_version") != RUN_SCHEMA_VERSION:
            raise SpliceError(f"'{run_file}' is not a splice run record of schema version {RUN_SCHEMA_VERSION}")
        return resume, info
    if out is None:
        raise SpliceError("tune needs a run folder: pass --out RUN (out=...), or --resume RUN to continue one")
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise SpliceError(
            f"run folder '{out}' already exists and is not empty; continue it with --resume {out}, "
            "or choose another --out folder"
        )
    if ctx.distributed:  # every rank has checked before rank 0 creates anything
        import torch.distributed as dist

        dist.barrier()
    if ctx.is_main:
        out.mkdir(parents=True, exist_ok=True)
    distributed.broadcast_flag(ctx, False)
    return out, None


def _check_same(what: str, given: Any, recorded: Any, run: Path) -> None:
    if given is not None and given != recorded:
        raise SpliceError(
            f"run '{run}' was started with {what} {recorded!r}, but {given!r} was given; pass the same "
            f"{what} (or omit it) to resume"
        )


def _tune(ctx, *, model, recipe, data, out, resume, epochs, lr, batch_size, seed, quiet, weights, kwargs,
          input_shape, allow_partial, trust_pickle, leaves, workers, reference, progress, stop_after_steps):
    from .progress import Progress
    from .sources import load_source
    from .surgery import WARP_PREFIX, warps_of
    from .training.checkpoint import CHECKPOINT_NAME, load_checkpoint

    run_dir, info = _prepare_folder(ctx, Path(out) if out is not None else None,
                                    Path(resume) if resume is not None else None)
    overrides = {"epochs": epochs, "lr": lr, "batch_size": batch_size, "seed": seed}
    ckpt = None
    if info is not None:  # resuming: the run folder is the authority
        recorded = load_recipe(run_dir / _RECIPE_FILE)
        if recipe is not None or any(v is not None for v in overrides.values()):
            given = load_recipe(recipe if recipe is not None else run_dir / _RECIPE_FILE)
            given = given.with_overrides(**overrides)
            if given.to_dict() | {"name": ""} != recorded.to_dict() | {"name": ""}:
                diff = [k for k, v in given.to_dict().items() if recorded.to_dict().get(k) != v and k != "name"]
                raise RecipeError(
                    f"run '{run_dir}' was started with a different recipe (differs in {', '.join(diff)}); "
                    f"resume without --recipe and overrides, or with the same ones"
                )
        rec = recorded
        _check_same("model", _describe(model) if model is not None else None, info["model"], run_dir)
        _check_same("data", data, info["data"], run_dir)
        if model is None and info["model"] == "<module>":
            raise SpliceError(
                f"run '{run_dir}' was started from an nn.Module object; pass the same model again to resume"
            )
        model = model if model is not None else info["model"]
        # the architecture must be rebuilt exactly as it was: reuse the recorded builder options
        kwargs = kwargs if kwargs is not None else info.get("model_kwargs") or None
        input_shape = input_shape if input_shape is not None else info.get("input_shape")
        weights = weights if weights is not None else info.get("model_weights")
        data = info["data"]
        if (run_dir / CHECKPOINT_NAME).is_file():
            ckpt = load_checkpoint(run_dir / CHECKPOINT_NAME)
    else:
        if recipe is None:
            raise RecipeError("tune needs a recipe: baseline, warp-only, joint, staged, or a .toml file")
        if model is None:
            raise SpliceError("tune needs a model: a spec such as splice.models:tray_net or a splice folder")
        rec = load_recipe(recipe).with_overrides(**overrides)
        data = "digits" if data is None else data
    if ctx.world_size > 1 and rec.batch_size % ctx.world_size:
        raise RecipeError(
            f"batch_size {rec.batch_size} does not split evenly over {ctx.world_size} processes; the recipe's "
            "batch size is the global batch — pick a multiple of the process count (--batch-size)"
        )

    # ---- the model
    from .training.batches import mix

    caller_owned = not isinstance(model, (str, os.PathLike))
    with torch.random.fork_rng(devices=[]):
        # a model built from a spec without weights starts from the recipe seed's
        # random init, so one seed gives one run; the rest of the run does not see
        # this seeding (tune() restores the caller's RNG when the run ends)
        torch.manual_seed(mix(rec.seed, "init"))
        src = load_source(model if not isinstance(model, os.PathLike) else os.fspath(model), weights=weights,
                          kwargs=kwargs, input_shape=input_shape, allow_partial=allow_partial,
                          trust_pickle=trust_pickle, leaves=leaves, warn_random=ckpt is None and info is None)
    net = src.model
    splice_info = getattr(net, "splice_info", None)
    if caller_owned:  # never train the caller's module in place
        net = copy.deepcopy(net)
        if splice_info is not None:
            net.splice_info = copy.deepcopy(splice_info)
    warps = warps_of(net)
    where = f"recipe '{rec.name}'"
    if rec.uses_warps and not warps:
        raise RecipeError(
            f"{where} trains warps, but {_describe(model)} has none; splice it first, e.g. "
            f"'splice insert {_describe(model)} --at input --warp affine --out SPLICED', then tune SPLICED"
        )
    if not rec.uses_warps and warps:
        raise RecipeError(
            f"{where} ({rec.mode}) trains plain models, but {_describe(model)} holds warps at "
            f"{', '.join(warps)}; use 'joint', 'warp-only' or 'staged', or tune the model before splicing"
        )
    if not warps and getattr(net, "splice_info", None) is None and getattr(src, "spec", "<module>") == "<module>":
        raise SpliceError(
            "tune cannot save a plain nn.Module without knowing how to rebuild it; pass a spec string "
            "(e.g. 'splice.models:tray_net') or a Source from splice.load_source"
        )
    if src.input_shape is None:
        raise SpliceError("tune needs the model's input shape; pass --input-shape CxHxW (input_shape=...)")
    shape = tuple(src.input_shape)
    net.to(ctx.device)

    # ---- data
    train, val = _open_splits(data, shape)
    classes = list(getattr(train, "classes", []) or [])
    n_out = _num_outputs(net, shape, ctx.device)
    if n_out is not None and classes and n_out != len(classes):
        raise DataError(
            f"the model has {n_out} outputs but data {data!r} has {len(classes)} classes; build the model "
            f"with that many, e.g. --kwargs '{{\"num_classes\": {len(classes)}}}'"
        )
    if src.class_names and classes and list(src.class_names) != classes:
        raise DataError(
            f"the model was trained on classes {src.class_names[:6]} but data {data!r} has {classes[:6]}; "
            "class folders must match the model's classes (same names, same order)"
        )
    norm = _resolve_normalisation(rec, src)
    dev = ctx.device

    def prepare(x: torch.Tensor) -> torch.Tensor:
        from .data import normalise

        return normalise(x, norm).to(dev, non_blocking=True)

    # ---- bookkeeping files (rank 0)
    base_hash0 = state_dict_sha256({k: v for k, v in net.state_dict().items()
                                    if not k.startswith(WARP_PREFIX + ".")})
    if info is None:
        info = {
            "schema_version": RUN_SCHEMA_VERSION, "format": _RUN_FORMAT, "model": _describe(model),
            "model_kwargs": dict(src.kwargs), "model_weights": str(weights) if weights is not None else None,
            "data": data, "recipe": rec.name, "mode": rec.mode, "world_size": ctx.world_size,
            "device": str(dev), "input_shape": list(shape), "class_names": classes or None,
            "normalisation": norm, "base_sha256_start": base_hash0, "status": "running",
            "created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        }
        if ctx.is_main:
            with _writing(run_dir):
                atomic_write_text(run_dir / _RECIPE_FILE, recipe_to_toml(rec))
                atomic_write_json(run_dir / _RUN_FILE, info)
                atomic_write_text(run_dir / _METRICS_FILE, "")
    elif ctx.is_main:
        info["status"] = "running"
        with _writing(run_dir / _RUN_FILE):
            atomic_write_json(run_dir / _RUN_FILE, info)

    run = _Run(ctx=ctx, rec=rec, src=src, net=net, warps=warps, train=train, val=val, prepare=prepare,
               norm=norm, classes=classes or None, run_dir=run_dir, info=info, data=data, shape=shape,
               workers=workers, ckpt=ckpt, stop_after_steps=stop_after_steps, where=where,
               reference_override=reference)
    show = progress and ctx.is_main
    with Progress(enabled=show, quiet=quiet) as bar, _StopFlag() as flag:
        run.bar, run.flag = bar, flag
        summary = _train(run)
    return summary


# ----------------------------------------------------------------------------- training


def _warp_distances(warps: Mapping[str, nn.Module]) -> dict[str, float]:
    return {name: round(float(w.identity_distance()), 6) for name, w in warps.items()}


def _set_modes(net: nn.Module, warps, base_frozen: bool, frozen_modules: list[nn.Module]) -> None:
    net.train()
    if base_frozen:
        net.eval()  # every base module, BatchNorm included, in eval mode
        for w in warps.values():
            w.train()
    for m in frozen_modules:
        m.eval()


def _set_requires_grad(net: nn.Module, rec: Recipe, frozen: set[str], base_frozen: bool) -> None:
    from .surgery import WARP_PREFIX

    for name, p in net.named_parameters():
        is_warp = name.startswith(WARP_PREFIX + ".")
        p.requires_grad_(name not in frozen and (is_warp or not base_frozen))


def _reduce_grads(ctx):
    import torch.distributed as dist

    def reduce(grads: list[torch.Tensor]) -> None:
        if not grads:
            return
        flat = torch.cat([g.reshape(-1) for g in grads])
        dist.all_reduce(flat)
        flat /= ctx.world_size
        offset = 0
        for g in grads:
            g.copy_(flat[offset:offset + g.numel()].view_as(g))
            offset += g.numel()
    return reduce if ctx.distributed else None


def _evaluate(run) -> tuple[float, float]:
    from .training import distributed
    from .training.loop import evaluate

    ctx = run.ctx
    idx = torch.arange(len(run.val))[ctx.rank::ctx.world_size]
    loss_sum, correct, seen = evaluate(_unwrap(run.net_wrapped), run.val, idx, prepare=run.prepare,
                                       device=ctx.device, amp=run.amp, workers=run.workers)
    loss_sum, correct, seen = distributed.all_reduce_sum(ctx, [loss_sum, correct, float(seen)])
    return loss_sum / max(1.0, seen), correct / max(1.0, seen)


def _tuning(run, which: str, epoch: int, step: int, accuracy: float) -> dict:
    from .surgery import WARP_PREFIX

    base = {k: v for k, v in _unwrap(run.net_wrapped).state_dict().items() if not k.startswith(WARP_PREFIX + ".")}
    return {
        "recipe": run.rec.name, "mode": run.rec.mode, "which": which, "epoch": epoch, "step": step,
        "val_accuracy": round(accuracy, 6), "data": run.data, "seed": run.rec.seed,
        "base_changed": state_dict_sha256(base) != run.info["base_sha256_start"], "run": str(run.run_dir),
    }


def _save_folder(run, which: str, epoch: int, step: int, accuracy: float) -> None:
    from .store import save

    if not run.ctx.is_main:
        return
    model = _unwrap(run.net_wrapped)
    kwargs = {"overwrite": True, "tuning": _tuning(run, which, epoch, step, accuracy),
              "class_names": run.classes, "normalisation": run.norm}
    if getattr(model, "splice_info", None) is None:
        kwargs["source"] = run.src
    with _writing(run.run_dir / which):
        save(model, run.run_dir / which, **kwargs)


def _checkpoint(run, *, epoch: int, batch: int, step: int, stepper, extra: dict | None = None) -> None:
    from .training.checkpoint import CHECKPOINT_NAME, rng_state, save_checkpoint

    if not run.ctx.is_main:
        return
    loss_sum, correct, seen = stepper.totals()
    payload = {
        "epoch": epoch, "batch": batch, "step": step, "world_size": run.ctx.world_size,
        "model": {k: v.detach().to("cpu") for k, v in _unwrap(run.net_wrapped).state_dict().items()},
        "optimizer": run.optimizer.state_dict(),
        "scheduler": {"kind": run.rec.schedule, "step": step, "total_steps": run.total_steps,
                      "steps_per_epoch": run.steps_per_epoch, "warmup_steps": run.warmup_steps},
        "scaler": stepper.scaler.state_dict() if stepper.scaler is not None else {},
        "rng": rng_state(),
        "best": dict(run.best),
        "bad_evals": run.bad_evals,
        "metrics_rows": run.metrics_rows,
        "epoch_totals": [loss_sum, correct, float(seen), run.epoch_time],
        "recipe": run.rec.to_dict(),
    }
    if extra:
        payload.update(extra)
    save_checkpoint(run.run_dir / CHECKPOINT_NAME, payload)


def _row(run, row: dict) -> None:
    if run.ctx.is_main:
        with _writing(run.run_dir / _METRICS_FILE):
            _append_metrics(run.run_dir, row)
    run.metrics_rows += 1


def _wrap(run, base_frozen: bool) -> None:
    """(Re)build the DDP wrapper for the current set of trainable parameters."""
    if not run.ctx.distributed:
        run.net_wrapped = run.net
        return
    from torch.nn.parallel import DistributedDataParallel as DDP

    ids = [run.ctx.device.index] if run.ctx.device.type == "cuda" else None
    run.net_wrapped = DDP(run.net, device_ids=ids, broadcast_buffers=not base_frozen)


def _train(run) -> dict[str, Any]:
    from .training import batches as _b
    from .training import distributed
    from .distort import random_distort
    from .training.checkpoint import set_rng_state
    from .training.loop import Stepper, ThetaTap
    from .training.pretrain import pretrain_warps_
    from .training.schedule import lr_factor

    ctx, rec, net, warps = run.ctx, run.rec, run.net, run.warps
    run.amp = ctx.device.type == "cuda"
    frozen = _frozen_names(net, rec.freeze, run.where)
    frozen_modules = _frozen_modules(net, rec.freeze)
    groups = _param_groups(net, rec, frozen)
    if not groups:
        raise RecipeError(f"{run.where}: nothing left to train (every parameter is frozen); shorten 'freeze'")
    run.optimizer = _optimizer(groups, rec)
    per_rank = rec.batch_size // ctx.world_size
    n_train = len(run.train)
    run.steps_per_epoch = len(_b.index_batches(_b.shard(torch.arange(n_train), ctx.rank, ctx.world_size), per_rank))
    run.total_steps = run.steps_per_epoch * rec.epochs
    run.warmup_steps = round(rec.warmup_epochs * run.steps_per_epoch)
    run.best = {"accuracy": -1.0, "epoch": -1, "step": 0}
    run.bad_evals = 0
    run.metrics_rows = 0
    run.epoch_time = 0.0
    tap = ThetaTap(warps) if warps and rec.identity_reg > 0 else None
    aug_range = None if rec.augment.is_identity else rec.augment.to_range()
    stepper = Stepper(net, run.optimizer, device=ctx.device, label_smoothing=rec.label_smoothing,
                      grad_clip=rec.grad_clip, amp=run.amp, tap=tap)
    start_epoch, start_batch, step = 0, 0, 0
    run.net_wrapped = net
    ckpt = run.ckpt
    if ckpt is not None:
        if ckpt["world_size"] != ctx.world_size and ckpt["batch"] != 0:
            raise SpliceError(
                f"the checkpoint in '{run.run_dir}' was written mid-epoch by {ckpt['world_size']} process(es); "
                f"resume it with the same number of processes (now {ctx.world_size})"
            )
        try:
            net.load_state_dict(ckpt["model"], strict=True)
        except RuntimeError as exc:
            first = str(exc).splitlines()[0]
            raise SpliceError(
                f"the checkpoint in '{run.run_dir}' does not fit the model ({first}); resume with the model, "
                "--kwargs and --input-shape the run was started with"
            ) from None
        run.optimizer.load_state_dict(ckpt["optimizer"])
        if stepper.scaler is not None and ckpt.get("scaler"):
            stepper.scaler.load_state_dict(ckpt["scaler"])
        set_rng_state(ckpt["rng"])
        start_epoch, start_batch, step = int(ckpt["epoch"]), int(ckpt["batch"]), int(ckpt["step"])
        run.best, run.bad_evals = dict(ckpt["best"]), int(ckpt["bad_evals"])
        run.metrics_rows = int(ckpt["metrics_rows"])
        if ctx.is_main:
            with _writing(run.run_dir / _METRICS_FILE):
                _truncate_metrics(run.run_dir, run.metrics_rows)
        if start_batch and ctx.is_main:  # the partial epoch's totals (summed over ranks) live on rank 0
            ls, cor, seen, run.epoch_time = ckpt["epoch_totals"]
            stepper.loss_sum.fill_(ls)
            stepper.correct.fill_(cor)
            stepper.seen = int(seen)
        elif start_batch:
            run.epoch_time = float(ckpt["epoch_totals"][3])
        run.bar.line(f"resuming {run.run_dir} at epoch {start_epoch + 1}, batch {start_batch}, step {step}")
    elif ctx.is_main:
        _truncate_metrics(run.run_dir, 0)
    t_run = time.monotonic()

    def record(phase: str, epoch: int, *, loss=None, train_acc=None, ips=None, extra=None) -> tuple[float, bool]:
        val_loss, acc = _evaluate(run)
        lr_now = run.optimizer.param_groups[0]["lr"]
        row = {"phase": phase, "epoch": epoch, "step": step, "loss": loss, "train_accuracy": train_acc,
               "accuracy": round(acc, 6), "val_loss": round(val_loss, 6), "lr": lr_now,
               "images_per_s": ips, "warp_distance": _warp_distances(warps), "base_frozen": rec.base_frozen(
                   max(0, epoch - 1)), "time_s": round(time.monotonic() - t_run, 3), **(extra or {})}
        _row(run, row)
        improved = acc > run.best["accuracy"]
        if improved:
            run.best = {"accuracy": acc, "epoch": epoch, "step": step}
            _save_folder(run, "best", epoch, step, acc)
        _save_folder(run, "last", epoch, step, acc)
        parts = [f"{phase} {epoch}/{rec.epochs}" if phase == "epoch" else phase, f"step {step}"]
        if loss is not None:
            parts.append(f"loss {loss:.4f}")
        parts.append(f"val acc {acc:.4f}")
        if ips:
            parts.append(f"{ips:,.0f} img/s")
        if warps:
            parts.append("warp dist " + ", ".join(f"{k} {v:.3f}" for k, v in row["warp_distance"].items()))
        run.bar.line("  ".join(parts))
        return acc, improved

    # ---- pre-training and the starting point (only on a fresh start)
    if ckpt is None:
        pre = rec.pretrain
        extra = None
        if warps and pre.epochs > 0:
            ref, ref_name = _reference(rec, run.data, run.train, run.shape, run.reference_override)
            _set_requires_grad(net, rec, frozen, base_frozen=True)

            def on_step(i, total, loss):
                if i == 1:
                    run.bar.start("pre-train warps", total)
                run.bar.update(i, **{"grid loss": loss})
                if distributed.broadcast_flag(ctx, run.flag.raised):  # every rank stops at the same step
                    raise TuneInterrupted("interrupted during warp pre-training")
            try:
                res = pretrain_warps_(net, warps, ref, pre, seed=rec.seed, prepare=run.prepare,
                                      rank=ctx.rank, world=ctx.world_size, reduce_grads=_reduce_grads(ctx),
                                      on_step=on_step, workers=run.workers)
            except TuneInterrupted:
                run.bar.line(f"interrupted during warp pre-training (no checkpoint yet); "
                             f"'splice tune --resume {run.run_dir}' starts the run again from the beginning")
                raise
            run.bar.finish(res["steps"])
            extra = {"reference": ref_name, "pretrain_steps": res["steps"]}
            record("pretrain", 0, loss=round(res["grid_loss"], 6), extra=extra)
        else:
            record("start", 0)
        _checkpoint(run, epoch=0, batch=0, step=0, stepper=stepper)

    # ---- epochs
    stopped_early = False
    pending_stop = False
    current_frozen = None
    ips = None
    for epoch in range(start_epoch, rec.epochs):
        base_frozen = rec.base_frozen(epoch)
        if base_frozen != current_frozen:
            _set_requires_grad(net, rec, frozen, base_frozen)
            _wrap(run, base_frozen)
            stepper.model = run.net_wrapped
            current_frozen = base_frozen
        _set_modes(net, warps, base_frozen, frozen_modules)
        stepper.reg_weight = rec.identity_reg * rec.identity_reg_decay ** epoch if warps else 0.0
        order = _b.shard(_b.epoch_order(rec.seed, epoch, n_train), ctx.rank, ctx.world_size)
        batches = _b.index_batches(order, per_rank)
        first = start_batch if epoch == start_epoch else 0
        if first == 0:
            stepper.reset_totals()
            run.epoch_time = 0.0
        run.bar.start(f"epoch {epoch + 1}/{rec.epochs}", len(batches))
        t0 = time.perf_counter()
        for b, (x, y) in enumerate(_b.iterate(run.train, batches[first:], workers=run.workers), start=first):
            if aug_range is not None:
                x, _ = random_distort(x, aug_range, _b.generator(rec.seed, "augment", epoch, b, ctx.rank))
            factor = lr_factor(rec.schedule, step, steps_per_epoch=run.steps_per_epoch,
                               total_steps=run.total_steps, warmup_steps=run.warmup_steps,
                               step_epochs=rec.step_epochs, step_gamma=rec.step_gamma)
            for g in run.optimizer.param_groups:
                g["lr"] = g["base_lr"] * factor
            torch.manual_seed(_b.mix(rec.seed, "step", epoch, b, ctx.rank))
            stepper.step(run.prepare(x), y.to(ctx.device, non_blocking=True))
            step += 1
            if run.bar.rich:
                seen = stepper.seen
                el = run.epoch_time + time.perf_counter() - t0
                run.bar.update(b + 1, loss=float(stepper.loss_sum) / max(1, seen),
                               acc=float(stepper.correct) / max(1, seen),
                               **{"img/s": seen * ctx.world_size / max(el, 1e-9)})
            stop = run.flag.raised or (run.stop_after_steps is not None and step >= run.stop_after_steps)
            if distributed.broadcast_flag(ctx, stop) if ctx.distributed else stop:
                pending_stop = True
                if b + 1 < len(batches):  # mid-epoch: checkpoint this exact batch and stop
                    run.epoch_time += time.perf_counter() - t0
                    totals = distributed.all_reduce_sum(ctx, list(stepper.totals()))  # over every rank
                    _checkpoint(run, epoch=epoch, batch=b + 1, step=step, stepper=stepper,
                                extra={"epoch_totals": [*totals, run.epoch_time]})
                    return _stopped(run, epoch, b + 1, step)
                # the epoch's last batch: finish the epoch (evaluation, checkpoint) first
        run.epoch_time += time.perf_counter() - t0
        distributed.sync_buffers(ctx, net)
        loss_sum, correct, seen = distributed.all_reduce_sum(ctx, list(stepper.totals()))
        ips = seen / max(run.epoch_time, 1e-9)
        improved = None
        if (epoch + 1) % rec.eval_every == 0 or epoch + 1 == rec.epochs:
            _, improved = record("epoch", epoch + 1, loss=round(loss_sum / max(1, seen), 6),
                                 train_acc=round(correct / max(1, seen), 6), ips=round(ips, 1))
            run.bad_evals = 0 if improved else run.bad_evals + 1
        _checkpoint(run, epoch=epoch + 1, batch=0, step=step, stepper=stepper)
        if pending_stop:
            return _stopped(run, epoch + 1, 0, step)
        if rec.patience and run.bad_evals >= rec.patience and epoch + 1 < rec.epochs:
            stopped_early = True
            run.bar.line(f"no better validation accuracy for {rec.patience} evaluations: stopping early")
            break

    if tap is not None:
        tap.close()
    return _finish(run, step, ips, stopped_early)


def _stopped(run, epoch: int, batch: int, step: int) -> dict[str, Any]:
    """After a stop request: the checkpoint is written; record it, and raise for Ctrl-C / SIGTERM."""
    if run.ctx.is_main:
        with _writing(run.run_dir / _RUN_FILE):
            atomic_write_json(run.run_dir / _RUN_FILE, dict(run.info, status="interrupted"))
    where = f"epoch {epoch + 1}, batch {batch}" if batch else f"the end of epoch {epoch}"
    run.bar.line(f"stopped at {where} (step {step}); checkpoint written. "
                 f"Continue with: splice tune --resume {run.run_dir}")
    if run.flag.raised:
        raise TuneInterrupted(f"stopped at step {step}; resume with --resume {run.run_dir}")
    return {"out": str(run.run_dir), "rank": run.ctx.rank, "world_size": run.ctx.world_size,
            "best_accuracy": run.best["accuracy"], "best_epoch": run.best["epoch"], "steps": step,
            "epochs": run.rec.epochs, "interrupted": True, "resume_at": {"epoch": epoch, "batch": batch}}


def _finish(run, step: int, ips, stopped_early: bool) -> dict[str, Any]:
    ctx, rec = run.ctx, run.rec
    final = _unwrap(run.net_wrapped)
    base_changed = _tuning(run, "last", 0, step, 0.0)["base_changed"]
    if os.environ.get(_HASH_ENV):
        (run.run_dir / f"rank{ctx.rank}.sha256").write_text(state_dict_sha256(final.state_dict()) + "\n")
    last_rows = [r for r in read_metrics(run.run_dir) if r.get("phase") == "epoch"] if ctx.is_main else []
    if ctx.is_main:
        atomic_write_json(run.run_dir / _RUN_FILE, dict(run.info, status="stopped early" if stopped_early
                                                         else "finished"))
    return {
        "out": str(run.run_dir), "rank": ctx.rank, "world_size": ctx.world_size,
        "best_accuracy": run.best["accuracy"], "best_epoch": run.best["epoch"],
        "last_accuracy": last_rows[-1]["accuracy"] if last_rows else None,
        "epochs": rec.epochs, "steps": step, "base_changed": base_changed,
        "images_per_s": ips, "stopped_early": stopped_early, "interrupted": False,
    }

