"""The run folder of ``splice tune``: ``run.json``, ``recipe.toml``, ``metrics.jsonl``, creation and resume checks.

Rank 0 alone writes; every write goes through :mod:`splice.fileio` (atomic) or,
for the append-only metrics file, is flushed and fsynced per row. A torn last
metrics line (a crash mid-write) is skipped on reading and cut off on resume.

Rank 0 holds the folder's lock (:class:`splice.folders.FolderLock`) from the
moment it starts or resumes a run until the run ends, however it ends; a
second run into a locked folder is refused, naming the process that holds it.
``run.json``'s ``status`` is one of :data:`STATUSES`.
"""

from __future__ import annotations

import contextlib
import json
import os
import sys
import warnings
from pathlib import Path
from typing import Any

from ..fileio import atomic_write_json, atomic_write_text, make_dir, read_json, recover_dirs
from ..errors import SpliceError, SpliceWarning
from ..folders import LOCK_FILE, RUN_FILE, RUN_FORMAT, FolderLock, lock_holder
from ..recipes import Recipe, recipe_to_toml
from ..sources import MODULE_SPEC

__all__ = ["RUN_SCHEMA_VERSION", "RUN_FORMAT", "RUN_FILE", "RECIPE_FILE", "METRICS_FILE", "HASH_ENV", "STATUSES",
           "read_metrics", "truncate_metrics", "append_metrics", "writing", "prepare_folder", "check_same",
           "describe", "write_run_info", "start_files", "read_run_info", "warn_other_data", "resumed_data"]

RUN_SCHEMA_VERSION = 1
# running: a process is writing (or died: then no live lock; --resume continues); finished; stopped early
# (patience); interrupted (Ctrl-C / SIGTERM, checkpoint written); diverged (a NaN/Inf loss or weight: the
# checkpoint and last/ keep the last finite state); failed (any other error, named in "error")
STATUSES = ("running", "finished", "stopped early", "interrupted", "diverged", "failed")
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
    return getattr(model, "spec", MODULE_SPEC)


def check_same(what: str, given: Any, recorded: Any, run: Path) -> None:
    """On resume, a given value must match the one the run was started with."""
    if given is not None and given != recorded:
        raise SpliceError(
            f"run '{run}' was started with {what} {recorded!r}, but {given!r} was given; pass the same "
            f"{what} (or omit it) to resume"
        )


def resumed_data(given: Any, info: dict, run: Path, flag: str = "--data") -> tuple[str, bool]:
    """What a resumed run opens, as ``(data, another_copy)``.

    The run's own data is run.json's absolute ``data_path`` (its typed ``data``
    for a built-in data set, or for a run an older splice started), never a
    folder of that name under the current directory. A given ``flag`` value
    names the same data when both sides resolve to the same folder (``imgs/``
    is ``imgs``). Another folder is taken where the recorded one no longer
    exists (it was moved; the caller warns if its files differ); while the
    recorded one exists, ``another_copy`` is true and the caller refuses it
    unless it holds the run's image files.
    """
    from .reference import data_record

    recorded, what = info.get("data_path") or info["data"], flag.lstrip("-")
    theirs = data_record(recorded)  # a built-in data set by its name, a folder by its absolute path
    if given is None:
        if os.path.isabs(theirs) and not Path(theirs).exists():
            raise SpliceError(f"run '{run}' was started on the {what} folder '{recorded}' ({RUN_FILE}), which no "
                              f"longer exists; pass {flag} with the folder's new place to resume")
        return recorded, False
    mine = data_record(os.fspath(given))
    if mine == theirs:
        return recorded, False
    if not (os.path.isabs(mine) and os.path.isabs(theirs)):  # a built-in data set on either side: other data
        check_same(what, os.fspath(given), info["data"], run)
    return mine, Path(theirs).exists()


def warn_other_data(what: str) -> None:
    """Warn that a run is resumed on ``what`` (other images than it started with): it goes on, but its batches from
    here on are not the ones an uninterrupted run would have drawn."""
    warnings.warn(f"resuming with {what}: from here on its batches are not the ones an uninterrupted run would "
                  "have drawn", SpliceWarning, stacklevel=6)


def read_run_info(resume: Path) -> dict:
    """The checked run.json of the run folder ``resume`` (nothing is written)."""
    return _read_info(resume)


def _read_info(resume: Path) -> dict:
    run_file = resume / RUN_FILE
    if not run_file.is_file():
        raise SpliceError(
            f"'{resume}' is not a splice tune run folder (no {RUN_FILE}); pass the --out folder of an "
            "earlier 'splice tune'"
        )
    info = read_json(run_file, SpliceError, "the run folder is damaged — start a new run")
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


def _lock(ctx, folder: Path, locks: contextlib.ExitStack, check=None) -> None:
    """Rank 0 takes the folder's lock (held until ``locks`` closes) and runs ``check`` under it;
    every rank fails together if either fails."""
    from . import distributed

    error: SpliceError | None = None
    if ctx.is_main:
        lock = FolderLock(folder, "splice tune")
        try:
            lock.acquire()
            locks.callback(lock.release)
            if check is not None:
                check()
        except SpliceError as exc:
            error = exc
        else:
            if lock.stale:
                print(f"splice tune: note: replaced the stale lock of process {lock.stale.get('pid')} "
                      f"in '{folder}' (that process no longer runs)", file=sys.stderr)
    if distributed.broadcast_flag(ctx, error is not None):
        raise error or SpliceError(f"rank 0 could not lock the run folder '{folder}'; see its message")


def _content(folder: Path) -> list[Path]:
    return [p for p in folder.iterdir() if p.name != LOCK_FILE]


def prepare_folder(ctx, out: Path | None, resume: Path | None,
                   locks: contextlib.ExitStack) -> tuple[Path, dict | None]:
    """The run folder, locked, and its run.json when resuming (a fresh folder is created by rank 0)."""
    if resume is not None:
        if out is not None and Path(out).resolve() != Path(resume).resolve():
            raise SpliceError(
                f"--out {out} and --resume {resume} name different folders; a resumed run writes into "
                "its own folder, so drop --out"
            )
        _read_info(resume)  # a run folder at all?
        # a run killed while replacing best/ or last/ left the old one aside: put it back
        _lock(ctx, resume, locks, lambda: recover_dirs(resume))
        return resume, _read_info(resume)
    if out is None:
        raise SpliceError("tune needs a run folder: pass --out RUN (out=...), or --resume RUN to continue one")
    if out.exists() and not out.is_dir():
        raise SpliceError(f"run folder '{out}' exists and is a file; choose another --out folder")
    holder = lock_holder(out) if out.is_dir() else None
    if holder is not None:
        raise FolderLock(out).busy(holder)
    if out.exists() and _content(out):
        raise SpliceError(
            f"run folder '{out}' already exists and is not empty; continue it with --resume {out}, "
            "or choose another --out folder"
        )
    if ctx.distributed:  # every rank has checked before rank 0 creates anything
        import torch.distributed as dist

        dist.barrier()
    if ctx.is_main:
        make_dir(out)

    def still_empty() -> None:  # another run may have got there between the check and the lock
        if _content(out):
            raise SpliceError(f"run folder '{out}' was filled by another run meanwhile; choose another --out folder")

    _lock(ctx, out, locks, still_empty)
    return out, None
