"""The runner: :func:`verify` (a folder, opened with :func:`splice.store.open_folder`) and
:func:`verify_models` (models in memory) run the rows in order and return a :class:`VerifyReport`."""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import os
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import nn

from ..fileio import file_sha256, state_dict_sha256
from ..compare import compare_outputs, detached, flatten_outputs
from ..copies import collector_paused, own_buffers_, private_buffers, rng_kept, same_draws, tree_copy
from ..errors import SpliceError
from ..exporting import check_opset
from ..exporting.run import moving_state
from ..limits import check_fits, tensor_bytes
from ..manifest import MANIFEST_NAME, SpliceInfo, edited_fields, info_of
from ..store import base_part, open_folder
from ..surgery import warps_of
from .gradients import at_identity, gradient_norms, gradients_row, onnx_row, outputs_move, warp_head_params
from .probe import (
    Laps,
    Snapshot,
    WarpProbe,
    check_batch,
    error_text,
    only_copy,
    probe_inputs,
    read_images,
    reset_copy,
    resolve_dtype,
    run_no_grad,
)
from .provenance import provenance_row
from .report import CheckResult, VerifyReport, versions
from .rows import (
    finite_row,
    integrity_row,
    merge_compares,
    outputs_row,
    shapes_row,
    warps_row,
)

__all__ = ["verify", "verify_models"]


@dataclass(frozen=True)
class _Options:
    """The options of one verification, checked once (bad input raises :class:`SpliceError`)."""

    batch: int
    dtype: torch.dtype
    onnx: bool
    opset: int
    exporter: str
    seed: int
    tol: float | None
    trust_code: bool = False
    trust_pickle: bool = False

    @classmethod
    def checked(cls, *, batch, dtype, onnx, opset, exporter, seed, tol, trust_code=False,
                trust_pickle=False) -> _Options:
        dt = resolve_dtype(dtype)
        check_batch(batch)
        if onnx:
            check_opset(opset, exporter)
        return cls(batch, dt, bool(onnx), opset, exporter, seed, tol, bool(trust_code), bool(trust_pickle))


def _info_of(spliced: nn.Module, info: SpliceInfo | Mapping | None) -> SpliceInfo:
    if isinstance(info, Mapping):
        info = SpliceInfo(**info) if info.get("input_shape") else None
    elif info is None:
        info = info_of(spliced)
    if info is None or not info.input_shape:
        raise SpliceError("verify needs the model's input shape: pass a model from splice.insert/splice.load "
                          "(it carries splice_info) or info={'input_shape': (C, H, W), ...}")
    return info


def _images_for(info: SpliceInfo, images) -> tuple[torch.Tensor, list[str]]:
    if info.extra_inputs:
        raise SpliceError(f"--images probes models with one input; this one takes {len(info.input_shapes)} "
                          "(the seeded probe covers every input): drop --images")
    return read_images(images, info.input_shape, info.normalisation)


def _meta(*, folder, opts: _Options, info: SpliceInfo) -> dict:
    return {
        "folder": str(folder) if folder is not None else None,
        "created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        "seed": int(opts.seed), "dtype": str(opts.dtype).replace("torch.", ""), "batch": int(opts.batch),
        "onnx": {"opset": opts.opset, "exporter": opts.exporter} if opts.onnx else None,
        "input_shape": list(info.input_shape),
        "points": info.point_names,
        "tuning": info.tuning,
        "versions": versions(), "hashes": {}, "tuned": None,
    }


@dataclass
class _Forward:
    """What the forward rows leave for the later ones."""

    x: tuple[torch.Tensor, ...] = ()  # the probe batch, one tensor per model input
    out: object = None  # the spliced model's output on the probe (with its autograd graph)
    n_outputs: int | None = None
    first_sample: object = None  # the stored model's outputs for a probe of one sample (None for a larger probe)


def _image_rows(base, identity_model, images, opts: _Options, tuned: bool) -> CheckResult:
    chunks = []
    for start in range(0, images.shape[0], opts.batch):
        chunk = images[start:start + opts.batch].to(opts.dtype)
        chunks.append(compare_outputs(run_no_grad(base, chunk, "base model"),
                                      run_no_grad(identity_model, chunk, "spliced model"), tol=opts.tol))
    return outputs_row("images", merge_compares(chunks), tuned, f"{images.shape[0]} image(s) from --images")


def _unsaved_said(row: CheckResult, base: nn.Module, spliced: nn.Module) -> CheckResult:
    """A failed outputs ``row`` that names the base's buffers kept out of the weights (non-persistent) whose values
    differ between the two models: drawn when a model is built, they make every build another model."""
    saved = set(base.state_dict())
    theirs = dict(spliced.named_buffers())
    differ = [n for n, t in base.named_buffers() if n not in saved and n in theirs
              and theirs[n].shape == t.shape and not torch.equal(theirs[n], t)]
    if not differ:
        return row
    return dataclasses.replace(row, detail=(
        f"{row.detail}; the base's buffer{'s' if len(differ) > 1 else ''} {', '.join(repr(n) for n in differ[:4])}"
        f"{', …' if len(differ) > 4 else ''}, kept out of the weights (persistent=False), "
        f"differ{'s' if len(differ) == 1 else ''} between the two "
        "models built here: drawn when a model is built, they make every build another model; register them with "
        "persistent=True, or compute them without a random draw"))


def _output_rows(base, spliced, x, ref, out, probe, *, images, opts: _Options, tuned: bool, tuned_declared: bool,
                 distances: dict[str, float]) -> list[CheckResult]:
    """``outputs``, ``images`` (with images) and ``warps``, from a spliced forward pass that worked."""
    warps = warps_of(spliced)
    identity_model = reset_copy(spliced) if tuned else spliced
    id_out = run_no_grad(identity_model, x, "spliced model at the identity") if tuned else out
    rows = [outputs_row("outputs", compare_outputs(ref, detached(id_out), tol=opts.tol), tuned,
                         f"seeded N(0,1) probe of {opts.batch}")]
    if not rows[0].passed:
        rows[0] = _unsaved_said(rows[0], base, spliced)
    if images is not None:
        rows.append(_image_rows(base, identity_model, images, opts, tuned))
    deviation = compare_outputs(detached(id_out), detached(out), tol=math.inf) if tuned else None
    per_warp = {}
    moved = [n for n, d in distances.items() if d > 0]
    if tuned and len(moved) > 1:
        for name in moved:
            per_warp[name] = compare_outputs(detached(id_out), run_no_grad(only_copy(spliced, name), x,
                                                                           f"spliced model with '{name}' alone moved"),
                                             tol=math.inf)
    rows.append(warps_row(warps, distances, probe, tuned_declared, deviation, per_warp))
    return rows


def _forward_rows(base, spliced, info: SpliceInfo, opts: _Options, *, images, tuned: bool, tuned_declared: bool,
                  distances, rows: list[CheckResult], lap: Laps) -> _Forward:
    """Probe both models; append ``shapes``, ``outputs``, ``images`` and ``warps``."""
    warps = warps_of(spliced)
    points = {p.name: tuple(p.shape) for p in info.points if p.shape}
    x = probe_inputs(info.input_shapes, opts.batch, seed=opts.seed, dtype=opts.dtype)
    ref = run_no_grad(base, x, "base model")
    lap("base forward")
    probe = WarpProbe(warps)
    error = None
    result = _Forward(tuple(t.detach().requires_grad_(t.is_floating_point()) for t in x))
    try:
        with torch.enable_grad(), same_draws():  # the base's draws (see run_no_grad)
            result.out = spliced(*[t.clone() for t in result.x])  # the leaves stay as they are; grads reach them
    except Exception as exc:
        error = error_text(exc)
    finally:
        probe.remove()
    lap("spliced forward")
    rows.append(shapes_row(probe, warps, points, ref, result.out, error))
    if result.out is None:
        rows.append(CheckResult("outputs", False, {}, f"the spliced model fails on the probe ({error})",
                                "forward failed"))
        rows.append(warps_row(warps, distances, probe, tuned_declared, None, {}))
        return result
    rows.extend(_output_rows(base, spliced, x, ref, result.out, probe, images=images, opts=opts, tuned=tuned,
                             tuned_declared=tuned_declared, distances=distances))
    result.n_outputs = len(flatten_outputs(result.out))
    # the ONNX row runs the probe's first sample alone: the probe's outputs are its outputs only for a probe of one
    # (a model whose samples meet, a batch-centred one, answers one sample alone otherwise), else it runs torch itself
    result.first_sample = detached(result.out) if opts.batch == 1 else None
    return result


def _check_probe_fits(info: SpliceInfo, opts: _Options) -> None:
    """Refuse a probe batch that cannot fit, before allocating it: the input and every warped activation, kept
    for the gradient check, about three times over (both models, and the backward pass; a rule of thumb,
    common practice, no source)."""
    shapes = [info.input_shape, *(p.shape for p in info.points if p.shape)]
    check_fits(3 * tensor_bytes(shapes, opts.dtype, opts.batch), f"a probe batch of {opts.batch}",
               "pass a smaller --batch")


def _in_dtype(base, spliced, dtype: torch.dtype, owned: bool):
    current = next(iter(spliced.parameters()), None)
    if current is not None and current.dtype != dtype:
        if not owned:  # never change the caller's models
            base, spliced = tree_copy(base), tree_copy(spliced)
        base.to(dtype)
        spliced.to(dtype)
    return base, spliced


def _after_same_updates(base: nn.Module, identity: nn.Module, x, tol: float | None) -> dict:
    """Base and splice (at the identity) compared on two more calls of ``x`` after the splice's base part took the
    base's buffers: a model whose forward updates buffers in eval mode (a call counter) must go on answering as
    its base does, not only on the first call (a value a trace computed from those buffers stays as it was).
    Runs on twins; ``base`` and ``identity`` are not changed."""
    base, identity = private_buffers(base).eval(), private_buffers(identity).eval()
    own = dict(base.named_buffers())
    with torch.no_grad():
        for name, b in identity.named_buffers():
            src = own.get(name)
            if src is not None and src.shape == b.shape and src.dtype == b.dtype:
                b.copy_(src)
    return merge_compares([compare_outputs(run_no_grad(base, x, "base model"),
                                           run_no_grad(identity, x, "spliced model"), tol=tol) for _ in range(2)])


def _with_moving_state(row: CheckResult, moved: list[str]) -> CheckResult:
    """A failed onnx ``row`` that says why, when the model updates buffers at every call (``moved``): an exported
    graph holds them at their values when exported."""
    if row.passed or not moved:
        return row
    return dataclasses.replace(row, detail=f"{row.detail}; {moving_state(moved)}")


def _run_checks(base: nn.Module, spliced: nn.Module, info: SpliceInfo, opts: _Options, *, images, image_files,
                recorded_base: str | None, rows: list[CheckResult], meta: dict, owned: bool,
                lap: Laps) -> VerifyReport:
    base_state = base_part(spliced.state_dict())
    # hashing releases the GIL: the base part is hashed on a second thread while the probes run (the checks
    # only read the weights, and every forward runs on twins that own their buffers)
    hashing = ThreadPoolExecutor(max_workers=1)
    base_hash = hashing.submit(state_dict_sha256, base_state)
    hashing.shutdown(wait=False)
    reference = None if owned else base  # the caller's base: provenance's last resort when no file is on disk
    base, spliced = _in_dtype(base, spliced, opts.dtype, owned)
    # the ONNX check starts from a model no probe has run (it makes its own twin of it)
    if owned:
        # verify built both models for this call: they run as they are, each module with its own copy of every
        # buffer; the tensors they held before (the folder's) are the snapshot the updates are measured against
        unrun = private_buffers(spliced) if opts.onnx else None
        snapshot = Snapshot.of_own({"base": own_buffers_(base), "spliced": own_buffers_(spliced)})
        base, spliced = base.eval(), spliced.eval()
    else:
        # the caller's models: every forward runs on twins with their own buffers, modes and Python state, so a
        # model that updates a buffer in eval mode (a call counter) is left as it was
        snapshot = Snapshot({"base": base, "spliced": spliced})
        unrun = spliced
        base, spliced = private_buffers(base).eval(), private_buffers(spliced).eval()
    warps = warps_of(spliced)
    distances = {name: float(w.identity_distance()) for name, w in warps.items()}
    tuned_declared = info.tuning is not None
    tuned = tuned_declared or any(d > 0 for d in distances.values())
    meta["tuned"] = tuned
    head_params = warp_head_params(warps)
    flat_params = [p for parts in head_params.values() for ps in parts.values() for p in ps]
    grad_flags = {id(p): p.requires_grad for p in flat_params}
    try:
        for p in flat_params:
            p.requires_grad_(True)
        fwd = _forward_rows(base, spliced, info, opts, images=images, tuned=tuned, tuned_declared=tuned_declared,
                            distances=distances, rows=rows, lap=lap)
        lap("outputs")
        meta["hashes"]["base_sha256"] = base_hash.result()
        buffers = frozenset(n for n, _ in base.named_buffers())
        self_updated = snapshot.updated_by("base", base)  # what the base's own forwards moved, measured once
        rows.append(provenance_row(info, base_state, meta["hashes"]["base_sha256"], recorded_base, info.input_shape,
                                   trust_code=opts.trust_code, buffers=buffers, reference=reference,
                                   trust_pickle=opts.trust_pickle, self_updated=self_updated))
        lap("provenance")
        if fwd.out is not None:
            grads, gerr, input_grad = gradient_norms(fwd.out, head_params, opts.seed, fwd.x)
            row = gradients_row(warps, grads, gerr, input_grad,
                                outputs_move(spliced, fwd.x, fwd.out) if input_grad == 0.0 and gerr is None else None)
            if tuned and not row.passed and gerr is None:
                row = at_identity(spliced, fwd.x, opts.seed, row)
            rows.append(row)
            lap("gradients")
            fwd.out = None  # free the autograd graph before exporting
        else:
            rows.append(CheckResult("gradients", False, {}, "not run: the spliced model fails on the probe", "not run"))
        if opts.onnx:
            example = tuple(t[:1].detach() for t in fwd.x)
            # the model no probe ran (the export makes its own twin of it): a forward that caches tensors derived
            # from parameters (attention biases indexed once in eval mode) left them requiring grad in the probed
            # twin after the gradient check, and the exporter refuses those
            rows.append(_with_moving_state(onnx_row(unrun, example, opset=opts.opset, exporter=opts.exporter,
                                                    n_outputs=fwd.n_outputs, reference=fwd.first_sample,
                                                    images=images),
                                           sorted(self_updated)))
            lap("onnx")
    finally:
        for p in flat_params:
            p.requires_grad_(grad_flags[id(p)])
        snapshot.restore_modes()
    drift = None
    if fwd.n_outputs is not None and self_updated:  # the spliced forward ran
        drift = _after_same_updates(base, reset_copy(spliced) if tuned else spliced,
                                   tuple(t.detach() for t in fwd.x), opts.tol)
    rows.append(snapshot.check({"base": base, "spliced": spliced}, after_updates=drift))
    lap("buffers")
    meta["seconds"] = {k: round(v, 4) for k, v in lap.seconds.items()}
    if image_files is not None:
        meta["images"] = image_files
    return VerifyReport(rows, meta)


@collector_paused()
@rng_kept()
def verify_models(base: nn.Module, spliced: nn.Module, *, info: SpliceInfo | Mapping | None = None, images=None,
                  batch: int = 1, dtype="float32", onnx: bool = False, opset: int = 17, seed: int = 0,
                  exporter: str = "torchscript", tol: float | None = None, trust_code: bool = False) -> VerifyReport:
    """Run the checks on a base and a spliced model in memory (neither is changed).

    ``info`` defaults to the :class:`~splice.manifest.SpliceInfo` the spliced
    model carries (set by :func:`splice.insert` and :func:`splice.load`); a
    mapping of its fields (at least ``input_shape``) also does. ``images`` is
    a folder, files, or an already normalised ``(N, C, H, W)`` tensor. The
    folder-only checks (integrity, finite) are not run.
    """
    lap = Laps()
    info = _info_of(spliced, info)
    opts = _Options.checked(batch=batch, dtype=dtype, onnx=onnx, opset=opset, exporter=exporter, seed=seed, tol=tol,
                            trust_code=trust_code)
    files = None
    if images is not None and not isinstance(images, torch.Tensor):
        images, files = _images_for(info, images)
    meta = _meta(folder=info.folder, opts=opts, info=info)
    meta["hashes"]["source_sha256"] = info.source_weights_sha256
    return _run_checks(base, spliced, info, opts, images=images, image_files=files, recorded_base=None, rows=[],
                       meta=meta, owned=False, lap=lap)


@collector_paused()
@rng_kept()
def verify(folder: str | os.PathLike, *, images=None, batch: int = 1, dtype="float32", onnx: bool = False,
           opset: int = 17, seed: int = 0, trust_pickle: bool = False, exporter: str = "torchscript",
           tol: float | None = None, trust_code: bool = False) -> VerifyReport:
    """Certify a spliced folder against its base, rebuilt from the manifest.

    Returns a :class:`VerifyReport`; ``report.passed`` is ``True`` only when
    every check passed. The checks and their tolerances are described in
    :mod:`splice.verification`. Bad input (missing folder, schema violations,
    bad options, unreadable images) raises :class:`~splice.errors.SpliceError`;
    a certificate that does not hold is a report with failed rows.

    >>> report = splice.verify("out/r18-affine", onnx=True)   # doctest: +SKIP
    >>> report.passed, report.failed                          # doctest: +SKIP
    (True, [])
    """
    lap = Laps()
    folder = Path(folder)
    opts = _Options.checked(batch=batch, dtype=dtype, onnx=onnx, opset=opset, exporter=exporter, seed=seed, tol=tol,
                            trust_code=trust_code, trust_pickle=trust_pickle)
    # the tensors stay backed by the mapped file: both models live only as long as this call
    opened = open_folder(folder, keep_mapped=True, trust_pickle=trust_pickle, strict=False, trust_code=trust_code)
    info = opened.info
    _check_probe_fits(info, opts)
    files = images_t = None
    if images is not None:
        images_t, files = _images_for(info, images)
    meta = _meta(folder=folder, opts=opts, info=info)
    meta["hashes"].update({"manifest_sha256": file_sha256(folder / MANIFEST_NAME),
                           "weights_sha256_recorded": opened.recorded_sha256,
                           "source_sha256": info.source_weights_sha256, "weights_sha256": opened.actual_sha256})
    rows = [integrity_row(opened.weights_path, opened.recorded_sha256, opened.actual_sha256,
                          edited_fields(opened.weights_path, opened.manifest))]
    if not rows[0].passed:
        meta["not_run"] = "the weights file cannot be trusted, so no other check ran"
        return VerifyReport(rows, meta)
    lap("integrity")
    rows.append(finite_row(opened.state, f"'{opened.weights_path}'"))
    lap("finite")
    if not rows[-1].passed:
        meta["not_run"] = "the weights hold NaN/Inf values, so no other check ran"
        return VerifyReport(rows, meta)
    spliced = opened.spliced()
    lap("spliced")
    base = opened.base()
    lap("base")
    return _run_checks(base, spliced, info, opts, images=images_t, image_files=files,
                       recorded_base=opened.manifest["weights"].get("base_sha256"), rows=rows, meta=meta, owned=True,
                       lap=lap)
