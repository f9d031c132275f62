"""What inspect says of a warp, checked against references outside splice: a bent thin-plate spline described
at the output centre (scipy's thin-plate RBFInterpolator, scipy.linalg.polar, scipy.optimize.fsolve), and angles
on both sides of the half turn summarised as one spread (scipy.stats.circmean / circstd)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from splice import inspection as I
from splice.warps import grids

H, W = 32, 40  # non-square on purpose: angles must be rigid in pixels


def test_a_bent_tps_is_described_at_the_output_centre_as_scipy_interpolates_it():
    # reference: scipy.interpolate.RBFInterpolator with the thin-plate kernel and a degree-1 polynomial is the
    # same interpolant (its kernel r^2 log r is half of r^2 log r^2, which the same constraints absorb). Only
    # the inner control points move, so the polynomial term alone misstates the centre (3.6 px against 6.3).
    from scipy.interpolate import RBFInterpolator
    from scipy.linalg import polar
    from scipy.optimize import fsolve

    k = 4
    ctrl = grids.tps_control_points(k).numpy()
    rng = np.random.default_rng(3)
    cases = [np.where((np.abs(ctrl) < 0.5).all(axis=1, keepdims=True), [0.2, 0.0], 0.0),
             rng.normal(0.0, 0.08, ctrl.shape)]
    for offsets in cases:
        f = RBFInterpolator(ctrl, ctrl + offsets, kernel="thin_plate_spline", degree=1)
        d = I.describe_tps(torch.from_numpy(offsets.reshape(1, -1)), (H, W), k)
        centre = f(np.zeros((1, 2)))[0]
        assert abs(float(d["shift_x_px"][0]) - centre[0] * W / 2) < 1e-9
        assert abs(float(d["shift_y_px"][0]) - centre[1] * H / 2) < 1e-9
        eps = 1e-6
        jac = np.stack([(f(np.array([[eps, 0.0]])) - f(np.array([[-eps, 0.0]])))[0] / (2 * eps),
                        (f(np.array([[0.0, eps]])) - f(np.array([[0.0, -eps]])))[0] / (2 * eps)], axis=1)
        dmat = np.diag([W / 2, H / 2])
        u, pos = polar(dmat @ jac @ np.linalg.inv(dmat))
        scales = np.linalg.eigvalsh(pos)
        assert abs(float(d["scale_1"][0]) - scales[1]) < 1e-6 and abs(float(d["scale_2"][0]) - scales[0]) < 1e-6
        assert abs(float(d["angle_deg"][0]) - math.degrees(math.atan2(u[1, 0], u[0, 0]))) < 1e-5
        seen = fsolve(lambda q: f(q.reshape(1, 2))[0], np.zeros(2), xtol=1e-13)
        assert abs(float(d["view_shift_x_px"][0]) - seen[0] * W / 2) < 1e-7
        assert abs(float(d["view_shift_y_px"][0]) - seen[1] * H / 2) < 1e-7
    assert float(d["tps_max_px"][0]) > 0


def test_angles_across_the_half_turn_are_summarised_as_one_spread():
    # reference: scipy.stats.circmean / circstd. Parts lying upside down read angles on both sides of +-180;
    # a linear mean of them is near 0, and their spread looks like a full turn.
    from scipy.stats import circmean, circstd

    from splice.inspection.summary import summarise

    rng = np.random.default_rng(0)
    angles = (180.0 + rng.normal(0.0, 4.0, 400) + 180.0) % 360.0 - 180.0
    stats = summarise(torch.from_numpy(np.append(angles, np.nan)), circular=True)
    assert stats["n"] == 400
    assert stats["mean"] == pytest.approx(float(circmean(angles, high=180, low=-180)), abs=1e-9)
    assert stats["std"] == pytest.approx(float(circstd(angles, high=180, low=-180)), rel=0.01)
    assert stats["p95"] - stats["p5"] == pytest.approx(2 * 1.645 * 4.0, rel=0.15)  # a normal's 5-95 % width
    assert stats["max"] > 180.0 and stats["min"] < 180.0  # unwrapped around the mean, not split in two
    plain = summarise(torch.from_numpy(angles))
    assert plain["std"] > 150.0  # what a linear summary says of the same angles
    near_zero = torch.tensor([10.0, -10.0, 20.0], dtype=torch.float64)
    circ, lin = summarise(near_zero, circular=True), summarise(near_zero)
    assert circ["mean"] == pytest.approx(float(circmean(near_zero.numpy(), high=180, low=-180)), abs=1e-9)
    assert {k: v for k, v in circ.items() if k != "mean"} == {k: v for k, v in lin.items() if k != "mean"}


def test_scale_axes_near_the_vertical_are_summarised_as_one_spread():
    # reference: scipy.stats.circmean / circstd with high - low = 180 (an undirected axis repeats every half
    # turn). A vertical stretch reads axes of 89 and -89 degrees; a linear mean of them is near 0, the
    # horizontal, with a spread of +-89.
    from scipy.stats import circmean, circstd

    from splice.inspection.summary import AXIS_QUANTITIES, period_of, summarise

    assert period_of("scale_axis_deg") == 180.0 and set(AXIS_QUANTITIES) == {"scale_axis_deg", "view_zoom_axis_deg"}
    rng = np.random.default_rng(1)
    axes = (90.0 + rng.normal(0.0, 3.0, 300) + 90.0) % 180.0 - 90.0  # folded into [-90, 90)
    stats = summarise(torch.from_numpy(axes), period=180.0)
    assert stats["mean"] == pytest.approx(float(circmean(axes, high=90, low=-90)), abs=1e-9)
    assert abs(abs(stats["mean"]) - 90.0) < 1.0
    assert stats["std"] == pytest.approx(float(circstd(axes, high=90, low=-90)), rel=0.01)
    assert stats["std"] < 4.0 and summarise(torch.from_numpy(axes))["std"] > 80.0


def test_equal_principal_scales_leave_both_outlines_visible(tmp_path):
    """A warp that zooms evenly has scale_1 == scale_2 on every image: both outlines must still show (the second
    is dashed over the first). Counted in the scales cell's pixels, against the palette's own colours."""
    import numpy as np
    from PIL import Image

    from splice.inspection.plots import HIST_CELL_W, draw_histograms
    from splice.pictures import OKABE_ITO

    gen = torch.Generator().manual_seed(0)
    scales = 1.0 + 0.1 * torch.rand(40, generator=gen)
    desc = {"angle_deg": 5 * torch.randn(40, generator=gen), "scale_1": scales, "scale_2": scales.clone(),
            "shift_x_px": torch.randn(40, generator=gen), "shift_y_px": torch.randn(40, generator=gen)}
    path = draw_histograms(tmp_path / "hist.png", "input", "affine", desc)
    with Image.open(path) as im:
        cell = np.asarray(im.convert("RGB"))[:, HIST_CELL_W:2 * HIST_CELL_W].astype(int)

    def pixels_of(hex_colour: str) -> int:
        rgb = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)])
        return int((np.abs(cell - rgb).sum(axis=-1) < 40).sum())

    assert pixels_of(OKABE_ITO["orange"]) > 200  # scale_2, on top
    assert pixels_of(OKABE_ITO["blue"]) > 200  # scale_1 shows between the dashes (it was hidden before)


def test_scales_equal_up_to_float32_rounding_share_one_bin(tmp_path):
    """Every image's two scales 0.8, apart only by float32 rounding (a few 1e-8): the two outlines drew in
    neighbouring bins (the value sat on the middle bin edge), showing an anisotropy that is not there. Both
    colours must span the same columns of the scales cell."""
    import numpy as np
    from PIL import Image

    from splice.inspection.plots import HIST_CELL_W, draw_histograms
    from splice.pictures import OKABE_ITO

    scale_1 = torch.full((16,), 0.8, dtype=torch.float64)
    desc = {"angle_deg": torch.zeros(16, dtype=torch.float64), "scale_1": scale_1, "scale_2": scale_1 * (1 - 3e-8),
            "shift_x_px": torch.zeros(16, dtype=torch.float64), "shift_y_px": torch.zeros(16, dtype=torch.float64)}
    path = draw_histograms(tmp_path / "hist.png", "input", "affine", desc)
    with Image.open(path) as im:
        cell = np.asarray(im.convert("RGB"))[:, HIST_CELL_W:2 * HIST_CELL_W].astype(int)

    def columns_of(hex_colour: str) -> tuple[int, int]:
        rgb = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)])
        cols = np.nonzero((np.abs(cell - rgb).sum(axis=-1) < 40).sum(axis=0) > 20)[0]  # the tall outline edges
        return int(cols.min()), int(cols.max())

    (b0, b1), (o0, o1) = columns_of(OKABE_ITO["blue"]), columns_of(OKABE_ITO["orange"])
    assert abs(b0 - o0) <= 3 and abs(b1 - o1) <= 3, ((b0, b1), (o0, o1))


def test_an_isotropic_map_set_in_float32_reports_no_scale_axis():
    """0.8 x a rotation of 0.5 rad, rounded to float32 as a warp head computes it: the two scales differ by about
    2e-9 relative in float64, which set a meaningless axis (-59.3 degrees) to four figures; reference: the
    singular values of the same matrix from numpy's SVD, equal to float32's precision."""
    import numpy as np

    from splice.inspection.decompose import describe_linear

    c, s = math.cos(0.5), math.sin(0.5)
    a = (0.8 * torch.tensor([[c, -s], [s, c]], dtype=torch.float32)).to(torch.float64)
    sv = np.linalg.svd(a.numpy(), compute_uv=False)
    assert 0 < (sv[0] - sv[1]) / sv[0] < 1e-6  # not exactly equal: the case of the defect
    d = describe_linear(a.unsqueeze(0))
    assert float(d["scale_axis_deg"][0]) == 0.0 and float(d["view_zoom_axis_deg"][0]) == 0.0
    assert float(d["scale_1"][0]) == pytest.approx(0.8, rel=1e-6)
