"""splice's own folders: how to recognise them, and the lock a run holds while it writes one.

Two kinds of folder are splice's: a spliced folder (``splice.json`` whose
``format`` is ``splice-folder``) and a tune run folder (``run.json`` whose
``format`` is ``splice-run``). Only those may be replaced by ``--overwrite``
(:func:`check_replaceable`); anything else is the user's and is left alone.
The same rule holds for the files and report folders a command writes where
the user says (:func:`check_file_target`, :func:`check_report_folder`): an
earlier output of the same kind is replaced, anything else is refused in one
line before any work.

A run folder is locked while a run writes to it (:class:`FolderLock`): the
file ``.splice.lock`` holds the writer's process id, and the writer holds an
exclusive ``flock`` on it. The kernel drops that lock when the process dies,
however it dies (SIGKILL included), so a lock file whose lock nobody holds is
stale: the next run takes it over and says so. Where ``flock`` is not
available the process id alone decides (a lock of a process that no longer
exists is stale).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import os
import socket
from pathlib import Path

from .errors import SpliceError

__all__ = ["MANIFEST_FILE", "FOLDER_FORMAT", "RUN_FILE", "RUN_FORMAT", "LOCK_FILE", "REPORT_FILE", "REPORT_FORMAT",
           "CERTIFICATE_FORMAT", "FolderBusy", "FolderLock", "folder_kind", "lock_holder", "check_replaceable",
           "check_keeps_inputs", "check_file_target", "check_report_folder", "check_outside"]

MANIFEST_FILE = "splice.json"
FOLDER_FORMAT = "splice-folder"
RUN_FILE = "run.json"
RUN_FORMAT = "splice-run"
LOCK_FILE = ".splice.lock"
REPORT_FILE = "summary.json"  # the record of a report folder 'splice inspect' wrote
REPORT_FORMAT = "splice-inspect-report"
CERTIFICATE_FORMAT = "splice-verify-certificate"  # the JSON record 'splice verify --report' writes
# what a spliced folder holds of splice's own
_FOLDER_FILES = frozenset({MANIFEST_FILE, "weights.safetensors", LOCK_FILE})


class FolderBusy(SpliceError):
    """Another live process holds the folder's lock."""


def _format_of(path: Path) -> str | None:
    try:
        if path.stat().st_size > 1 << 20:  # a record of ours is a few kB; do not read a huge file
            return None
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data.get("format") if isinstance(data, dict) else None


def folder_kind(folder: str | os.PathLike) -> str | None:
    """``"spliced folder"``, ``"run folder"``, or ``None`` for anything splice did not write."""
    folder = Path(folder)
    if _format_of(folder / MANIFEST_FILE) == FOLDER_FORMAT:
        return "spliced folder"
    if _format_of(folder / RUN_FILE) == RUN_FORMAT:
        return "run folder"
    return None


def _alive(pid: int) -> bool:
    if pid <= 0:
        return False
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True  # exists, owned by someone else
    return True


def _read_lock(path: Path) -> dict:
    try:
        data = json.loads(path.read_text(encoding="utf-8") or "{}")
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _describe(info: dict) -> str:
    pid = info.get("pid", "?")
    what = info.get("command") or "splice"
    host = info.get("host")
    here = f" on {host}" if host and host != socket.gethostname() else ""
    return f"process {pid}{here} ({what})"


def _flock(fd: int, exclusive: bool = True) -> bool | None:
    """True if taken, False if another process holds it, None if this platform or file system has no flock."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return None
    try:
        fcntl.flock(fd, (fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH) | fcntl.LOCK_NB)
    except (BlockingIOError, PermissionError):
        return False
    except OSError:  # e.g. a file system without flock
        return None
    return True


def lock_holder(folder: str | os.PathLike) -> dict | None:
    """The lock record (``pid``, ``host``, ``command``, ``started``) of a live writer of ``folder``, else None."""
    path = Path(folder) / LOCK_FILE
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return None
    try:
        taken = _flock(fd, exclusive=False)  # a shared lock is refused while a writer holds its exclusive one
        info = _read_lock(path)
    finally:
        os.close(fd)  # closing drops the probe's shared lock
    if taken is None:
        return info if _alive(int(info.get("pid", 0) or 0)) else None
    return None if taken else (info or {"pid": "?"})


class FolderLock:
    """The exclusive write lock on a folder; ``acquire()`` it, ``release()`` it (or use ``with``)."""

    def __init__(self, folder: str | os.PathLike, command: str = "splice tune") -> None:
        self.folder = Path(folder)
        self.path = self.folder / LOCK_FILE
        self.command = command
        self.stale: dict | None = None  # the record of a dead writer whose lock this one replaced
        self._fd: int | None = None

    def busy(self, info: dict) -> FolderBusy:
        """The error that says who holds this lock."""
        return FolderBusy(
            f"'{self.folder}' is in use by {_describe(info)}, started {info.get('started', '?')}; wait for it "
            f"to finish or stop it, or choose another folder (lock file {self.path})"
        )

    def _open_locked(self) -> int:
        """Open the lock file and take its lock; retry if a releasing writer unlinked it meanwhile."""
        for _ in range(20):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o666)
            taken = _flock(fd)
            if taken is False:
                info = _read_lock(self.path)
                os.close(fd)
                raise self.busy(info)
            if taken is None:  # no flock here: the recorded process id decides
                info = _read_lock(self.path)
                pid = int(info.get("pid", 0) or 0)
                if pid != os.getpid() and _alive(pid) and info.get("host") in (None, socket.gethostname()):
                    os.close(fd)
                    raise self.busy(info)
            with contextlib.suppress(OSError):
                if os.fstat(fd).st_ino == os.stat(self.path).st_ino:
                    return fd
            os.close(fd)  # the file we locked was unlinked by its last owner: lock the new one
        raise SpliceError(f"could not take the lock '{self.path}' (it keeps changing); try again")

    def acquire(self) -> FolderLock:
        """Take the lock; raise :class:`FolderBusy` naming the live process that holds it."""
        fd = self._open_locked()
        previous = _read_lock(self.path)
        if previous.get("pid") not in (None, os.getpid()):
            self.stale = previous
        record = {"pid": os.getpid(), "host": socket.gethostname(), "command": self.command,
                  "started": _dt.datetime.now().astimezone().replace(microsecond=0).isoformat()}
        os.ftruncate(fd, 0)
        os.pwrite(fd, (json.dumps(record) + "\n").encode("utf-8"), 0)
        os.fsync(fd)
        self._fd = fd
        return self

    def release(self) -> None:
        """Remove the lock file and drop the lock (a no-op when not held)."""
        if self._fd is None:
            return
        with contextlib.suppress(OSError):
            os.unlink(self.path)
        os.close(self._fd)
        self._fd = None

    def __enter__(self) -> FolderLock:
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


def _some(items: list[str], n: int = 4) -> str:
    """The first ``n`` of ``items`` and how many more."""
    return ", ".join(items[:n]) + (f" and {len(items) - n} more" if len(items) > n else "")


def _listing(folder: Path, n: int = 4) -> str:
    names = sorted(p.name + ("/" if p.is_dir() else "") for p in folder.iterdir())
    return _some(names, n) if names else "nothing"


def check_replaceable(target: str | os.PathLike) -> None:
    """Raise unless ``target`` may be replaced by ``--overwrite``: absent, empty, or a folder splice wrote, not in
    use."""
    target = Path(target)
    if not target.exists() and not target.is_symlink():
        return
    if target.is_symlink() or not target.is_dir():
        raise SpliceError(
            f"--overwrite replaces only folders splice wrote, but '{target}' is a "
            f"{'symbolic link' if target.is_symlink() else 'file'}; choose another output folder"
        )
    holder = lock_holder(target)
    if holder is not None:
        raise FolderBusy(f"cannot replace '{target}': it is in use by {_describe(holder)}; wait for it to finish")
    if not any(target.iterdir()):
        return
    kind = folder_kind(target)
    if kind == "spliced folder":
        foreign = sorted(f"'{p.name}'" for p in target.iterdir() if not _splice_output(p))
        if foreign:
            raise SpliceError(f"--overwrite would delete '{target}', which also holds {_some(foreign)}, not written "
                              "by splice; move those out of the folder first, or choose another output folder")
    if kind is not None:
        return
    raise SpliceError(
        f"--overwrite replaces only a spliced folder (with {MANIFEST_FILE}) or a run folder (with {RUN_FILE}), "
        f"but '{target}' holds {_listing(target)}; choose another output folder or remove it yourself"
    )


def _splice_output(path: Path) -> bool:
    """Whether ``path``, inside a spliced folder, is splice's by what it says of itself: the folder's own files, a
    certificate or an inspect report (their JSON ``format``), which a replaced splice leaves out of date. An export
    or a picture cannot be told from a file of the user's by its name, so it is not (the replacement is refused)."""
    if path.is_symlink():
        return False
    if path.is_dir():
        return _format_of(path / REPORT_FILE) == REPORT_FORMAT
    return path.name in _FOLDER_FILES or (path.suffix.lower() == ".json" and _format_of(path) == CERTIFICATE_FORMAT)


def check_keeps_inputs(target: str | os.PathLike, inputs) -> None:
    """Raise when replacing ``target`` would delete one of ``inputs``, the paths the command reads (a model's
    folder or file, a weights file; ``None`` entries are skipped), at or inside ``target``."""
    out = Path(target).resolve()
    for given in inputs:
        path = None if given is None else Path(given)
        if path is not None and path.exists() and (path.resolve() == out or out in path.resolve().parents):
            raise SpliceError(f"--overwrite would delete '{target}', which holds '{given}', read by this command; "
                              "choose another output folder")


def check_file_target(target: str | os.PathLike, label: str, example: str, *, suffix: str | None = None,
                      fmt: tuple[str, str] | None = None) -> None:
    """Raise unless writing the file ``target`` destroys nothing of the user's, before any work is done.

    A folder is refused. An existing file is replaced only when it is an earlier output of the same kind: its
    name ends in ``suffix`` (any case; ``.png``, ``.onnx``) or, for ``fmt = (format, what it is)``, it is JSON
    whose ``format`` is that (a certificate). ``label`` names the option in the message (``--plot target``),
    ``example`` a file name to give.
    """
    path = Path(target)
    if path.is_dir():
        raise SpliceError(f"{label} '{target}' is a folder; give a file name such as {example}")
    if not path.exists() and not path.is_symlink():
        return
    if suffix is not None and path.suffix.lower() == suffix.lower():
        return
    if fmt is not None and _format_of(path) == fmt[0]:
        return
    kind = f"a {suffix} file" if suffix is not None else f"{fmt[1]} (its 'format' is not '{fmt[0]}')"
    ending = f"give a file name ending in {suffix}" if suffix is not None else "give another file name"
    raise SpliceError(f"{label} '{target}' exists and is not {kind}, so it is not replaced; {ending}, "
                      "or move that file away")


def check_report_folder(out: str | os.PathLike | None, *, overwrite: bool = False) -> None:
    """Raise unless ``out`` may take the files of an ``inspect`` report, before any work is done.

    ``out`` may be absent, empty, or an earlier report (its ``summary.json`` has ``format`` ``REPORT_FORMAT``),
    whose files are replaced. Any other folder is the user's: refused unless ``overwrite``, which writes the
    report's files beside what it holds (files of the same names are replaced). A file is always refused.
    """
    if out is None:  # the command says it needs one
        return
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise SpliceError(f"report folder '{out}' is a file; give a folder name (--out DIR)")
    if overwrite or not out.is_dir() or not any(out.iterdir()) or _format_of(out / REPORT_FILE) == REPORT_FORMAT:
        return
    raise SpliceError(
        f"report folder '{out}' holds {_listing(out)}, not a report 'splice inspect' wrote, and the report's files "
        "would go among them; choose another --out folder, or pass --overwrite (overwrite=True) to write them there"
    )


def check_outside(target: str | os.PathLike, folder, label: str, what: str) -> None:
    """Raise when ``target`` is ``folder`` or inside it, where ``folder`` is a folder the command reads ``what``
    from (an image folder: a picture written there would be read as one of its images). A ``folder`` that is not
    an existing folder (a data set's name) is no concern."""
    if folder is None or not Path(str(folder)).is_dir():
        return
    inside, out = Path(str(folder)).resolve(), Path(target).resolve()
    if out == inside or inside in out.parents:
        raise SpliceError(f"{label} '{target}' is inside '{folder}', which this command reads {what} from, so "
                          f"what it writes would be read as {what} next time; write it outside that folder")
