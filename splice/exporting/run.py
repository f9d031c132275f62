"""``splice export``: export a spliced folder, keep only copies that pass parity."""

from __future__ import annotations

import os
import time
from pathlib import Path

import torch

from ..errors import CheckFailed, SpliceError
from ..manifest import info_of
from ..store import load
from .onnx import check_opset, export_onnx_bytes
from .parity import _model_dtype, onnx_parity
from .pt2 import export_pt2_bytes, pt2_parity

__all__ = ["export"]


def _probe_inputs(shape, dtype, *, dynamic_batch: bool, seed: int) -> tuple[torch.Tensor, list[torch.Tensor]]:
    """(trace example, check batches): batch 1 static; dynamic traces at 2 and checks at 1 and 3."""
    gen = torch.Generator().manual_seed(seed)
    if dynamic_batch:
        example = torch.randn((2, *shape), generator=gen).to(dtype)
        checks = [torch.randn((n, *shape), generator=gen).to(dtype) for n in (1, 3)]
        return example, checks
    x = torch.randn((1, *shape), generator=gen).to(dtype)
    return x, [x]

def _keep(path: str | os.PathLike, data: bytes) -> tuple[Path, str]:
    import hashlib

    from .._io import atomic_write_bytes, file_sha256

    target = atomic_write_bytes(path, data)
    digest = hashlib.sha256(data).hexdigest()
    if file_sha256(target) != digest:  # the disk gave back other bytes than were written
        target.unlink(missing_ok=True)
        raise SpliceError(f"'{target}' reads back different bytes than were written; check the disk and retry")
    return target, digest

def export(folder: str | os.PathLike, onnx: str | os.PathLike | None = None, pt2: str | os.PathLike | None = None,
           *, opset: int = 17, dynamic_batch: bool = True, trust_pickle: bool = False,
           exporter: str = "torchscript", seed: int = 0, tol: float | None = None, trust_code: bool = False) -> dict:
    """Export a spliced folder to ONNX and/or torch.export, keeping only copies that pass parity.

    Each export is checked with :func:`onnx_parity` / :func:`pt2_parity` (as
    stored and with a perturbed warp) on seeded N(0,1) inputs: one batch of 1,
    or with ``dynamic_batch`` batches of 1 and 3 (the trace uses 2). A failed
    check raises :class:`~splice.errors.CheckFailed` and writes nothing. An
    existing file at the target is replaced atomically.

    Returns ``{"exports": [{"path", "format", "sha256", "seconds", "max_abs",
    "max_rel", "max_abs_perturbed", "max_rel_perturbed", "tolerance",
    "batch_sizes", "dynamic_batch", ...}]}``.

    >>> splice.export("out/r18-affine", onnx="r18.onnx")   # doctest: +SKIP
    """
    if onnx is None and pt2 is None:
        raise SpliceError("export needs a target: onnx=FILE (--onnx FILE) and/or pt2=FILE (--pt2 FILE)")
    if onnx is not None:
        check_opset(opset, exporter)
    for target in (onnx, pt2):
        if target is not None and Path(target).is_dir():
            raise SpliceError(f"export target '{target}' is a folder; give a file name such as model.onnx")
    model = load(folder, trust_pickle=trust_pickle, trust_code=trust_code)
    shape = info_of(model).input_shape
    example, batches = _probe_inputs(shape, _model_dtype(model), dynamic_batch=dynamic_batch, seed=seed)
    jobs: list[tuple[str, str | os.PathLike]] = []
    if onnx is not None:
        jobs.append(("onnx", onnx))
    if pt2 is not None:
        jobs.append(("pt2", pt2))
    done = []
    for fmt, target in jobs:
        start = time.perf_counter()
        if fmt == "onnx":
            data = export_onnx_bytes(model, example, opset=opset, dynamic_batch=dynamic_batch, exporter=exporter)
            seconds = time.perf_counter() - start
            result = onnx_parity(model, data, batches, tol=tol)
        else:
            data = export_pt2_bytes(model, example, dynamic_batch=dynamic_batch)
            seconds = time.perf_counter() - start
            result = pt2_parity(model, data, batches, tol=tol)
        if not result["passed"]:
            raise CheckFailed(
                f"the {fmt} export of '{folder}' does not match the model ({result['detail']}); "
                f"nothing was written to '{target}'. Try another --opset or report the model"
            )
        path, digest = _keep(target, data)
        done.append({"path": str(path), "format": fmt, "sha256": digest, "seconds": seconds,
                     "dynamic_batch": dynamic_batch,
                     **({"opset": opset, "exporter": exporter} if fmt == "onnx" else {}),
                     **{k: v for k, v in result.items() if k != "passed"}})
    return {"exports": done}
