"""The run folder of ``splice tune``: ``run.json``, ``recipe.toml``, ``metrics.jsonl``, creation and resume checks.

Rank 0 alone writes; every write goes through :mod:`splice._io` (atomic) or,
for the append-only metrics file, is flushed and fsynced per row. A torn last
metrics line (a crash mid-write) is skipped on reading and cut off on resume.
"""

from __future__ import annotations

import contextlib
import json
import os
from pathlib import Path
from typing import Any

from .._io import atomic_write_json, atomic_write_text, make_dir
from ..errors import SpliceError
from ..recipes import Recipe, recipe_to_toml

__all__ = ["RUN_SCHEMA_VERSION", "RUN_FORMAT", "RUN_FILE", "RECIPE_FILE", "METRICS_FILE", "HASH_ENV",
           "read_metrics", "truncate_metrics", "append_metrics", "writing", "prepare_folder", "check_same",
           "describe", "write_run_info", "start_files"]

RUN_SCHEMA_VERSION = 1
RUN_FORMAT = "splice-run"
RUN_FILE = "run.json"
RECIPE_FILE = "recipe.toml"
METRICS_FILE = "metrics.jsonl"
# Debug aid for the distributed tests: when set, every rank writes the sha256 of
# its final state dict to RUN/rank<r>.sha256.
HASH_ENV = "SPLICE_TUNE_RANK_HASHES"


def read_metrics(run: str | os.PathLike) -> list[dict]:
    """The rows of ``RUN/metrics.jsonl`` (a torn last line, from a crash, is skipped)."""
    path = Path(run) / METRICS_FILE
    if not path.is_file():
        return []
    rows = []
    for line in path.read_text(encoding="utf-8").splitlines():
        with contextlib.suppress(json.JSONDecodeError):
            rows.append(json.loads(line))
    return rows


def truncate_metrics(run: Path, keep: int) -> None:
    """Keep the first ``keep`` metrics rows (the ones a checkpoint knows about)."""
    rows = read_metrics(run)[:keep]
    with writing(run / METRICS_FILE):
        atomic_write_text(run / METRICS_FILE, "".join(json.dumps(r, sort_keys=True) + "\n" for r in rows))


def append_metrics(run: Path, row: dict) -> None:
    """Append one row, flushed to disk before returning."""
    with writing(run / METRICS_FILE), open(run / METRICS_FILE, "a", encoding="utf-8") as fh:
        fh.write(json.dumps(row, sort_keys=True) + "\n")
        fh.flush()
        os.fsync(fh.fileno())


@contextlib.contextmanager
def writing(what: Path):
    """Turn a failed write (read-only folder, full disk) into one clear error; atomic writes keep the old file."""
    try:
        yield
    except OSError as exc:
        raise SpliceError(
            f"could not write '{what}' ({exc.strerror or exc}); the previous version, if any, is intact. "
            "Free disk space or make the run folder writable, then continue with --resume"
        ) from exc


def write_run_info(run: Path, info: dict) -> None:
    """Rewrite ``run.json`` atomically."""
    with writing(run / RUN_FILE):
        atomic_write_json(run / RUN_FILE, info)


def start_files(run: Path, recipe: Recipe, info: dict) -> None:
    """The files of a fresh run: the resolved recipe, run.json and an empty metrics file."""
    with writing(run):
        atomic_write_text(run / RECIPE_FILE, recipe_to_toml(recipe))
        atomic_write_json(run / RUN_FILE, info)
        atomic_write_text(run / METRICS_FILE, "")


def describe(model: Any) -> str:
    """How run.json names the model: a resolved path for a folder or file, the spec, or ``<module>``."""
    if isinstance(model, (str, os.PathLike)):
        text = os.fspath(model)
        p = Path(text)
        return str(p.resolve()) if p.exists() else text
    return getattr(model, "spec", "<module>")


def check_same(what: str, given: Any, recorded: Any, run: Path) -> None:
    """On resume, a given value must match the one the run was started with."""
    if given is not None and given != recorded:
        raise SpliceError(
            f"run '{run}' was started with {what} {recorded!r}, but {given!r} was given; pass the same "
            f"{what} (or omit it) to resume"
        )


def _read_info(resume: Path) -> dict:
    run_file = resume / RUN_FILE
    if not run_file.is_file():
        raise SpliceError(
            f"'{resume}' is not a splice tune run folder (no {RUN_FILE}); pass the --out folder of an "
            "earlier 'splice tune'"
        )
    try:
        info = json.loads(run_file.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise SpliceError(f"'{run_file}' is not valid JSON ({exc}); the run folder is damaged") from None
    except RecursionError:
        raise SpliceError(f"'{run_file}' nests its JSON too deeply to read; the run folder is damaged — "
                          "start a new run") from None
    if not isinstance(info, dict) or info.get("format") != RUN_FORMAT or \
            info.get("schema_version") != RUN_SCHEMA_VERSION:
        raise SpliceError(f"'{run_file}' is not a splice run record of schema version {RUN_SCHEMA_VERSION}")
    problems = [f"{key} must be {what}" for key, (kinds, what) in _RUN_FIELDS.items()
                if not isinstance(info.get(key), kinds) or isinstance(info.get(key), bool)]
    if problems:
        raise SpliceError(f"'{run_file}' is damaged: {'; '.join(problems)}; start a new run rather than "
                          "editing run.json by hand")
    return info


# the run.json fields a resume reads, with the types it accepts (None: the field may be null)
_RUN_FIELDS: dict[str, tuple[tuple[type, ...], str]] = {
    "model": ((str,), "a string"),
    "model_kwargs": ((dict, type(None)), "an object or null"),
    "model_weights": ((str, type(None)), "a string or null"),
    "data": ((str,), "a string"),
    "input_shape": ((list, type(None)), "a list or null"),
    "base_sha256_start": ((str,), "a string"),
}


def prepare_folder(ctx, out: Path | None, resume: Path | None) -> tuple[Path, dict | None]:
    """The run folder, and its run.json when resuming (a fresh folder is created by rank 0)."""
    from . import distributed

    if resume is not None:
        if out is not None and Path(out).resolve() != Path(resume).resolve():
            raise SpliceError(
                f"--out {out} and --resume {resume} name different folders; a resumed run writes into "
                "its own folder, so drop --out"
            )
        return resume, _read_info(resume)
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
        make_dir(out)
    distributed.broadcast_flag(ctx, False)
    return out, None
