"""Atomic writes, content hashes, and names that are not UTF-8.

Everything splice writes goes through these helpers, so an interrupted or
failed write never leaves a half-written file where a good one used to be.
A file or class name that is not UTF-8 (Python holds its bytes as surrogate
escapes) is hashed as its bytes (:func:`name_bytes`) and written, printed
and drawn as :func:`printable` shows it (``caf\\xe9``).
"""

from __future__ import annotations

import codecs
import contextlib
import errno
import hashlib
import json
import math
import os
import shutil
import sys
import tempfile
from collections.abc import Iterator, Mapping
from pathlib import Path

__all__ = [
    "atomic_write_bytes",
    "atomic_write_text",
    "atomic_write_json",
    "atomic_dir",
    "write_safetensors",
    "make_dir",
    "recover_dirs",
    "file_sha256",
    "state_dict_sha256",
    "json_safe",
    "read_json",
    "printable",
    "printable_streams",
    "name_bytes",
]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _fsync_dir(path: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


_FULL = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC)}  # no room left: the disk, or the user's quota


def _target_error(target: Path, exc: OSError):
    """A failed write as one line that names the user's target, never the temporary file beside it.

    The error is a :class:`~splice.errors.WriteError`: a ``SpliceError`` for
    the command line, and still an ``OSError`` (same errno) for callers that
    handle those.
    """
    from .errors import WriteError

    if isinstance(exc, IsADirectoryError) and target.is_dir():
        why = "it is a folder; give a file name"
    elif any(p.exists() and not p.is_dir() for p in target.parents):
        blocker = next(p for p in reversed(target.parents) if p.exists() and not p.is_dir())
        why = f"'{blocker}' is a file, not a folder; choose a path inside a folder"
    elif isinstance(exc, PermissionError):
        why = "permission denied; make its folder writable or choose another path"
    elif exc.errno == errno.EFBIG:  # a file-size limit ('ulimit -f') or the largest file the file system holds
        why = f"{exc.strerror}; raise the file-size limit ('ulimit -f'), free disk space or write to another disk"
    elif exc.errno in _FULL:
        why = f"{exc.strerror}; free disk space or write to another disk"
    else:
        why = f"{exc.strerror or type(exc).__name__}; check the path and the disk"
    return WriteError(f"could not write '{target}': {why}", exc, target)


def make_dir(path: str | os.PathLike) -> Path:
    """``mkdir -p path``; a failure raises :class:`~splice.errors.SpliceError` naming ``path``."""
    path = Path(path)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise _target_error(path, exc) from exc
    return path


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` via a temporary file in the same folder and a rename.

    A failed write raises :class:`~splice.errors.SpliceError` naming ``path``;
    the previous file, if any, is untouched.
    """
    path = Path(path)
    try:
        return _write_bytes(path, data)
    except OSError as exc:
        raise _target_error(path, exc) from exc


def _write_bytes(path: Path, data: bytes) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual permissions
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    _fsync_dir(path.parent)
    return path


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Text version of :func:`atomic_write_bytes` (UTF-8; a name that is not UTF-8 as :func:`printable` shows it)."""
    return atomic_write_bytes(path, printable(text).encode("utf-8"))


def name_bytes(text: str) -> bytes:
    """``text`` as UTF-8 bytes, where a byte Python could not decode from a file name (a surrogate escape, as
    ``os.listdir`` gives for a Latin-1 name) is that byte again, as :func:`os.fsencode` gives it on POSIX: the same
    bytes as ``text.encode()`` for any valid text, so a hash of names does not change for them."""
    try:
        return text.encode("utf-8", "surrogateescape")
    except UnicodeEncodeError:  # a lone surrogate that stands for no byte
        return text.encode("utf-8", "surrogatepass")


def printable(text: str) -> str:
    """``text`` with the bytes of a file name that is not UTF-8 written as ``\\xe9`` (they are surrogate escapes
    in Python, which UTF-8 files, terminals and fonts refuse): the one form splice writes, prints and draws. Valid
    text comes back unchanged."""
    try:
        return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    except UnicodeEncodeError:  # a lone surrogate that stands for no byte: shown as its code point
        return text.encode("utf-8", "backslashreplace").decode("utf-8")


def _printable_errors(exc: UnicodeError):
    """What a stream cannot encode (a file name that is not UTF-8), written as ``fileio.printable`` shows it."""
    if not isinstance(exc, UnicodeEncodeError):
        raise exc
    return printable(exc.object[exc.start:exc.end]).encode("ascii", "backslashreplace").decode("ascii"), exc.end


@contextlib.contextmanager
def printable_streams():
    """The CLI's stdout and stderr write names that are not UTF-8 as :func:`printable` shows them, for the
    command's length (a strict stream would fail on them; an escaping one would show ``\\udce9`` or raw bytes)."""
    codecs.register_error("splice.printable", _printable_errors)
    saved = []
    for stream in (sys.stdout, sys.stderr):
        errors = getattr(stream, "errors", None)
        with contextlib.suppress(AttributeError, ValueError, OSError):
            stream.reconfigure(errors="splice.printable")
            saved.append((stream, errors))
    try:
        yield
    finally:
        for stream, errors in saved:
            with contextlib.suppress(AttributeError, ValueError, OSError):
                stream.reconfigure(errors=errors)


def json_safe(value: object) -> object:
    """``value`` as plain JSON data: the one policy for what JSON cannot hold.

    Non-finite floats become the strings ``"inf"``, ``"-inf"`` and ``"nan"``
    (JSON has no such numbers, and ``null`` would hide which one it was);
    mappings get string keys, tuples become lists, and any other object
    (a dtype, a path) its ``str``.
    """
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else str(value)
    if hasattr(value, "item") and getattr(value, "ndim", None) == 0:  # numpy / torch scalars
        return json_safe(value.item())
    text = str(value)
    return text.removeprefix("torch.") if text.startswith("torch.") and " " not in text else text


def atomic_write_json(path: str | os.PathLike, obj: object) -> Path:
    """Write ``obj`` as indented, key-sorted JSON (through :func:`json_safe`), atomically."""
    return atomic_write_text(path, json.dumps(json_safe(obj), indent=2, sort_keys=True) + "\n")


@contextlib.contextmanager
def atomic_dir(target: str | os.PathLike, *, overwrite: bool = False) -> Iterator[Path]:
    """Build a folder in a temporary sibling and move it into place on success.

    Yields the temporary folder. If the body raises, the temporary folder is
    removed and ``target`` is left exactly as it was. With ``overwrite=True`` an
    existing ``target`` is replaced only after the new one is complete, and only
    when splice wrote it (:func:`splice.folders.check_replaceable`): a spliced
    folder or a run folder that no live process is writing; anything else is refused.

    >>> with atomic_dir("out/model", overwrite=True) as tmp:  # doctest: +SKIP
    ...     (tmp / "a.txt").write_text("hi")
    """
    from .errors import SpliceError
    from .folders import check_replaceable

    target = Path(target)
    if target.exists() and not overwrite:
        raise SpliceError(
            f"output folder '{target}' already exists; pass --overwrite "
            "(overwrite=True) to replace it, or choose another folder"
        )
    check_replaceable(target)  # only a folder splice wrote, and not while a run writes to it
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent))
        os.chmod(tmp, 0o777 & ~_umask())  # mkdtemp makes 0700
    except OSError as exc:
        raise _target_error(target, exc) from exc
    try:
        yield tmp
        _settle(tmp)
        if target.exists():
            old = target.with_name(f".{target.name}.old-{os.getpid()}")
            os.replace(target, old)
            os.replace(tmp, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, target)
        _fsync_dir(target.parent)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise _target_error(target, exc) from exc
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_safetensors(path: str | os.PathLike, state: Mapping, metadata: Mapping[str, str] | None = None) -> Path:
    """``safetensors.torch.save_file`` into a folder :func:`atomic_dir` is building; a failure to write is an
    ``OSError``.

    safetensors reports a failed write (a full disk, a file-size limit) as its own ``SafetensorError``, whose
    text ends in the ``(os error N)`` of the cause; raised here as that ``OSError`` (``EIO`` when no number is
    given), so :func:`atomic_dir` names the folder in one line, removes the half-written copy and keeps the old.
    """
    import re

    from safetensors import SafetensorError
    from safetensors.torch import save_file

    try:
        save_file(dict(state), str(path), metadata=None if metadata is None else dict(metadata))
    except SafetensorError as exc:
        text = " ".join(str(exc).split())
        code = re.search(r"\(os error (\d+)\)", text)
        if code is not None:
            raise OSError(int(code.group(1)), os.strerror(int(code.group(1)))) from exc
        raise OSError(errno.EIO, f"the weights file could not be written ({text[:300]})") from exc
    return Path(path)


def _settle(folder: Path) -> None:
    """Every file written into ``folder`` gets the usual permissions (0666 less the umask) and reaches the disk.

    Some writers (safetensors among them) create their files 0600; a folder
    splice writes holds files like any other file the user writes.
    """
    mode = 0o666 & ~_umask()
    for f in folder.rglob("*"):
        if f.is_file():
            os.chmod(f, mode)
            with open(f, "rb") as fh:
                os.fsync(fh.fileno())


def recover_dirs(parent: str | os.PathLike) -> list[str]:
    """Tidy ``parent`` after a process died inside :func:`atomic_dir` or :func:`atomic_write_bytes`.

    A death between the two renames of a replacement leaves the old folder at
    ``.NAME.old-PID`` and no ``NAME``: the old folder is moved back. Temporary
    files and folders (``.NAME.*.tmp``) and old folders whose target exists are
    removed. Call it only while no other process writes to ``parent`` (under its
    lock). Returns the names restored.
    """
    parent = Path(parent)
    restored = []
    for old in sorted(parent.glob(".*.old-*")):
        target = parent / old.name[1:].rsplit(".old-", 1)[0]
        if old.is_dir() and not target.exists():
            os.replace(old, target)
            restored.append(target.name)
        else:
            shutil.rmtree(old, ignore_errors=True)
    for tmp in parent.glob(".*.tmp"):
        if tmp.is_dir():
            shutil.rmtree(tmp, ignore_errors=True)
        else:
            with contextlib.suppress(OSError):
                tmp.unlink()
    if restored:
        _fsync_dir(parent)
    return restored


def file_sha256(path: str | os.PathLike) -> str:
    """sha256 of a file's bytes, hex-encoded.

    The file is mapped and hashed in one call, which releases the GIL for the
    whole file: hashing in a worker thread then runs beside Python work in the
    main thread (chunked reads would hand the GIL back and forth per chunk).
    """
    import mmap

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        if os.fstat(fh.fileno()).st_size:
            with mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as view:
                h.update(view)
    return h.hexdigest()


def state_dict_sha256(state: Mapping[str, object], *, prefix_exclude: str | None = None) -> str:
    """Canonical sha256 of a state dict: sorted names, dtype, shape and raw bytes.

    Two state dicts hash equal exactly when they have the same keys and every
    tensor is bitwise equal. Keys starting with ``prefix_exclude`` are skipped
    (used to hash only the base part of a spliced model).
    """
    import torch

    h = hashlib.sha256()
    for name in sorted(state):
        if prefix_exclude and name.startswith(prefix_exclude):
            continue
        t = state[name]
        if not isinstance(t, torch.Tensor):
            continue
        t = t.detach().to("cpu").contiguous()
        h.update(name.encode())
        h.update(str(t.dtype).encode())
        h.update(str(tuple(t.shape)).encode())
        if t.numel():
            h.update(memoryview(t.reshape(-1).view(torch.uint8).numpy()))  # no copy of the bytes
    return h.hexdigest()


def read_json(path: str | os.PathLike, error: type[Exception], remedy: str, *, max_bytes: int | None = None):
    """The JSON value in ``path``; a damaged file raises ``error`` with one line that ends in ``remedy``.

    Invalid JSON, undecodable text, nesting too deep for the parser and (with
    ``max_bytes``) a file larger than that are all refused the same way.
    """
    path = Path(path)
    if max_bytes is not None and path.stat().st_size > max_bytes:
        raise error(f"'{path}' is larger than {max_bytes >> 20} MB, too big for this file; {remedy}")
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise error(f"'{path}' is not valid JSON ({type(exc).__name__}: {exc}); {remedy}") from None
    except RecursionError:
        raise error(f"'{path}' nests its JSON too deeply to read; {remedy}") from None
