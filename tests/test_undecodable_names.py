"""File and class names that are not UTF-8 (Latin-1 bytes, as an old zip extracts them on Linux): Python hands
them over surrogate-escaped; tune hashes their bytes, and every text file, console line and picture shows them
in one printable form (``splice.fileio.printable``)."""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

import splice
from splice.errors import SpliceWarning
from splice.fileio import name_bytes, printable
from splice.options import ModelOptions
from splice.recipes import load_recipe
from splice.training import RunOptions, tune

LATIN1 = (b"caf\xe9", b"th\xe9")  # "café", "thé" in Latin-1: not valid UTF-8


def test_names_keep_their_bytes_and_print_as_escapes():
    for raw in LATIN1 + ("café".encode(), b"plain"):
        name = os.fsdecode(raw)  # what os.listdir gives
        assert name_bytes(name) == os.fsencode(name) == raw  # os.fsencode is the reference for a name's bytes
    assert printable(os.fsdecode(b"caf\xe9")) == "caf\\xe9"
    assert printable("café") == "café" and printable("\ud800x") == "\\ud800x"
    assert name_bytes("café/0.png") == "café/0.png".encode()  # valid text: its UTF-8, as before


def _tree(root: Path, names: tuple[bytes, ...]) -> Path:
    for split in (b"train", b"val", b"test"):
        for k, name in enumerate(names):
            folder = os.path.join(os.fsencode(root), split, name)
            os.makedirs(folder)
            for i in range(3):
                Image.fromarray(np.full((8, 8), 40 * k + 10 * i, np.uint8)).save(os.path.join(folder, b"%d\xe9.png"
                                                                                             % i if b"\xe9" in name
                                                                                             else b"%d.png" % i))
    return root


def _old_hash(root: Path) -> str:
    """The hash tune recorded before names that are not UTF-8 were carried (str.encode of each line)."""
    h = hashlib.sha256()
    for split in ("train", "val"):
        for label, cls in enumerate(sorted(os.listdir(root / split))):
            for f in sorted(os.listdir(root / split / cls)):
                size = (root / split / cls / f).stat().st_size
                h.update(f"{split}\t{split}/{cls}/{f}\t{label}\t{size}\n".encode())
    return h.hexdigest()


def _tune(root: Path, out: Path, **run) -> None:
    recipe = dataclasses.replace(load_recipe("baseline"), batch_size=4, epochs=1)
    with pytest.warns(SpliceWarning):  # random weights
        tune("splice.models:tray_net", recipe=recipe, data=str(root), out=out,
             model_options=ModelOptions(kwargs={"num_classes": 2}), run_options=RunOptions(progress=False, **run))


def test_the_image_list_hash_of_utf8_names_is_unchanged(tmp_path):
    root = _tree(tmp_path / "data", ("café".encode(), b"b"))
    _tune(root, tmp_path / "run", stop_after_steps=1)
    assert json.loads((tmp_path / "run" / "run.json").read_text())["images_sha256"] == _old_hash(root)


def test_names_that_are_not_utf8_go_through_tune_and_inspect(tmp_path):
    try:
        root = _tree(tmp_path / "data", LATIN1)
    except (OSError, UnicodeError):
        pytest.skip("this file system keeps only UTF-8 names")
    _tune(root, tmp_path / "run")
    recorded = json.loads((tmp_path / "run" / "run.json").read_text())
    assert recorded["class_names"] == [os.fsdecode(n) for n in LATIN1]
    spliced = splice.insert(str(tmp_path / "run" / "best"), at="input")
    result = splice.inspect(spliced, data=str(root), n=6, out=tmp_path / "report")
    csv = (tmp_path / "report" / "warps.csv").read_text(encoding="utf-8")
    assert "caf\\xe9/0\\xe9.png" in csv and "th\\xe9/2\\xe9.png" in csv
    assert {Path(p).name for p in result["files"]["pictures"]} == {"sheet_input.png", "hist_input.png"}
    assert all((tmp_path / "report" / p).stat().st_size > 0 for p in result["files"]["pictures"])


def test_the_command_line_prints_such_names_on_a_strict_stream(tmp_path, monkeypatch):
    import io
    import sys

    from splice import cli
    from splice.fileio import printable_streams

    strict = io.TextIOWrapper(io.BytesIO(), encoding="utf-8", errors="strict")
    monkeypatch.setattr(sys, "stdout", strict)
    with printable_streams():
        print(os.fsdecode(b"caf\xe9"), "café")
    assert strict.errors == "strict"  # given back after the command
    strict.flush()
    assert strict.buffer.getvalue() == "caf\\xe9 café\n".encode()
    try:
        root = _tree(tmp_path / "data", LATIN1 + (b"zz",))
    except (OSError, UnicodeError):
        pytest.skip("this file system keeps only UTF-8 names")
    for path in (root / "test" / os.fsdecode(LATIN1[1])).iterdir():
        path.unlink()
    err = io.TextIOWrapper(io.BytesIO(), encoding="utf-8", errors="strict")
    monkeypatch.setattr(sys, "stderr", err)
    code = cli.main(["eval", "splice.models:tray_net", "--kwargs", '{"num_classes": 3}', "--data", str(root),
                     "--distort", "none", "--json"])
    err.flush()
    assert code == 0 and b"warning: test has no images of th\\xe9 (in " in err.buffer.getvalue()
