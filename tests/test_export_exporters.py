"""Which exporter checks a file, and what export says when a dynamic batch fails: the perturbed check exports
the twin again with the exporter the user chose (export and verify alike), and a failed dynamic-batch export is
named a failure in one line."""

from __future__ import annotations

import warnings

import pytest
import torch

import splice
from splice.errors import SpliceError
from splice.exporting import export
from splice.verification import verify_models

# tray_folder: conftest's small tray net spliced at pool2


@pytest.fixture
def re_exports(monkeypatch) -> list:
    """The exporters the perturbed check exported the twin with, with its heads made unfeedable (as when an
    exporter merges their tensors)."""
    import splice.exporting.parity as parity

    used = []
    original = parity.export_onnx_bytes

    def spy(*args, **kwargs):
        used.append(kwargs.get("exporter", "torchscript"))
        return original(*args, **kwargs)

    monkeypatch.setattr(parity, "_overridable", lambda proto, names: None)
    monkeypatch.setattr(parity, "export_onnx_bytes", spy)
    return used


@pytest.mark.slow
def test_the_perturbed_check_exports_again_with_the_exporter_asked_for(tray_folder, tmp_path, re_exports):
    """When the perturbed heads cannot be fed to the stored graph, the twin is exported again: with the exporter
    the user chose. It used TorchScript, so a model only dynamo exports passed verify and failed export, with
    advice to use the dynamo exporter it was already using."""
    item = export(tray_folder, onnx=tmp_path / "again.onnx", exporter="dynamo", opset=18)["exports"][0]
    assert re_exports and set(re_exports) == {"dynamo"}
    assert item["exporter"] == "dynamo" and item["dynamic_batch"] and item["max_rel_perturbed"] <= 1e-4


def test_a_dynamic_export_that_fails_is_named_a_failure_in_one_line(tray_folder, tmp_path, monkeypatch):
    """When the dynamic-batch export itself fails (not a mismatch), the warning says so, with its first line."""
    import splice.exporting.run as run

    original = run._one

    def dynamic_fails(model, fmt, shapes, *, dynamic_batch, **options):
        if dynamic_batch:
            raise SpliceError("ONNX export (torchscript, opset 17) failed: RuntimeError: no pool\ngraph(%x : Float...")
        return original(model, fmt, shapes, dynamic_batch=dynamic_batch, **options)

    monkeypatch.setattr(run, "_one", dynamic_fails)
    with warnings.catch_warnings(record=True) as caught:  # pytest.warns would re-raise torch.onnx's own notes
        warnings.simplefilter("always")
        item = export(tray_folder, onnx=tmp_path / "static.onnx")["exports"][0]
    ours = [str(w.message) for w in caught if issubclass(w.category, splice.errors.SpliceWarning)]
    assert len(ours) == 1
    message = ours[0]
    assert "with a dynamic batch failed (ONNX export (torchscript, opset 17) failed: RuntimeError: no pool)" in message
    assert "does not match" not in message and "\n" not in message and not item["dynamic_batch"]


@pytest.mark.slow
def test_verify_checks_with_the_exporter_asked_for_and_reports_its_failure_as_a_row(tray_folder, re_exports,
                                                                                    monkeypatch):
    report = splice.verify(tray_folder, onnx=True, exporter="dynamo", opset=18)
    assert report["onnx"].passed and set(re_exports) == {"dynamo"}
    import splice.exporting.parity as parity

    def failing(*args, **kwargs):
        raise SpliceError("ONNX export (dynamo, opset 18) failed: RuntimeError: no col2im; try another --opset")

    monkeypatch.setattr(parity, "export_onnx_bytes", failing)
    report = splice.verify(tray_folder, onnx=True, exporter="dynamo", opset=18)  # a failed row, not a raise
    assert not report.passed and report.failed == ["onnx"] and "no col2im" in report["onnx"].detail


@pytest.mark.slow
@pytest.mark.parametrize("opset", [16, 17])
def test_verify_checks_a_dynamo_export_below_its_floor(tray_folder, opset):
    """verify's onnx row exported without folding constants, so the dynamo graph kept its reductions' axes as
    computed inputs, which onnx's version converter cannot turn into the attributes of opsets 16 and 17: the row
    failed ("No initializer or constant input") where export passed. A graph to be converted is now folded; the
    warp heads stay inputs fed by the perturbed check. Reference: onnxruntime ran the converted graph."""
    report = splice.verify(tray_folder, onnx=True, exporter="dynamo", opset=opset)
    row = report["onnx"]
    assert row.passed, row.detail
    assert row.numbers["opset"] == opset and row.numbers["perturbed_by"] == "feeds"
    assert row.numbers["max_rel"] <= 1e-4 and row.numbers["max_rel_perturbed"] <= 1e-4


@pytest.mark.slow
def test_the_perturbed_re_export_reaches_opset_17_with_dynamo(tray_folder, tmp_path, re_exports):
    """The perturbed check's second export (when the heads cannot be fed, as for resnet18 with warps at maxpool and
    layer1_0_bn1) did not fold either, so export --exporter dynamo failed at the default opset 17."""
    import onnx

    target = tmp_path / "again17.onnx"
    item = export(tray_folder, onnx=target, exporter="dynamo", opset=17)["exports"][0]
    assert re_exports and set(re_exports) == {"dynamo"}
    assert item["perturbed_by"] == "re-export" and item["max_rel_perturbed"] <= 1e-4  # onnxruntime's run
    assert onnx.load(str(target)).opset_import[0].version == 17


def test_an_export_replaces_an_earlier_export_but_no_other_file(tray_folder, tmp_path):
    victim = tmp_path / "train.py"
    victim.write_text("print('my training script')\n")
    with pytest.raises(SpliceError, match=r"exists and is not a \.onnx file, so it is not replaced"):
        export(str(tray_folder), onnx=victim)
    assert victim.read_text() == "print('my training script')\n"
    earlier = tmp_path / "model.onnx"
    earlier.write_bytes(b"an earlier export")
    export(str(tray_folder), onnx=earlier)
    assert earlier.read_bytes() != b"an earlier export"
    checked = earlier.read_bytes()
    (tmp_path / "link.pt2").symlink_to(earlier)
    for pt2 in (earlier, tmp_path / "link.pt2"):  # one file under two names: the .pt2 would replace the checked ONNX
        with pytest.raises(SpliceError, match=r"--onnx and --pt2 name the same file .* give each its own file"):
            export(str(tray_folder), onnx=earlier, pt2=pt2)
    assert earlier.read_bytes() == checked


def test_an_onnx_file_says_what_it_needs_and_what_it_returns(tray_folder, tmp_path):
    """The metadata a deployment reads back with onnxruntime (InferenceSession.get_modelmeta, the outside
    reference): input shapes, normalisation, class names, and which output is which."""
    import json

    import onnxruntime as ort

    target = tmp_path / "tray.onnx"
    export(str(tray_folder), onnx=target)
    session = ort.InferenceSession(str(target), providers=["CPUExecutionProvider"])
    meta = session.get_modelmeta().custom_metadata_map
    info = splice.load(tray_folder).splice_info
    assert json.loads(meta["splice.input_shapes"]) == [list(s) for s in info.input_shapes]
    assert json.loads(meta["splice.normalisation"]) == info.normalisation
    assert json.loads(meta["splice.class_names"]) == info.class_names
    assert len(json.loads(meta["splice.outputs"])) == len(session.get_outputs())
    assert json.loads(meta["splice.points"]) == [p.name for p in info.points]
    assert json.loads(meta["splice.version"]) == splice.__version__
    # README: every splice.* value is JSON (the json module, the reference, reads each one)
    assert {k: json.loads(v) for k, v in meta.items() if k.startswith("splice.")}


@pytest.mark.parametrize("dtype, tol", [("float64", 1e-5), ("bfloat16", 0.05)])
def test_a_float64_model_exports_as_verify_checks_it(tmp_path, dtype, tol):
    """verify --onnx checks a float32 copy (onnxruntime samples grids in float32 only, and runs no float64 Conv);
    export used to write the float64 or bfloat16 graph, which onnxruntime then refused after verify had passed.
    Reference: onnxruntime on the written file."""
    import numpy as np
    import onnxruntime as ort
    import torch
    from torch import nn

    from splice.errors import SpliceWarning

    torch.manual_seed(0)
    base = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(4, 2)).to(getattr(torch, dtype))
    spliced = splice.insert(base, at="input", input_shape=(3, 16, 16))
    assert splice.verify(spliced, onnx=True).passed
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")  # the exporter's own deprecation notes too
        splice.export(spliced, onnx=tmp_path / "f64.onnx")
    assert any(issubclass(w.category, SpliceWarning) and "exported from a float32 copy" in str(w.message)
               for w in seen)
    session = ort.InferenceSession(str(tmp_path / "f64.onnx"), providers=["CPUExecutionProvider"])
    x = np.random.default_rng(0).random((2, 3, 16, 16), dtype=np.float32)
    with torch.no_grad():
        expected = spliced(torch.from_numpy(x).to(getattr(torch, dtype))).double().numpy()
    assert np.abs(session.run(None, {session.get_inputs()[0].name: x})[0] - expected).max() < tol
    assert next(spliced.parameters()).dtype == getattr(torch, dtype)  # the caller's model is as it was


class _CountedClasses(torch.nn.Module):
    """A classifier that returns its class count beside the logits: a number no graph can carry."""

    def __init__(self):
        super().__init__()
        torch.manual_seed(0)
        self.conv, self.head = torch.nn.Conv2d(3, 4, 3, padding=1), torch.nn.Linear(4, 3)

    def forward(self, x):
        return {"logits": self.head(self.conv(x).mean((2, 3))), "classes": 3}


@pytest.mark.parametrize("exporter, opset", [("torchscript", 17), ("dynamo", 18)])
def test_a_number_among_the_outputs_stays_out_of_the_graph(tmp_path, exporter, opset):
    # both exporters refused the number ("output 1 (3" / "'int' object has no attribute 'name'"); the graph's
    # outputs are the tensors, output_0 ..., as splice's comparisons already read them
    import onnxruntime as ort

    model = _CountedClasses().eval()
    spliced = splice.insert(model, at="input", input_shape=(3, 12, 12))
    report = verify_models(model, spliced, onnx=True, exporter=exporter, opset=opset)
    assert report["onnx"].passed, report["onnx"].detail
    with warnings.catch_warnings(record=True):
        result = splice.export(spliced, onnx=tmp_path / "m.onnx", exporter=exporter, opset=opset)
    assert result["exports"][0]["dynamic_batch"], result
    session = ort.InferenceSession(str(tmp_path / "m.onnx"), providers=["CPUExecutionProvider"])
    x = torch.rand(2, 3, 12, 12)
    (got,) = session.run(None, {session.get_inputs()[0].name: x.numpy()})  # onnxruntime, the outside reference
    with torch.no_grad():
        torch.testing.assert_close(torch.from_numpy(got), model(x)["logits"], rtol=1e-4, atol=1e-5)


def _normed_net() -> torch.nn.Module:
    """Convs under torch's parametrization-based spectral_norm and weight_norm, as GAN critics and some
    classifiers have them."""
    from torch.nn.utils.parametrizations import spectral_norm, weight_norm

    torch.manual_seed(0)
    net = torch.nn.Sequential(spectral_norm(torch.nn.Conv2d(3, 6, 3, padding=1)), torch.nn.ReLU(),
                              weight_norm(torch.nn.Conv2d(6, 6, 3, stride=2, padding=1)), torch.nn.ReLU(),
                              torch.nn.AdaptiveAvgPool2d(1), torch.nn.Flatten(), torch.nn.Linear(6, 3))
    net.train()
    for _ in range(3):  # a few power iterations, as training leaves them: u and v are no longer their start
        net(torch.rand(2, 3, 16, 16))
    return net.eval()


def test_a_parametrized_model_exports_with_the_weights_it_computes(tmp_path):
    # spectral_norm's vdot has no ONNX form at opset 17: verify's onnx row failed and export refused, naming the
    # dynamo exporter. The export now holds the weights the parametrizations compute, on a twin.
    import onnxruntime as ort

    model = _normed_net()
    spliced = splice.insert(model, at="input", input_shape=(3, 16, 16))
    before = {k: v.clone() for k, v in spliced.state_dict().items()}
    report = verify_models(model, spliced, onnx=True)
    assert report["onnx"].passed, report["onnx"].detail
    with warnings.catch_warnings(record=True):
        splice.export(spliced, onnx=tmp_path / "sn.onnx")
    session = ort.InferenceSession(str(tmp_path / "sn.onnx"), providers=["CPUExecutionProvider"])
    x = torch.rand(3, 3, 16, 16)
    (got,) = session.run(None, {session.get_inputs()[0].name: x.numpy()})  # onnxruntime, the outside reference
    with torch.no_grad():
        torch.testing.assert_close(torch.from_numpy(got), model(x), rtol=1e-4, atol=1e-5)
    after = spliced.state_dict()
    assert after.keys() == before.keys() and all(torch.equal(before[k], after[k]) for k in before)
    assert torch.nn.utils.parametrize.is_parametrized(spliced.get_submodule("0"))  # the caller's model keeps them


class _LightInverted(torch.nn.Module):
    """Inverts light photos: a branch on tensor values, which torch.export (the dynamo exporter) cannot follow."""

    def __init__(self):
        super().__init__()
        self.conv = torch.nn.Conv2d(3, 4, 3, padding=1)
        self.fc = torch.nn.Linear(4, 5)

    def forward(self, x):
        if x.mean() > 0.5:
            x = 1 - x
        return self.fc(torch.nn.functional.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))


@pytest.mark.slow  # the dynamo exporter takes seconds
def test_a_failed_dynamo_export_is_one_line_naming_the_branch(tmp_path, capfd):
    # torch's symbolic-shapes logger and torch.export printed the guard and whole FX graphs (65 KB) to stderr
    # before splice's line; the user's source line comes from torch.export's own error
    import inspect

    from splice.cli import main
    from splice.graph import TraceFallbackWarning

    torch.manual_seed(0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)  # a branch in the forward itself: hooks at 'input'
        spliced = splice.insert(_LightInverted().eval(), at="input", input_shape=(3, 16, 16))
    folder = splice.save(spliced, tmp_path / "light", source=f"{__file__}:_LightInverted")
    capfd.readouterr()
    args = ["export", str(folder), "--onnx", str(tmp_path / "x.onnx"), "--exporter", "dynamo", "--opset", "18",
            "--trust-code"]
    assert main(args) == 2
    out, err = capfd.readouterr()
    line = inspect.getsourcelines(_LightInverted.forward)[1] + 1
    assert out == "" and err.count("\n") == 1, err[:2000]
    assert err.startswith("splice export: error: ONNX export (dynamo, opset 18) failed: torch.export cannot follow")
    assert f"at test_export_exporters.py:{line} (`if x.mean() > 0.5:`)" in err and "torch.cond" in err
    assert main([*args, "--debug"]) == 2  # --debug shows torch's own output and the traceback
    assert capfd.readouterr().err.count("\n") > 20


@pytest.mark.slow  # torch.export takes seconds
def test_a_pt2_export_that_stops_at_a_branch_on_values_names_it(tmp_path, capfd):
    import inspect

    from splice.exporting.pt2 import export_pt2_bytes

    with pytest.raises(SpliceError, match=r"tensor values at test_export_exporters\.py:(\d+) \(`if x\.mean\(\) > 0\.5:`\)"
                                          r".*torch\.cond") as caught:
        export_pt2_bytes(_LightInverted().eval(), torch.randn(1, 3, 16, 16))
    assert str(inspect.getsourcelines(_LightInverted.forward)[1] + 1) in str(caught.value)
    out, err = capfd.readouterr()
    assert out == "" and err == "", err[:2000]  # torch's guard log and graph dumps stay off the terminal
