"""A write that fails for lack of room (a full disk, a file-size limit) is one line naming the target, and the
previous output is left byte for byte as it was, for every writer of a spliced folder (insert, save, tune)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
import torch
from safetensors import SafetensorError

import splice
from splice.cli import main
from splice.errors import SpliceError

SPEC = "splice.models:tray_net"
# what safetensors 0.4-0.6 raises when its writer hits a file-size limit (its Rust io::Error, "os error 27" = EFBIG)
FILE_TOO_LARGE = "Error while serializing: I/O error: File too large (os error 27)"


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


@pytest.fixture
def earlier(tmp_path) -> Path:
    """A spliced folder written before, which a failed --overwrite must leave as it was."""
    folder = tmp_path / "model"
    splice.save(splice.insert(SPEC, at="input", warp="similarity"), folder)
    return folder


def _errors(stderr: str) -> list[str]:
    """The lines of stderr that are not warnings (a model without --weights warns that it has random weights)."""
    return [line for line in stderr.splitlines() if not line.startswith("warning:")]


def _failing_writer(text: str):
    def save_file(*args, **kwargs):
        raise SafetensorError(text)

    return save_file


@pytest.mark.parametrize(("text", "reason"), [
    (FILE_TOO_LARGE, "File too large; raise the file-size limit ('ulimit -f'), free disk space"),
    ("Error while serializing: I/O error: No space left on device (os error 28)",
     "No space left on device; free disk space or write to another disk"),
    ("Error while serializing: something else", "the weights file could not be written (Error while serializing"),
])
def test_insert_that_cannot_write_its_weights_is_one_line(earlier, tmp_path, capsys, monkeypatch, text, reason):
    import safetensors.torch as st_torch

    before = _snapshot(earlier)
    monkeypatch.setattr(st_torch, "save_file", _failing_writer(text))
    code = main(["insert", SPEC, "--at", "input", "--warp", "affine", "--out", str(earlier), "--overwrite"])
    err = _errors(capsys.readouterr().err)
    assert code == 2
    assert len(err) == 1 and err[0].startswith(f"splice insert: error: could not write '{earlier}': {reason}"), err
    assert _snapshot(earlier) == before, "the earlier folder changed"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model"], "a temporary folder was left behind"


def test_save_raises_an_oserror_that_is_a_splice_error(tmp_path, monkeypatch):
    """The Python API gets the same one line, as a SpliceError that is also the OSError (errno 27) it was."""
    import errno

    import safetensors.torch as st_torch

    monkeypatch.setattr(st_torch, "save_file", _failing_writer(FILE_TOO_LARGE))
    with pytest.raises(SpliceError, match="could not write .*new.*File too large") as info:
        splice.save(splice.insert(SPEC, at="input"), tmp_path / "new")
    assert isinstance(info.value, OSError) and info.value.errno == errno.EFBIG
    assert list(tmp_path.iterdir()) == []


def test_tune_that_cannot_write_best_or_last_is_one_line(tmp_path, capsys, monkeypatch):
    """tune writes best/ and last/ through the same writer: one line naming the folder, no 'internal error'."""
    import safetensors.torch as st_torch

    monkeypatch.setattr(st_torch, "save_file", _failing_writer(FILE_TOO_LARGE))
    torch.set_num_threads(1)
    out = tmp_path / "run"
    code = main(["tune", SPEC, "--kwargs", '{"width": 4}', "--input-shape", "1,24,24", "--recipe", "baseline",
                 "--epochs", "1", "--batch-size", "256", "--data", "digits", "--out", str(out), "--quiet"])
    err = _errors(capsys.readouterr().err)
    assert code == 2, err
    assert len(err) == 1 and err[0].startswith(f"splice tune: error: could not write '{out}{os.sep}"), err
    assert "(File too large)" in err[0] and "--resume" in err[0]
    assert not [p.name for p in out.iterdir() if p.name.endswith(".tmp")], "a temporary folder was left behind"


@pytest.mark.slow
@pytest.mark.skipif(sys.platform == "win32", reason="RLIMIT_FSIZE is POSIX (the resource module)")
def test_a_real_file_size_limit(earlier, tmp_path):
    """A real failure, not a stand-in: the command runs under a file-size limit smaller than its weights
    (RLIMIT_FSIZE, what 'ulimit -f' sets; Python ignores SIGXFSZ, so the write fails with EFBIG)."""
    import resource

    before = _snapshot(earlier)
    limit = 64 * 1024  # the manifest fits, tray_net's weights (about 290 kB) do not

    def limited():
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, resource.getrlimit(resource.RLIMIT_FSIZE)[1]))

    root = str(Path(splice.__file__).resolve().parents[1])
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([root, os.environ.get("PYTHONPATH", "")]),
           "OMP_NUM_THREADS": "1"}
    proc = subprocess.run([sys.executable, "-m", "splice", "insert", SPEC, "--at", "input", "--out", str(earlier),
                           "--overwrite"], capture_output=True, text=True, env=env, preexec_fn=limited, timeout=300)
    err = _errors(proc.stderr)
    assert proc.returncode == 2, proc.stderr
    assert len(err) == 1 and err[0].startswith(f"splice insert: error: could not write '{earlier}': File too large;"), proc.stderr
    assert _snapshot(earlier) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model"]
