"""splice.inspection: the decomposition maths against scipy / scikit-image, capture, reports and pictures."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import torch

from splice import inspection as I
from splice.errors import SpliceError
from splice.warps import Warp, WarpConfig, grids, identity_theta, theta_to_matrix
from splice.inspection import run

H, W = 32, 40  # non-square on purpose: angles must be rigid in pixels


def _rot(a_deg: float) -> np.ndarray:
    a = math.radians(a_deg)
    return np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])


def _random_matrices(n: int, seed: int) -> np.ndarray:
    """Random 2x2 matrices: generic ones, reflections (det < 0) and near-singular ones."""
    rng = np.random.default_rng(seed)
    out = [rng.normal(size=(2, 2)) for _ in range(n)]
    for _ in range(n):  # reflections
        m = rng.normal(size=(2, 2))
        if np.linalg.det(m) > 0:
            m[:, 0] *= -1
        out.append(m)
    for eps in (1e-4, 1e-7, 1e-10):  # near-singular: a rank-1 matrix plus a tiny perturbation
        u, v = rng.normal(size=2), rng.normal(size=2)
        out.append(np.outer(u, v) + eps * rng.normal(size=(2, 2)))
    return np.stack(out)


# ----------------------------------------------------------------------------- polar decomposition


def test_polar_matches_scipy_on_random_matrices_with_reflections_and_near_singular():
    from scipy.linalg import polar

    mats = _random_matrices(20, seed=1)
    u, p = I.polar_decompose(torch.from_numpy(mats))
    for i, a in enumerate(mats):
        # source: scipy.linalg.polar(a, side="right") gives a = u p with u unitary, p PSD
        ref_u, ref_p = polar(a, side="right")
        sv = np.linalg.svd(a, compute_uv=False)
        # P = sqrt(A^T A) is unique, U = A P^-1 is unique for invertible A; its error
        # grows like 1 / s2, so allow a tolerance scaled by the condition number
        cond_tol = 1e-12 * sv[0] / sv[1]
        np.testing.assert_allclose(p[i].numpy(), ref_p, atol=1e-12 * max(1.0, sv[0]))
        np.testing.assert_allclose(u[i].numpy(), ref_u, atol=max(1e-12, cond_tol))
        np.testing.assert_allclose((u[i] @ p[i]).numpy(), a, atol=1e-12 * max(1.0, sv[0]))
        assert np.sign(np.linalg.det(u[i].numpy())) == np.sign(np.linalg.det(a))


def test_polar_of_an_exactly_singular_matrix_is_still_a_valid_decomposition():
    from scipy.linalg import polar

    a = np.array([[2.0, 4.0], [1.0, 2.0]])  # rank 1
    u, p = I.polar_decompose(torch.from_numpy(a))
    # source: scipy.linalg.polar — P is unique even when A is singular (U is not)
    np.testing.assert_allclose(p.numpy(), polar(a, side="right")[1], atol=1e-12)
    np.testing.assert_allclose((u @ p).numpy(), a, atol=1e-12)
    np.testing.assert_allclose((u.T @ u).numpy(), np.eye(2), atol=1e-12)
    assert np.all(np.linalg.eigvalsh(p.numpy()) >= -1e-12)


def test_polar_rejects_wrong_shape():
    with pytest.raises(SpliceError, match=r"needs \(\.\.\., 2, 2\) matrices, got shape \(3, 3\)"):
        I.polar_decompose(torch.eye(3))


def test_describe_linear_scales_match_scipy_and_axis_is_principal():
    from scipy.linalg import polar, svdvals

    mats = _random_matrices(10, seed=2)[:20]
    d = I.describe_linear(torch.from_numpy(mats))
    for i, a in enumerate(mats):
        # source: scipy.linalg.svdvals — the eigenvalues of P are A's singular values
        np.testing.assert_allclose([d["scale_1"][i], d["scale_2"][i]], svdvals(a), rtol=1e-12)
        # the reported axis is an eigenvector of scipy's P with eigenvalue scale_1
        ref_p = polar(a, side="right")[1]
        ang = math.radians(float(d["scale_axis_deg"][i]))
        v = np.array([math.cos(ang), math.sin(ang)])
        np.testing.assert_allclose(ref_p @ v, float(d["scale_1"][i]) * v, atol=1e-10)
        # the rotation angle reproduces scipy's U: U = R(a) (det > 0) or R(a) diag(1, -1)
        ref_u = polar(a, side="right")[0]
        flip = np.diag([1.0, -1.0]) if d["reflection"][i] else np.eye(2)
        np.testing.assert_allclose(_rot(float(d["angle_deg"][i])) @ flip, ref_u, atol=1e-10)
        assert bool(d["reflection"][i]) == (np.linalg.det(a) < 0)
        np.testing.assert_allclose(float(d["anisotropy"][i]), svdvals(a)[0] / svdvals(a)[1], rtol=1e-12)


def test_a_vertical_scale_axis_reads_90_whichever_sign_rounding_gives_it():
    from scipy.linalg import polar

    # a pure vertical stretch, with off-diagonal terms of rounding size (as a float32 theta gives them): the axis
    # is the vertical, reported near 90 (README: axes in (-90, 90]), never as -89.9999993
    for e in (0.0, 1e-9, -1e-9, 4e-8, -4e-8):
        for dtype in (torch.float64, torch.float32):
            a = torch.tensor([[[1.0, e], [0.0, 2.0]], [[1.0, 0.0], [e, 2.0]]], dtype=dtype)
            d = I.describe_linear(a)
            assert all(90.0 - 1e-5 < v <= 90.0 for v in d["scale_axis_deg"].tolist()), (e, dtype, d)
            assert all(-90.0 < v <= 90.0 for v in d["view_zoom_axis_deg"].tolist())
            # source: scipy.linalg.polar — the vertical is still scale_1's eigenvector of P
            ref_p = polar(a[0].double().numpy(), side="right")[1]
            np.testing.assert_allclose(ref_p @ np.array([0.0, 1.0]), [0.0, 2.0], atol=1e-6)
    # an axis a real (not rounding-sized) step off the vertical keeps its sign
    tilted = I.describe_linear(torch.tensor([[[1.0, -1e-4], [0.0, 2.0]]], dtype=torch.float64))["scale_axis_deg"]
    assert -90.0 < float(tilted) < -89.99


def test_viewer_side_is_the_description_of_the_inverse_map():
    mats = _random_matrices(8, seed=3)[:16]
    d = I.describe_linear(torch.from_numpy(mats))
    inv = I.describe_linear(torch.from_numpy(np.linalg.inv(mats)))  # numpy's inverse as the reference
    np.testing.assert_allclose(d["view_rotation_deg"], inv["angle_deg"], atol=1e-9)
    np.testing.assert_allclose(d["view_zoom_1"], inv["scale_1"], rtol=1e-10)
    np.testing.assert_allclose(d["view_zoom_2"], inv["scale_2"], rtol=1e-10)
    proper = d["reflection"] == 0
    np.testing.assert_allclose(d["view_rotation_deg"][proper], -d["angle_deg"][proper], atol=1e-9)
    # the content looks most magnified along view_zoom_axis: |A^-1 (A v)| / |A v| is largest for that v
    for i, a in enumerate(mats):
        ang = math.radians(float(d["view_zoom_axis_deg"][i]))
        v = np.array([math.cos(ang), math.sin(ang)])
        np.testing.assert_allclose(np.linalg.norm(a @ v), float(d["scale_2"][i]), rtol=1e-9)


# ----------------------------------------------------------------------------- synthesised warps


def _theta_from_pixel_affine(a_px: np.ndarray, t_px: np.ndarray, size=(H, W)) -> torch.Tensor:
    """Normalised affine theta whose pixel-unit linear part is a_px and shift t_px (pixels)."""
    h, w = size
    d = np.diag([w / 2, h / 2])
    a = np.linalg.inv(d) @ a_px @ d
    t = t_px / np.array([w / 2, h / 2])
    return torch.tensor([[a[0, 0], a[0, 1], t[0], a[1, 0], a[1, 1], t[1]]], dtype=torch.float64)


@pytest.mark.parametrize("angle,s1,s2,axis,shift", [
    (30.0, 1.3, 0.7, 20.0, (3.0, -5.0)),
    (-75.5, 0.9, 0.4, -60.0, (-8.0, 2.5)),
    (170.0, 2.0, 1.5, 85.0, (0.0, 0.0)),
    (0.0, 1.0, 1.0, 0.0, (12.0, 0.0)),
])
def test_affine_of_known_angle_scale_and_shift_is_recovered(angle, s1, s2, axis, shift):
    p = _rot(axis) @ np.diag([s1, s2]) @ _rot(axis).T
    theta = _theta_from_pixel_affine(_rot(angle) @ p, np.array(shift))
    d = I.describe_matrix(theta_to_matrix("affine", theta), (H, W))
    assert abs(float(d["angle_deg"][0]) - angle) < 1e-6
    assert abs(float(d["scale_1"][0]) - s1) < 1e-6 and abs(float(d["scale_2"][0]) - s2) < 1e-6
    if s1 != s2:
        assert abs(float(d["scale_axis_deg"][0]) - axis) < 1e-6
        assert abs(float(d["view_zoom_axis_deg"][0]) - (axis - 90.0 if axis > 0 else axis + 90.0)) < 1e-6
    assert abs(float(d["shift_x_px"][0]) - shift[0]) < 1e-6
    assert abs(float(d["shift_y_px"][0]) - shift[1]) < 1e-6
    assert abs(float(d["shift_x_frac"][0]) - shift[0] / W) < 1e-6
    assert abs(float(d["shift_y_frac"][0]) - shift[1] / H) < 1e-6
    assert float(d["reflection"][0]) == 0.0
    assert abs(float(d["view_rotation_deg"][0]) + angle) < 1e-6
    assert abs(float(d["view_zoom_1"][0]) - 1 / s2) < 1e-6


def test_affine_reflection_is_flagged_with_the_documented_angle():
    flip = np.diag([1.0, -1.0])
    theta = _theta_from_pixel_affine(_rot(40.0) @ flip @ np.diag([1.2, 1.2]), np.zeros(2))
    d = I.describe_matrix(theta_to_matrix("affine", theta), (H, W))
    assert float(d["reflection"][0]) == 1.0
    assert abs(float(d["angle_deg"][0]) - 40.0) < 1e-6
    assert abs(float(d["view_rotation_deg"][0]) - 40.0) < 1e-6  # a reflection is its own inverse
    assert abs(float(d["scale_1"][0]) - 1.2) < 1e-6


def test_similarity_matches_scikit_image_and_known_values():
    from skimage.transform import SimilarityTransform

    angle_rad, log_s, tx, ty = 0.6, math.log(1.25), 0.2, -0.1
    theta = torch.tensor([[angle_rad, log_s, tx, ty]], dtype=torch.float64)
    m = theta_to_matrix("similarity", theta)
    d = I.describe_matrix(m, (H, H))  # square, so normalised and pixel angles agree
    assert abs(float(d["angle_deg"][0]) - math.degrees(angle_rad)) < 1e-6
    assert abs(float(d["scale_1"][0]) - 1.25) < 1e-6 and abs(float(d["scale_2"][0]) - 1.25) < 1e-6
    assert abs(float(d["shift_x_px"][0]) - tx * H / 2) < 1e-6
    assert abs(float(d["shift_y_px"][0]) - ty * H / 2) < 1e-6
    # source: scikit-image SimilarityTransform reads rotation and scale off the same matrix
    ref = SimilarityTransform(matrix=m[0].numpy())
    assert abs(float(d["angle_deg"][0]) - math.degrees(ref.rotation)) < 1e-9
    assert abs(float(d["scale_1"][0]) - ref.scale) < 1e-9
    # the viewer sees where the input centre lands: f(view_shift) must be the centre
    q = np.array([d["view_shift_x_px"][0] / (H / 2), d["view_shift_y_px"][0] / (H / 2), 1.0])
    np.testing.assert_allclose((m[0].numpy() @ q)[:2], 0.0, atol=1e-12)
    # same through the Warp module, as inspect() calls it
    warp = Warp(WarpConfig(family="similarity"), (1, H, H))
    d2 = I.describe_theta(warp, theta)
    assert abs(float(d2["angle_deg"][0]) - math.degrees(angle_rad)) < 1e-6
    assert "persp_x" not in d2


def test_attention_and_translation_known_values():
    theta = torch.tensor([[0.4, 0.3, -0.2]], dtype=torch.float64)  # r, tx, ty
    d = I.describe_matrix(theta_to_matrix("attention", theta), (H, W))
    assert abs(float(d["scale_1"][0]) - math.exp(-0.4)) < 1e-6
    assert abs(float(d["view_zoom_1"][0]) - math.exp(0.4)) < 1e-6
    assert abs(float(d["angle_deg"][0])) < 1e-6
    assert abs(float(d["shift_x_px"][0]) - 0.3 * W / 2) < 1e-6
    assert abs(float(d["shift_y_px"][0]) + 0.2 * H / 2) < 1e-6
    # attention: the input centre appears at -t / s
    assert abs(float(d["view_shift_x_px"][0]) + 0.3 * W / 2 / math.exp(-0.4)) < 1e-6
    theta = torch.tensor([[-0.5, 0.25]], dtype=torch.float64)
    d = I.describe_matrix(theta_to_matrix("translation", theta), (H, W))
    assert abs(float(d["shift_x_frac"][0]) + 0.25) < 1e-6 and abs(float(d["shift_y_frac"][0]) - 0.125) < 1e-6
    assert abs(float(d["view_shift_x_px"][0]) - 0.5 * W / 2) < 1e-6
    assert float(d["scale_1"][0]) == 1.0 and float(d["anisotropy"][0]) == 1.0


def test_projective_perspective_terms_and_jacobian():
    import cv2

    g, h_ = 0.15, -0.05
    theta = torch.tensor([[1.0, 0.0, 0.1, 0.0, 1.0, 0.0, g, h_]], dtype=torch.float64)
    m = theta_to_matrix("projective", theta)
    d = I.describe_matrix(m, (H, H))
    assert abs(float(d["persp_x"][0]) - g) < 1e-12 and abs(float(d["persp_y"][0]) - h_) < 1e-12
    # the linear part is the Jacobian at the centre, A - t g^T; check it by finite differences
    # of OpenCV's perspectiveTransform (source: cv2.perspectiveTransform)
    eps = 1e-6
    pts = np.array([[[0.0, 0.0], [eps, 0.0], [0.0, eps]]])
    out = cv2.perspectiveTransform(pts, m[0].numpy())[0]
    jac = np.stack([(out[1] - out[0]) / eps, (out[2] - out[0]) / eps], axis=1)
    sv = np.linalg.svd(jac, compute_uv=False)
    assert abs(float(d["scale_1"][0]) - sv[0]) < 1e-5 and abs(float(d["scale_2"][0]) - sv[1]) < 1e-5
    assert abs(float(d["shift_x_px"][0]) - 0.1 * H / 2) < 1e-12


def test_tps_affine_offsets_give_the_affine_part_and_displacements():
    k = 4
    ctrl = grids.tps_control_points(k).numpy()
    a_px = _rot(25.0) @ np.diag([1.1, 0.9])
    t_px = np.array([2.0, -3.0])
    dmat = np.diag([W / 2, H / 2])
    a = np.linalg.inv(dmat) @ a_px @ dmat
    t = t_px / np.array([W / 2, H / 2])
    # control point c moves to A c + t: offsets (A - I) c + t, an affine field that a
    # thin-plate spline reproduces exactly (from memory: TPS has an exact affine part)
    offsets = ctrl @ (a - np.eye(2)).T + t
    theta = torch.from_numpy(offsets.reshape(1, -1))
    d = I.describe_tps(theta, (H, W), k)
    assert abs(float(d["angle_deg"][0]) - 25.0) < 1e-6
    assert abs(float(d["scale_1"][0]) - 1.1) < 1e-6 and abs(float(d["scale_2"][0]) - 0.9) < 1e-6
    assert abs(float(d["shift_x_px"][0]) - 2.0) < 1e-6 and abs(float(d["shift_y_px"][0]) + 3.0) < 1e-6
    lengths = np.linalg.norm(offsets * np.array([W / 2, H / 2]), axis=1)
    assert abs(float(d["tps_mean_px"][0]) - lengths.mean()) < 1e-9
    assert abs(float(d["tps_max_px"][0]) - lengths.max()) < 1e-9
    with pytest.raises(SpliceError, match=r"4x4 control grid takes theta of shape \(N, 32\), got \(1, 6\)"):
        I.describe_tps(torch.zeros(1, 6), (H, W), 4)


@pytest.mark.parametrize("family", ["translation", "attention", "similarity", "affine", "projective", "tps"])
def test_identity_theta_decomposes_to_the_identity(family):
    warp = Warp(WarpConfig(family=family), (3, H, W))
    d = I.describe_theta(warp, identity_theta(family).unsqueeze(0).repeat(3, 1))
    for key, value in (("angle_deg", 0.0), ("scale_1", 1.0), ("scale_2", 1.0), ("shift_x_px", 0.0),
                       ("shift_y_px", 0.0), ("view_rotation_deg", 0.0), ("view_zoom_1", 1.0),
                       ("reflection", 0.0), ("anisotropy", 1.0)):
        np.testing.assert_allclose(d[key].numpy(), value, atol=1e-12, err_msg=key)
    assert set(d) == set(I.quantities_for(family))


def test_describe_matrix_rejects_bad_input():
    with pytest.raises(SpliceError, match=r"needs \(N, 3, 3\) sampling matrices, got shape \(2, 3\)"):
        I.describe_matrix(torch.zeros(2, 3), (H, W))
    with pytest.raises(SpliceError, match=r"size must be \(H, W\).*got \(32,\)"):
        I.describe_matrix(torch.eye(3).unsqueeze(0), (32,))


# ----------------------------------------------------------------------------- capture, report, pictures

N_IMAGES = 5
SHEET = 4


def _spliced_folder(path, warp, perturb: bool):
    import warnings

    from harness import perturb_warps_

    from splice.errors import RandomWeightsWarning
    from splice.store import save
    from splice.surgery import insert

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RandomWeightsWarning)
        model = insert("splice.models:tray_net", at=["input", "pool1"], warp=warp)
    if perturb:
        perturb_warps_(model, scale=0.05, seed=1)
    save(model, path)
    return path


@pytest.fixture(scope="module")
def identity_report(tmp_path_factory):
    root = tmp_path_factory.mktemp("identity")
    folder = _spliced_folder(root / "spliced", "affine", perturb=False)
    return I.inspect(folder, data="digits-moved", n=N_IMAGES, out=root / "report", pictures=False), root / "report"


@pytest.fixture(scope="module")
def picture_report(tmp_path_factory):
    root = tmp_path_factory.mktemp("pictures")
    folder = _spliced_folder(root / "spliced", {"input": "affine", "pool1": "tps"}, perturb=True)
    result = I.inspect(folder, data="digits-moved", n=N_IMAGES, out=root / "report", sheet_images=SHEET)
    return result, root / "report", folder


def _read_csv(path):
    import csv

    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_identity_splice_decomposes_to_the_identity_for_every_image(identity_report):
    result, out = identity_report
    rows = _read_csv(out / "warps.csv")
    assert len(rows) == N_IMAGES * 2 and {r["point"] for r in rows} == {"input", "pool1"}
    for row in rows:
        assert abs(float(row["angle_deg"])) < 1e-9
        assert abs(float(row["scale_1"]) - 1.0) < 1e-9 and abs(float(row["scale_2"]) - 1.0) < 1e-9
        assert abs(float(row["shift_x_px"])) < 1e-9 and abs(float(row["shift_y_px"])) < 1e-9
        assert row["reflection"] == "0" and row["tps_mean_px"] == ""
    q = result["warps"]["input"]["quantities"]
    assert q["angle_deg"]["mean"] == pytest.approx(0.0, abs=1e-9)
    assert q["view_zoom_1"]["p95"] == pytest.approx(1.0, abs=1e-9)
    assert result["warps"]["pool1"]["level"] == "feature" and result["warps"]["pool1"]["stride"] == [2.0, 2.0]
    assert json.loads((out / "summary.json").read_text())["n_images"] == N_IMAGES
    assert result["files"]["pictures"] == []


def test_summary_json_writes_non_finite_numbers_as_strings(identity_report, tmp_path, monkeypatch):
    """The one JSON policy of splice.fileio.json_safe: 'inf'/'-inf'/'nan' strings, never null."""

    real = run.summarise

    def with_non_finite(values, **options):
        stats = real(values, **options)
        return dict(stats, max=math.inf, min=-math.inf, std=math.nan)

    monkeypatch.setattr(run, "summarise", with_non_finite)
    folder = identity_report[1].parent / "spliced"
    result = I.inspect(folder, data="digits-moved", n=2, out=tmp_path / "r", pictures=False)
    on_disk = json.loads((tmp_path / "r" / "summary.json").read_text(encoding="utf-8"))
    stats = on_disk["warps"]["input"]["quantities"]["angle_deg"]
    assert (stats["max"], stats["min"], stats["std"]) == ("inf", "-inf", "nan")
    assert result["warps"]["input"]["quantities"]["angle_deg"]["max"] == "inf"


def test_csv_rows_are_the_decomposition_of_the_captured_thetas(picture_report):
    from splice.data import open_data
    from splice.store import load
    from splice.surgery import warps_of

    result, out, folder = picture_report
    rows = _read_csv(out / "warps.csv")
    assert "angle_deg" in rows[0] and len(rows) == 2 * N_IMAGES
    model = load(folder)
    ds = open_data("digits-moved", "test")
    picked = run.sample_indices(ds.labels, N_IMAGES)
    images = ds.images[picked]
    cap = I.capture(model, images)  # the batch inspect used, so the float32 model rounds the same way
    for point, warp in warps_of(model).items():
        desc = I.describe_theta(warp, cap.thetas[point])
        mine = [r for r in rows if r["point"] == point]
        assert [int(r["image"]) for r in mine] == picked.tolist()
        for q in I.quantities_for(warp.family):
            np.testing.assert_allclose([float(r[q]) for r in mine], desc[q].numpy(), rtol=1e-8, atol=1e-12)
        stats = result["warps"][point]["quantities"]["angle_deg"]
        # source: numpy.percentile / numpy.std on the same values
        assert stats["p95"] == pytest.approx(float(np.percentile(desc["angle_deg"].numpy(), 95)), abs=1e-12)
        assert stats["std"] == pytest.approx(float(np.std(desc["angle_deg"].numpy())), abs=1e-12)
    assert "tps_max_px" in result["warps"]["pool1"]["quantities"]
    assert "tps_max_px" not in result["warps"]["input"]["quantities"]


def test_every_picture_decodes_with_the_expected_size(picture_report):
    from PIL import Image

    _, out, _ = picture_report
    # layout (see splice.inspection): width = 2*12 + cols*(panels*160 + (panels-1)*6) + (cols-1)*24,
    # height = 78 + rows*(36 + 160) + 12; histograms are 420 px per cell, 78 + 340 high
    expected = {
        "sheet_input.png": (24 + 3 * (3 * 160 + 2 * 6) + 2 * 24, 78 + 2 * 196 + 12),  # 4 images, 3 per row
        "outline_pool1.png": (24 + 4 * 160 + 3 * 24, 78 + 196 + 12),  # 4 images in one row
        "hist_input.png": (3 * 420, 78 + 340),  # angle, scales, shifts
        "hist_pool1.png": (4 * 420, 78 + 340),  # ... and the tps displacements
    }
    assert sorted(p.name for p in out.glob("*.png")) == sorted(expected)
    for name, size in expected.items():
        with Image.open(out / name) as im:
            im.load()  # decodes the whole image
            assert im.format == "PNG" and im.size == size, name
            assert len(im.getcolors(1 << 16) or range(1 << 16)) > 50  # not blank


def test_render_inspect_prints_the_summary_table(picture_report):
    from rich.console import Console

    result, _, _ = picture_report
    console = Console(record=True, width=200)
    I.render_inspect(result, console)
    text = console.export_text()
    for word in ("warp at 'input': affine", "warp at 'pool1': tps", "angle_deg", "view_rotation_deg", "p95",
                 "tps_max_px", "hist_pool1.png"):
        assert word in text


def test_capture_restores_the_model_and_rejects_plain_models():
    from splice.surgery import warps_of

    warp_model = _tiny_spliced()
    warp_model.train()
    frozen = next(m for m in warp_model.modules() if isinstance(m, torch.nn.BatchNorm2d))
    frozen.eval()  # a norm kept frozen while the rest trains: it stays so (the root's mode is not spread)
    modes = {n: m.training for n, m in warp_model.named_modules()}
    cap = I.capture(warp_model, torch.rand(3, 1, 48, 48), batch_size=2)
    assert cap.thetas["input"].shape == (3, 6) and cap.logits.shape == (3, 10)
    assert {n: m.training for n, m in warp_model.named_modules()} == modes and not frozen.training
    assert all(not w.record and w.last_theta is None for w in warps_of(warp_model).values())
    with pytest.raises(SpliceError, match=r"capture needs a spliced model with at least one warp"):
        I.capture(torch.nn.Conv2d(1, 1, 1), torch.rand(1, 1, 4, 4))


def _tiny_spliced():
    import warnings

    from splice.errors import RandomWeightsWarning
    from splice.surgery import insert

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RandomWeightsWarning)
        return insert("splice.models:tray_net", at=["input"], warp="affine")


def test_inspect_errors(tmp_path):
    from splice.errors import DataError

    with pytest.raises(DataError, match=r"n must be a positive integer; got 0"):
        I.inspect(tmp_path, data="digits", n=0, out=tmp_path / "r")
    with pytest.raises(SpliceError, match=r"not a splice folder"):
        I.inspect(tmp_path, data="digits", out=tmp_path / "r")


def test_map_points_matches_opencv_and_the_warp_grid():
    import cv2

    warp = Warp(WarpConfig(family="projective"), (1, H, W))
    theta = torch.tensor([[1.1, 0.2, 0.05, -0.1, 0.9, 0.1, 0.2, -0.1]], dtype=torch.float64)
    pts = torch.tensor([[-1.0, -1.0], [1.0, -1.0], [0.3, 0.7], [1.0, 1.0]], dtype=torch.float64)
    # source: cv2.perspectiveTransform with the same 3x3 matrix
    ref = cv2.perspectiveTransform(pts.numpy()[None], warp.matrix(theta)[0].numpy())[0]
    np.testing.assert_allclose(I.map_points(warp, theta, pts)[0].numpy(), ref, atol=1e-12)
    # tps: at the pixel centres the mapped points are the warp's own sampling grid
    tps = Warp(WarpConfig(family="tps", tps_k=3), (1, 6, 8)).double()
    theta = 0.1 * torch.randn(2, 18, dtype=torch.float64)
    centres = grids.base_grid(6, 8)[:, :2]
    np.testing.assert_allclose(I.map_points(tps, theta, centres).numpy(),
                               tps.grid(theta, 6, 8).reshape(2, -1, 2).numpy(), atol=1e-12)


def test_a_warp_that_undoes_a_distortion_reports_that_distortion():
    """The documented convention: undoing distort.apply_affine(angle a, scale s, shift t) reads as a, s, t."""
    from torch.nn import functional as F

    from splice import distort

    side = 48
    yy, xx = torch.meshgrid(torch.linspace(-1, 1, side, dtype=torch.float64),
                            torch.linspace(-1, 1, side, dtype=torch.float64), indexing="ij")
    # a smooth, asymmetric test card that vanishes towards the border (bilinear resampling is then
    # nearly exact, and nothing important leaves the frame)
    card = (torch.exp(-((xx - 0.2) ** 2 / 0.1 + (yy + 0.1) ** 2 / 0.05))
            + 0.6 * torch.exp(-((xx + 0.25) ** 2 + (yy - 0.3) ** 2) / 0.05))
    card = card.view(1, 1, side, side)
    a, s, t = 35.0, 1.15, (0.06, -0.04)
    # source: splice.distort.apply_affine, itself checked against torchvision.transforms.v2.functional.affine
    moved = distort.apply_affine(card, a, s, t)
    forward = distort.affine_matrix(a, s, t, size=(side, side))  # where content moves, normalised
    warp = Warp(WarpConfig(family="affine"), (1, side, side)).double()
    theta = forward.reshape(1, 6)  # sampling with the forward map puts every point back
    undone = F.grid_sample(moved, warp.grid(theta, side, side), mode="bilinear", align_corners=False)
    # two bilinear resamplings leave ~0.02; sampling with the inverse map instead would leave ~0.9
    assert (undone - card).abs().max() < 0.05 and (moved - card).abs().max() > 0.3
    d = I.describe_theta(warp, theta)
    assert abs(float(d["angle_deg"][0]) - a) < 1e-6 and abs(float(d["view_rotation_deg"][0]) + a) < 1e-6
    assert abs(float(d["scale_1"][0]) - s) < 1e-6 and abs(float(d["scale_2"][0]) - s) < 1e-6
    assert abs(float(d["shift_x_frac"][0]) - t[0]) < 1e-6 and abs(float(d["shift_y_frac"][0]) - t[1]) < 1e-6


def test_sample_spans_classes_and_is_seeded():
    # a class-sorted split (the ImageFolder order): the sample must not be the first images
    labels = torch.arange(5).repeat_interleave(20)
    picked = run.sample_indices(labels, 12)
    assert torch.equal(picked, run.sample_indices(labels, 12))  # same seed, same sample
    assert not torch.equal(picked, run.sample_indices(labels, 12, seed=1))
    assert len(set(picked.tolist())) == 12
    assert set(labels[picked[:5]].tolist()) == set(range(5))  # any first k cover min(k, classes) classes
    assert sorted(run.sample_indices(labels, 500).tolist()) == list(range(100))  # n above the size: all of them
