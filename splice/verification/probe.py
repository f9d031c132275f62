"""What the checks run on and with: the probe batch, images, and the instruments around a run
(buffer snapshot, warp hooks, timings, identity-reset copies)."""

from __future__ import annotations

import os
import time
from collections.abc import Mapping, Sequence
from pathlib import Path

import torch
from torch import nn

from ..copies import bitwise_equal, same_draws, tree_copy
from ..data import normalise
from ..errors import DataError, SpliceError, first_line
from ..imagefiles import image_suffixes, list_image_files, load_images
from ..limits import check_fits
from ..surgery import warps_of
from .report import CheckResult

__all__ = ["DTYPES", "probe_batch", "probe_inputs"]

DTYPES = {"float32": torch.float32, "float64": torch.float64}


def probe_batch(input_shape: Sequence[int], batch: int = 1, *, seed: int = 0, dtype=torch.float32) -> torch.Tensor:
    """The seeded N(0,1) probe ``(batch, C, H, W)``; the same seed gives the same tensor on any machine."""
    gen = torch.Generator().manual_seed(int(seed))
    return torch.randn((int(batch), *[int(d) for d in input_shape]), generator=gen, dtype=torch.float32).to(dtype)

def probe_inputs(input_shapes: Sequence[Sequence[int]], batch: int = 1, *, seed: int = 0,
                 dtype=torch.float32) -> tuple[torch.Tensor, ...]:
    """One seeded N(0,1) probe per model input, drawn in order from one generator (one input: :func:`probe_batch`)."""
    gen = torch.Generator().manual_seed(int(seed))
    return tuple(torch.randn((int(batch), *[int(d) for d in shape]), generator=gen, dtype=torch.float32).to(dtype)
                 for shape in input_shapes)

def resolve_dtype(dtype) -> torch.dtype:
    if isinstance(dtype, torch.dtype) and dtype in DTYPES.values():
        return dtype
    if isinstance(dtype, str) and dtype in DTYPES:
        return DTYPES[dtype]
    raise SpliceError(f"dtype {dtype!r} is not supported by verify; choose float32 or float64 (--dtype)")

def check_batch(batch) -> int:
    if isinstance(batch, bool) or not isinstance(batch, int) or batch < 1:
        raise SpliceError(f"probe batch must be a positive integer, got {batch!r}; pass e.g. --batch 2")
    return batch

def _image_files(images) -> list[Path]:
    items = [images] if isinstance(images, (str, os.PathLike)) else list(images)
    files: list[Path] = []
    for item in items:
        path = Path(item)
        if path.is_dir():
            found = list_image_files(path)
            if not found:
                raise DataError(
                    f"image folder '{path}' holds no images (looked for {', '.join(image_suffixes())}); "
                    "point --images at a folder of image files"
                )
            files.extend(found)
        elif path.is_file():
            files.append(path)
        else:
            raise DataError(f"--images '{path}' does not exist; give a folder of images or an image file")
    return files

def read_images(images, input_shape, normalisation) -> tuple[torch.Tensor, list[str]]:
    files = _image_files(images)
    c, h, w = input_shape
    # held at once, twice (read, then normalised): refused before reading when that would not fit
    check_fits(2 * 4 * len(files) * c * h * w, f"reading {len(files):,} images of {c}x{h}x{w} for --images",
               "point --images at fewer images (a few hundred probe the model as well as many thousands)")
    return normalise(load_images(files, input_shape), normalisation), [str(f) for f in files]

def short_number(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.3g}"

def listed_names(items: Sequence[str], limit: int = 4) -> str:
    shown = ", ".join(items[:limit])
    return shown + (f" and {len(items) - limit} more" if len(items) > limit else "")

class Snapshot:
    """Buffers and train/eval modes of some models, to prove the checks changed neither."""

    def __init__(self, models: Mapping[str, nn.Module]) -> None:
        self.models = dict(models)
        self.buffers = {f"{tag}:{n}": b.detach().clone() for tag, m in self.models.items()
                        for n, b in m.named_buffers()}
        # the module trees, listed once: the modes are read, restored and compared from this list
        self.trees = {tag: list(m.named_modules()) for tag, m in self.models.items()}
        self.modes = {f"{tag}:{n or '<root>'}": mod.training for tag, mods in self.trees.items() for n, mod in mods}

    @classmethod
    def of_own(cls, buffers: Mapping[str, Mapping[str, torch.Tensor]]) -> Snapshot:
        """For models verify built itself and runs as they are, each with its own copies of the buffers
        (:func:`splice.copies.own_buffers_`): ``buffers`` are the tensors they held before, by tag. Nothing of a
        caller's is there to change or restore; :meth:`check` reports what the forwards updated."""
        snap = cls({})
        snap.buffers = {f"{tag}:{n}": b for tag, named in buffers.items() for n, b in named.items()}
        return snap

    def restore_modes(self) -> None:
        for tag, mods in self.trees.items():
            for n, mod in mods:
                mod.training = self.modes[f"{tag}:{n or '<root>'}"]

    def updated_by(self, tag: str, model: nn.Module) -> frozenset[str]:
        """The buffers of ``model`` (a twin the checks ran, tagged ``tag``) that differ from the snapshot: those its
        own forward updates."""
        return frozenset(n for n, b in model.named_buffers()
                         if f"{tag}:{n}" in self.buffers and not bitwise_equal(self.buffers[f"{tag}:{n}"], b))

    def check(self, runs: Mapping[str, nn.Module] | None = None, after_updates: dict | None = None) -> CheckResult:
        """The ``buffers`` row; ``runs`` are the twins the checks ran (their updates are reported, not failed).
        ``after_updates`` compares base and splice on later calls from the same buffers (verify runs it for a base
        that updates buffers in eval mode)."""
        now = {f"{tag}:{n}": b for tag, m in self.models.items() for n, b in m.named_buffers()}
        changed = sorted(k for k, v in self.buffers.items() if k.split(":", 1)[0] in self.models
                         and (k not in now or not bitwise_equal(v, now[k])))
        modes = {f"{tag}:{n or '<root>'}": mod.training for tag, m in self.models.items()
                 for n, mod in m.named_modules()}
        wrong_modes = sorted(k for k, v in self.modes.items() if modes.get(k) != v)
        # put back whatever a misbehaving model changed, so verify leaves no trace
        with torch.no_grad():
            for k in changed:
                if k in now and now[k].shape == self.buffers[k].shape:
                    now[k].copy_(self.buffers[k])
        self.restore_modes()
        ran = {f"{tag}:{n}": b for tag, m in (runs or {}).items() for n, b in m.named_buffers()}
        updated = sorted(f"{tag}:{n}" for tag, m in (runs or {}).items() for n in self.updated_by(tag, m))
        # a buffer the base updates in its forward must be updated by the splice too (a traced graph that
        # ran the update once, while tracing, would not)
        lost = [k for k in updated if k.startswith("base:") and "spliced:" + k[5:] in ran
                and "spliced:" + k[5:] not in updated]
        drift = after_updates is not None and not after_updates["passed"]
        numbers = {"buffers": len(self.buffers), "changed": changed, "modes_restored": not wrong_modes,
                   "updated_in_eval": updated, "not_updated_by_splice": lost,
                   "after_updates_max_rel": None if after_updates is None else after_updates.get("max_rel")}
        if changed:
            detail = (f"{len(changed)} of {len(self.buffers)} buffers changed while the checks ran: "
                      f"{listed_names(changed)} (restored); the checks must leave the models as they were")
        elif wrong_modes:
            detail = f"train/eval modes were not restored for {listed_names(wrong_modes)}"
        elif lost:
            detail = (f"the base updates {listed_names(lost)} in its forward, the spliced model does not; "
                      "mark the updating module as a leaf (--leaf TYPE) and re-create the splice")
        elif drift:
            detail = (f"the forward updates {listed_names(updated)} even in eval mode, and from the same buffers base "
                      f"and splice then answer differently ({after_updates['detail']}): the splice holds a value its "
                      "trace computed from them once; mark the module whose code reads them as a leaf (--leaf TYPE; "
                      "when the model's own forward reads them, splice inside a part with --within NAME) and "
                      "re-create the splice")
        elif not self.models:  # models verify built for itself: they ran on copies of the folder's buffers
            detail = f"the checks ran on copies of the {len(self.buffers)} buffers read from the folder"
            if updated:
                detail += (f"; the forward updates {listed_names(updated)} even in eval mode, in base and splice "
                           "alike")
        else:
            detail = f"all {len(self.buffers)} buffers bitwise unchanged; train/eval modes restored"
            if updated:
                detail += (f"; the forward updates {listed_names(updated)} even in eval mode, in base and splice "
                           "alike (the checks ran on copies of the buffers)")
        passed = not changed and not wrong_modes and not lost and not drift
        return CheckResult("buffers", passed, numbers, detail,
                           f"{len(self.buffers)} buffers, {len(changed) + len(lost)} changed"
                           + (", calls drift apart" if drift else ""))


class Laps:
    """Wall-clock seconds per phase of a verification (reported in ``meta['seconds']``)."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self._last = time.perf_counter()

    def __call__(self, name: str) -> None:
        now = time.perf_counter()
        self.seconds[name] = self.seconds.get(name, 0.0) + now - self._last
        self._last = now

class WarpProbe:
    """Forward hooks on every warp: input/output shapes and how far the output is from the input."""

    def __init__(self, warps: Mapping[str, nn.Module]) -> None:
        self.seen: dict[str, dict] = {}
        self.handles = [w.register_forward_hook(self._hook(name)) for name, w in warps.items()]

    def _hook(self, name: str):
        def hook(module, args, output):
            x = args[0] if args else None
            rec = {"in": tuple(x.shape) if isinstance(x, torch.Tensor) else None,
                   "out": tuple(output.shape) if isinstance(output, torch.Tensor) else None}
            if rec["in"] is not None and rec["in"] == rec["out"]:
                with torch.no_grad():
                    diff = float((output.detach().double() - x.detach().double()).abs().max()) if x.numel() else 0.0
                    scale = float(x.detach().double().abs().max()) if x.numel() else 0.0
                rec["max_abs"] = diff
                rec["max_rel"] = diff / scale if scale > 0 else diff
            self.seen[name] = rec
        return hook

    def remove(self) -> None:
        for h in self.handles:
            h.remove()

def error_text(exc: BaseException) -> str:
    first = first_line(exc)
    return type(exc).__name__ if first == type(exc).__name__ else f"{type(exc).__name__}: {first}"

def reset_copy(model: nn.Module) -> nn.Module:
    """A copy with every warp back at the identity (``Warp.reset_parameters``), RNG untouched."""
    work = tree_copy(model)
    with torch.random.fork_rng(devices=[]):
        for warp in warps_of(work).values():
            warp.reset_parameters()
    return work

def only_copy(model: nn.Module, keep: str) -> nn.Module:
    work = tree_copy(model)
    with torch.random.fork_rng(devices=[]):
        for name, warp in warps_of(work).items():
            if name != keep:
                warp.reset_parameters()
    return work

def run_no_grad(model: nn.Module, x, what: str):
    """``model(*x)`` without gradients, on a copy of ``x`` (a forward may normalise its input in place) and with
    :func:`~splice.copies.same_draws`; ``x`` is a tensor or one tensor per model input."""
    xs = (x,) if isinstance(x, torch.Tensor) else tuple(x)
    try:
        with torch.no_grad(), same_draws():
            return model(*[t.clone() for t in xs])
    except Exception as exc:
        shapes = ", ".join(str(tuple(t.shape)) for t in xs)
        raise SpliceError(f"the {what} fails on a probe batch of shape {shapes} ({error_text(exc)}); "
                          "check the input shape recorded in splice.json") from exc
