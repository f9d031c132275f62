"""splice.verify: every check on a passing splice, and each deliberate break caught by the right check.

The outside reference for the ONNX rows is onnxruntime (CPUExecutionProvider);
the image probe uses scikit-learn's bundled handwritten digits (UCI optdigits).
"""

from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest
import torch
from safetensors.torch import load_file, save_file

import splice
from splice import store
from splice.fileio import file_sha256, state_dict_sha256
from splice.cli import main
from splice.errors import DataError, ManifestError, SpliceError
from splice.surgery import insert, warps_of
from splice.verification import (
    DEFAULT_TOLERANCES,
    CheckResult,
    VerifyReport,
    compare_outputs,
    probe_batch,
    render_verify,
    verify,
    verify_models,
    write_report,
)
from splice.warps import Warp, WarpConfig

ALL_CHECKS = ["integrity", "finite", "shapes", "outputs", "warps", "provenance", "gradients", "buffers"]
TRAY = "splice.models:tray_net"
SMALL = {"width": 4}

MODEL_FILE = '''
import torch
from torch import nn


class _Body(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(1, 4, 3, padding=1)
        self.bn1 = nn.BatchNorm2d(4)
        self.conv2 = nn.Conv2d(4, 4, 3, padding=1)
        self.fc = nn.Linear(4, 3)

    def features(self, x):
        x = torch.relu(self.bn1(self.conv1(x)))
        return torch.relu(self.conv2(x))


class DictNet(_Body):
    def forward(self, x):
        f = self.features(x)
        return {"logits": self.fc(f.mean((2, 3))), "map": f[:, :1]}


class TwoNet(_Body):
    def forward(self, x):
        f = self.features(x)
        return self.fc(f.mean((2, 3))), f.amax((2, 3))


class Tally(nn.Module):
    """Counts its calls in a buffer, even in eval mode (state verify must catch)."""

    def __init__(self):
        super().__init__()
        self.register_buffer("calls", torch.zeros(()))

    def forward(self, x):
        self.calls += 1
        return x


class CountingNet(_Body):
    def __init__(self):
        super().__init__()
        self.tally = Tally()

    def forward(self, x):
        return self.fc(self.tally(self.features(x)).mean((2, 3)))


class FlatNet(_Body):
    """Flattens a fixed-size map, so a shape change makes it fail."""

    def __init__(self):
        super().__init__()
        self.head = nn.Linear(4 * 20 * 20, 3)

    def forward(self, x):
        return self.head(torch.flatten(self.features(x), 1))


def flat_net():
    return FlatNet()


def dict_net():
    return DictNet()


def two_net():
    return TwoNet()


def counting_net():
    return CountingNet()


for _f in (dict_net, two_net, counting_net, flat_net):
    _f.input_shape = (1, 20, 20)


class CachedBias(nn.Module):
    """Keeps, in eval mode, a bias indexed from a parameter table; branches on a size (warps go in by hooks)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)
        self.table = nn.Parameter(torch.randn(6))
        self.register_buffer("index", torch.tensor([0, 2, 4, 5]))
        self.cache = {}
        self.head = nn.Linear(4, 3)

    def forward(self, x):
        if self.training or "bias" not in self.cache:
            bias = self.table[self.index]
            if not self.training:
                self.cache["bias"] = bias
        bias = bias if self.training else self.cache["bias"]
        y = self.conv(x) + bias.view(1, -1, 1, 1)
        if y.shape[-1] % 2 == 0:
            y = y * 1.0
        return self.head(y.mean((2, 3)))


def cached_bias_net():
    return CachedBias()


cached_bias_net.input_shape = (1, 8, 8)
'''


# ----------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def work(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("verify")


@pytest.fixture(scope="module")
def source_weights(work) -> Path:
    """A tray_net checkpoint on disk, so provenance can compare tensor by tensor."""
    from splice.models import tray_net

    torch.manual_seed(1)

    model = tray_net(**SMALL)
    path = work / "tray_source.safetensors"
    save_file({k: v.contiguous() for k, v in model.state_dict().items()}, str(path))
    return path


@pytest.fixture(scope="module")
def tray_source(source_weights):
    return splice.load_source(TRAY, kwargs=SMALL, weights=source_weights)


@pytest.fixture(scope="module")
def tray_spliced(tray_source):
    return insert(tray_source, at=["input", "pool2"])


@pytest.fixture(scope="module")
def tray_folder(work, tray_spliced) -> Path:
    return store.save(tray_spliced, work / "tray")


@pytest.fixture(scope="module")
def digits_folder(work) -> Path:
    """Eight tray-camera digits (scikit-learn's bundled optdigits) as PNG files."""
    import numpy as np
    from PIL import Image
    from sklearn.datasets import load_digits

    folder = work / "digits"
    folder.mkdir()
    digits = load_digits()
    for i in range(8):
        img = (digits.images[i] / 16.0 * 255).astype(np.uint8)
        Image.fromarray(img, mode="L").save(folder / f"digit_{i}.png")
    return folder


@pytest.fixture(scope="module")
def model_file(work) -> Path:
    path = work / "outputs_nets.py"
    path.write_text(MODEL_FILE)
    return path


def _copy_folder(src: Path, dst: Path) -> Path:
    import shutil

    shutil.copytree(src, dst)
    return dst


def _rewrite_weights(folder: Path, edit) -> None:
    """Edit the safetensors file and re-record its file hash (so integrity still passes)."""
    path = folder / store.WEIGHTS_NAME
    state = load_file(str(path))
    edit(state)
    save_file(state, str(path), metadata={"format": "pt"})
    manifest_path = folder / store.MANIFEST_NAME
    manifest = json.loads(manifest_path.read_text())
    manifest["weights"]["sha256"] = file_sha256(path)
    manifest_path.write_text(json.dumps(manifest))


def _final(warp):
    return warp.head.final


def _clone(spliced):
    """deepcopy of a spliced GraphModule; fx's deepcopy drops custom attributes, so carry splice_info over."""
    twin = copy.deepcopy(spliced)
    twin.splice_info = copy.deepcopy(spliced.splice_info)
    return twin


# ----------------------------------------------------------------------------- a passing splice


def test_passing_splice_every_check(tray_folder, digits_folder):
    report = verify(tray_folder, images=digits_folder, onnx=True)
    names = [c.check for c in report.checks]
    assert names == ["integrity", "finite", "shapes", "outputs", "images", "warps", "provenance", "gradients",
                     "onnx", "buffers"]
    assert report.passed, [(c.check, c.detail) for c in report.checks if not c.passed]
    out = report["outputs"].numbers
    assert out["max_rel"] <= DEFAULT_TOLERANCES[torch.float32] and out["top1"] == 1.0
    assert out["warps_reset"] is False
    assert report["images"].numbers["top1"] == 1.0
    assert len(report.meta["images"]) == 8
    # onnxruntime is the outside reference for the export rows
    onnx_row = report["onnx"].numbers
    assert onnx_row["opset"] == 17 and onnx_row["export_seconds"] > 0
    assert onnx_row["max_rel"] <= 1e-4 and onnx_row["max_rel_perturbed"] <= 1e-4
    assert onnx_row["perturbed_by"] == "feeds"
    # the gradient contract at the exact identity: final layer non-zero, earlier head layers exactly 0
    for g in report["gradients"].numbers["warps"].values():
        assert g["final_weight"] > 0 and g["final_bias"] > 0 and g["upstream"] == 0.0
    assert report["buffers"].numbers["buffers"] > 0  # BatchNorm running stats are counted
    assert report.meta["tuned"] is False


def test_outputs_row_matches_an_independent_comparison(tray_folder):
    """Recompute the outputs row by hand from the folder: eager base against the spliced model."""
    report = verify(tray_folder, batch=3, seed=7)
    base = store.load_base(tray_folder)
    spliced = store.load(tray_folder)
    x = probe_batch((1, 48, 48), 3, seed=7)
    with torch.no_grad():
        err = float((base(x) - spliced(x)).abs().max())
    assert report["outputs"].numbers["max_abs"] == pytest.approx(err, abs=0.0)
    assert report.meta["batch"] == 3 and report.meta["seed"] == 7


def test_probe_is_seeded_and_shaped():
    a, b = probe_batch((3, 8, 8), 2, seed=5), probe_batch((3, 8, 8), 2, seed=5)
    assert a.shape == (2, 3, 8, 8) and torch.equal(a, b)
    assert not torch.equal(a, probe_batch((3, 8, 8), 2, seed=6))
    assert probe_batch((3, 8, 8), 1, dtype=torch.float64).dtype == torch.float64


def test_probe_batch_default_and_larger(tray_folder):
    """One sample by default; a larger probe batch runs every check on all of its samples."""
    assert verify(tray_folder).meta["batch"] == 1
    report = verify(tray_folder, batch=3)
    assert report.passed, report.failed
    assert report.meta["batch"] == 3
    assert report["shapes"].numbers["warps"]["pool2"]["input"][0] == 3


def test_float64_runs_both_models_in_float64(tray_folder):
    report = verify(tray_folder, dtype="float64")
    assert report.passed
    assert report.meta["dtype"] == "float64"
    assert report["outputs"].numbers["tolerance"] == DEFAULT_TOLERANCES[torch.float64]
    assert report["outputs"].numbers["max_rel"] <= 1e-10


def test_report_file_is_a_complete_certificate(tray_folder, tmp_path):
    report = verify(tray_folder, seed=3)
    path = write_report(report, tmp_path / "cert.json")
    data = json.loads(path.read_text())
    assert data["format"] == "splice-verify-certificate" and data["passed"] is True
    assert data["seed"] == 3
    assert set(data["versions"]) >= {"splice", "torch", "torchvision", "onnx", "onnxruntime"}
    manifest = store.read_manifest(tray_folder)
    assert data["hashes"]["weights_sha256"] == manifest["weights"]["sha256"]
    assert data["hashes"]["base_sha256"] == manifest["source"]["weights_sha256"]
    assert [c["check"] for c in data["checks"]] == ALL_CHECKS
    assert all({"check", "passed", "numbers", "detail"} <= set(c) for c in data["checks"])
    assert not list(tmp_path.glob(".*tmp"))  # atomic write left no temporary file


def test_render_table_has_one_row_per_check(tray_folder):
    from rich.console import Console

    report = verify(tray_folder)
    console = Console(record=True, width=160)
    render_verify(report, console)
    text = console.export_text()
    for name in ALL_CHECKS:
        assert name in text
    assert text.count("PASS") >= len(ALL_CHECKS)


def test_torchvision_resnet18_small_input(tmp_path):
    src = splice.load_source("torchvision:resnet18", input_shape=(3, 64, 64), kwargs={"num_classes": 10})
    folder = store.save(insert(src, at=["input", "maxpool"]), tmp_path / "r18")
    report = verify(folder)
    assert report.passed, report.failed
    assert report["outputs"].numbers["top1"] == 1.0


@pytest.mark.slow
def test_torchvision_resnet18_onnx(tmp_path):
    src = splice.load_source("torchvision:resnet18", input_shape=(3, 64, 64), kwargs={"num_classes": 10})
    folder = store.save(insert(src, at=["input", "maxpool"], warp="projective"), tmp_path / "r18")
    report = verify(folder, onnx=True)  # onnxruntime is the reference
    assert report.passed, [(c.check, c.detail) for c in report.checks if not c.passed]


@pytest.mark.parametrize("factory", ["dict_net", "two_net"])
def test_dict_and_tuple_outputs_verify(model_file, tmp_path, factory):
    spliced = insert(f"{model_file}:{factory}", at="input")
    folder = store.save(spliced, tmp_path / factory)
    report = verify(folder, onnx=True, trust_code=True)  # the factory is a .py file this test wrote
    assert report.passed, [(c.check, c.detail) for c in report.checks if not c.passed]
    outputs = report["shapes"].numbers["outputs"]
    expected = {"dict_net": {"out.logits", "out.map"}, "two_net": {"out[0]", "out[1]"}}[factory]
    assert set(outputs) == expected


# ----------------------------------------------------------------------------- deliberate breaks


def test_head_not_zero_initialised_is_caught_by_warps(tray_spliced, tmp_path):
    bad = _clone(tray_spliced)
    with torch.no_grad():
        _final(warps_of(bad)["pool2"]).weight.normal_(0, 0.05)
    folder = store.save(bad, tmp_path / "bad_head")  # saved as a fresh splice: tuning is null
    report = verify(folder)
    assert report.failed == ["warps"]
    row = report["warps"]
    assert "pool2" in row.detail and "no tuning" in row.detail
    assert row.numbers["moved"] == ["pool2"] and row.numbers["warps"]["pool2"]["distance"] > 0
    # re-checked with the warps reset to the identity: the base graph inside is intact
    assert report["outputs"].passed and report["outputs"].numbers["warps_reset"] is True


def test_changed_base_weight_is_caught_by_provenance(tray_folder, tmp_path):
    folder = _copy_folder(tray_folder, tmp_path / "edited")

    def edit(state):
        state["block2.conv.weight"][0, 0, 0, 0] += 0.25

    _rewrite_weights(folder, edit)
    report = verify(folder)
    assert report.failed == ["provenance"]
    row = report["provenance"]
    assert "no tuning of the base is recorded" in row.detail
    assert row.numbers["diff"]["changed"] == 1
    assert row.numbers["diff"]["largest"][0]["name"] == "block2.conv.weight"
    assert row.numbers["diff"]["max_abs_diff"] == pytest.approx(0.25, rel=1e-6)


def test_shape_changing_warp_is_caught_by_shapes(tray_spliced):
    class CroppingWarp(Warp):
        def forward(self, x, loc=None):
            return super().forward(x, loc)[..., 1:-1, 1:-1]

    bad = _clone(tray_spliced)
    old = warps_of(bad)["pool2"]
    crop = CroppingWarp(old.config, old.shape)
    crop.load_state_dict(old.state_dict())
    bad.splice_warps["pool2"] = crop
    base = splice.load_source(TRAY, kwargs=SMALL).model
    base.load_state_dict({k: v for k, v in bad.state_dict().items() if not k.startswith("splice_warps.")})
    report = verify_models(base, bad)
    assert "shapes" in report.failed
    assert "warp 'pool2' turns (1, 8, 12, 12) into (1, 8, 10, 10)" in report["shapes"].detail


def test_shape_change_that_breaks_the_model_is_still_named(model_file):
    class CroppingWarp(Warp):
        def forward(self, x, loc=None):
            return super().forward(x, loc)[..., 1:-1, 1:-1]

    spliced = insert(f"{model_file}:flat_net", at="input")
    old = warps_of(spliced)["input"]
    crop = CroppingWarp(old.config, old.shape)
    crop.load_state_dict(old.state_dict())
    spliced.splice_warps["input"] = crop
    base = splice.load_source(f"{model_file}:flat_net").model
    base.load_state_dict({k: v for k, v in spliced.state_dict().items() if not k.startswith("splice_warps.")})
    report = verify_models(base, spliced)
    assert report.failed == ["shapes", "outputs", "gradients"]
    detail = report["shapes"].detail
    assert "warp 'input' turns (1, 1, 20, 20) into (1, 1, 18, 18)" in detail
    assert "the spliced model fails on the probe (RuntimeError" in detail
    assert report["gradients"].detail.startswith("not run")


def test_tampered_weights_file_is_caught_by_integrity(tray_folder, tmp_path):
    folder = _copy_folder(tray_folder, tmp_path / "tampered")
    path = folder / store.WEIGHTS_NAME
    data = bytearray(path.read_bytes())
    data[-5] ^= 0xFF
    path.write_bytes(bytes(data))
    report = verify(folder)
    assert report.failed == ["integrity"] and len(report.checks) == 1
    assert str(path) in report["integrity"].detail
    assert "no other check ran" in report.meta["not_run"]


def test_nan_weights_are_named_by_finite(tray_folder, tmp_path):
    folder = _copy_folder(tray_folder, tmp_path / "nan")

    def edit(state):
        state["fc.weight"][0, 0] = float("nan")
        state["block1.bn.running_var"][1] = float("inf")

    _rewrite_weights(folder, edit)
    report = verify(folder)
    assert report.failed == ["finite"]
    assert report["finite"].numbers["non_finite"] == ["block1.bn.running_var", "fc.weight"]
    assert "fc.weight" in report["finite"].detail


def test_a_model_that_counts_in_eval_mode_is_checked_on_copies(model_file):
    # the checks run on twins with their own buffers: the models stay as they were, and the row says
    # that base and splice both update the counter
    spliced = insert(f"{model_file}:counting_net", at="input", check=False)
    base = splice.load_source(f"{model_file}:counting_net").model
    base.load_state_dict({k: v for k, v in spliced.state_dict().items() if not k.startswith("splice_warps.")})
    assert int(spliced.get_buffer("tally.calls")) == 0  # listing and splicing never ran the counter
    before = state_dict_sha256(spliced.state_dict()), state_dict_sha256(base.state_dict())
    report = verify_models(base, spliced)
    assert report.passed, report.failed
    assert report["buffers"].numbers["updated_in_eval"] == ["base:tally.calls", "spliced:tally.calls"]
    assert "tally.calls" in report["buffers"].detail
    assert (state_dict_sha256(spliced.state_dict()), state_dict_sha256(base.state_dict())) == before


def test_a_splice_that_stopped_updating_a_buffer_fails_buffers(model_file):
    spliced = insert(f"{model_file}:counting_net", at="input", check=False)
    spliced.tally.forward = lambda x: x  # as a graph traced through the counter would behave
    base = splice.load_source(f"{model_file}:counting_net").model
    base.load_state_dict({k: v for k, v in spliced.state_dict().items() if not k.startswith("splice_warps.")})
    report = verify_models(base, spliced)
    assert report.failed == ["buffers"]
    assert report["buffers"].numbers["not_updated_by_splice"] == ["base:tally.calls"]
    assert "the spliced model does not" in report["buffers"].detail


def test_nearest_sampler_fails_gradients(tray_source, tmp_path):
    spliced = insert(tray_source, at="pool2", warp=WarpConfig(sampler="nearest"))
    report = verify(store.save(spliced, tmp_path / "nearest"))
    assert report.failed == ["gradients"]
    assert "'nearest' sampler passes no gradient" in report["gradients"].detail


# ----------------------------------------------------------------------------- tuned models


def _tuned(spliced, *, scale=0.05):
    from harness import perturb_warps_

    moved = _clone(spliced)
    perturb_warps_(moved, scale=scale)
    return moved


def test_tuned_warps_reported_and_reset_recheck_passes(tray_spliced, tmp_path):
    moved = _tuned(tray_spliced)
    folder = store.save(moved, tmp_path / "tuned", tuning={"recipe": "warp-only", "base_changed": False})
    report = verify(folder)
    assert report.passed, [(c.check, c.detail) for c in report.checks if not c.passed]
    assert report.meta["tuned"] is True
    warps_row = report["warps"].numbers
    for name, warp in warps_of(moved).items():
        assert warps_row["warps"][name]["distance"] == pytest.approx(warp.identity_distance())
        assert warps_row["warps"][name]["point_max_abs"] > 0
        assert warps_row["warps"][name]["output_max_abs"] > 0  # two moved warps: one deviation each
    assert warps_row["output_max_abs"] > 0
    assert report["outputs"].numbers["warps_reset"] is True
    assert report["outputs"].numbers["max_rel"] <= DEFAULT_TOLERANCES[torch.float32]
    # off the identity, every head layer gets a gradient
    for g in report["gradients"].numbers["warps"].values():
        assert g["upstream"] > 0


def test_joint_tuning_declares_and_compares_base(tray_spliced, tmp_path):
    moved = _tuned(tray_spliced)
    with torch.no_grad():
        moved.get_parameter("fc.bias").add_(0.5)
    folder = store.save(moved, tmp_path / "joint", tuning={"recipe": "joint", "base_changed": True})
    report = verify(folder)
    assert report.passed, report.failed
    row = report["provenance"]
    assert "joint recipe" in row.detail
    assert row.numbers["diff"]["largest"][0]["name"] == "fc.bias"
    assert row.numbers["diff"]["max_abs_diff"] == pytest.approx(0.5, rel=1e-6)
    # the same change without the declaration fails
    undeclared = store.save(moved, tmp_path / "undeclared", tuning={"recipe": "warp-only", "base_changed": False})
    assert verify(undeclared).failed == ["provenance"]


# ----------------------------------------------------------------------------- the in-memory API


def test_verify_models_leaves_callers_models_alone(tray_source, tray_spliced):
    base = copy.deepcopy(tray_source.model).train()
    spliced = _clone(tray_spliced).train()
    hashes = (state_dict_sha256(base.state_dict()), state_dict_sha256(spliced.state_dict()))
    report = verify_models(base, spliced, dtype="float64")
    assert report.passed, report.failed
    assert "integrity" not in report
    assert base.training and spliced.training
    assert all(m.training for m in spliced.modules())
    assert next(base.parameters()).dtype == torch.float32
    assert (state_dict_sha256(base.state_dict()), state_dict_sha256(spliced.state_dict())) == hashes


def test_report_types():
    rows = [CheckResult("a", True, {"x": float("inf")}), CheckResult("b", False)]
    report = VerifyReport(rows, {"seed": 1})
    assert not report.passed and report.failed == ["b"]
    assert report.to_json()["checks"][0]["numbers"]["x"] == "inf"
    with pytest.raises(KeyError, match="no check named 'c'"):
        report["c"]
    assert not VerifyReport([]).passed


def test_compare_outputs_flags_shape_and_nan():
    a = torch.ones(2, 3)
    assert not compare_outputs(a, torch.ones(2, 4))["passed"]
    nan = torch.ones(2, 3)
    nan[0, 0] = float("nan")
    assert "NaN" in compare_outputs(a, nan)["detail"]


# ----------------------------------------------------------------------------- bad input


def test_bad_input_errors(tray_folder, tmp_path):
    with pytest.raises(ManifestError, match="does not exist"):
        verify(tmp_path / "nowhere")
    with pytest.raises(ManifestError, match="not a splice folder"):
        verify(tmp_path)
    with pytest.raises(SpliceError, match="probe batch must be a positive integer, got 0"):
        verify(tray_folder, batch=0)
    with pytest.raises(SpliceError, match="dtype 'float16' is not supported"):
        verify(tray_folder, dtype="float16")
    with pytest.raises(SpliceError, match="opset 15 is too old.*GridSample"):
        verify(tray_folder, onnx=True, opset=15)
    (tmp_path / "empty").mkdir()
    with pytest.raises(DataError, match="holds no images"):
        verify(tray_folder, images=tmp_path / "empty")
    with pytest.raises(DataError, match="does not exist"):
        verify(tray_folder, images=tmp_path / "missing")
    with pytest.raises(SpliceError, match="needs the model's input shape"):
        verify_models(torch.nn.Identity(), torch.nn.Identity())


def test_missing_weights_file_is_bad_input(tray_folder, tmp_path):
    from splice.errors import WeightsError

    folder = _copy_folder(tray_folder, tmp_path / "incomplete")
    (folder / store.WEIGHTS_NAME).unlink()
    with pytest.raises(WeightsError, match="is missing; the folder is incomplete"):
        verify(folder)


# ----------------------------------------------------------------------------- CLI


def test_cli_exit_codes(tray_folder, tmp_path, capsys):
    cert = tmp_path / "cert.json"
    assert main(["verify", str(tray_folder), "--report", str(cert), "--batch", "2"]) == 0
    assert json.loads(cert.read_text())["passed"] is True
    assert "PASS" in capsys.readouterr().out

    broken = _copy_folder(tray_folder, tmp_path / "broken")
    path = broken / store.WEIGHTS_NAME
    data = bytearray(path.read_bytes())
    data[-1] ^= 0x01
    path.write_bytes(bytes(data))
    assert main(["verify", str(broken), "--json"]) == 1
    printed = json.loads(capsys.readouterr().out)
    assert printed["passed"] is False and printed["checks"][0]["check"] == "integrity"

    assert main(["verify", str(tmp_path / "nowhere")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert main(["verify", str(tray_folder), "--onnx", "--opset", "11"]) == 2
    assert "GridSample" in capsys.readouterr().err


class _CachedBias(torch.nn.Module):
    """Indexes a bias table once in eval mode and keeps the result, as attention with relative position biases
    does: a forward with gradients leaves a cached tensor that requires grad. Its check on a size keeps fx
    out (the warps go in by hooks, and the model's own forward runs)."""

    def __init__(self):
        super().__init__()
        self.conv = torch.nn.Conv2d(3, 4, 3, padding=1)
        self.table = torch.nn.Parameter(torch.randn(6))
        self.register_buffer("index", torch.tensor([0, 2, 4, 5]))
        self.cache: dict = {}
        self.head = torch.nn.Linear(4, 3)

    def forward(self, x):
        if self.training:
            bias = self.table[self.index]
        else:
            if "bias" not in self.cache:
                self.cache["bias"] = self.table[self.index]
            bias = self.cache["bias"]
        y = self.conv(x) + bias.view(1, -1, 1, 1)
        if y.shape[-1] % 2 == 0:  # Python on a size: torch.fx cannot trace it, the meta device can
            y = y * 1.0
        return self.head(y.mean((2, 3)))


def test_the_onnx_check_runs_on_a_model_no_probe_has_run():
    # the gradient check's forward filled the twin's cache with a tensor that requires grad; exported from
    # that twin, the TorchScript exporter refused it as a constant
    model = _CachedBias().eval()
    with pytest.warns(splice.graph.TraceFallbackWarning):
        spliced = insert(model, at="recommended", input_shape=(3, 8, 8))
    report = verify_models(model, spliced, onnx=True)
    assert report["onnx"].passed, report["onnx"].detail
    assert report.passed, report.failed
    assert model.cache == {}  # and the caller's model still has none


def test_a_folders_onnx_check_runs_on_a_model_no_probe_has_run(model_file, tmp_path):
    # verify runs the models it rebuilt as they are (each with its own copies of the buffers); the export
    # still starts from one whose cache no probe has filled with a tensor that requires grad
    with pytest.warns(splice.graph.TraceFallbackWarning):
        spliced = insert(f"{model_file}:cached_bias_net", at="recommended", check=False)
    folder = store.save(spliced, tmp_path / "cached")
    report = verify(folder, onnx=True, trust_code=True)
    assert report["onnx"].passed, report["onnx"].detail
    assert report.passed, report.failed
