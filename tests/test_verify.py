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

from verify_fixtures import (  # noqa: F401 - fixtures are found by name
    ALL_CHECKS,
    TRAY,
    SMALL,
    MODEL_FILE,
    work,
    source_weights,
    tray_source,
    tray_spliced,
    tray_folder,
    digits_folder,
    model_file,
    copy_folder as _copy_folder,
    rewrite_weights as _rewrite_weights,
    final_layer as _final,
    clone_spliced as _clone,
)


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


def test_a_leafs_buffer_read_outside_it_is_a_node_of_the_graph(model_file):
    """WarmingNet's own forward reads the counter its leaf updates: the graph reads the buffer at each call (fx
    hands traced code a buffer's value, so the factor computed from it was a constant of the graph)."""
    spliced = insert(f"{model_file}:warming_net", at="input", check=False)
    assert splice.manifest.info_of(spliced).mechanism == "fx"
    assert [n.target for n in spliced.graph.nodes if n.op == "get_attr"] == ["tally.calls"]
    base = splice.load_source(f"{model_file}:warming_net").model
    base.load_state_dict({k: v for k, v in spliced.state_dict().items() if not k.startswith("splice_warps.")})
    report = verify_models(base, spliced)  # before either has run: their counters are the source's
    assert report.passed, [(c.check, c.detail) for c in report.checks if not c.passed]
    x = torch.randn(2, 1, 20, 20)
    with torch.no_grad():  # the reference: the base itself, call after call
        for _ in range(3):
            torch.testing.assert_close(spliced.eval()(x), base.eval()(x), rtol=0, atol=0)


class _ChannelsFromStatistics(torch.nn.Module):
    """Takes a Python number from a batch norm's statistics (len): a node cannot give one, so that read is traced
    as a value, as fx reads buffers, and the model stays on fx."""

    def __init__(self):
        super().__init__()
        self.conv, self.bn = torch.nn.Conv2d(1, 6, 3, padding=1), torch.nn.BatchNorm2d(6)
        self.conv2, self.fc = torch.nn.Conv2d(4, 4, 3, padding=1), torch.nn.Linear(4, 3)

    def forward(self, x):
        y = torch.relu(self.bn(self.conv(x)))[:, :len(self.bn.running_mean) - 2]
        return self.fc(torch.relu(self.conv2(y)).mean((2, 3)))


@pytest.mark.filterwarnings("ignore:ONNX Preprocess - Removing mutation")  # the exporter's own note on the counter
def test_exporting_a_model_that_counts_its_calls_says_why_no_file_can_follow(model_file, tmp_path):
    """An exported graph holds a buffer at its value when exported; a model whose answer follows a call counter
    cannot be exported as it runs, and the refusal says so (it said to try another opset)."""
    from splice.errors import CheckFailed

    folder = store.save(insert(f"{model_file}:warming_net", at="input", check=False), tmp_path / "warm")
    with pytest.raises(CheckFailed, match=r"updates tally\.calls at every call, which an exported graph holds"):
        splice.export(folder, onnx=tmp_path / "warm.onnx", trust_code=True)
    assert not (tmp_path / "warm.onnx").exists()
    report = splice.verify(folder, onnx=True, trust_code=True)  # verify's onnx row says the same
    assert report.failed == ["onnx"]
    assert "updates tally.calls at every call, which an exported graph holds" in report["onnx"].detail


def test_a_python_number_read_from_a_leafs_buffer_keeps_the_model_on_fx():
    torch.manual_seed(0)
    pts = splice.points(_ChannelsFromStatistics(), input_shape=(1, 16, 16))
    assert {p.mechanism for p in pts} == {"fx"} and len(pts) >= 3


def test_a_splice_that_froze_a_value_read_from_an_updated_buffer_fails_buffers(model_file):
    """The first call of base and splice agree; from the same counter on, the base's warm-up factor grows and the
    frozen graph's does not (as a trace that computed it once would). The certificate must not pass it."""
    spliced = insert(f"{model_file}:warming_net", at="input", check=False)
    read = next(n for n in spliced.graph.nodes if n.op == "get_attr" and n.target == "tally.calls")
    # its value after one call, kept by the graph (out of the state dict, as a lifted constant is)
    spliced.register_buffer("frozen_calls", spliced.get_buffer("tally.calls").clone() + 1, persistent=False)
    read.target = "frozen_calls"
    spliced.recompile()
    base = splice.load_source(f"{model_file}:warming_net").model
    base.load_state_dict({k: v for k, v in spliced.state_dict().items() if not k.startswith("splice_warps.")})
    x = torch.randn(2, 1, 20, 20)
    twin_b, twin_s = copy.deepcopy(base).eval(), copy.deepcopy(spliced).eval()
    with torch.no_grad():  # the reference: the two models themselves, called twice from the same counter
        firsts = twin_b(x), twin_s(x)
        seconds = twin_b(x), twin_s(x)
    assert torch.allclose(*firsts) and not torch.allclose(*seconds)
    report = verify_models(base, spliced)
    assert report.failed == ["buffers"]
    assert "answer differently" in report["buffers"].detail and "--leaf" in report["buffers"].detail


def test_a_nearest_sampler_is_a_warning_in_verify_and_refused_by_tune(tray_source, tmp_path):
    # a nearest warp is piecewise constant in its grid: no gradient reaches its head, by design, not by a fault in
    # the splice; verify passes it with a warning (every splice made with --sampler nearest failed), tune refuses it
    from splice.errors import RecipeError
    from splice.training import RunOptions, tune

    spliced = insert(tray_source, at="pool2", warp=WarpConfig(sampler="nearest"))
    folder = store.save(spliced, tmp_path / "nearest")
    report = verify(folder)
    assert report.passed, report.failed
    assert "warp pool2 samples with 'nearest', which passes no gradient" in report["gradients"].warning
    with pytest.raises(RecipeError, match=r"the warp at pool2 samples with 'nearest'.*--sampler bilinear"):
        tune(folder, recipe="warp-only", data="digits", out=tmp_path / "run", run_options=RunOptions(progress=False))
