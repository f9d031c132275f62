"""A graph traced by the TorchScript exporter keeps the branch its example took. When the branch came from tensor
values, the ONNX file is wrong for inputs that go the other way, whatever the probes show: verify and export must
say so. Outside reference: onnxruntime (CPUExecutionProvider) on a bright input."""

from __future__ import annotations

import math
import re
import warnings

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import splice
from splice.errors import CheckFailed
from splice.exporting.onnx import export_onnx_bytes, value_branch


class Gate(nn.Module):
    """Negates bright feature maps: a Python branch on tensor values."""

    def forward(self, x):
        if x.amax() > 3.0:
            return -x
        return x


class GatedNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.gate = Gate()
        self.fc = nn.Linear(4, 5)
        with torch.no_grad():  # an averaging conv: N(0,1) probes stay far below the gate's threshold
            self.conv.weight.fill_(1 / 27)
            self.conv.bias.zero_()

    def forward(self, x):
        return self.fc(F.adaptive_avg_pool2d(self.gate(self.conv(x)), 1).flatten(1))


class SamePadNet(nn.Module):
    """'Same' padding computed from the input's size in Python, as TensorFlow ports do: the tracer fixes numbers
    taken from shapes, which is right for the shape it was traced at."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, stride=2)
        self.fc = nn.Linear(4, 5)

    def forward(self, x):
        ih, iw = x.size()[-2:]
        ph = max((math.ceil(ih / 2) - 1) * 2 + 3 - ih, 0)
        pw = max((math.ceil(iw / 2) - 1) * 2 + 3 - iw, 0)
        x = F.pad(x, [pw // 2, pw - pw // 2, ph // 2, ph - ph // 2])
        return self.fc(F.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))


def _spliced(net: nn.Module):
    from splice.graph import TraceFallbackWarning

    torch.manual_seed(0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)  # SamePadNet's sizes stop torch.fx: hooks it is
        return splice.insert(net, at="input", input_shape=(3, 16, 16),
                             leaves=["Gate"] if any(isinstance(m, Gate) for m in net.modules()) else [])


def test_a_branch_on_values_is_found_and_the_export_it_fixes_is_refused(tmp_path):
    import onnxruntime as ort

    spliced = _spliced(GatedNet())
    assert value_branch(spliced, torch.randn(2, 3, 16, 16))[0] == "values"
    # the reference: the graph the tracer writes answers a bright image with the probe's branch
    data = export_onnx_bytes(spliced, torch.randn(2, 3, 16, 16), dynamic_batch=True)
    session = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    bright = torch.full((2, 3, 16, 16), 5.0)
    with torch.no_grad():
        expected = spliced(bright).numpy()
    got = session.run(None, {session.get_inputs()[0].name: bright.numpy()})[0]
    assert np.abs(got - expected).max() > 1.0
    report = splice.verify(spliced, onnx=True)
    row = next(c for c in report.checks if c.check == "onnx")
    assert not row.passed and "Python branch or number from tensor values at test_export_branches.py:" in row.detail
    assert "torch.where" in row.detail
    target = tmp_path / "gated.onnx"
    with pytest.raises(CheckFailed, match=r"from tensor values at test_export_branches\.py:\d+.*torch\.where"):
        splice.export(spliced, onnx=target)
    assert not target.exists()


class RescaledNet(nn.Module):
    """Takes 0-255 or 0-1 images, decided on the values: a branch whose other side moves random-weight outputs by a
    few percent only (the features are mostly their biases)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 5)

    def forward(self, x):
        if x.max() > 1.0:
            x = x / 255.0
        return self.fc(F.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))


def test_a_branch_that_moves_the_outputs_a_little_is_not_taken_for_a_match(tmp_path):
    import onnxruntime as ort

    spliced = _spliced(RescaledNet())
    target = tmp_path / "rescaled.onnx"
    # the N(0,1) probe takes the x / 255 side; scaled by 0.125 it stays below 1 in torch, not in the graph
    with pytest.raises(CheckFailed, match=r"on the probe scaled by 0\.125: .*tolerance 0\.01\).*from tensor values"):
        splice.export(spliced, onnx=target)
    assert not target.exists()
    # the reference: onnxruntime on the graph the tracer writes, against torch on 0-1 images (the other side)
    data = export_onnx_bytes(spliced, torch.randn(2, 3, 16, 16), dynamic_batch=True)
    session = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    images = torch.rand(2, 3, 16, 16)
    with torch.no_grad():
        expected = spliced(images).numpy()
    got = session.run(None, {session.get_inputs()[0].name: images.numpy()})[0]
    assert np.abs(got - expected).max() > 0.01 * np.abs(expected).max()


def test_numbers_the_tracer_takes_from_shapes_pass_and_are_named():
    spliced = _spliced(SamePadNet())
    assert value_branch(spliced, torch.randn(2, 3, 16, 16)) == ("shapes", "")
    report = splice.verify(spliced, onnx=True)
    row = next(c for c in report.checks if c.check == "onnx")
    assert row.passed, row.detail
    assert "from shapes only" in row.detail


class ReadsANumber(nn.Module):
    """Scales by a number read from the pixels: .item() traces through torch.export as a value of its own."""

    def forward(self, x):
        return x / x.abs().amax().item()


class NumpySign(nn.Module):
    """A branch taken on a NumPy copy of the input: torch.export cannot run it at all."""

    def forward(self, x):
        return x * 2 if x.numpy().mean() > 0 else x * 3


@pytest.mark.parametrize("net, kind", [(ReadsANumber, "values"), (NumpySign, "unknown")])
def test_numbers_read_from_values_and_numpy_branches_are_not_taken_for_shapes(net, kind):
    from splice.exporting.parity import onnx_parity

    model = net().eval()
    x = torch.randn(2, 3, 8, 8)
    conversions = []
    data = export_onnx_bytes(model, x, conversions=conversions)
    assert conversions  # the tracer's warning, NumPy's included, names the line
    assert value_branch(model, x)[0] == kind
    # checked on the very batch it was traced on, as verify does: the values verdict, or the scaled probes
    # (the sign flip catches the NumPy branch), must fail it
    result = onnx_parity(model, data, [x], conversions=conversions, perturb=False)
    assert not result["passed"], result["detail"]
    assert ("tensor values" in result["detail"]) if kind == "values" else ("probe scaled by" in result["detail"])


def test_a_static_export_is_checked_on_a_batch_it_was_not_traced_on(tmp_path):
    spliced = _spliced(SamePadNet())
    result = splice.export(spliced, onnx=tmp_path / "static.onnx", dynamic_batch=False)
    assert result["exports"][0]["batch_sizes"] == [1, 1]  # the traced batch, and a fresh one


class Guard(nn.Module):
    """An input check: the model refuses non-finite images, and computes the same for every image it takes."""

    def forward(self, x):
        if not torch.isfinite(x).all():
            raise ValueError("non-finite input")
        return x


class CheckedNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.guard = Guard()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 5)

    def forward(self, x):
        return self.fc(F.adaptive_avg_pool2d(torch.relu(self.conv(self.guard(x))), 1).flatten(1))


def test_an_input_check_that_raises_is_not_a_branch_the_graph_gets_wrong(tmp_path):
    torch.manual_seed(0)
    spliced = splice.insert(CheckedNet(), at="input", input_shape=(3, 16, 16), leaves=["Guard"])
    row = next(c for c in splice.verify(spliced, onnx=True).checks if c.check == "onnx")
    assert row.passed and "input checks that raise, which the ONNX graph does not carry" in row.detail, row.detail
    splice.export(spliced, onnx=tmp_path / "checked.onnx")
    assert (tmp_path / "checked.onnx").is_file()


class TracingOnlyGate(nn.Module):
    """A branch on values written only on the tracing path, as export-minded code keeps one: torch.export runs the
    eager path (torch.where) and sees no branch, the TorchScript tracer fixes the other."""

    def forward(self, x):
        if torch.jit.is_tracing():
            if x.amax() > 6.0:
                return -x
            return x
        return torch.where(x.amax() > 6.0, -x, x)


class StripPad(nn.Module):
    """Drops right-hand zero padding: a count read from the pixels, which no scaled probe changes."""

    def forward(self, x):
        width = int((x.abs().amax(dim=(0, 1, 2)) > 0).sum())
        return x[..., :max(width, 1)]


class TriedCheck(nn.Module):
    """A raise caught nearby is control flow, not an input check."""

    def forward(self, x):
        try:
            assert x.amax() < 3.0
            return x
        except AssertionError:
            return -x


def _with(layer: nn.Module):
    """GatedNet's gate replaced by ``layer``, kept a leaf so that the spliced graph calls its Python forward."""
    net = GatedNet()
    net.gate = layer
    torch.manual_seed(0)
    return splice.insert(net, at="input", input_shape=(3, 16, 16), leaves=[type(layer).__name__])


def test_the_scaled_probes_run_on_shapes_too_and_an_unproven_pass_says_so(tmp_path):
    row = next(c for c in splice.verify(_with(TracingOnlyGate()), onnx=True).checks if c.check == "onnx")
    assert not row.passed and "from shapes only" in row.detail and "on the probe scaled by" in row.detail
    stripped = _with(StripPad())
    row = next(c for c in splice.verify(stripped, onnx=True).checks if c.check == "onnx")
    assert row.passed and row.warning and "not proven for other inputs" in row.detail
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        splice.export(stripped, onnx=tmp_path / "strip.onnx")
    assert any("not proven for every input" in str(w.message) for w in seen)


def test_a_raise_caught_nearby_is_not_an_input_check():
    from splice.exporting.onnx import input_checks

    sites = [f"{__file__}:{TriedCheck.forward.__code__.co_firstlineno + 2}"]
    assert input_checks(sites) == []
    guard = [f"{__file__}:{Guard.forward.__code__.co_firstlineno + 1}"]
    assert input_checks(guard) == guard


def test_a_miss_on_the_checked_batches_is_told_before_the_scaled_probes():
    """When the graph already differs on a batch it was checked on, the detail says that first (it named only the
    first scaled probe, as if the checked batches had passed)."""
    import inspect

    from splice.exporting.branches import judge_conversions

    net = GatedNet()
    line = inspect.getsourcelines(Gate.forward)[1] + 1  # the `if` on values
    site = f"{inspect.getsourcefile(Gate)}:{line}"
    summary = {"passed": False, "detail": "max rel error 0.27 at batch 2, over the tolerance"}
    judged = judge_conversions(summary, net, [(torch.randn(1, 3, 16, 16),)], [site],
                               lambda batch, tol: {"passed": False, "max_abs": 1.0, "detail": "max rel error 0.9"})
    assert not judged["passed"] and judged["branch_on_values"]
    assert judged["detail"].startswith("max rel error 0.27 at batch 2, over the tolerance; the model takes a Python "
                                       "branch or number from tensor values at test_export_branches.py:")


class InvertsLight(nn.Module):
    """Light photos are inverted, so that digits come bright on dark: a branch on the mean, which no scaled N(0,1)
    probe moves from 0. Uniform [0, 1) noise inverted is the same noise: the [0, 255) probe catches it."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 5)

    def forward(self, x):
        if x.mean() > 0.5:
            x = 1 - x
        return self.fc(F.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))


class NormalisesRaw(nn.Module):
    """Takes [0, 1) images as well as normalised ones, decided on the values: no N(0,1) probe is non-negative."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 5)

    def forward(self, x):
        if x.min() >= 0:
            x = (x - 0.5) / 0.25
        return self.fc(F.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))


class MetaIfAny(nn.Module):
    """Adds a metadata term only when some metadata is given: no scaled N(0,1) probe is all zeros."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 5)
        self.extra = nn.Linear(4, 5)

    def forward(self, x, meta):
        out = self.fc(F.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))
        if meta.abs().sum() > 0:
            out = out + self.extra(meta)
        return out


@pytest.mark.parametrize("net, shape, probe, tol", [
    (NormalisesRaw, (3, 16, 16), "uniform [0, 1) inputs", 0.01),
    (InvertsLight, (3, 16, 16), "uniform [0, 255) inputs", 0.25),
    (MetaIfAny, [(3, 16, 16), (4,)], "all-zero inputs", 0.01),
])
def test_branches_that_only_natural_inputs_take_are_probed(net, shape, probe, tol, tmp_path):
    import onnxruntime as ort

    from splice.graph import TraceFallbackWarning

    torch.manual_seed(0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)  # a branch in the forward itself: hooks at 'input'
        spliced = splice.insert(net(), at="input", input_shape=shape)
    row = next(c for c in splice.verify(spliced, onnx=True).checks if c.check == "onnx")
    assert not row.passed and f"on {probe}: " in row.detail and f"(tolerance {tol:g})" in row.detail, row.detail
    target = tmp_path / "natural.onnx"
    with pytest.raises(CheckFailed, match=rf"on {re.escape(probe)}: .*from tensor values"):
        splice.export(spliced, onnx=target)
    assert not target.exists()
    # the reference: onnxruntime on the graph the tracer writes from an N(0,1) probe, against torch on ordinary
    # inputs (a light image; no metadata), which take the branch's other side
    shapes = [shape] if isinstance(shape, tuple) else shape
    xs = tuple(torch.randn(2, *s) for s in shapes)
    data = export_onnx_bytes(spliced, xs, dynamic_batch=True)
    session = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    ordinary = (0.5 + 0.5 * torch.rand(2, *shapes[0]),) + tuple(torch.zeros(2, *s) for s in shapes[1:])
    with torch.no_grad():
        expected = spliced(*ordinary).numpy()
    got = session.run(None, {i.name: x.numpy() for i, x in zip(session.get_inputs(), ordinary)})[0]
    assert np.abs(got - expected).max() > 0.05 * np.abs(expected).max()


def test_the_probes_are_named_and_drawn_without_the_callers_generators():
    from splice.exporting.branches import value_regimes

    x = torch.randn(2, 3, 4, 4)
    state = torch.get_rng_state()
    probes = value_regimes((x,))
    assert torch.equal(torch.get_rng_state(), state)
    assert [(name, tol) for name, _, tol in probes] == [
        ("the probe scaled by 8", 0.25), ("the probe scaled by 64", 0.25), ("the probe scaled by 0.125", 0.01),
        ("the probe scaled by -1", 0.01), ("uniform [0, 1) inputs", 0.01), ("uniform [0, 255) inputs", 0.25),
        ("all-zero inputs", 0.01)]
    unit, wide, zero = (batch[0] for _, batch, _ in probes[4:])
    assert torch.equal(probes[3][1][0], -x) and not zero.any() and zero.shape == x.shape
    assert 0 <= float(unit.min()) and float(unit.max()) < 1 and 0.4 < float(unit.mean()) < 0.6
    assert 0 <= float(wide.min()) and float(wide.max()) < 255 and float(wide.max()) > 200


class Standardised(nn.Module):
    """Divides by the std (NaN on all-zero inputs, in torch as in the graph), then clips on the values: a branch
    no probe takes."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 5)

    def forward(self, x):
        x = (x - x.mean()) / x.std()
        if x.amax() > 1e4:
            x = x.clamp(max=1e4)
        return self.fc(F.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))


def test_a_probe_where_torch_answers_nan_judges_nothing():
    from splice.graph import TraceFallbackWarning

    torch.manual_seed(0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)
        spliced = splice.insert(Standardised(), at="input", input_shape=(3, 16, 16))
    with torch.no_grad():  # the reference: torch itself answers NaN on zeros (0 / 0)
        assert torch.isnan(spliced(torch.zeros(1, 3, 16, 16))).all()
    row = next(c for c in splice.verify(spliced, onnx=True).checks if c.check == "onnx")
    assert row.passed and row.warning and "not proven for other inputs" in row.detail, row.detail
    assert "all-zero inputs: outside, torch's own output is not finite there" in row.detail
    assert "the graph matched on the probe scaled by 8, 64, 0.125, -1, on uniform [0, 1) inputs and on uniform " \
           "[0, 255) inputs" in row.detail


class LightOnly(nn.Module):
    """Inverts a light photo (every pixel between 0.3 and 1): no probe, scaled or natural, takes that side."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 5)

    def forward(self, x):
        if bool((x.min() > 0.3) & (x.max() <= 1.0)):
            x = 1 - x
        return self.fc(F.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))


def test_verify_runs_the_graph_on_the_images_it_is_given(tmp_path):
    import onnxruntime as ort
    from PIL import Image

    from splice.graph import TraceFallbackWarning

    gen = np.random.default_rng(0)
    for kind, low, high in (("dark", 0, 60), ("light", 150, 256)):
        (tmp_path / kind).mkdir()
        for i in range(3):
            pixels = gen.integers(low, high, (16, 16, 3), dtype=np.uint8)
            Image.fromarray(pixels).save(tmp_path / kind / f"{i}.png")
    torch.manual_seed(0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)
        spliced = splice.insert(LightOnly(), at="input", input_shape=(3, 16, 16))
    dark = next(c for c in splice.verify(spliced, onnx=True, images=tmp_path / "dark").checks if c.check == "onnx")
    assert dark.passed and dark.warning and "the graph matched torch on the 3 image(s) from --images" in dark.detail
    light = next(c for c in splice.verify(spliced, onnx=True, images=tmp_path / "light").checks if c.check == "onnx")
    assert not light.passed and light.detail.startswith(
        "onnxruntime vs torch (opset 17, torchscript, weights fed as inputs): on the 3 image(s) from --images the "
        "graph differs from torch (as stored: max abs error"), light.detail
    # the reference: onnxruntime on the graph traced from an N(0,1) probe, against torch on a light image
    data = export_onnx_bytes(spliced, torch.randn(1, 3, 16, 16))
    session = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    image = torch.from_numpy(np.array(Image.open(tmp_path / "light" / "0.png"))).permute(2, 0, 1)[None] / 255.0
    with torch.no_grad():
        expected = spliced(image).numpy()
    got = session.run(None, {session.get_inputs()[0].name: image.numpy()})[0]
    assert np.abs(got - expected).max() > 1e-3 * np.abs(expected).max()


class BatchBranch(nn.Module):
    """Halves its features for batches of more than four: a Python branch on the batch size."""

    def __init__(self):
        super().__init__()
        self.conv, self.fc = nn.Conv2d(3, 4, 3, padding=1), nn.Linear(4, 3)

    def forward(self, x):
        y = torch.relu(self.conv(x))
        if x.shape[0] > 4:
            y = y * 0.5
        return self.fc(y.mean((2, 3)))


@pytest.mark.parametrize("exporter", ["torchscript", "dynamo"])
def test_a_branch_on_the_batch_size_is_not_exported_for_any_batch(tmp_path, exporter):
    """The dynamic-batch graph was checked at batches 1 and 3 and written as passed; it kept the branch of the traced
    batch and was 26 % off at batch 7 (onnxruntime). torch.export with the batch as a symbol refuses the code, so a
    static batch of 1 is written, with a warning. Reference: onnxruntime, which takes the file's own input shape."""
    ort = pytest.importorskip("onnxruntime")
    torch.manual_seed(0)
    model = BatchBranch().eval()
    x7 = torch.rand(7, 3, 16, 16)
    with torch.no_grad():
        assert not torch.allclose(model(x7), torch.cat([model(x7[:4]), model(x7[4:])]))  # the branch is real
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # fx cannot trace the branch: hooks (named in their own tests)
        spliced = splice.insert(model, at="input", input_shape=(3, 16, 16))
    target = tmp_path / "bb.onnx"
    with warnings.catch_warnings(record=True) as caught:  # pytest.warns would re-raise torch.onnx's own notes
        warnings.simplefilter("always")
        result = splice.export(spliced, onnx=target, exporter=exporter, opset=18 if exporter == "dynamo" else 17)
    ours = [str(w.message) for w in caught if issubclass(w.category, splice.errors.SpliceWarning)]
    assert len(ours) == 1 and "would fix the model's branch on its batch size" in ours[0], ours
    assert not result["exports"][0]["dynamic_batch"]
    session = ort.InferenceSession(str(target), providers=["CPUExecutionProvider"])
    assert session.get_inputs()[0].shape[0] == 1  # a graph for one batch size, not for any
    with torch.no_grad():
        want = spliced(x7[:1]).numpy()
    got = session.run(None, {session.get_inputs()[0].name: x7[:1].numpy()})[0]
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-6)
