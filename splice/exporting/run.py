"""``splice export``: export a spliced folder, keep only copies that pass parity."""

from __future__ import annotations

import os
import time
import warnings
from pathlib import Path

import torch

from ..copies import rng_kept, tree_copy
from ..errors import CheckFailed, EditedManifestWarning, SpliceError, SpliceWarning, first_line
from ..folders import check_file_target
from ..manifest import MANIFEST_NAME, WEIGHTS_NAME, edited_fields, info_of
from ..sources import code_change
from ..store import load
from .onnx import batch_bound, check_opset, export_onnx_bytes, site_names, with_metadata
from .parity import model_dtype, onnx_parity
from .pt2 import export_pt2_bytes, pt2_parity

__all__ = ["export", "export_model"]


def _probe_inputs(shapes, dtype, *, dynamic_batch: bool, seed: int) -> tuple[tuple, list[tuple]]:
    """(trace example, check batches), one tensor per input each: static traces at 1 and checks on that batch and
    a fresh one (a graph checked only on what it was traced on proves nothing of other inputs); dynamic traces at
    2 and checks at 1 and 3."""
    gen = torch.Generator().manual_seed(seed)

    def batch(n: int) -> tuple[torch.Tensor, ...]:
        return _seeded_batch(shapes, dtype, n, gen)

    if dynamic_batch:
        example = batch(2)
        return example, [batch(1), batch(3)]
    x = batch(1)
    return x, [x, batch(1)]

def _seeded_batch(shapes, dtype, n: int, gen: torch.Generator) -> tuple[torch.Tensor, ...]:
    """A batch of ``n``, one N(0, 1) tensor per input (of the per-sample ``shapes``), drawn from ``gen``."""
    return tuple(torch.randn((n, *shape), generator=gen).to(dtype) for shape in shapes)

def _keep(path: str | os.PathLike, data: bytes) -> tuple[Path, str]:
    import hashlib

    from ..fileio import atomic_write_bytes, file_sha256

    target = atomic_write_bytes(path, data)
    digest = hashlib.sha256(data).hexdigest()
    if file_sha256(target) != digest:  # the disk gave back other bytes than were written
        target.unlink(missing_ok=True)
        raise SpliceError(f"'{target}' reads back different bytes than were written; check the disk and retry")
    return target, digest

def _one(model, fmt: str, shapes, *, dynamic_batch: bool, opset: int, exporter: str, seed: int, tol) -> tuple:
    """``(bytes, parity result, seconds)`` of one export, traced and checked on seeded inputs."""
    example, batches = _probe_inputs(shapes, model_dtype(model), dynamic_batch=dynamic_batch, seed=seed)
    start = time.perf_counter()
    if fmt == "onnx":
        conversions: list[str] = []
        data = export_onnx_bytes(model, example, opset=opset, dynamic_batch=dynamic_batch, exporter=exporter,
                                 conversions=conversions)
        seconds = time.perf_counter() - start
        result = onnx_parity(model, data, batches, tol=tol, exporter=exporter, conversions=conversions)
        if dynamic_batch and result["passed"] and batch_bound(model, example):  # checked at 1 and 3, not beyond
            result = _larger_batches(model, data, result, shapes, exporter=exporter, seed=seed, tol=tol)
        return data, result, seconds
    data = export_pt2_bytes(model, example, dynamic_batch=dynamic_batch)
    seconds = time.perf_counter() - start
    return data, pt2_parity(model, data, batches, tol=tol), seconds


#: the batch sizes a graph for any batch is checked at besides 1 and 3, when torch.export sees a guard on the batch
#: size (:func:`~.onnx.batch_bound`): thresholds in code are small numbers (common practice, no source), and a
#: batch of 9 is three times the memory of the check at 3
LARGER_BATCHES = (5, 9)


def _larger_batches(model, data: bytes, result: dict, shapes, *, exporter: str, seed: int, tol) -> dict:
    """``result`` of a graph for any batch, checked again at :data:`LARGER_BATCHES`: a miss fails it (a branch on
    the batch size, which the graph fixed at the traced batch's), matches are said."""
    gen = torch.Generator().manual_seed(seed + 7)
    larger = [_seeded_batch(shapes, model_dtype(model), n, gen) for n in LARGER_BATCHES]
    found = onnx_parity(model, data, larger, tol=tol, exporter=exporter, perturb=False)
    sizes = ", ".join(str(n) for n in LARGER_BATCHES)
    if not found["passed"]:
        return {**result, "passed": False, "branch_on_batch": True,
                "detail": f"{result['detail']}; at batch sizes {sizes}: {found['detail']} (torch.export sees a guard "
                          "on the batch size: the model takes a Python branch or number from it, which a graph for "
                          "any batch fixes at the traced batch's)"}
    return {**result, "batch_sizes": [*result.get("batch_sizes", []), *LARGER_BATCHES],
            "detail": f"{result['detail']}; torch.export sees a guard on the batch size, and the graph matched at "
                      f"batch sizes {sizes} too"}


def _checked(model, fmt: str, shapes, *, dynamic_batch: bool, **options) -> tuple:
    """:func:`_one`, with a dynamic batch when asked and the model allows it, else a static batch of 1.

    A model whose graph depends on the batch size (a detector that loops over
    the images of a batch) traces into a graph for one batch size only: its
    dynamic-batch export fails at batch sizes 1 and 3, and a static one is
    written instead, with a warning.
    """
    if dynamic_batch:
        try:
            data, result, seconds = _one(model, fmt, shapes, dynamic_batch=True, **options)
        except SpliceError as exc:
            data, result, seconds = None, {"passed": False, "detail": first_line(exc)}, 0.0
        if result["passed"] or result.get("branch_on_values"):  # a static batch fixes no branch on values
            return data, result, seconds, True
        static = _one(model, fmt, shapes, dynamic_batch=False, **options)
        if not static[1]["passed"]:  # both fail: say how each did, so --static-batch is not tried in vain
            if data is None:
                return (*static, False)
            both = {**result, "detail": f"{result['detail']}; with a static batch of 1: {static[1]['detail']}"}
            return data, both, seconds, True
        # output shapes that follow the traced batch (a loop over the images), or a graph onnxruntime cannot run
        # at another batch, show a graph that depends on the batch size (the static one passed); differing values
        # alone may also come from an ill-conditioned probe (torch float32 far from float64)
        sized = result.get("shapes_equal") is False or result.get("max_abs") is None
        why = ("the model's graph depends on its batch size" if sized else
               "the graph may hold the traced batch's sizes, or the probe is ill-conditioned")
        how = (f"failed ({result['detail']})" if data is None else
               f"would fix the model's branch on its batch size ({result['detail']})" if result.get("branch_on_batch")
               else f"does not match the model at batch sizes 1 and 3 ({result['detail']}); {why}")
        warnings.warn(f"the {fmt} export with a dynamic batch {how}, so a static batch of 1 is exported instead "
                      "(--static-batch says so explicitly)", SpliceWarning, stacklevel=3)
        return (*static, False)
    data, result, seconds = _one(model, fmt, shapes, dynamic_batch=False, **options)
    return data, result, seconds, False


@rng_kept()
def export(folder: str | os.PathLike, onnx: str | os.PathLike | None = None, pt2: str | os.PathLike | None = None,
           *, opset: int = 17, dynamic_batch: bool = True, trust_pickle: bool = False,
           exporter: str = "torchscript", seed: int = 0, tol: float | None = None, trust_code: bool = False) -> dict:
    """Export a spliced folder to ONNX and/or torch.export, keeping only copies that pass parity.

    Each export is checked with :func:`onnx_parity` / :func:`pt2_parity` (as
    stored and with a perturbed warp) on seeded N(0,1) inputs. The batch
    dimension is dynamic by default: traced at 2, checked at 1 and 3; a model
    whose graph depends on the batch size gets a static export of batch 1
    instead, with a :class:`~splice.errors.SpliceWarning` (``dynamic_batch=False``,
    ``--static-batch``, asks for that directly). A failed check raises
    :class:`~splice.errors.CheckFailed` and writes nothing. An existing
    ``.onnx`` / ``.pt2`` file at the target is replaced atomically; an existing
    file of any other name is refused.

    Returns ``{"exports": [{"path", "format", "sha256", "seconds", "max_abs",
    "max_rel", "max_abs_perturbed", "max_rel_perturbed", "tolerance",
    "float64_rounding", "batch_sizes", "dynamic_batch", ...}]}``;
    ``float64_rounding`` is set when a comparison missed the float32 tolerance
    and passed only because torch float32 was farther from float64 on that
    probe than the export was from torch (an ill-conditioned probe).

    >>> splice.export("out/r18-affine", onnx="r18.onnx")   # doctest: +SKIP
    """
    _check_targets(onnx, pt2, opset, exporter)
    edited = _edited(folder)
    with warnings.catch_warnings():
        if edited:  # said once, below, after the folder's other checks (its trust gate first)
            warnings.simplefilter("ignore", EditedManifestWarning)
        model = load(folder, trust_pickle=trust_pickle, trust_code=trust_code)
    if edited:  # the file would ship what verify's integrity row fails
        raise CheckFailed(f"'{folder}': {MANIFEST_NAME}'s {', '.join(edited)} differ from those its weights were "
                          f"written with (edited after saving); restore {MANIFEST_NAME} from a good copy or insert "
                          "again; nothing was exported")
    told = code_change(info_of(model).spec, info_of(model).code_sha256)
    if told is not None:  # the parity check would compare the new code with itself, and pass
        raise CheckFailed(f"'{folder}': {told}; nothing was exported")
    return _export_loaded(model, f"'{folder}'", onnx, pt2, opset=opset, dynamic_batch=dynamic_batch,
                          exporter=exporter, seed=seed, tol=tol)


def _edited(folder) -> list[str]:
    """The fields of a folder's splice.json edited after saving (:func:`~splice.manifest.edited_fields`); none when
    the manifest cannot be read (:func:`~splice.store.load` says what is wrong with it)."""
    import json

    path = Path(folder)
    try:
        manifest = json.loads((path / MANIFEST_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return []
    return edited_fields(path / WEIGHTS_NAME, manifest) if isinstance(manifest, dict) else []


@rng_kept()
def export_model(model: torch.nn.Module, onnx: str | os.PathLike | None = None,
                 pt2: str | os.PathLike | None = None, *, opset: int = 17, dynamic_batch: bool = True,
                 exporter: str = "torchscript", seed: int = 0, tol: float | None = None) -> dict:
    """:func:`export` for a spliced model in memory (one that carries its record, from :func:`splice.insert`
    or :func:`splice.load`); the model is not changed. Same checks, same result."""
    if info_of(model) is None:
        raise SpliceError("export_model needs a spliced model (from splice.insert or splice.load), which carries "
                          "its input shapes; save a plain model with splice.save(model, folder, source=SPEC) first")
    _check_targets(onnx, pt2, opset, exporter)
    return _export_loaded(model, "the model", onnx, pt2, opset=opset, dynamic_batch=dynamic_batch,
                          exporter=exporter, seed=seed, tol=tol)


def _check_targets(onnx, pt2, opset: int, exporter: str) -> None:
    if onnx is None and pt2 is None:
        raise SpliceError("export needs a target: onnx=FILE (--onnx FILE) and/or pt2=FILE (--pt2 FILE)")
    if onnx is not None:
        check_opset(opset, exporter)
    if onnx is not None and pt2 is not None and Path(onnx).resolve() == Path(pt2).resolve():
        raise SpliceError(f"--onnx and --pt2 name the same file '{onnx}', and the second export would replace the "
                          "first; give each its own file (model.onnx, model.pt2)")
    for target, suffix in ((onnx, ".onnx"), (pt2, ".pt2")):
        # an earlier export is replaced; a file of another kind (a typo'd source file, a checkpoint) is not
        if target is not None:
            check_file_target(target, "export target", f"model{suffix}", suffix=suffix)


def _deployment_notes(model) -> dict[str, str]:
    """What the ONNX file says of itself (``metadata_props``, JSON values): the input shapes, the normalisation the
    images need first, the class names, the outputs in the graph's order (``output_i`` is the i-th), the warp
    points and the splice version."""
    import json

    from ..compare import flatten_outputs
    from ..copies import private_buffers
    from ..version import __version__

    info = info_of(model)
    twin = private_buffers(model).eval()  # a forward of splice's own: the caller's modes and buffers stay
    param = next(iter(model.parameters()), None)
    like = {"dtype": model_dtype(model), "device": param.device if param is not None else "cpu"}
    try:
        with torch.no_grad():
            outputs = list(flatten_outputs(twin(*[torch.zeros((1, *s), **like) for s in info.input_shapes])))
    except Exception:  # a forward that refuses zeros: the outputs keep the graph's own names
        outputs = None
    return {"splice.input_shapes": json.dumps([list(s) for s in info.input_shapes]),
            "splice.normalisation": json.dumps(info.normalisation), "splice.class_names": json.dumps(info.class_names),
            "splice.outputs": json.dumps(outputs), "splice.points": json.dumps([p.name for p in info.points]),
            "splice.version": json.dumps(__version__)}  # every value JSON, as the README says


def _updated_by_a_call(model, shapes) -> list[str]:
    """The buffers one eval-mode forward of ``model`` changes (a call counter), run on a twin: the caller's model
    is not changed."""
    from ..copies import buffer_snapshot, changed_buffers, private_buffers
    from ..graph.shapes import model_device

    twin = private_buffers(model).eval()
    like = {"dtype": model_dtype(model), "device": model_device(model)}
    before = buffer_snapshot(twin)
    try:
        with torch.no_grad():
            twin(*[torch.randn((2, *s), **like) for s in shapes])
    except Exception:  # the failure the check reported says enough
        return []
    return changed_buffers(before, twin)


def moving_state(moved: list[str]) -> str:
    """Why an exported graph cannot answer as a model whose forward updates the buffers ``moved`` at every call."""
    return (f"the model updates {', '.join(moved[:4])} at every call, which an exported graph holds at its value "
            "when exported")


def _float32_for_onnx(model):
    """``model``, or a float32 copy of a float64, float16 or bfloat16 one, with a warning: onnxruntime's grid
    sampling runs in float32 only (and no float64 convolution), and ``verify --onnx`` checks a float32 copy too.
    The caller's model is not changed."""
    dtype = model_dtype(model)
    if not dtype.is_floating_point or dtype == torch.float32:
        return model
    from ..manifest import attach_info

    warnings.warn(f"the model is {str(dtype).replace('torch.', '')}, and onnxruntime samples grids in float32 only: "
                  "the ONNX file is exported from a float32 copy (as verify --onnx checks it)", SpliceWarning,
                  stacklevel=4)
    twin = tree_copy(model).float()
    attach_info(twin, info_of(model))  # a GraphModule's deepcopy drops its record
    return twin


def _export_loaded(model, what: str, onnx, pt2, *, opset: int, dynamic_batch: bool, exporter: str, seed: int,
                   tol: float | None) -> dict:
    shapes = info_of(model).input_shapes
    jobs = [(fmt, target) for fmt, target in (("onnx", onnx), ("pt2", pt2)) if target is not None]
    done = []
    for fmt, target in jobs:
        model_fmt = _float32_for_onnx(model) if fmt == "onnx" else model
        data, result, seconds, dynamic = _checked(model_fmt, fmt, shapes, dynamic_batch=dynamic_batch, opset=opset,
                                                  exporter=exporter, seed=seed, tol=tol)
        if not result["passed"]:
            hint = "" if result.get("tracer_conversions") else ". Try another --opset or report the model"
            moved = _updated_by_a_call(model_fmt, shapes)
            if moved:  # no exported graph can follow state that every call changes
                note = moving_state(moved)
                hint = f". {note[0].upper()}{note[1:]}, so no such file answers as the model does on later calls"
            raise CheckFailed(
                f"the {fmt} export of {what} does not match the model ({result['detail']}); "
                f"nothing was written to '{target}'{hint}"
            )
        if fmt == "onnx":
            data = with_metadata(data, _deployment_notes(model_fmt))
            if result.get("unproven"):
                warnings.warn(f"the ONNX graph of {what} holds Python values the tracer fixed at "
                              f"{site_names(result.get('tracer_conversions', []))}; it matched torch on the probes, "
                              "but is not proven for every input: check it on your own images with "
                              "'splice verify DIR --onnx --images FOLDER'", SpliceWarning,
                              stacklevel=3)
        path, digest = _keep(target, data)
        done.append({"path": str(path), "format": fmt, "sha256": digest, "seconds": seconds,
                     "dynamic_batch": dynamic,
                     **({"opset": opset, "exporter": exporter} if fmt == "onnx" else {}),
                     **{k: v for k, v in result.items() if k != "passed"}})
    return {"exports": done}
