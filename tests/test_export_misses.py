"""Export parity misses: a float32 miss judged against float64 (rounding passes, a real difference does not),
and an export that fails with a dynamic and a static batch alike.

onnxruntime and torch round in different orders; on an ill-conditioned probe
(a LayerNorm over nearly-zero channels behind a warp that samples outside the
image) both can be far from exact arithmetic while agreeing with each other
to 1e-3 or so. Measured on timm pvt_v2_b0, twins_svt_small and
focalnet_tiny_srf with random weights and a perturbed input warp: torch
float32 was 0.03-0.17 from float64, the export 1e-3..7e-3 from torch. The
model here makes that situation exact: its output is ``x`` plus a gain times
``r = (3x)/3 - x``, which is zero in exact arithmetic and a rounding error in
float32 (computed the same way by both runtimes: IEEE 754 multiplication and
division are correctly rounded). Its export adds ``share`` times that same
rounding term (a runtime rounding in another order, where rounding is) and
an ``offset`` everywhere (a lowering error, also where torch is exact).
"""

from __future__ import annotations

import io
import warnings

import pytest
import torch
from torch import nn

from splice.exporting import onnx_parity
from splice.exporting.parity import EXPORT_TOLERANCES, ROUNDING_LIMIT

pytest.importorskip("onnxruntime")


class _Rounding(nn.Module):
    def __init__(self, gain: float, share: float, offset: float, second: float | None):
        super().__init__()
        self.gain, self.share, self.offset, self.second = gain, share, offset, second

    def forward(self, x):
        r = (x * 3.0) / 3.0 - x
        y = x + self.gain * r
        clean = x.mean((2, 3))  # a second output, exact in float32 too
        if torch.onnx.is_in_onnx_export():  # what the export computes
            y = y + self.share * self.gain * r + self.offset
            clean = clean + (self.second or 0.0)
        return y if self.second is None else (y, clean)


def _probe() -> tuple[torch.Tensor, float]:
    """An input in [1, 2] and the largest float32 rounding of (3x)/3 - x on it."""
    x = torch.linspace(1.0, 2.0, 64).reshape(1, 1, 8, 8)
    r = ((x * 3.0) / 3.0 - x).abs()
    assert float(r.max()) > 0 and float(r.min()) == 0  # the probe rounds at some elements, not at all
    return x, float(r.max())


def _parity(rounding: float, share: float = 0.0, offset: float = 0.0, tol: float | None = None,
            second: float | None = None) -> dict:
    """onnx_parity of a model whose float32 output is up to ``rounding`` (relative) from float64, exported with
    ``share`` of that rounding and ``offset`` (relative) added, and ``second`` added to a second, exact output."""
    x, r = _probe()
    scale = float(x.abs().max())
    model = _Rounding(gain=rounding * scale / r, share=share, offset=offset * scale,
                      second=None if second is None else second * float(x.mean())).eval()
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)  # the TorchScript exporter, which splice uses too
        torch.onnx.export(model, (x,), buf, opset_version=17, dynamo=False, input_names=["input"])
    return onnx_parity(model, buf.getvalue(), x, tol=tol)


def test_exact_export_passes_without_float64():
    result = _parity(rounding=0.02)
    assert result["passed"] and result["max_abs"] == 0.0
    assert result["float64_rounding"] is None  # only a miss is judged against float64


def test_difference_where_torch_itself_rounds_passes_and_says_why():
    tol = EXPORT_TOLERANCES[torch.float32]
    result = _parity(rounding=0.02, share=1.0)
    assert result["max_rel"] == pytest.approx(0.02, rel=0.05) and result["max_rel"] > tol  # missed 1e-3 ...
    assert result["passed"]  # ... but only where torch float32 is itself 0.02 from exact
    assert result["float64_rounding"] == pytest.approx(0.02, rel=0.05)
    assert "within the probe's float32 rounding" in result["detail"]


def test_difference_beyond_twice_the_rounding_fails():
    result = _parity(rounding=0.01, share=3.0)
    assert not result["passed"]
    assert "more than rounding explains" in result["detail"]


def test_rounding_at_some_elements_excuses_nothing_at_others():
    # an offset of 0.01 everywhere: below the probe's largest rounding (0.02), but also where torch is exact
    result = _parity(rounding=0.02, offset=0.01)
    assert not result["passed"] and "more than rounding explains" in result["detail"]


def test_rounding_in_one_output_excuses_nothing_in_another():
    result = _parity(rounding=0.02, share=1.0, second=0.015)
    assert not result["passed"]
    assert _parity(rounding=0.02, share=1.0, second=0.0)["passed"]


def test_very_ill_conditioned_probe_passes_a_small_difference():
    # as measured on twins_svt_small and focalnet_tiny_srf: torch float32 0.16-0.17 from float64, export 3e-3..7e-3
    result = _parity(rounding=0.16, share=0.05)
    assert result["passed"] and result["float64_rounding"] == pytest.approx(0.16, rel=0.05)


def test_difference_too_large_for_rounding_fails_however_ill_conditioned():
    result = _parity(rounding=0.5, share=0.1)
    assert result["max_rel"] > ROUNDING_LIMIT and not result["passed"]
    assert "too large to put down to rounding" in result["detail"]


class _Offset(nn.Module):
    """Adds 1 while exporting: the export computes something else than the model (kept a leaf, so that the
    check runs at export time, not once at trace time)."""

    def forward(self, y):
        return y + 1.0 if torch.onnx.is_in_onnx_export() else y


class _OffWhenExported(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.off = _Offset()

    def forward(self, x):
        return self.off(self.conv(x).mean((2, 3)))


def test_export_failing_at_both_batch_kinds_says_how_each_failed(tmp_path):
    import splice
    from splice.errors import CheckFailed

    torch.manual_seed(0)
    spliced = splice.insert(_OffWhenExported().eval(), at="input", input_shape=(3, 16, 16), leaves=[_Offset])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(CheckFailed) as caught:
            splice.export(spliced, onnx=tmp_path / "off.onnx")
    message = str(caught.value)
    assert "as stored" in message and "with a static batch of 1: as stored" in message
    assert not (tmp_path / "off.onnx").exists()


class _Folds(nn.Module):
    """Unfolds and folds back (im2col, col2im): the TorchScript exporter has col2im from opset 18 only."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)

    def forward(self, x):
        cols = nn.functional.unfold(self.conv(x), kernel_size=2, stride=2)
        return nn.functional.fold(cols, output_size=x.shape[-2:], kernel_size=2, stride=2).mean((2, 3))


@pytest.mark.slow  # the dynamo exporter takes seconds
def test_failed_export_names_the_other_exporter_and_an_opset_it_takes(tmp_path):
    import splice
    from splice.errors import SpliceError

    torch.manual_seed(0)
    spliced = splice.insert(_Folds().eval(), at="input", input_shape=(3, 16, 16))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(SpliceError, match=r"col2im.*try --exporter dynamo --opset 18 \(Python: exporter='dynamo'"):
            splice.export(spliced, onnx=tmp_path / "folds.onnx")
        # and the advice works
        result = splice.export(spliced, onnx=tmp_path / "folds.onnx", opset=18, exporter="dynamo")["exports"][0]
    assert result["max_abs"] < 1e-5 and (tmp_path / "folds.onnx").is_file()


def test_a_tolerance_the_caller_sets_is_kept_as_it_is():
    assert _parity(rounding=0.02, share=1.0)["passed"]  # the default tolerance is judged against float64
    result = _parity(rounding=0.02, share=1.0, tol=EXPORT_TOLERANCES[torch.float32])
    assert not result["passed"] and result["float64_rounding"] is None


class _RoundingLeaf(nn.Module):
    """(3x)/3 - x, amplified: exact arithmetic gives 0, float32 its rounding. Behind a perturbed warp the two
    runtimes sample x in their own orders, so their roundings differ where x does (independent noise)."""

    def forward(self, x):
        return x + 1e5 * ((x * 3.0) / 3.0 - x)


class _WarpedRounding(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 2, 3, padding=1)
        self.leaf = _RoundingLeaf()

    def forward(self, x):
        return self.leaf(x) + self.conv(x).mean()


def test_verify_s_checking_graph_judges_the_perturbed_run():
    # verify's path: weights fed as inputs, the perturbed run's float64 model built from perturbed_copy. The
    # runtimes' independent rounding behind the off-grid warp misses 1e-3 and is put down to rounding
    import splice
    from splice.exporting import check_onnx_graph

    torch.manual_seed(0)
    spliced = splice.insert(_WarpedRounding().eval(), at="input", input_shape=(1, 8, 8), leaves=[_RoundingLeaf])
    x = torch.linspace(1.0, 2.0, 128).reshape(2, 1, 8, 8)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = check_onnx_graph(spliced, x)
    tol = EXPORT_TOLERANCES[torch.float32]
    assert result["passed"] and result["max_rel"] <= tol < result["max_rel_perturbed"]
    assert result["float64_rounding"] == pytest.approx(result["max_rel_perturbed"], rel=0.05)
    assert "perturbed, relative error" in result["detail"]


@pytest.mark.slow  # the dynamo exporter takes seconds
def test_verify_s_advice_can_be_followed_on_the_command_line(tmp_path, capsys):
    import splice
    from splice.cli import main

    torch.manual_seed(0)
    folder = splice.save(splice.insert(_Folds().eval(), at="input", input_shape=(3, 16, 16)), tmp_path / "folds",
                         source=f"{__file__}:_Folds")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["verify", str(folder), "--onnx", "--trust-code"]) == 1
        out = capsys.readouterr()
        assert "try --exporter dynamo --opset 18" in out.out + out.err
        assert main(["verify", str(folder), "--onnx", "--trust-code", "--exporter", "dynamo", "--opset", "18"]) == 0


def test_a_dynamic_miss_in_values_alone_is_not_called_batch_dependence(monkeypatch):
    """When the dynamic export misses in values only (same shapes, numbers compared) and the static one passes,
    the warning names both causes instead of asserting the graph depends on the batch size; with differing output
    shapes it does say so."""
    import warnings as _warnings

    from splice.errors import SpliceWarning
    from splice.exporting import run as export_run

    def fake(model, fmt, shapes, *, dynamic_batch, **options):
        if not dynamic_batch:
            return b"static", {"passed": True, "detail": "ok"}, 0.0
        return b"dynamic", {"passed": False, "max_abs": 62.6, "shapes_equal": shape_ok,
                            "detail": "as stored: max relative error 0.054"}, 0.0
    monkeypatch.setattr(export_run, "_one", fake)
    for shape_ok, said in ((True, "the graph may hold the traced batch's sizes, or the probe is ill-conditioned"),
                           (False, "the model's graph depends on its batch size")):
        with _warnings.catch_warnings(record=True) as caught:
            _warnings.simplefilter("always")
            data, _, _, dynamic = export_run._checked(None, "onnx", [(3, 8, 8)], dynamic_batch=True)
        assert data == b"static" and not dynamic
        assert [str(w.message) for w in caught if issubclass(w.category, SpliceWarning) and said in str(w.message)]


class _Dropping(nn.Module):
    """Dropout left on in eval mode: torch answers otherwise at every call."""

    def __init__(self):
        super().__init__()
        self.conv, self.fc = nn.Conv2d(3, 8, 3, padding=1), nn.Linear(8, 3)

    def forward(self, x):
        h = nn.functional.dropout(torch.relu(self.conv(x)), 0.5, training=True)
        return self.fc(h.mean((2, 3)))


def test_a_model_that_answers_otherwise_at_every_call_is_named_as_such_not_as_rounding():
    """The onnx row blamed float32 rounding ("torch float32 itself is up to 0.184 from float64 ... too large to put
    down to rounding"); the cause is torch: two runs on the same input differ (reference: torch itself, below)."""
    import splice

    torch.manual_seed(0)
    model = _Dropping().eval()
    x = torch.rand(2, 3, 16, 16)
    with torch.no_grad():
        assert not torch.allclose(model(x), model(x))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        report = splice.verify(splice.insert(model, at="input", input_shape=(3, 16, 16)), onnx=True)
    row = report["onnx"]
    assert not row.passed and "torch itself answers otherwise when run twice on the same input" in row.detail
