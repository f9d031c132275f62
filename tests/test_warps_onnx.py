"""ONNX export of warps, checked against onnxruntime with non-identity warps.

What works (torch 2.14, onnxruntime 1.32): every family with every sampler
exports with the TorchScript exporter (dynamo=False) and the dynamo exporter
(dynamo=True) at opsets 16, 17, 18 and 20 (grid_sample -> GridSample, opset 16+;
the dynamo exporter builds opset 18 and converts down for 16/17).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch
from torch import nn

from splice.warps import FAMILIES, Warp, WarpConfig

OPSETS = (16, 17, 18, 20)
SHAPE = (3, 20, 24)  # not a power of two: the identity rounding correction is exported too

# A non-trivial warp per family (added to the identity bias).
_BIAS_OFFSET = {
    "translation": [0.12, -0.08],
    "attention": [0.25, 0.1, -0.05],
    "similarity": [0.3, 0.1, 0.05, -0.08],
    "affine": [-0.1, -0.2, 0.05, 0.15, 0.1, -0.1],
    "projective": [0.05, 0.1, 0.05, -0.08, -0.05, 0.02, 0.15, -0.1],
}


def _nonidentity(warp: Warp) -> Warp:
    gen = torch.Generator().manual_seed(3)
    fc2 = warp.head.fc2
    with torch.no_grad():
        offset = _BIAS_OFFSET.get(warp.family)
        if offset is None:  # tps: move every control point a little
            offset = (0.08 * torch.randn(warp.n_params, generator=gen)).tolist()
        fc2.bias.add_(torch.tensor(offset))
        # small input-dependent part so the head's layers are exercised too
        fc2.weight.copy_(0.01 * torch.randn(fc2.weight.shape, generator=gen))
    return warp.eval()


class _TinyNet(nn.Module):
    """A small conv net with a warp between two convolutions."""

    def __init__(self, family: str, sampler: str = "bilinear") -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(3, 6, 3, padding=1)
        self.warp = _nonidentity(Warp(WarpConfig(family=family, sampler=sampler, head_width=8), (6, 18, 22)))
        self.conv2 = nn.Conv2d(6, 4, 3, stride=2)
        # No global pooling: the dynamo exporter writes it as an opset-18 ReduceMean
        # with an axes input, which the onnx version converter fails to take down
        # to 16/17 (the model then stays at 18). That limitation is not the warp's.
        self.fc = nn.Linear(4 * 8 * 10, 5)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        z = torch.relu(self.conv1(x))
        z = self.warp(z)
        z = torch.flatten(torch.relu(self.conv2(z)), 1)
        return self.fc(z)


def _export(model: nn.Module, x: torch.Tensor, path, *, dynamo: bool, opset: int, dynamic_batch=False) -> str:
    path = str(path)
    with warnings.catch_warnings():
        # the dynamo exporter warns when it converts its opset-18 model down to 16/17
        warnings.filterwarnings("ignore", message=r".*[Vv]ersion conversion.*")
        # dynamo=False is requested on purpose: both exporters are supported
        warnings.filterwarnings(
            "ignore", message=r"You are using the legacy TorchScript-based ONNX export", category=DeprecationWarning
        )
        if dynamo:
            shapes = {"x": {0: torch.export.Dim("batch", min=1, max=64)}} if dynamic_batch else None
            program = torch.onnx.export(model, (x,), dynamo=True, opset_version=opset, dynamic_shapes=shapes)
            program.save(path)
        else:
            axes = {"x": {0: "batch"}, "y": {0: "batch"}} if dynamic_batch else None
            torch.onnx.export(
                model, (x,), path, dynamo=False, opset_version=opset,
                input_names=["x"], output_names=["y"], dynamic_axes=axes,
            )
    return path


def _check(path: str, model: nn.Module, x: torch.Tensor, opset: int) -> None:
    import onnx
    import onnxruntime as ort

    proto = onnx.load(path)
    version = {o.domain: o.version for o in proto.opset_import}.get("", None)
    assert version == opset
    assert "GridSample" in {n.op_type for n in proto.graph.node}
    session = ort.InferenceSession(path, providers=["CPUExecutionProvider"])
    (got,) = session.run(None, {session.get_inputs()[0].name: x.numpy()})
    with torch.no_grad():
        want = model(x).numpy()
    # Reference: onnxruntime's GridSample. It unnormalises with ((x + 1) W - 1) / 2
    # where torch's CPU kernel uses (x + 1) W / 2 - 0.5, so float32 results agree
    # to rounding (1e-4 of the output scale), not bit for bit.
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-4 * max(1.0, float(np.abs(want).max())))


@pytest.mark.parametrize("family", FAMILIES)
def test_torchscript_export_matches_onnxruntime(family, tmp_path):
    warp = _nonidentity(Warp(WarpConfig(family=family), SHAPE))
    x = torch.randn(2, *SHAPE)
    with torch.no_grad():
        assert not torch.allclose(warp(x), x, atol=1e-2)  # really not the identity
    for opset in OPSETS:
        _check(_export(warp, x, tmp_path / f"w{opset}.onnx", dynamo=False, opset=opset), warp, x, opset)


@pytest.mark.parametrize("sampler", ["nearest", "bicubic"])
@pytest.mark.parametrize("family", ["affine", "tps"])
def test_torchscript_export_other_samplers(family, sampler, tmp_path):
    warp = _nonidentity(Warp(WarpConfig(family=family, sampler=sampler, padding="border"), SHAPE))
    x = torch.randn(2, *SHAPE)
    for opset in (16, 20):
        _check(_export(warp, x, tmp_path / f"w{opset}.onnx", dynamo=False, opset=opset), warp, x, opset)


def test_exported_identity_is_exact_in_onnxruntime(tmp_path):
    import onnxruntime as ort

    # Reference: onnxruntime. The residual form x + (S(x, G) - S(x, B)) is exact
    # in any runtime whose GridSample is deterministic: at the identity G == B.
    warp = Warp(WarpConfig(family="projective"), SHAPE).eval()
    x = torch.randn(2, *SHAPE)
    path = _export(warp, x, tmp_path / "id.onnx", dynamo=False, opset=16)
    session = ort.InferenceSession(path, providers=["CPUExecutionProvider"])
    (got,) = session.run(None, {"x": x.numpy()})
    np.testing.assert_array_equal(got, x.numpy())


def test_tiny_net_exports_with_torchscript(tmp_path):
    torch.manual_seed(0)
    net = _TinyNet("affine").eval()
    x = torch.randn(2, 3, 18, 22)
    for opset in OPSETS:
        _check(_export(net, x, tmp_path / f"t{opset}.onnx", dynamo=False, opset=opset), net, x, opset)


def test_dynamic_batch(tmp_path):
    # The one dynamo export in the quick loop; the full dynamo matrix is marked slow.
    import onnxruntime as ort

    warp = _nonidentity(Warp(WarpConfig(family="tps"), SHAPE))
    x2, x5 = torch.randn(2, *SHAPE), torch.randn(5, *SHAPE)
    with torch.no_grad():
        want = warp(x5).numpy()
    for dynamo in (False, True):
        path = _export(warp, x2, tmp_path / f"dyn{dynamo}.onnx", dynamo=dynamo, opset=18, dynamic_batch=True)
        session = ort.InferenceSession(path, providers=["CPUExecutionProvider"])
        (got,) = session.run(None, {session.get_inputs()[0].name: x5.numpy()})
        # Reference: onnxruntime, tolerance as in _check.
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-4 * float(np.abs(want).max()))


@pytest.mark.slow
@pytest.mark.parametrize("opset", OPSETS)
@pytest.mark.parametrize("family", FAMILIES)
def test_dynamo_export_matches_onnxruntime(family, opset, tmp_path):
    warp = _nonidentity(Warp(WarpConfig(family=family), SHAPE))
    x = torch.randn(2, *SHAPE)
    _check(_export(warp, x, tmp_path / "w.onnx", dynamo=True, opset=opset), warp, x, opset)


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["bilinear", "nearest", "bicubic"])
@pytest.mark.parametrize("opset", OPSETS)
def test_dynamo_export_tiny_net_samplers(sampler, opset, tmp_path):
    torch.manual_seed(0)
    net = _TinyNet("tps", sampler).eval()
    x = torch.randn(2, 3, 18, 22)
    _check(_export(net, x, tmp_path / "t.onnx", dynamo=True, opset=opset), net, x, opset)
