"""The source weights file a folder's splice.json (``source.weights_file``) and a run's run.json
(``model_weights``) name: splice writes it absolute, and a relative one is read as the folder's, never the current
directory's (a verify run from elsewhere must not read whatever file has that name there)."""

from __future__ import annotations

import json
import os

import pytest
import torch
from safetensors.torch import save_file

import splice
from splice.cli import main
from splice.models import tray_net
from splice.training import RecipeOverrides, RunOptions

SPEC = "splice.models:tray_net"
SHAPE = (1, 16, 16)


def _weights(path, seed: int) -> None:
    torch.manual_seed(seed)
    save_file({k: v.contiguous() for k, v in tray_net(width=4).state_dict().items()}, str(path))


def _folder(tmp_path):
    """A folder spliced from weights named by a relative path, as it would be after moving the two together."""
    made = tmp_path / "made"
    made.mkdir()
    _weights(made / "w.safetensors", seed=1)
    src = splice.load_source(SPEC, weights=str(made / "w.safetensors"), kwargs={"width": 4}, input_shape=SHAPE)
    model = splice.insert(src, at="input")
    folder = splice.save(model, tmp_path / "sp")
    os.replace(made / "w.safetensors", folder / "w.safetensors")
    manifest = json.loads((folder / "splice.json").read_text())
    manifest["source"]["weights_file"] = "w.safetensors"
    (folder / "splice.json").write_text(json.dumps(manifest), encoding="utf-8")
    return folder


def test_a_relative_weights_file_is_the_folders_not_the_current_directorys(tmp_path, monkeypatch):
    folder = _folder(tmp_path)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    _weights(elsewhere / "w.safetensors", seed=2)  # a decoy of the same name where verify runs
    monkeypatch.chdir(elsewhere)
    report = splice.verify(folder)
    row = report["provenance"]
    assert report.passed and row.passed and not row.warning  # read, and bitwise the base: the decoy would differ
    assert str(folder / "w.safetensors") in row.detail and str(elsewhere) not in row.detail


def test_splice_records_the_source_weights_absolute(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _weights(tmp_path / "w.safetensors", seed=1)
    src = splice.load_source(SPEC, weights="w.safetensors", kwargs={"width": 4}, input_shape=SHAPE)  # as typed
    folder = splice.save(splice.insert(src, at="input"), tmp_path / "sp")
    assert json.loads((folder / "splice.json").read_text())["source"]["weights_file"] == str(tmp_path / "w.safetensors")
    run = tmp_path / "run"
    options = splice.ModelOptions(weights="w.safetensors", kwargs={"width": 4}, input_shape=SHAPE)
    splice.tune(SPEC, recipe="baseline", data="digits", out=run, model_options=options,
                overrides=RecipeOverrides(epochs=1, batch_size=256), run_options=RunOptions(progress=False))
    assert json.loads((run / "run.json").read_text())["model_weights"] == str(tmp_path / "w.safetensors")
    recorded = json.loads((run / "last" / "splice.json").read_text())["source"]["weights_file"]
    assert recorded == str(tmp_path / "w.safetensors")


def test_verify_says_trust_pickle_also_opens_the_source_checkpoint(capsys):
    with pytest.raises(SystemExit):
        main(["verify", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "source checkpoint its splice.json names (source.weights_file" in text
