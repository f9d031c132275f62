"""Tuning a float64 model: every recipe casts its batches (and the label-free probe) to the model's dtype.

The model is a narrow tray_net in float64 on 24x24 digits, built from a factory file.
"""

from __future__ import annotations

import json
import warnings

import pytest
import torch
from safetensors.torch import load_file

import splice
from splice.data import open_data
from splice.errors import SpliceWarning
from splice.recipes import Recipe, load_recipe
from splice.training import RunOptions, read_metrics, tune

SHAPE = (1, 24, 24)
QUIET = RunOptions(progress=False)
TRUST = splice.ModelOptions(trust_code=True)  # the factory file is the test's own
FACTORY = '''
from splice.models import tray_net


def net():
    return tray_net(width=4).double()


net.input_shape = (1, 24, 24)
'''


pytestmark = pytest.mark.usefixtures("one_thread")  # see conftest.py


@pytest.fixture(scope="module")
def spec(tmp_path_factory):
    path = tmp_path_factory.mktemp("models") / "f64.py"
    path.write_text(FACTORY, encoding="utf-8")
    return f"{path}:net"


@pytest.fixture(scope="module")
def spliced(spec, tmp_path_factory):
    out = tmp_path_factory.mktemp("spliced") / "f64"
    with warnings.catch_warnings():  # the random-weights warning, told once per spec
        warnings.filterwarnings("ignore", ".*has random weights", SpliceWarning)
        splice.save(splice.insert(spec, at="input", warp=splice.WarpConfig(head_width=4)), out)
    return out


def _tiny(name: str) -> Recipe:
    d = load_recipe(name).to_dict()
    d.update(epochs=1, batch_size=128)
    d["pretrain"].update(epochs=1, batch_size=128)
    if "site" in d:
        d["site"].update(probe_epochs=1, probe_width=4)
    return Recipe.from_dict(d)


def _dtypes(folder) -> set[torch.dtype]:
    return {t.dtype for t in load_file(str(folder / "weights.safetensors")).values() if t.is_floating_point()}


def test_baseline_tunes_a_float64_model_and_records_its_own_accuracy(spec, tmp_path):
    out = tmp_path / "run"
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", ".*has random weights", SpliceWarning)
        summary = tune(spec, recipe=_tiny("baseline"), data="digits", out=out, run_options=QUIET)
    assert summary["steps"] == -(-1078 // 128)  # 1078 training digits (splice.data), batch 128
    assert _dtypes(out / "last") == {torch.float64}
    # the reference: torch's own float64 forward of the saved model over the validation digits
    val = open_data("digits", "val", input_shape=SHAPE)
    model = splice.load(out / "last", trust_code=True).eval()
    norm = json.loads((out / "last" / "splice.json").read_text())["normalisation"]  # estimated by the run
    mean, std = (torch.tensor(norm[k], dtype=torch.float64).view(-1, 1, 1) for k in ("mean", "std"))
    with torch.no_grad():
        logits = model((val.images.double() - mean) / std)
    accuracy = (logits.argmax(1) == val.labels).double().mean().item()
    assert read_metrics(out)[-1]["accuracy"] == pytest.approx(accuracy, abs=1e-6)


@pytest.mark.parametrize("recipe", ["joint", "warp-only"])
def test_recipes_that_pretrain_warps_tune_a_float64_splice(spliced, recipe, tmp_path):
    out = tmp_path / recipe
    summary = tune(str(spliced), recipe=_tiny(recipe), data="digits-moved", out=out, run_options=QUIET,
                   model_options=TRUST)
    assert summary["steps"] == -(-1078 // 128)
    assert [r["phase"] for r in read_metrics(out)][0] == "pretrain"
    assert _dtypes(out / "last") == {torch.float64}
    moved = splice.load(out / "last", trust_code=True)
    assert moved.splice_warps.input.identity_distance() > 0  # the warp was trained


def _adapt(model, recipe, out) -> dict[str, torch.Tensor]:
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", ".*has random weights", SpliceWarning)
        tune(str(model), model_options=TRUST, recipe=_tiny(recipe), site="digits-moved", out=out, run_options=QUIET)
    assert _dtypes(out / "best") == {torch.float64}
    return load_file(str(out / "best" / "weights.safetensors"))


def test_batchnorm_stats_adapts_a_float64_model(spec, tmp_path):
    after = _adapt(spec, "batchnorm-stats", tmp_path / "bn")
    means = [v for k, v in after.items() if k.endswith("running_mean")]
    # a freshly built BatchNorm2d keeps mean 0 (torch's init): the site's statistics replaced it
    assert means and all(v.dtype == torch.float64 and v.abs().sum() > 0 for v in means)


def test_label_free_adapts_a_float64_splice(spliced, tmp_path):
    before = load_file(str(spliced / "weights.safetensors"))
    after = _adapt(spliced, "label-free", tmp_path / "lf")
    assert any(not torch.equal(before[k], after[k]) for k in before if k.startswith("splice_warps."))
