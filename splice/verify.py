"""The equivalence certificate: checks that a splice broke nothing (``splice verify``).

:func:`verify` rebuilds the base network of a spliced folder from its manifest
(as :func:`splice.store.load_base` does) and the spliced model (as
:func:`splice.store.load` does) and runs the checks below;
:func:`verify_models` runs them on models in memory. The weights file is read
and hashed once; both models are built empty and then adopt its tensors, so
they are separate module trees over the same (read-only) weights.
Each check gives one :class:`CheckResult` row ``{check, passed, numbers, detail}``.

``integrity``
    ``weights.safetensors`` hashes to the sha256 recorded in ``splice.json``.
    A mismatch is a *failed check* (exit 1), not an input error: the folder is
    well formed but its content is not what was certified. The file is named,
    with both hashes, and no other check runs on weights that cannot be trusted.
``finite``
    No NaN/Inf tensor in the weights file; offenders are listed by name. Also a
    failed check that stops the run (a diverged checkpoint is not usable).
``shapes``
    At every point the warp's output shape equals its input shape (and the
    shape recorded in the manifest), found with forward hooks on the warps; the
    model outputs have the base's shapes.
``outputs``
    Base and spliced model on a seeded N(0,1) probe batch ``(batch, *input_shape)``,
    one sample by default: at the identity a splice is exact sample by sample,
    so more samples cost time without adding evidence (``batch=N`` also
    exercises code that depends on the batch size; ``images=`` adds real
    inputs). Reported: max absolute error, max error relative to the output's scale (max ``|y|``)
    and top-1 agreement for 2-D classifier-like outputs; nested tuple, list and
    dict outputs are flattened. Default relative tolerances
    (:data:`DEFAULT_TOLERANCES`): float32 1e-5, float64 1e-10. A tuned model is
    compared with its warps reset to the identity on a copy, which shows that
    the base graph inside it is intact.
``images``
    The same on the ``images=`` files, resized and normalised as the manifest
    says (only when images are given).
``warps``
    Each warp's parameter distance from the identity
    (:meth:`splice.warps.Warp.identity_distance`) and the deviation it causes:
    at its point (``|warp(x) - x|``, absolute and relative to ``max |x|``) and
    at the model output (stored model against its identity-reset copy). A model
    is *tuned* when its manifest records tuning or any warp has moved. For a
    fresh splice (no tuning recorded) every distance must be exactly 0: a head
    that is not zero-initialised fails here.
``provenance``
    The base part of the weights hashes (:func:`splice._io.state_dict_sha256`)
    to the source checkpoint's hash recorded at splice time: bitwise equal. A
    joint recipe (tuning records ``base_changed``) may move them; then the row
    says so, passes, and compares them with the source weights (hashes, and
    per-tensor max abs differences when the source file is still on disk).
    An undeclared change fails.
``gradients``
    One backward pass of a seeded random projection of the outputs, in eval
    mode. Required, for every warp: the head's final layer weight and bias get
    a finite, non-zero gradient, and every head gradient is finite. Reported,
    not required: the gradient reaching the earlier head layers. At the exact
    identity it is exactly 0, because it flows through the zero-initialised
    final weight (see :mod:`splice.warps.head`); the first update moves it. A
    ``nearest`` sampler passes no gradient to its grid, so such a warp fails
    here: it cannot be trained.
``onnx`` (``onnx=True``)
    Export once (TorchScript exporter by default, ``exporter='dynamo'`` for
    opset 18+; opset 17 by default) traced on the first probe sample, and
    compare onnxruntime (CPU) with torch on that sample, as stored and with a
    fixed perturbed warp (:func:`splice.export.onnx_parity`), relative
    tolerance 1e-4; reports the export and check times. With the TorchScript
    exporter the checked graph takes the weights as inputs
    (``export_onnx_bytes(weights_as_inputs=True)``): the same operators as the
    file ``splice export`` writes, without serialising 100 MB of weights into
    it and having onnxruntime prepare them, and the perturbed run is the same
    session fed the perturbed head tensors. ``splice export`` checks its own,
    self-contained file the same two ways. The torch side of the as-stored
    comparison is the stored model's output for that sample from the outputs
    check. Constant folding is off (onnxruntime folds when it loads the graph;
    ``splice export`` folds). Runs in float32 even when ``dtype`` is float64.
``buffers``
    Every buffer of both models (BatchNorm running statistics included) is
    bitwise unchanged after all of the above, and every module's train/eval
    mode is restored. The checks run in eval mode; a buffer a model changes
    anyway is reported by name and put back.
"""

from __future__ import annotations

import copy
import datetime as _dt
import math
import os
import time
from collections.abc import Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import torch
from torch import nn

__all__ = [
    "flatten_outputs",
    "compare_outputs",
    "DEFAULT_TOLERANCES",
    "DTYPES",
    "IMAGE_SUFFIXES",
    "CheckResult",
    "VerifyReport",
    "verify",
    "verify_models",
    "probe_batch",
    "render_verify",
    "write_report",
    "versions",
]

# max error relative to the output's scale (max |y|), by dtype. float32 rounding
# through a bilinear resample at the identity stays near 1e-7; 1e-5 leaves room
# for deep networks (common practice, no source).
DEFAULT_TOLERANCES = {torch.float32: 1e-5, torch.float64: 1e-10, torch.float16: 1e-2, torch.bfloat16: 1e-2}
DTYPES = {"float32": torch.float32, "float64": torch.float64}
IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".gif", ".tif", ".tiff", ".webp", ".pgm", ".ppm")
_CERTIFICATE = "splice-verify-certificate"
_CERTIFICATE_VERSION = 1


def flatten_outputs(out, prefix: str = "out") -> dict[str, torch.Tensor]:
    """Flatten tensors in nested tuple/list/dict outputs into ``{path: tensor}``."""
    if isinstance(out, torch.Tensor):
        return {prefix: out}
    if isinstance(out, Mapping):
        flat: dict[str, torch.Tensor] = {}
        for k in out:
            flat.update(flatten_outputs(out[k], f"{prefix}.{k}"))
        return flat
    if isinstance(out, Sequence) and not isinstance(out, (str, bytes)):
        flat = {}
        for i, v in enumerate(out):
            flat.update(flatten_outputs(v, f"{prefix}[{i}]"))
        return flat
    return {}


def compare_outputs(reference, candidate, *, tol: float | None = None) -> dict:
    """Compare two model outputs (any nesting). Returns numbers and a verdict.

    ``max_rel`` is the max absolute error divided by the reference's max
    absolute value (per output, then the worst). ``top1`` is the fraction of
    rows whose argmax agrees, for 2-D classifier-like outputs (else ``None``).
    """
    ref, cand = flatten_outputs(reference), flatten_outputs(candidate)
    if not ref:
        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                "detail": f"the model returned {type(reference).__name__}, which holds no tensors"}
    if set(ref) != set(cand):
        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                "detail": f"output structure differs: {sorted(ref)} vs {sorted(cand)}"}
    max_abs = 0.0
    max_rel = 0.0
    top1: list[float] = []
    shapes_ok = True
    dtype = next(iter(ref.values())).dtype
    for key, a in ref.items():
        b = cand[key]
        if a.shape != b.shape:
            shapes_ok = False
            continue
        a64, b64 = a.detach().double().cpu(), b.detach().double().cpu()
        if not torch.isfinite(b64).all():
            return {"passed": False, "max_abs": float("inf"), "max_rel": float("inf"), "top1": None,
                    "detail": f"{key} has NaN or Inf values"}
        err = float((a64 - b64).abs().max()) if a64.numel() else 0.0
        scale = float(a64.abs().max()) if a64.numel() else 0.0
        max_abs = max(max_abs, err)
        max_rel = max(max_rel, err / scale if scale > 0 else err)
        if a.ndim == 2 and a.shape[1] > 1 and a.is_floating_point():
            top1.append(float((a64.argmax(1) == b64.argmax(1)).double().mean()))
    limit = DEFAULT_TOLERANCES.get(dtype, 1e-5) if tol is None else tol
    agree = min(top1) if top1 else None
    passed = shapes_ok and max_rel <= limit
    if not shapes_ok:
        detail = "output shapes differ: " + ", ".join(
            f"{k} {tuple(ref[k].shape)} vs {tuple(cand[k].shape)}" for k in ref if ref[k].shape != cand[k].shape)
    else:
        detail = f"max abs error {max_abs:.3g}, max relative error {max_rel:.3g} (tolerance {limit:g})"
    return {"passed": passed, "max_abs": max_abs, "max_rel": max_rel, "top1": agree,
            "tolerance": limit, "shapes_equal": shapes_ok, "detail": detail}


# ----------------------------------------------------------------------------- report types


@dataclass
class CheckResult:
    """One row of the certificate: the check's name, verdict, numbers and a sentence."""

    check: str
    passed: bool
    numbers: dict = field(default_factory=dict)
    detail: str = ""
    summary: str = ""

    def to_json(self) -> dict:
        return {"check": self.check, "passed": bool(self.passed), "numbers": _jsonable(self.numbers),
                "detail": self.detail, "summary": self.summary}


@dataclass
class VerifyReport:
    """Every check of one verification plus what is needed to reproduce it."""

    checks: list[CheckResult]
    meta: dict = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return bool(self.checks) and all(c.passed for c in self.checks)

    @property
    def failed(self) -> list[str]:
        return [c.check for c in self.checks if not c.passed]

    def __getitem__(self, name: str) -> CheckResult:
        for c in self.checks:
            if c.check == name:
                return c
        raise KeyError(f"no check named {name!r} in this report; it has {', '.join(c.check for c in self.checks)}")

    def __contains__(self, name: object) -> bool:
        return any(c.check == name for c in self.checks)

    def to_json(self) -> dict:
        return {"format": _CERTIFICATE, "schema_version": _CERTIFICATE_VERSION, "passed": self.passed,
                **_jsonable(self.meta), "checks": [c.to_json() for c in self.checks]}


def _jsonable(value: Any) -> Any:
    """Plain JSON values; non-finite floats become the strings 'inf', '-inf', 'nan'."""
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else str(value)
    if isinstance(value, torch.dtype):
        return str(value).replace("torch.", "")
    if isinstance(value, Path):
        return str(value)
    return str(value)


def versions() -> dict[str, str | None]:
    """Versions of splice and the libraries a certificate depends on (``None`` if not installed)."""
    import platform
    from importlib import metadata

    from . import __version__

    out: dict[str, str | None] = {"splice": __version__, "python": platform.python_version(),
                                  "torch": torch.__version__}
    for name in ("torchvision", "onnx", "onnxruntime", "numpy", "safetensors"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


# ----------------------------------------------------------------------------- inputs


def probe_batch(input_shape: Sequence[int], batch: int = 1, *, seed: int = 0, dtype=torch.float32) -> torch.Tensor:
    """The seeded N(0,1) probe ``(batch, C, H, W)``; the same seed gives the same tensor on any machine."""
    gen = torch.Generator().manual_seed(int(seed))
    return torch.randn((int(batch), *[int(d) for d in input_shape]), generator=gen, dtype=torch.float32).to(dtype)


def _resolve_dtype(dtype) -> torch.dtype:
    from .errors import SpliceError

    if isinstance(dtype, torch.dtype) and dtype in DTYPES.values():
        return dtype
    if isinstance(dtype, str) and dtype in DTYPES:
        return DTYPES[dtype]
    raise SpliceError(f"dtype {dtype!r} is not supported by verify; choose float32 or float64 (--dtype)")


def _check_batch(batch) -> int:
    from .errors import SpliceError

    if isinstance(batch, bool) or not isinstance(batch, int) or batch < 1:
        raise SpliceError(f"probe batch must be a positive integer, got {batch!r}; pass e.g. --batch 2")
    return batch


def _image_files(images) -> list[Path]:
    from .errors import DataError

    items = [images] if isinstance(images, (str, os.PathLike)) else list(images)
    files: list[Path] = []
    for item in items:
        path = Path(item)
        if path.is_dir():
            found = sorted(p for p in path.iterdir() if p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES)
            if not found:
                raise DataError(
                    f"image folder '{path}' holds no images (looked for {', '.join(IMAGE_SUFFIXES)}); "
                    "point --images at a folder of image files"
                )
            files.extend(found)
        elif path.is_file():
            files.append(path)
        else:
            raise DataError(f"--images '{path}' does not exist; give a folder of images or an image file")
    return files


def _read_images(images, input_shape, normalisation) -> tuple[torch.Tensor, list[str]]:
    from .data import load_images, normalise

    files = _image_files(images)
    return normalise(load_images(files, input_shape), normalisation), [str(f) for f in files]


# ----------------------------------------------------------------------------- helpers


def _fmt(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.3g}"


def _names(items: Sequence[str], limit: int = 4) -> str:
    shown = ", ".join(items[:limit])
    return shown + (f" and {len(items) - limit} more" if len(items) > limit else "")


def _bitwise_equal(a: torch.Tensor, b: torch.Tensor) -> bool:
    if a.shape != b.shape or a.dtype != b.dtype:
        return False
    if a.numel() == 0:
        return True
    return torch.equal(a.detach().contiguous().reshape(-1).view(torch.uint8),
                       b.detach().contiguous().reshape(-1).view(torch.uint8))


class _Snapshot:
    """Buffers and train/eval modes of some models, to prove the checks changed neither."""

    def __init__(self, models: Mapping[str, nn.Module]) -> None:
        self.models = dict(models)
        self.buffers = {f"{tag}:{n}": b.detach().clone() for tag, m in self.models.items()
                        for n, b in m.named_buffers()}
        self.modes = {f"{tag}:{n or '<root>'}": mod.training for tag, m in self.models.items()
                      for n, mod in m.named_modules()}

    def restore_modes(self) -> None:
        for tag, m in self.models.items():
            for n, mod in m.named_modules():
                mod.training = self.modes[f"{tag}:{n or '<root>'}"]

    def check(self) -> CheckResult:
        now = {f"{tag}:{n}": b for tag, m in self.models.items() for n, b in m.named_buffers()}
        changed = sorted(k for k, v in self.buffers.items() if k not in now or not _bitwise_equal(v, now[k]))
        modes = {f"{tag}:{n or '<root>'}": mod.training for tag, m in self.models.items()
                 for n, mod in m.named_modules()}
        wrong_modes = sorted(k for k, v in self.modes.items() if modes.get(k) != v)
        # put back whatever a misbehaving model changed, so verify leaves no trace
        with torch.no_grad():
            for k in changed:
                if k in now and now[k].shape == self.buffers[k].shape:
                    now[k].copy_(self.buffers[k])
        self.restore_modes()
        numbers = {"buffers": len(self.buffers), "changed": changed, "modes_restored": not wrong_modes}
        if changed:
            detail = (f"{len(changed)} of {len(self.buffers)} buffers changed while the checks ran in eval mode: "
                      f"{_names(changed)} (restored); the model updates state outside training mode")
        elif wrong_modes:
            detail = f"train/eval modes were not restored for {_names(wrong_modes)}"
        else:
            detail = f"all {len(self.buffers)} buffers bitwise unchanged; train/eval modes restored"
        return CheckResult("buffers", not changed and not wrong_modes, numbers, detail,
                           f"{len(self.buffers)} buffers, {len(changed)} changed")


class _Laps:
    """Wall-clock seconds per phase of a verification (reported in ``meta['seconds']``)."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self._last = time.perf_counter()

    def __call__(self, name: str) -> None:
        now = time.perf_counter()
        self.seconds[name] = self.seconds.get(name, 0.0) + now - self._last
        self._last = now


class _WarpProbe:
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


def _error_text(exc: BaseException) -> str:
    first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    return f"{type(exc).__name__}: {first}" if first else type(exc).__name__


def _reset_copy(model: nn.Module) -> nn.Module:
    """A copy with every warp back at the identity (``Warp.reset_parameters``), RNG untouched."""
    from .surgery import warps_of

    work = copy.deepcopy(model)
    with torch.random.fork_rng(devices=[]):
        for warp in warps_of(work).values():
            warp.reset_parameters()
    return work


def _only_copy(model: nn.Module, keep: str) -> nn.Module:
    from .surgery import warps_of

    work = copy.deepcopy(model)
    with torch.random.fork_rng(devices=[]):
        for name, warp in warps_of(work).items():
            if name != keep:
                warp.reset_parameters()
    return work


def _run(model: nn.Module, x: torch.Tensor, what: str):
    from .errors import SpliceError

    try:
        with torch.no_grad():
            return model(x)
    except Exception as exc:
        raise SpliceError(f"the {what} fails on a probe batch of shape {tuple(x.shape)} ({_error_text(exc)}); "
                          "check the input shape recorded in splice.json") from exc


# ----------------------------------------------------------------------------- the checks


def _integrity_row(path: Path, recorded: str, actual: str) -> CheckResult:
    ok = recorded == actual
    numbers = {"file": str(path), "recorded_sha256": recorded, "actual_sha256": actual}
    if ok:
        return CheckResult("integrity", True, numbers, f"'{path.name}' matches its recorded sha256",
                           f"sha256 {actual[:12]}…")
    return CheckResult(
        "integrity", False, numbers,
        f"'{path}' does not match the sha256 recorded in splice.json (recorded {recorded[:12]}…, found "
        f"{actual[:12]}…): the weights were changed or damaged after saving; restore the folder from a good copy",
        "hash mismatch")


def _all_finite(t: torch.Tensor) -> bool:
    # A NaN or an Inf anywhere makes the sum NaN or Inf; a finite sum needs no
    # element-wise pass. Only an overflowing sum of finite values is re-checked.
    if t.numel() == 0:
        return True
    total = t.detach().double().sum() if t.dtype in (torch.float16, torch.bfloat16) else t.detach().sum()
    return bool(torch.isfinite(total)) or bool(torch.isfinite(t).all())


def _finite_row(state: Mapping[str, torch.Tensor], where: str) -> CheckResult:
    bad = sorted(k for k, v in state.items() if v.is_floating_point() and not _all_finite(v))
    numbers = {"tensors": len(state), "non_finite": bad}
    if not bad:
        return CheckResult("finite", True, numbers, f"all {len(state)} tensors are finite", f"{len(state)} tensors")
    return CheckResult("finite", False, numbers,
                       f"{where} has NaN or Inf values in {len(bad)} tensor(s): {_names(bad, 6)}; the checkpoint is "
                       "damaged or diverged — use an earlier one", f"{len(bad)} non-finite")


def _shapes_row(probe: _WarpProbe, warps, points: Mapping[str, Sequence[int]], ref_out, out,
                error: str | None) -> CheckResult:
    per: dict[str, dict] = {}
    problems: list[str] = []
    for name in warps:
        rec = probe.seen.get(name)
        if rec is None:
            per[name] = {"input": None, "output": None}
            problems.append(f"warp {name!r} never ran")
            continue
        per[name] = {"input": list(rec["in"] or []), "output": list(rec["out"] or [])}
        if rec["in"] != rec["out"]:
            problems.append(f"warp {name!r} turns {rec['in']} into {rec['out']}")
        want = points.get(name)
        if want is not None and rec["in"] is not None and tuple(rec["in"][1:]) != tuple(want):
            problems.append(f"point {name!r} has shape {tuple(rec['in'][1:])}, the manifest records {tuple(want)}")
    outputs: dict[str, Any] = {}
    if out is not None:
        ref_flat, flat = flatten_outputs(ref_out), flatten_outputs(out)
        for key in ref_flat:
            outputs[key] = {"base": list(ref_flat[key].shape),
                            "spliced": list(flat[key].shape) if key in flat else None}
            if key not in flat:
                problems.append(f"output {key} is missing")
            elif flat[key].shape != ref_flat[key].shape:
                problems.append(f"output {key} is {tuple(flat[key].shape)}, "
                                f"the base gives {tuple(ref_flat[key].shape)}")
        problems.extend(f"output {k} is new" for k in flat if k not in ref_flat)
    if error is not None:
        problems.append(f"the spliced model fails on the probe ({error})")
    numbers = {"warps": per, "outputs": outputs}
    n = len(warps)
    if problems:
        return CheckResult("shapes", False, numbers, "; ".join(problems), f"{len(problems)} problem(s)")
    return CheckResult("shapes", True, numbers,
                       f"{n} warp(s) keep their input shape; {len(outputs)} output(s) keep the base's shapes",
                       f"{n} warps, {len(outputs)} outputs")


def _outputs_row(name: str, cmp: dict, reset: bool, what: str) -> CheckResult:
    numbers = {k: cmp.get(k) for k in ("max_abs", "max_rel", "top1", "tolerance", "shapes_equal")}
    numbers["warps_reset"] = reset
    numbers["probe"] = what
    where = " (warps reset to the identity on a copy)" if reset else ""
    summary = f"abs {_fmt(cmp.get('max_abs'))}, rel {_fmt(cmp.get('max_rel'))}"
    if cmp.get("top1") is not None:
        summary += f", top-1 {cmp['top1']:.0%}"
    return CheckResult(name, bool(cmp["passed"]), numbers, f"{what}{where}: {cmp['detail']}", summary)


def _merge_compares(results: list[dict]) -> dict:
    if not results:
        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None, "detail": "no images"}
    failed = [r for r in results if not r["passed"]]
    top = [r["top1"] for r in results if r.get("top1") is not None]
    have = [r for r in results if r.get("max_abs") is not None]
    merged = {"passed": not failed,
              "max_abs": max((r["max_abs"] for r in have), default=None),
              "max_rel": max((r["max_rel"] for r in have), default=None),
              "top1": sum(top) / len(top) if top else None,
              "tolerance": results[0].get("tolerance"),
              "shapes_equal": all(r.get("shapes_equal", True) for r in results)}
    merged["detail"] = failed[0]["detail"] if failed else (
        f"max abs error {_fmt(merged['max_abs'])}, max relative error {_fmt(merged['max_rel'])} "
        f"(tolerance {merged['tolerance']:g})")
    return merged


def _warps_row(warps, distances: dict[str, float], probe: _WarpProbe, tuned_declared: bool,
               deviation: dict | None, per_warp_model: dict[str, dict]) -> CheckResult:
    per = {}
    for name, warp in warps.items():
        rec = probe.seen.get(name, {})
        per[name] = {"family": getattr(getattr(warp, "config", None), "family", None),
                     "distance": distances[name],
                     "point_max_abs": rec.get("max_abs"), "point_max_rel": rec.get("max_rel")}
        if name in per_warp_model:
            per[name]["output_max_abs"] = per_warp_model[name]["max_abs"]
            per[name]["output_max_rel"] = per_warp_model[name]["max_rel"]
    moved = [n for n, d in distances.items() if d > 0]
    numbers: dict[str, Any] = {"warps": per, "moved": moved, "tuning_recorded": tuned_declared}
    if deviation is not None:
        numbers.update({"output_max_abs": deviation.get("max_abs"), "output_max_rel": deviation.get("max_rel"),
                        "output_top1": deviation.get("top1")})
    if not warps:
        return CheckResult("warps", True, numbers, "the model has no warps", "no warps")
    summary = ", ".join(f"{n} {distances[n]:.3g}" for n in warps)
    if not moved:
        return CheckResult("warps", True, numbers, f"all {len(warps)} warp(s) are exactly at the identity (distance 0)",
                           f"distance {summary}")
    dev = (f"; they move the model output by up to {_fmt(deviation.get('max_abs'))} "
           f"({_fmt(deviation.get('max_rel'))} of its scale)") if deviation else ""
    moved_text = ", ".join(f"{n!r} distance {distances[n]:.3g} (shifts its point by up to "
                           f"{_fmt(per[n]['point_max_abs'])})" for n in moved)
    if not tuned_declared:
        return CheckResult(
            "warps", False, numbers,
            f"the manifest records no tuning, yet {moved_text}{dev}: a fresh splice must start at the exact identity "
            "(the head's final layer zero weight, identity bias); re-create it with 'splice insert'",
            f"moved: {_names(moved)}")
    return CheckResult("warps", True, numbers, f"tuned model: {moved_text}{dev}", f"distance {summary}")


def _source_state(info: Mapping, input_shape) -> tuple[dict | None, str]:
    """The source checkpoint's state dict, or ``None`` and the reason it is unavailable."""
    from .errors import SpliceError
    from .sources import load_source

    path = info.get("source_weights_path")
    if path is None:
        why = "the source was a random init" if info.get("random_init") else "no source weights file was recorded"
        return None, f"{why}, so only hashes are compared"
    if not Path(path).is_file():
        return None, f"the source weights file '{path}' is no longer on disk, so only hashes are compared"
    try:
        src = load_source(info["spec"], weights=path, kwargs=info.get("kwargs") or {}, input_shape=input_shape,
                          warn_random=False, leaves=tuple(info.get("leaves") or ()))
    except SpliceError as exc:
        return None, f"the source '{path}' could not be rebuilt ({exc}), so only hashes are compared"
    return dict(src.model.state_dict()), f"compared with '{path}'"


def _tensor_diff(base: Mapping[str, torch.Tensor], source: Mapping[str, torch.Tensor]) -> dict:
    changed: list[tuple[str, float]] = []
    missing = sorted(set(source) - set(base))
    extra = sorted(set(base) - set(source))
    for name in sorted(set(base) & set(source)):
        a, b = base[name], source[name]
        if _bitwise_equal(a, b):
            continue
        if a.shape != b.shape:
            changed.append((name, float("inf")))
        elif a.is_floating_point() or b.is_floating_point():
            changed.append((name, float((a.detach().double() - b.detach().double()).abs().max())))
        else:
            changed.append((name, float((a.long() - b.long()).abs().max())))
    changed.sort(key=lambda t: -t[1])
    return {"tensors": len(source), "changed": len(changed), "max_abs_diff": changed[0][1] if changed else 0.0,
            "largest": [{"name": n, "max_abs_diff": d} for n, d in changed[:5]],
            "missing": missing, "unexpected": extra}


def _provenance_row(info: Mapping, base_state: Mapping[str, torch.Tensor], actual: str, recorded_base: str | None,
                    input_shape) -> CheckResult:
    """``actual`` is ``state_dict_sha256(base_state)``, computed once by the caller."""
    from ._io import state_dict_sha256

    source = info.get("source_weights_sha256")
    tuning = info.get("tuning")
    declared = bool(isinstance(tuning, Mapping) and tuning.get("base_changed"))
    numbers: dict[str, Any] = {"base_sha256": actual, "source_sha256": source, "base_changed_recorded": declared}
    if recorded_base is not None:
        numbers["recorded_base_sha256"] = recorded_base
    stale = recorded_base is not None and recorded_base != actual
    if source is None:
        return CheckResult("provenance", False, numbers,
                           "splice.json records no source-weights hash, so the base cannot be traced to its source; "
                           "re-create the folder with 'splice insert'", "no source hash")
    if source == actual and not stale:
        note = " (tuning records base_changed, but the base weights did not move)" if declared else ""
        return CheckResult("provenance", True, numbers,
                           f"base weights are bitwise equal to the source checkpoint (sha256 {actual[:12]}…){note}",
                           f"sha256 {actual[:12]}… = source")
    state, how = _source_state(info, input_shape)
    if state is not None:
        diff = _tensor_diff(base_state, state)
        numbers["diff"] = diff
        if state_dict_sha256(state) != source:
            how += " (that file no longer hashes to the recorded source hash: it changed since the splice)"
        largest = ", ".join(f"{d['name']} {d['max_abs_diff']:.3g}" for d in diff["largest"][:3])
        how += f": {diff['changed']} of {diff['tensors']} tensors differ, max abs diff {diff['max_abs_diff']:.3g}" + (
            f" ({largest})" if largest else "")
    differs = (f"base weights (sha256 {actual[:12]}…) differ from the source checkpoint (sha256 {source[:12]}…)"
               if source != actual else
               f"the base weights' sha256 {actual[:12]}… differs from the one recorded at save time "
               f"({recorded_base[:12]}…)")
    if declared and source != actual:
        return CheckResult("provenance", True, numbers,
                           f"the base was tuned as well (joint recipe, recorded in splice.json): {differs}; {how}",
                           "base tuned (recorded)")
    return CheckResult("provenance", False, numbers,
                       f"{differs}, and no tuning of the base is recorded; {how}. The weights were edited after "
                       "splicing — re-create the folder from the source with 'splice insert'", "base changed")


def _gradients_row(warps, grads: dict[str, dict], error: str | None) -> CheckResult:
    numbers: dict[str, Any] = {"warps": grads}
    if error is not None:
        return CheckResult("gradients", False, numbers, f"the backward pass failed ({error})", "backward failed")
    if not warps:
        return CheckResult("gradients", True, numbers, "the model has no warps", "no warps")
    problems = []
    for name, g in grads.items():
        if not g["finite"]:
            problems.append(f"warp {name!r} gets NaN/Inf gradients")
        elif g["final_weight"] == 0.0 or g["final_bias"] == 0.0:
            sampler = getattr(getattr(warps[name], "config", None), "sampler", None)
            why = (" — the 'nearest' sampler passes no gradient to its grid, so this warp cannot be trained; "
                   "use bilinear or bicubic") if sampler == "nearest" else (
                   " — the warp does not influence the outputs, or its head is cut off from the loss")
            problems.append(f"warp {name!r}'s final layer gets a zero gradient "
                            f"(weight {g['final_weight']:.3g}, bias {g['final_bias']:.3g}){why}")
    summary = ", ".join(f"{n} {g['final_bias']:.3g}" for n, g in grads.items())
    if problems:
        return CheckResult("gradients", False, numbers, "; ".join(problems), f"|grad| final bias: {summary}")
    upstream = [n for n, g in grads.items() if g["upstream"] == 0.0]
    note = (f"; earlier head layers of {_names(upstream)} get exactly 0, as they must at the identity "
            "(the gradient flows through the zero final weight)") if upstream else ""
    return CheckResult("gradients", True, numbers,
                       f"every warp's final layer gets a finite, non-zero gradient{note}",
                       f"|grad| final bias: {summary}")


def _gradients(out, head_params: dict[str, dict[str, list]], seed: int) -> tuple[dict, str | None]:
    """Norms of d(random projection of the outputs)/d(head parameters), per warp."""
    gen = torch.Generator().manual_seed(int(seed) + 1)
    flat = [t for t in flatten_outputs(out).values() if t.is_floating_point() and t.requires_grad]
    grads: dict[str, dict] = {}
    if not flat:
        return grads, "no output depends on the parameters" if head_params else None
    loss = sum((t * torch.randn(t.shape, generator=gen, dtype=torch.float32).to(t.dtype)).sum() for t in flat)
    order = [(name, part, p) for name, parts in head_params.items() for part, ps in parts.items() for p in ps]
    if not order:
        return grads, None
    try:
        got = torch.autograd.grad(loss, [p for _, _, p in order], allow_unused=True)
    except RuntimeError as exc:
        return grads, _error_text(exc)
    for (name, part, p), g in zip(order, got):
        rec = grads.setdefault(name, {"final_weight": 0.0, "final_bias": 0.0, "upstream": 0.0, "finite": True})
        if g is None:
            continue
        g64 = g.detach().double()
        rec["finite"] = rec["finite"] and bool(torch.isfinite(g64).all())
        norm = float(g64.norm())
        rec[part] = math.hypot(rec[part], norm) if part == "upstream" else norm
    for name in head_params:
        grads.setdefault(name, {"final_weight": 0.0, "final_bias": 0.0, "upstream": 0.0, "finite": True})
    return grads, None


def _head_params(warps) -> dict[str, dict[str, list]]:
    from .export import final_layer

    out: dict[str, dict[str, list]] = {}
    for name, warp in warps.items():
        final = final_layer(warp)
        ids = {id(final.weight), id(final.bias) if final.bias is not None else None}
        out[name] = {"final_weight": [final.weight],
                     "final_bias": [final.bias] if final.bias is not None else [],
                     "upstream": [p for p in warp.parameters() if id(p) not in ids]}
    return out


def _onnx_row(model: nn.Module, example: torch.Tensor, *, opset: int, exporter: str,
              n_outputs: int | None, reference=None) -> CheckResult:
    from .errors import CheckFailed, SpliceError
    from .export import check_onnx_graph, export_onnx_bytes, onnx_parity

    twin = model if example.dtype == torch.float32 else copy.deepcopy(model).float()
    x = example.float()
    if twin is not model:
        reference = None  # the probe outputs were computed in another dtype
    fed = exporter == "torchscript"
    result = None
    if fed:
        try:
            result = check_onnx_graph(twin, x, opset=opset, reference=reference)
        except SpliceError:
            # a model whose forward reads its tensors in ways the feeding cannot
            # follow (or a graph onnxruntime refuses): check a self-contained graph instead
            fed = False
    if result is None:
        start = time.perf_counter()
        try:
            # constant folding only tidies the graph (onnxruntime folds again when it
            # loads it) and costs more than the export itself on deep nets
            data = export_onnx_bytes(twin, x, opset=opset, exporter=exporter, fold_constants=False,
                                     n_outputs=n_outputs)
        except SpliceError as exc:
            return CheckResult("onnx", False, {"opset": opset, "exporter": exporter}, str(exc), "export failed")
        seconds = time.perf_counter() - start
        start = time.perf_counter()
        try:
            parity = onnx_parity(twin, data, x, references=None if reference is None else [reference])
        except CheckFailed as exc:
            return CheckResult("onnx", False, {"opset": opset, "exporter": exporter, "export_seconds": seconds},
                               str(exc), "onnxruntime failed")
        result = {**parity, "export_seconds": seconds, "check_seconds": time.perf_counter() - start,
                  "bytes": len(data)}
    seconds = result["export_seconds"]
    numbers = {"opset": opset, "exporter": exporter, "weights_as_inputs": fed,
               **{k: result[k] for k in ("export_seconds", "check_seconds", "bytes", "max_abs", "max_rel",
                                         "max_abs_perturbed", "max_rel_perturbed", "tolerance", "perturbed_by",
                                         "batch_sizes")}}
    if example.dtype != torch.float32:
        numbers["note"] = "run in float32 (onnxruntime's GridSample is float32)"
    summary = (f"abs {_fmt(result['max_abs'])}, perturbed {_fmt(result['max_abs_perturbed'])}, "
               f"export {seconds:.2f}s")
    return CheckResult("onnx", bool(result["passed"]), numbers,
                       f"onnxruntime vs torch (opset {opset}, {exporter}{', weights fed as inputs' if fed else ''}): "
                       f"{result['detail']}", summary)


# ----------------------------------------------------------------------------- the runner


def _info_of(spliced: nn.Module, info: Mapping | None) -> dict:
    from .errors import SpliceError

    data = dict(info if info is not None else (getattr(spliced, "splice_info", None) or {}))
    if not data.get("input_shape"):
        raise SpliceError("verify needs the model's input shape: pass a model from splice.insert/splice.load "
                          "(it carries splice_info) or info={'input_shape': (C, H, W), ...}")
    return data


def _run_checks(base: nn.Module, spliced: nn.Module, info: dict, *, images, image_files, batch: int,
                dtype: torch.dtype, onnx: bool, opset: int, exporter: str, seed: int, tol: float | None,
                recorded_base: str | None, rows: list[CheckResult], meta: dict, owned: bool,
                lap: _Laps) -> VerifyReport:
    from ._io import state_dict_sha256
    from .surgery import WARP_PREFIX, warps_of

    input_shape = tuple(int(d) for d in info["input_shape"])
    base_state = {k: v for k, v in spliced.state_dict().items() if not k.startswith(WARP_PREFIX + ".")}
    meta["hashes"]["base_sha256"] = state_dict_sha256(base_state)
    provenance = _provenance_row(info, base_state, meta["hashes"]["base_sha256"], recorded_base, input_shape)
    lap("provenance")
    current = next(iter(spliced.parameters()), None)
    if current is not None and current.dtype != dtype:
        if not owned:  # never change the caller's models
            base, spliced = copy.deepcopy(base), copy.deepcopy(spliced)
        base.to(dtype)
        spliced.to(dtype)
    warps = warps_of(spliced)
    distances = {name: float(w.identity_distance()) for name, w in warps.items()}
    tuned_declared = info.get("tuning") is not None
    tuned = tuned_declared or any(d > 0 for d in distances.values())
    meta["tuned"] = tuned
    points = {p["name"]: tuple(p["shape"]) for p in info.get("points") or [] if p.get("shape")}

    snapshot = _Snapshot({"base": base, "spliced": spliced})
    head_params = _head_params(warps)
    grad_flags = {id(p): p.requires_grad for parts in head_params.values() for ps in parts.values() for p in ps}
    base.eval()
    spliced.eval()
    n_outputs = None
    first_sample = None
    try:
        for parts in head_params.values():
            for ps in parts.values():
                for p in ps:
                    p.requires_grad_(True)
        x = probe_batch(input_shape, batch, seed=seed, dtype=dtype)
        ref = _run(base, x, "base model")
        lap("base forward")
        probe = _WarpProbe(warps)
        error = None
        out = None
        try:
            with torch.enable_grad():
                out = spliced(x)
        except Exception as exc:
            error = _error_text(exc)
        finally:
            probe.remove()
        lap("spliced forward")
        rows.append(_shapes_row(probe, warps, points, ref, out, error))
        if out is None:
            rows.append(CheckResult("outputs", False, {}, f"the spliced model fails on the probe ({error})",
                                    "forward failed"))
            rows.append(_warps_row(warps, distances, probe, tuned_declared, None, {}))
        else:
            stored_out = out
            identity_model = _reset_copy(spliced) if tuned else spliced
            with torch.no_grad():
                id_out = identity_model(x) if tuned else stored_out
            cmp = compare_outputs(ref, _detached(id_out), tol=tol)
            rows.append(_outputs_row("outputs", cmp, tuned, f"seeded N(0,1) probe of {batch}"))
            if images is not None:
                chunks = []
                for start in range(0, images.shape[0], batch):
                    chunk = images[start:start + batch].to(dtype)
                    chunks.append(compare_outputs(_run(base, chunk, "base model"),
                                                  _run(identity_model, chunk, "spliced model"), tol=tol))
                rows.append(_outputs_row("images", _merge_compares(chunks), tuned,
                                         f"{images.shape[0]} image(s) from --images"))
            deviation = compare_outputs(_detached(id_out), _detached(stored_out), tol=math.inf) if tuned else None
            per_warp = {}
            moved = [n for n, d in distances.items() if d > 0]
            if tuned and len(moved) > 1:
                for name in moved:
                    with torch.no_grad():
                        per_warp[name] = compare_outputs(_detached(id_out), _only_copy(spliced, name)(x), tol=math.inf)
            rows.append(_warps_row(warps, distances, probe, tuned_declared, deviation, per_warp))
            n_outputs = len(flatten_outputs(id_out))
            # the stored model's outputs for the first probe sample: the ONNX check's torch side
            first_sample = _first_rows(_detached(stored_out), batch)
        lap("outputs")
        rows.append(provenance)
        if out is not None:
            grads, gerr = _gradients(out, head_params, seed)
            rows.append(_gradients_row(warps, grads, gerr))
            lap("gradients")
            out = None  # free the autograd graph before exporting
        else:
            rows.append(CheckResult("gradients", False, {}, "not run: the spliced model fails on the probe",
                                    "not run"))
        if onnx:
            row = _onnx_row(spliced, x[:1], opset=opset, exporter=exporter, n_outputs=n_outputs,
                                         reference=first_sample)
            rows.append(row)
            lap("onnx")
    finally:
        for parts in head_params.values():
            for ps in parts.values():
                for p in ps:
                    p.requires_grad_(grad_flags[id(p)])
        snapshot.restore_modes()
    rows.append(snapshot.check())
    lap("buffers")
    meta["seconds"] = {k: round(v, 4) for k, v in lap.seconds.items()}
    if image_files is not None:
        meta["images"] = image_files
    return VerifyReport(rows, meta)


def _first_rows(out, batch: int):
    """``out`` restricted to the first sample, or ``None`` if some output has no batch dimension."""
    flat = flatten_outputs(out)
    if not flat or any(t.dim() == 0 or t.shape[0] != batch for t in flat.values()):
        return None

    def cut(o):
        if isinstance(o, torch.Tensor):
            return o[:1]
        if isinstance(o, Mapping):
            return {k: cut(v) for k, v in o.items()}
        if isinstance(o, tuple) and hasattr(o, "_fields"):  # a named tuple
            return type(o)(*(cut(v) for v in o))
        if isinstance(o, (tuple, list)):
            return type(o)(cut(v) for v in o)
        return o

    return cut(out)


def _detached(out):
    """``out`` (a tensor or nested tuple/list/dict of them) with every tensor detached, containers kept."""
    if isinstance(out, torch.Tensor):
        return out.detach()
    if isinstance(out, Mapping):
        return {k: _detached(v) for k, v in out.items()}
    if isinstance(out, tuple) and hasattr(out, "_fields"):  # a named tuple
        return type(out)(*(_detached(v) for v in out))
    if isinstance(out, (tuple, list)):
        return type(out)(_detached(v) for v in out)
    return out


def _meta(*, folder, seed, dtype, batch, onnx, opset, exporter, info) -> dict:
    return {
        "folder": str(folder) if folder is not None else None,
        "created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        "seed": int(seed), "dtype": str(dtype).replace("torch.", ""), "batch": int(batch),
        "onnx": {"opset": opset, "exporter": exporter} if onnx else None,
        "input_shape": list(info.get("input_shape") or []) if info else None,
        "points": [p.get("name") for p in (info or {}).get("points") or []],
        "tuning": (info or {}).get("tuning"),
        "versions": versions(), "hashes": {}, "tuned": None,
    }


def _check_onnx_options(onnx: bool, opset: int, exporter: str) -> None:
    if onnx:
        from .export import _check_opset

        _check_opset(opset, exporter)


def verify_models(base: nn.Module, spliced: nn.Module, *, info: Mapping | None = None, images=None,
                  batch: int = 1, dtype="float32", onnx: bool = False, opset: int = 17, seed: int = 0,
                  exporter: str = "torchscript", tol: float | None = None) -> VerifyReport:
    """Run the checks on a base and a spliced model in memory (neither is changed).

    ``info`` defaults to ``spliced.splice_info`` (set by :func:`splice.insert`
    and :func:`splice.load`). ``images`` is a folder, files, or an already
    normalised ``(N, C, H, W)`` tensor. The folder-only checks (integrity,
    finite) are not run.
    """
    lap = _Laps()
    info = _info_of(spliced, info)
    dt = _resolve_dtype(dtype)
    _check_batch(batch)
    _check_onnx_options(onnx, opset, exporter)
    files = None
    if images is not None and not isinstance(images, torch.Tensor):
        images, files = _read_images(images, info["input_shape"], info.get("normalisation"))
    meta = _meta(folder=info.get("folder"), seed=seed, dtype=dt, batch=batch, onnx=onnx, opset=opset,
                 exporter=exporter, info=info)
    meta["hashes"]["source_sha256"] = info.get("source_weights_sha256")
    return _run_checks(base, spliced, info, images=images, image_files=files, batch=batch, dtype=dt, onnx=onnx,
                       opset=opset, exporter=exporter, seed=seed, tol=tol, recorded_base=None, rows=[], meta=meta,
                       owned=False, lap=lap)


def verify(folder: str | os.PathLike, *, images=None, batch: int = 1, dtype="float32", onnx: bool = False,
           opset: int = 17, seed: int = 0, trust_pickle: bool = False, exporter: str = "torchscript",
           tol: float | None = None) -> VerifyReport:
    """Certify a spliced folder against its base, rebuilt from the manifest.

    Returns a :class:`VerifyReport`; ``report.passed`` is ``True`` only when
    every check passed. The checks and their tolerances are described in this
    module's docstring. Bad input (missing folder, schema violations, bad
    options, unreadable images) raises :class:`~splice.errors.SpliceError`;
    a certificate that does not hold is a report with failed rows.

    >>> report = splice.verify("out/r18-affine", onnx=True)   # doctest: +SKIP
    >>> report.passed, report.failed                          # doctest: +SKIP
    (True, [])
    """
    from ._io import file_sha256
    from .errors import WeightsError
    from .sources import read_safetensors
    from .store import MANIFEST_NAME, _assembled, _base_from_state, _base_part, _empty_base, _frame, read_manifest

    lap = _Laps()
    folder = Path(folder)
    manifest = read_manifest(folder)
    dt = _resolve_dtype(dtype)
    _check_batch(batch)
    _check_onnx_options(onnx, opset, exporter)
    info = {
        "spec": manifest["source"]["spec"], "kwargs": manifest["source"].get("kwargs") or {},
        "input_shape": manifest["input_shape"], "normalisation": manifest.get("normalisation"),
        "points": manifest["points"], "tuning": manifest.get("tuning"), "leaves": manifest.get("leaves") or [],
        "source_weights_sha256": manifest["source"].get("weights_sha256"),
        "source_weights_path": manifest["source"].get("weights_file"),
        "random_init": bool(manifest["source"].get("random_init", False)), "folder": str(folder),
    }
    files = None
    images_t = None
    if images is not None:
        images_t, files = _read_images(images, manifest["input_shape"], manifest.get("normalisation"))
    meta = _meta(folder=folder, seed=seed, dtype=dt, batch=batch, onnx=onnx, opset=opset, exporter=exporter,
                 info=info)
    weights = folder / manifest["weights"]["file"]
    if not weights.is_file():
        raise WeightsError(f"'{weights}' is missing; the folder is incomplete — re-create it with 'splice insert'")
    recorded = manifest["weights"]["sha256"]
    meta["hashes"].update({"manifest_sha256": file_sha256(folder / MANIFEST_NAME), "weights_sha256_recorded": recorded,
                           "source_sha256": info["source_weights_sha256"]})
    with ThreadPoolExecutor(max_workers=1) as pool:
        # hashing releases the GIL (file_sha256 hashes the mapped file in one call):
        # the file is hashed while the empty models are built; no byte of it is
        # loaded before its hash is known to match
        file_hash = pool.submit(file_sha256, weights)
        empty = frame = None
        try:
            empty = _empty_base(manifest)
            frame = _frame(empty, manifest, copy_base=True) if empty is not None else None
        except Exception:  # left to the slow path below, which reports it after the integrity check
            empty = frame = None
        actual = file_hash.result()
    meta["hashes"]["weights_sha256"] = actual
    rows = [_integrity_row(weights, recorded, actual)]
    if not rows[0].passed:
        meta["not_run"] = "the weights file cannot be trusted, so no other check ran"
        return VerifyReport(rows, meta)
    # the tensors stay backed by the mapped file (safetensors maps it): both models
    # live only as long as this call, so they are not copied out as load() does
    state = read_safetensors(weights)
    lap("integrity")
    rows.append(_finite_row(state, f"'{weights}'"))
    lap("finite")
    if not rows[-1].passed:
        meta["not_run"] = "the weights hold NaN/Inf values, so no other check ran"
        return VerifyReport(rows, meta)
    spliced = _assembled(manifest, state, folder, trust_pickle=trust_pickle, empty=empty, frame=frame)
    spliced.splice_info = dict(info)
    spliced.eval()
    lap("spliced")
    base = _base_from_state(manifest, _base_part(state), trust_pickle=trust_pickle, empty=empty)
    lap("base")
    return _run_checks(base, spliced, info, images=images_t, image_files=files, batch=batch, dtype=dt, onnx=onnx,
                       opset=opset, exporter=exporter, seed=seed, tol=tol,
                       recorded_base=manifest["weights"].get("base_sha256"), rows=rows, meta=meta, owned=True,
                       lap=lap)


# ----------------------------------------------------------------------------- output


def render_verify(report: VerifyReport, console) -> None:
    """Print the certificate as a rich table (check, numbers, PASS/FAIL), then the failures' details."""
    from rich.table import Table

    where = report.meta.get("folder") or "model"
    table = Table(title=f"splice verify {where} (seed {report.meta.get('seed')}, {report.meta.get('dtype')}, "
                        f"batch {report.meta.get('batch')})")
    table.add_column("check")
    table.add_column("numbers")
    table.add_column("result", justify="center")
    for row in report.checks:
        table.add_row(row.check, row.summary or row.detail,
                      "[bold green]PASS[/]" if row.passed else "[bold red]FAIL[/]")
    console.print(table)
    for row in report.checks:
        if not row.passed:
            console.print(f"[bold red]{row.check}[/]: {row.detail}", markup=True, highlight=False)
    if report.meta.get("not_run"):
        console.print(f"not run: {report.meta['not_run']}")
    n = len(report.checks)
    if report.passed:
        console.print(f"[bold green]PASS[/]: all {n} checks passed", markup=True)
    else:
        console.print(f"[bold red]FAIL[/]: {len(report.failed)} of {n} checks failed ({', '.join(report.failed)})",
                      markup=True)


def write_report(report: VerifyReport, path: str | os.PathLike) -> Path:
    """Write the JSON certificate to ``path`` atomically."""
    from ._io import atomic_write_json

    return atomic_write_json(path, report.to_json())
