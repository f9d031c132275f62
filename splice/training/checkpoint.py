"""Resumable checkpoints: one file, written atomically, read with ``weights_only=True``.

A checkpoint is a dict of tensors, numbers, strings, lists and dicts only (no
pickled objects): the model and optimiser state dicts, the step counters, the
RNG states, the best-so-far bookkeeping and the schedule position. It is
serialised to memory first and then written through
:func:`splice.fileio.atomic_write_bytes` (temporary file, fsync, rename), so a
crash or a failed write (read-only folder, full disk) leaves the previous
checkpoint exactly as it was.
"""

from __future__ import annotations

import io
import os
from pathlib import Path
from typing import Any

import torch

from ..fileio import atomic_write_bytes
from ..errors import SpliceError

__all__ = ["CHECKPOINT_NAME", "CHECKPOINT_FORMAT", "CHECKPOINT_VERSION", "save_checkpoint", "load_checkpoint",
           "rng_state", "set_rng_state"]

CHECKPOINT_NAME = "checkpoint.pt"
CHECKPOINT_FORMAT = "splice-tune-checkpoint"
CHECKPOINT_VERSION = 1
_REQUIRED = ("format", "version", "epoch", "batch", "step", "model", "optimizer", "scheduler", "rng", "best")


def rng_state() -> dict[str, Any]:
    """The CPU (and CUDA) generator states as tensors."""
    state: dict[str, Any] = {"torch": torch.get_rng_state()}
    if torch.cuda.is_available() and torch.cuda.is_initialized():
        state["cuda"] = [s for s in torch.cuda.get_rng_state_all()]
    return state


def set_rng_state(state: dict[str, Any]) -> None:
    torch.set_rng_state(state["torch"])
    if "cuda" in state and torch.cuda.is_available():
        torch.cuda.set_rng_state_all(state["cuda"])


def save_checkpoint(path: str | os.PathLike, payload: dict[str, Any]) -> Path:
    """Write ``payload`` atomically; on failure raise :class:`SpliceError`, old file intact."""
    path = Path(path)
    payload = {"format": CHECKPOINT_FORMAT, "version": CHECKPOINT_VERSION, **payload}
    buf = io.BytesIO()
    torch.save(payload, buf)
    try:
        return atomic_write_bytes(path, buf.getvalue())
    except OSError as exc:
        intact = " the previous checkpoint is intact" if path.exists() else " no earlier checkpoint exists"
        raise SpliceError(
            f"could not write the checkpoint '{path}' ({exc.strerror or exc});{intact}. "
            "Free disk space or make the run folder writable, then resume with --resume"
        ) from exc


def load_checkpoint(path: str | os.PathLike) -> dict[str, Any]:
    """Read a checkpoint written by :func:`save_checkpoint` (tensors and plain data only)."""
    import pickle
    import zipfile

    path = Path(path)
    if not path.is_file():
        raise SpliceError(
            f"no checkpoint at '{path}'; the run never finished its first epoch or the folder is not a "
            "run folder — start it again without --resume"
        )
    try:
        data = torch.load(path, map_location="cpu", weights_only=True)
    except (pickle.UnpicklingError, RuntimeError, EOFError, zipfile.BadZipFile, OSError, ValueError) as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise SpliceError(
            f"checkpoint '{path}' cannot be read ({first}); it is damaged or was not written by splice tune"
        ) from None
    if not isinstance(data, dict) or data.get("format") != CHECKPOINT_FORMAT:
        raise SpliceError(f"'{path}' is not a splice tune checkpoint; pass the run folder written by splice tune")
    if data.get("version") != CHECKPOINT_VERSION:
        raise SpliceError(
            f"checkpoint '{path}' has version {data.get('version')!r}; this splice reads version {CHECKPOINT_VERSION}"
        )
    missing = [k for k in _REQUIRED if k not in data]
    if missing:
        raise SpliceError(f"checkpoint '{path}' lacks {', '.join(missing)}; it is damaged")
    return data
