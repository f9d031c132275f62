"""splice.export: ONNX and torch.export copies, each checked for parity before it is kept.

onnxruntime (CPUExecutionProvider) is the outside reference for ONNX files;
torch.export.load is the reference loader for .pt2 programs.
"""

from __future__ import annotations

import collections
import dataclasses
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn

import splice
from splice import store
from splice.cli import main
from splice.errors import CheckFailed, SpliceError
from splice.exporting import (
    MIN_OPSET,
    check_onnx_graph,
    export,
    export_onnx_bytes,
    onnx_parity,
    perturbation_theta,
    export_pt2_bytes,
    perturbed_copy,
    pt2_parity,
)
from splice.surgery import insert, warps_of
from splice.warps import Warp, WarpConfig, identity_theta

TRAY = "splice.models:tray_net"
SMALL = {"width": 4}


@pytest.fixture(scope="module")
def model(tray_folder):
    return store.load(tray_folder)


@pytest.fixture(scope="module")
def onnx_file(tray_folder, tmp_path_factory) -> tuple[Path, dict]:
    target = tmp_path_factory.mktemp("onnx") / "tray.onnx"
    result = export(tray_folder, onnx=target)
    return target, result


def _ort_run(path, x: torch.Tensor) -> list[np.ndarray]:
    import onnxruntime as ort

    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return session.run(None, {session.get_inputs()[0].name: x.numpy()})


def _rel(a: torch.Tensor, b) -> float:
    b = torch.as_tensor(b)
    return float((a - b).abs().max() / a.abs().max())


# ----------------------------------------------------------------------------- ONNX


def test_onnx_export_matches_onnxruntime(onnx_file, model):
    path, result = onnx_file
    assert path.is_file()
    item = result["exports"][0]
    assert item["format"] == "onnx" and item["opset"] == 17 and item["path"] == str(path)
    assert item["max_rel"] <= 1e-4 and item["max_rel_perturbed"] <= 1e-4
    from splice.fileio import file_sha256

    assert item["sha256"] == file_sha256(path)
    # independent check: the written file in onnxruntime against eager torch
    x = torch.randn(1, 1, 48, 48)
    with torch.no_grad():
        ref = model(x)
    assert _rel(ref, _ort_run(path, x)[0]) <= 1e-4  # onnxruntime is the reference
    assert not list(path.parent.glob(".*.tmp"))


def test_perturbed_warp_is_really_off_the_identity(model):
    twin = perturbed_copy(model)
    warp = warps_of(twin)["pool2"]
    assert warp.identity_distance() > 0.1
    assert torch.equal(warp.head.final.bias.detach(), perturbation_theta("affine"))
    assert warps_of(model)["pool2"].identity_distance() == 0.0  # the original is untouched
    expected = identity_theta("affine") + 0.1 * torch.linspace(-1, 1, 6)
    assert torch.allclose(perturbation_theta("affine"), expected)
    for family in ("translation", "attention", "similarity", "projective", "tps"):
        assert not torch.equal(perturbation_theta(family), identity_theta(family))
    x = torch.randn(2, 1, 48, 48)
    with torch.no_grad():
        assert (twin(x) - model(x)).abs().max() > 1e-3


def test_altered_onnx_weight_fails_parity(onnx_file, model, tmp_path):
    import onnx
    from onnx import numpy_helper

    path, _ = onnx_file
    proto = onnx.load(str(path))
    # the weight of the base's first convolution (the exporter may rename it when it folds BatchNorm in)
    first_conv = next(n for n in proto.graph.node if n.op_type == "Conv" and not n.input[1].startswith("splice_warps"))
    target = next(init for init in proto.graph.initializer if init.name == first_conv.input[1])
    arr = numpy_helper.to_array(target).copy()
    arr.flat[0] += 0.5
    target.CopyFrom(numpy_helper.from_array(arr, target.name))
    altered = tmp_path / "altered.onnx"
    onnx.save(proto, str(altered))
    x = torch.randn(1, 1, 48, 48)
    assert onnx_parity(model, path, x)["passed"]
    result = onnx_parity(model, altered, x)
    assert not result["passed"]
    assert result["detail"].startswith("as stored:")
    assert result["max_rel"] > 1e-3


def test_wrong_sampler_hides_at_identity_but_not_perturbed(onnx_file, model, tmp_path):
    """A GridSample lowered to nearest is exact at the identity; only the perturbed check sees it."""
    import onnx

    path, _ = onnx_file
    proto = onnx.load(str(path))
    changed = 0
    for node in proto.graph.node:
        if node.op_type == "GridSample":
            for attr in node.attribute:
                if attr.name == "mode":
                    attr.s = b"nearest"
                    changed += 1
    assert changed > 0
    x = torch.randn(1, 1, 48, 48)
    result = onnx_parity(model, proto, x)
    assert result["max_rel"] <= 1e-4  # identity parity passes ...
    assert not result["passed"]  # ... the perturbed warp does not
    assert result["detail"].startswith("with the perturbed warp:")


def test_shared_initializers_are_not_patched_blindly(tmp_path):
    """Two same-shape heads start equal, so the exporter merges their tensors; the check must still hold."""
    src = splice.load_source(TRAY, kwargs=SMALL)
    spliced = insert(src, at=["pool1", "pool2"])
    x = torch.randn(1, 1, 48, 48)
    data = export_onnx_bytes(spliced, x, fold_constants=False)
    result = onnx_parity(spliced, data, x)
    assert result["passed"], result["detail"]
    assert result["perturbed_by"] == "feeds"  # the merged tensors were split back, no re-export


# ----------------------------------------------------------------------------- the checking graph (verify --onnx)


def test_weights_as_inputs_graph_takes_every_state_tensor(model):
    """The checking graph stores no weights: each state entry is an input; onnxruntime is the reference."""
    import onnx

    x = torch.randn(1, 1, 48, 48)
    data = export_onnx_bytes(model, x, fold_constants=False, weights_as_inputs=True)
    proto = onnx.load_from_string(data)
    state = model.state_dict()
    inputs = [i.name for i in proto.graph.input]
    assert inputs[0] == "input"
    assert set(inputs[1:]) <= set(state)
    assert not {init.name for init in proto.graph.initializer} & set(state)
    result = onnx_parity(model, data, x)  # recognised by its inputs and fed the model's tensors
    assert result["passed"], result["detail"]
    assert result["perturbed_by"] == "feeds"
    assert result["max_rel"] <= 1e-4 and result["max_rel_perturbed"] <= 1e-4


def test_weights_as_inputs_graph_runs_at_the_perturbed_warp(model):
    """Fed the perturbed head tensors, onnxruntime follows torch's perturbed copy, not the stored model."""
    import onnxruntime as ort

    from splice.exporting import perturbed_tensors

    x = torch.randn(1, 1, 48, 48)
    data = export_onnx_bytes(model, x, fold_constants=False, weights_as_inputs=True)
    session = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    state = model.state_dict()
    feeds = {i.name: state[i.name].numpy() for i in session.get_inputs()[1:]}
    feeds.update({k: v.numpy() for k, v in perturbed_tensors(model).items()})
    out = session.run(None, {"input": x.numpy(), **feeds})[0]
    with torch.no_grad():
        stored, perturbed = model(x), perturbed_copy(model)(x)
    assert _rel(perturbed, out) <= 1e-4
    assert _rel(stored, out) > 1e-3  # the perturbation is visible at the output


def test_checking_graph_sees_a_wrong_sampler_only_when_perturbed(model):
    """The nearest-sampler break of the stored graph, made in the checking graph, is caught the same way."""
    import onnx

    x = torch.randn(1, 1, 48, 48)
    proto = onnx.load_from_string(export_onnx_bytes(model, x, fold_constants=False, weights_as_inputs=True))
    for node in proto.graph.node:
        if node.op_type == "GridSample":
            for attr in node.attribute:
                if attr.name == "mode":
                    attr.s = b"nearest"
    result = onnx_parity(model, proto, x)
    assert result["max_rel"] <= 1e-4
    assert not result["passed"]
    assert result["detail"].startswith("with the perturbed warp:")


def test_check_onnx_graph_two_equal_heads(tmp_path):
    """Two zero-initialised heads of one shape: fed separately, never merged into one input."""
    src = splice.load_source(TRAY, kwargs=SMALL)
    spliced = insert(src, at=["pool1", "pool2"]).eval()
    x = torch.randn(1, 1, 48, 48)
    result = check_onnx_graph(spliced, x)
    assert result["passed"], result["detail"]
    assert result["perturbed_by"] == "feeds" and result["batch_sizes"] == [1]
    assert 0 < result["max_rel_perturbed"] <= 1e-4
    assert result["export_seconds"] > 0 and result["bytes"] > 0
    # the torch side of the perturbed comparison is the tracer's pass at the perturbed warp
    with torch.no_grad():
        reference = perturbed_copy(spliced)(x)
    assert not torch.equal(reference, spliced(x))
    # a reference that is not the model's output is caught as stored
    wrong = check_onnx_graph(spliced, x, reference=spliced(x).detach() + 1.0)
    assert not wrong["passed"] and wrong["detail"].startswith("as stored:")


def test_dynamic_batch_onnx_runs_at_other_sizes(tray_folder, model, tmp_path):
    target = tmp_path / "dyn.onnx"
    item = export(tray_folder, onnx=target, dynamic_batch=True)["exports"][0]
    assert item["batch_sizes"] == [1, 3] and item["dynamic_batch"] is True
    x = torch.randn(5, 1, 48, 48)
    with torch.no_grad():
        ref = model(x)
    assert _rel(ref, _ort_run(target, x)[0]) <= 1e-4  # onnxruntime is the reference


def test_failed_check_leaves_no_file_and_keeps_the_old_one(tray_folder, tmp_path):
    target = tmp_path / "keep.onnx"
    target.write_bytes(b"previous good file")
    # a relative tolerance of 0 cannot be met by a different runtime's float32 arithmetic
    with pytest.raises(CheckFailed, match="nothing was written to"):
        export(tray_folder, onnx=target, tol=0.0)
    assert target.read_bytes() == b"previous good file"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["keep.onnx"]
    fresh = tmp_path / "fresh.onnx"
    with pytest.raises(CheckFailed):
        export(tray_folder, onnx=fresh, tol=0.0)
    assert not fresh.exists()


def test_export_errors(tray_folder, tmp_path):
    with pytest.raises(SpliceError, match="needs a target"):
        export(tray_folder)
    with pytest.raises(SpliceError, match=f"opset 15 is too old.*opset {MIN_OPSET}"):
        export(tray_folder, onnx=tmp_path / "a.onnx", opset=15)
    with pytest.raises(SpliceError, match="is a folder"):
        export(tray_folder, onnx=tmp_path)
    with pytest.raises(SpliceError, match="unknown exporter 'jit'"):
        export(tray_folder, onnx=tmp_path / "a.onnx", exporter="jit")
    with pytest.raises(SpliceError, match="does not exist"):
        onnx_parity(torch.nn.Identity(), tmp_path / "none.onnx", torch.zeros(1))
    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"not protobuf at all \x00\xff")
    with pytest.raises(SpliceError, match="not a readable ONNX file"):
        onnx_parity(torch.nn.Identity(), bad, torch.zeros(1))
    assert not (tmp_path / "a.onnx").exists()


@pytest.mark.slow
@pytest.mark.parametrize("opset", [16, 17])
def test_dynamo_exporter_below_its_floor(tray_folder, tmp_path, opset):
    """The dynamo exporter writes opset 18; 16 and 17 come from onnx's version converter."""
    import onnx

    target = tmp_path / f"dynamo{opset}.onnx"
    item = export(tray_folder, onnx=target, exporter="dynamo", opset=opset)["exports"][0]
    # onnxruntime (outside reference) ran the converted file in the parity check
    assert item["max_rel_perturbed"] <= 1e-4
    assert onnx.load(str(target)).opset_import[0].version == opset


@pytest.mark.slow
def test_dynamo_exporter(tray_folder, model, tmp_path):
    target = tmp_path / "dynamo.onnx"
    item = export(tray_folder, onnx=target, exporter="dynamo", opset=18)["exports"][0]
    assert item["exporter"] == "dynamo" and item["max_rel_perturbed"] <= 1e-4
    x = torch.randn(1, 1, 48, 48)
    with torch.no_grad():
        ref = model(x)
    assert _rel(ref, _ort_run(target, x)[0]) <= 1e-4  # onnxruntime is the reference


# ----------------------------------------------------------------------------- torch.export


@pytest.fixture(scope="module")
def pt2_file(tray_folder, tmp_path_factory) -> tuple[Path, dict]:
    target = tmp_path_factory.mktemp("pt2") / "tray.pt2"
    return target, export(tray_folder, pt2=target)


def test_pt2_export_reloads_and_matches(pt2_file, model):
    path, result = pt2_file
    item = result["exports"][0]
    assert item["format"] == "pt2" and item["perturbed_by"] == "parameters"
    assert item["max_rel"] <= 1e-5 and item["max_rel_perturbed"] <= 1e-5
    program = torch.export.load(str(path))  # torch's own loader is the reference
    x = torch.randn(1, 1, 48, 48)
    with torch.no_grad():
        assert _rel(model(x), program.module()(x)) <= 1e-5


def test_pt2_parity_catches_a_changed_parameter(pt2_file, model):
    path, _ = pt2_file
    program = torch.export.load(str(path))
    with torch.no_grad():
        program.state_dict["fc.bias"].add_(1.0)
    result = pt2_parity(model, program, torch.randn(1, 1, 48, 48))
    assert not result["passed"] and result["detail"].startswith("as stored:")


# ----------------------------------------------------------------------------- CLI


def test_cli_export(tray_folder, tmp_path, capsys):
    target = tmp_path / "cli.onnx"
    assert main(["export", str(tray_folder), "--onnx", str(target)]) == 0
    assert target.is_file() and "passed" in capsys.readouterr().out
    assert main(["export", str(tray_folder), "--onnx", str(tmp_path / "x.onnx"), "--opset", "12"]) == 2
    assert "GridSample" in capsys.readouterr().err
    assert main(["export", str(tray_folder)]) == 2
    assert "needs a target" in capsys.readouterr().err
    assert not (tmp_path / "x.onnx").exists()


def test_warp_module_is_what_gets_perturbed():
    warp = Warp(WarpConfig("tps", tps_k=3), (2, 8, 8))
    model = torch.nn.Module()
    model.splice_warps = torch.nn.ModuleDict({"p": warp})
    twin = perturbed_copy(model)
    assert torch.equal(twin.splice_warps["p"].head.final.bias.detach(), perturbation_theta("tps", 3))
    assert torch.count_nonzero(twin.splice_warps["p"].head.final.weight) == 0


def test_graph_onnxruntime_refuses_is_a_failed_check(onnx_file, model):
    """A graph onnxruntime cannot load is a failed check with its reason, not a crash."""
    import onnx

    path, _ = onnx_file
    proto = onnx.load(str(path))
    next(n for n in proto.graph.node if n.op_type == "Relu").op_type = "NoSuchOperator"
    with pytest.raises(CheckFailed, match="onnxruntime cannot load the exported graph"):
        onnx_parity(model, proto, torch.randn(1, 1, 48, 48))


def test_verify_reports_onnxruntime_refusing_the_graph(tray_folder, monkeypatch):
    import onnxruntime

    from splice.verification import verify

    def refuse(*args, **kwargs):
        raise RuntimeError("[ONNXRuntimeError] : 10 : INVALID_GRAPH : made up for this test")

    monkeypatch.setattr(onnxruntime, "InferenceSession", refuse)
    report = verify(tray_folder, onnx=True)
    assert report.failed == ["onnx"]
    assert "onnxruntime cannot load the exported graph" in report["onnx"].detail
    assert "INVALID_GRAPH" in report["onnx"].detail


def test_failed_export_keeps_stdout_clean(capfd):
    """The TorchScript exporter dumps its whole graph to stdout from C++ when it fails; the error alone remains."""

    class Unexportable(torch.nn.Module):
        def forward(self, x):  # 5 -> 3 is not a whole factor: the TorchScript exporter refuses it
            return torch.nn.functional.adaptive_avg_pool2d(x, 3)

    with pytest.raises(SpliceError, match="ONNX export .* failed"):
        export_onnx_bytes(Unexportable(), torch.randn(1, 2, 5, 5))
    out, _ = capfd.readouterr()
    assert "Torch IR graph" not in out and out == ""


class _WithOptions(torch.nn.Module):
    """A forward with options after its input, as attention models have: ``is_causal`` must reach
    scaled_dot_product_attention as a bool."""

    def __init__(self):
        super().__init__()
        self.conv = torch.nn.Conv2d(3, 8, 3, padding=1)
        self.head = torch.nn.Linear(8, 4)

    def forward(self, x, attn_mask=None, is_causal: bool = False, scale: float = 1.0):
        tokens = self.conv(x).flatten(2).transpose(1, 2)  # (N, HW, 8)
        mixed = torch.nn.functional.scaled_dot_product_attention(tokens, tokens, tokens, attn_mask=attn_mask,
                                                                 is_causal=is_causal)
        return self.head(mixed.mean(1)) * scale


def test_onnx_export_of_a_forward_with_options_runs_with_their_defaults(tmp_path):
    # the TorchScript exporter passes unset options as graph inputs (is_causal=False arrived as a tensor and
    # scaled_dot_product_attention refused it); the export runs the model with its own defaults instead
    model = _WithOptions().eval()
    x = torch.randn(2, 3, 6, 6)
    data = export_onnx_bytes(model, x[:1], dynamic_batch=True)
    path = tmp_path / "options.onnx"
    path.write_bytes(data)
    with torch.no_grad():
        ref = model(x)
    assert _rel(ref, _ort_run(path, x)[0]) <= 1e-5  # onnxruntime is the reference
    names = {init.name for init in __import__("onnx").load(str(path)).graph.initializer}
    assert {"conv.weight", "head.weight"} <= names  # the model's own names, not a wrapper's
    assert model.forward.__func__ is _WithOptions.forward  # the caller's model keeps its forward


class _MixedModes(torch.nn.Module):
    """In train mode with a frozen norm in eval mode (as detection fine-tuning keeps its BatchNorms), and a
    counter its forward bumps in eval mode."""

    def __init__(self):
        super().__init__()
        self.conv = torch.nn.Conv2d(1, 4, 3, padding=1)
        self.bn = torch.nn.BatchNorm2d(4)
        self.head = torch.nn.Linear(4, 3)
        self.register_buffer("calls", torch.zeros((), dtype=torch.long))
        self.cache: dict = {}

    def forward(self, x):
        if not self.training:
            self.calls += 1
            self.cache["last"] = tuple(x.shape)
        return self.head(torch.relu(self.bn(self.conv(x))).mean((2, 3)))


@pytest.mark.filterwarnings("ignore:ONNX Preprocess - Removing mutation")  # the counter, dropped from the graph
@pytest.mark.parametrize("step", ["export_onnx_bytes", "check_onnx_graph", "onnx_parity", "export_pt2_bytes",
                                  "pt2_parity"])
def test_exporting_and_checking_leave_the_callers_model_as_it_was(step):
    # each step ran the model in eval mode and then set every module to the root's mode, so a frozen norm came
    # back in train mode; and its forwards bumped the caller's buffers
    from splice.exporting import export_pt2_bytes

    model = _MixedModes().train()
    model.bn.eval()
    with pytest.warns(splice.graph.TraceFallbackWarning):  # its forward iterates a shape: warps go in by hooks
        spliced = insert(model, at="input", input_shape=(1, 8, 8)).train()
    spliced.get_submodule("bn").eval()
    modes = {n: m.training for n, m in spliced.named_modules()}
    state = {k: v.clone() for k, v in spliced.state_dict().items()}
    x = torch.randn(1, 1, 8, 8)
    if step == "export_onnx_bytes":
        export_onnx_bytes(spliced, x)
    elif step == "check_onnx_graph":
        check_onnx_graph(spliced, x)
    elif step == "onnx_parity":
        onnx_parity(spliced, export_onnx_bytes(spliced.eval(), x), x)
        spliced.train()
        spliced.get_submodule("bn").eval()
    elif step == "export_pt2_bytes":
        export_pt2_bytes(spliced, x)
    else:
        program = export_pt2_bytes(spliced, x)
        pt2_parity(spliced, program, x)
    assert {n: m.training for n, m in spliced.named_modules()} == modes
    assert all(torch.equal(state[k], v) for k, v in spliced.state_dict().items())


_Pair = collections.namedtuple("_Pair", "logits features")


@dataclasses.dataclass
class _PairDC:
    logits: torch.Tensor
    features: torch.Tensor


class _Structured(nn.Module):
    def __init__(self, kind: type):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.kind = kind

    def forward(self, x):
        h = torch.relu(self.conv(x))
        return self.kind(h.mean((2, 3)), h)


@pytest.mark.parametrize("kind", [_Pair, _PairDC])
def test_pt2_of_a_model_returning_a_named_tuple_or_a_dataclass_is_its_flat_tuple(kind):
    # torch.export refuses a dataclass output and cannot save a named tuple's (pytree classes it was not told
    # of): the program returns the tensors flat, in flatten_outputs' order. Reference: torch.export.load.
    import io

    from splice.compare import flatten_outputs

    torch.manual_seed(0)
    model = _Structured(kind).eval()
    x = torch.rand(2, 3, 8, 8)
    with pytest.warns(UserWarning, match="flat tuple"):
        data = export_pt2_bytes(model, x, dynamic_batch=True)
    out = torch.export.load(io.BytesIO(data)).module()(x)
    expected = list(flatten_outputs(model(x)).values())
    assert isinstance(out, tuple) and len(out) == 2
    assert all(torch.allclose(a, b, rtol=0, atol=1e-6) for a, b in zip(out, expected))
    assert pt2_parity(model, data, [x], perturb=False)["passed"]
