"""splice.distort against outside references (torchvision, OpenCV, scikit-image)."""

from __future__ import annotations

import math

import pytest
import torch
import torchvision.transforms.v2.functional as TF
from torchvision.transforms import InterpolationMode

from splice import distort as D
from splice.errors import DataError

H, W = 32, 40  # deliberately non-square: rotation must be rigid in pixels


def _images(n=2, c=3, seed=0, dtype=torch.float64):
    g = torch.Generator().manual_seed(seed)
    return torch.rand(n, c, H, W, generator=g, dtype=dtype)


def _index_matrix(h, w):
    """Normalised (align_corners=False) -> pixel-index coordinates (centre of pixel j at x = j)."""
    return torch.tensor([[w / 2, 0.0, w / 2 - 0.5], [0.0, h / 2, h / 2 - 0.5], [0.0, 0.0, 1.0]],
                        dtype=torch.float64)


AFFINE_CASES = [
    # angle_deg, scale, (shift_x px, shift_y px), shear_deg
    (30.0, 1.0, (0, 0), 0.0),
    (-47.0, 0.8, (3, -2), 0.0),
    (90.0, 1.3, (0, 0), 0.0),
    (12.0, 1.1, (5, 4), 15.0),
    (-170.0, 0.6, (-7, 6), -20.0),
]


@pytest.mark.parametrize("angle,scale,shift_px,shear", AFFINE_CASES)
@pytest.mark.parametrize("fill", [None, 0.0, 0.25])
def test_apply_affine_matches_torchvision(angle, scale, shift_px, shear, fill):
    img = _images()
    shift = (shift_px[0] / W, shift_px[1] / H)
    out = D.apply_affine(img, angle, scale, shift, shear_deg=shear, fill=fill)
    # source: torchvision.transforms.v2.functional.affine (bilinear), same parameters
    ref = TF.affine(img, angle=angle, translate=[float(shift_px[0]), float(shift_px[1])], scale=scale,
                    shear=[shear, 0.0], interpolation=InterpolationMode.BILINEAR, fill=fill)
    # interior pixels, as the contract asks ...
    torch.testing.assert_close(out[..., 3:-3, 3:-3], ref[..., 3:-3, 3:-3], rtol=0, atol=1e-4)
    # ... and in fact the whole image, borders included, agrees to float64 rounding
    torch.testing.assert_close(out, ref, rtol=0, atol=1e-10)


def test_apply_affine_per_image_parameters_match_torchvision():
    img = _images(n=3)
    angles = torch.tensor([-25.0, 0.0, 61.0], dtype=torch.float64)
    scales = torch.tensor([0.9, 1.0, 1.2], dtype=torch.float64)
    shifts = torch.tensor([[2 / W, -1 / H], [0.0, 0.0], [-4 / W, 3 / H]], dtype=torch.float64)
    out = D.apply_affine(img, angles, scales, shifts)
    for i in range(3):
        # source: torchvision.transforms.v2.functional.affine, one image at a time
        ref = TF.affine(img[i], angle=float(angles[i]), translate=[float(shifts[i, 0] * W), float(shifts[i, 1] * H)],
                        scale=float(scales[i]), shear=[0.0, 0.0], interpolation=InterpolationMode.BILINEAR, fill=0.0)
        torch.testing.assert_close(out[i], ref, rtol=0, atol=1e-10)


def test_apply_affine_nearest_matches_torchvision():
    img = _images()
    out = D.apply_affine(img, 33.0, 1.1, (2 / W, 1 / H), fill=0.5, mode="nearest")
    # source: torchvision.transforms.v2.functional.affine with InterpolationMode.NEAREST
    ref = TF.affine(img, angle=33.0, translate=[2.0, 1.0], scale=1.1, shear=[0.0, 0.0],
                    interpolation=InterpolationMode.NEAREST, fill=0.5)
    torch.testing.assert_close(out, ref, rtol=0, atol=1e-12)


def test_affine_matrix_convention_matches_opencv():
    cv2 = pytest.importorskip("cv2")
    angle, scale, tx, ty = 37.0, 0.85, 3.0, -2.0
    m = torch.cat([D.affine_matrix(angle, scale, (tx / W, ty / H), size=(H, W)),
                   torch.tensor([[0.0, 0.0, 1.0]], dtype=torch.float64)])
    k = _index_matrix(H, W)
    in_pixels = (k @ m @ torch.linalg.inv(k))[:2]
    # source: OpenCV cv2.getRotationMatrix2D, whose positive angle turns content counter-clockwise
    # on screen about a centre given in pixel-index coordinates; splice follows torchvision's
    # affine (clockwise on screen), hence -angle; the centre is ((W-1)/2, (H-1)/2) in indices.
    ref = torch.from_numpy(cv2.getRotationMatrix2D(((W - 1) / 2, (H - 1) / 2), -angle, scale))
    ref[:, 2] += torch.tensor([tx, ty], dtype=torch.float64)
    torch.testing.assert_close(in_pixels, ref, rtol=0, atol=1e-12)


def test_positive_angle_turns_content_clockwise_on_screen():
    img = torch.zeros(1, 1, 41, 41, dtype=torch.float64)
    img[0, 0, 20, 32] = 1.0  # a dot right of the centre
    out = D.apply_affine(img, 90.0, 1.0)
    row, col = divmod(int(out.argmax()), 41)
    # source: torchvision.transforms.v2.functional.affine documents angle as "clockwise direction";
    # with y pointing down, +90 degrees moves a point right of the centre straight below it.
    assert (row, col) == (32, 20)


PERSPECTIVE_CASES = [
    ([[0, 0], [39, 0], [39, 31], [0, 31]], [[3, 2], [36, 1], [38, 29], [1, 30]]),
    ([[0, 0], [39, 0], [39, 31], [0, 31]], [[-4, 3], [41, -2], [35, 33], [6, 28]]),
    ([[5, 5], [30, 4], [33, 27], [4, 26]], [[0, 0], [39, 0], [39, 31], [0, 31]]),
]


@pytest.mark.parametrize("start,end", PERSPECTIVE_CASES)
@pytest.mark.parametrize("fill", [None, 0.0, 0.3])
def test_apply_perspective_matches_torchvision(start, end, fill):
    img = _images()
    out = D.apply_perspective(img, start, end, fill=fill)
    # source: torchvision.transforms.v2.functional.perspective (bilinear); torchvision rounds its
    # eight coefficients to float32, which bounds the agreement at ~1e-5.
    ref = TF.perspective(img, start, end, interpolation=InterpolationMode.BILINEAR, fill=fill)
    torch.testing.assert_close(out, ref, rtol=0, atol=1e-4)


def test_perspective_per_image_points():
    img = _images(n=2)
    start, end = D.random_perspective_points(H, W, 0.4, torch.Generator().manual_seed(3), n=2)
    out = D.apply_perspective(img, start, end)
    for i in range(2):
        # source: torchvision.transforms.v2.functional.perspective, one image at a time
        ref = TF.perspective(img[i], start[i].tolist(), end[i].tolist(),
                             interpolation=InterpolationMode.BILINEAR, fill=0.0)
        torch.testing.assert_close(out[i], ref, rtol=0, atol=1e-4)


def test_identity_parameters_are_identity():
    img = _images()
    assert torch.equal(D.apply_affine(img, 0.0, 1.0, (0.0, 0.0)), img)
    assert torch.equal(D.apply_affine(img.float(), 0.0, 1.0), img.float())
    corners = [[0, 0], [W, 0], [W, H], [0, H]]
    torch.testing.assert_close(D.apply_perspective(img, corners, corners), img, rtol=0, atol=1e-12)
    # a non-trivial batch in which one image has identity parameters: that image is untouched
    out = D.apply_affine(img, torch.tensor([0.0, 20.0]), torch.tensor([1.0, 1.0]))
    torch.testing.assert_close(out[0], img[0], rtol=0, atol=1e-12)
    out, params = D.random_distort(img, D.DistortionRange(), torch.Generator().manual_seed(0))
    assert torch.equal(out, img)
    torch.testing.assert_close(params["matrix"], torch.eye(3, dtype=torch.float64).expand(2, 3, 3))


FULL = D.DistortionRange(rotation_deg=50, scale=(0.8, 1.25), shift=0.1, perspective=0.3,
                         hflip=True, vflip=True, crop=0.3, shear_deg=10)


def test_random_distort_matches_skimage_warp():
    skt = pytest.importorskip("skimage.transform")
    img = _images(n=6, c=1, seed=1)
    out, params = D.random_distort(img, FULL, torch.Generator().manual_seed(7))
    assert params["hflip"].any() and params["vflip"].any() and (params["perspective"] != 0).any()
    k = _index_matrix(H, W)
    for i in range(6):
        inv_idx = k @ torch.linalg.inv(params["matrix"][i]) @ torch.linalg.inv(k)
        # source: scikit-image skimage.transform.warp with a ProjectiveTransform inverse map
        # (pixel centres at integer coordinates), order=1 = bilinear
        ref = skt.warp(img[i, 0].numpy(), skt.ProjectiveTransform(matrix=inv_idx.numpy()), order=1,
                       mode="constant", cval=0.0)
        # compare where all four bilinear neighbours lie inside the image
        ys, xs = torch.meshgrid(torch.arange(H, dtype=torch.float64), torch.arange(W, dtype=torch.float64),
                                indexing="ij")
        src = torch.stack([xs, ys, torch.ones_like(xs)], -1) @ inv_idx.T
        sx, sy = src[..., 0] / src[..., 2], src[..., 1] / src[..., 2]
        inside = (sx > 0.01) & (sx < W - 1.01) & (sy > 0.01) & (sy < H - 1.01)
        assert inside.sum() > 100
        diff = (out[i, 0] - torch.from_numpy(ref))[inside]
        assert diff.abs().max() < 1e-9


def test_random_distort_parameters_describe_the_warp():
    spec = D.DistortionRange(rotation_deg=60, scale=(0.8, 1.2), shift=0.15)
    img = _images(n=4)
    out, p = D.random_distort(img, spec, torch.Generator().manual_seed(11))
    for i in range(4):
        # source: torchvision.transforms.v2.functional.affine with the reported parameters
        ref = TF.affine(img[i], angle=float(p["angle_deg"][i]),
                        translate=[float(p["shift"][i, 0]) * W, float(p["shift"][i, 1]) * H],
                        scale=float(p["scale"][i]), shear=[0.0, 0.0],
                        interpolation=InterpolationMode.BILINEAR, fill=0.0)
        torch.testing.assert_close(out[i], ref, rtol=0, atol=1e-9)


def test_flip_matches_torchvision():
    img = _images(n=8)
    out, p = D.random_distort(img, D.DistortionRange(hflip=True, vflip=True), torch.Generator().manual_seed(2))
    for i in range(8):
        ref = img[i]
        # source: torchvision.transforms.v2.functional.horizontal_flip / vertical_flip
        if p["hflip"][i]:
            ref = TF.horizontal_flip(ref)
        if p["vflip"][i]:
            ref = TF.vertical_flip(ref)
        torch.testing.assert_close(out[i], ref, rtol=0, atol=1e-10)


def test_random_distort_is_reproducible_and_vectorised(monkeypatch):
    img = _images(n=16, c=1)
    calls = []
    import torch.nn.functional as F

    real = F.grid_sample
    monkeypatch.setattr(F, "grid_sample", lambda *a, **k: calls.append(1) or real(*a, **k))
    a, pa = D.random_distort(img, FULL, torch.Generator().manual_seed(5))
    assert len(calls) == 1  # one grid_sample for the whole batch, no loop per image
    b, pb = D.random_distort(img, FULL, torch.Generator().manual_seed(5))
    c, _ = D.random_distort(img, FULL, torch.Generator().manual_seed(6))
    assert torch.equal(a, b)
    assert all(torch.equal(pa[k], pb[k]) for k in pa)
    assert not torch.equal(a, c)


def test_sampled_parameters_respect_the_range():
    spec = D.DistortionRange(rotation_deg=30, scale=(0.9, 1.1), shift=0.2, crop=0.4)
    p = D.sample_distortion(torch.Generator().manual_seed(0), 4000, spec)
    assert p["angle_deg"].abs().max() <= 30 and p["angle_deg"].min() < -29 and p["angle_deg"].max() > 29
    assert p["scale"].min() >= 0.9 and p["scale"].max() <= 1.1
    assert p["shift"].abs().max() <= 0.2 and p["shift"].abs().max() > 0.19
    assert not p["hflip"].any() and not p["vflip"].any() and (p["perspective"] == 0).all()
    cx, cy, hw, hh = p["crop"].unbind(-1)
    area = hw * hh  # fraction of the image area that is kept
    assert area.min() >= 0.6 - 1e-12 and area.max() <= 1.0 + 1e-12
    assert ((cx - hw) >= -1 - 1e-12).all() and ((cx + hw) <= 1 + 1e-12).all()
    assert ((cy - hh) >= -1 - 1e-12).all() and ((cy + hh) <= 1 + 1e-12).all()
    # changing one range leaves the draws for the others unchanged
    q = D.sample_distortion(torch.Generator().manual_seed(0), 4000, D.DistortionRange(rotation_deg=30))
    assert torch.equal(p["angle_deg"], q["angle_deg"])


def test_crop_zooms_into_the_kept_box():
    # a crop keeping the box x in [-1, 0], y in [-1, 1] (left half) stretches it to the full width:
    # output column j samples input column j/2 - 0.25 (pixel-index coordinates)
    img = _images(n=1, c=1)
    p = D.sample_distortion(None, 1, D.DistortionRange())
    p["crop"] = torch.tensor([[-0.5, 0.0, 0.5, 1.0]], dtype=torch.float64)
    out = D.apply_homography(img, D.distortion_matrix(p, (H, W)), fill=None)
    j = torch.arange(2, W - 2)
    src = j / 2 - 0.25
    lo, frac = src.floor().long(), src - src.floor()
    expected = img[0, 0][:, lo] * (1 - frac) + img[0, 0][:, lo + 1] * frac  # bilinear by hand
    torch.testing.assert_close(out[0, 0][:, 2:-2], expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("kwargs,match", [
    (dict(rotation_deg=-1), r"rotation_deg must be in \[0, 180\]; got -1"),
    (dict(rotation_deg=200), r"rotation_deg must be in \[0, 180\]; got 200"),
    (dict(rotation_deg="30"), r"rotation_deg must be a number; got '30'"),
    (dict(rotation_deg=True), r"rotation_deg must be a number; got True"),
    (dict(scale=(1.2, 0.8)), r"scale must be a pair \(low, high\) with 0 < low <= high; got \(1.2, 0.8\)"),
    (dict(scale=(0.0, 1.0)), r"scale must be a pair .*got \(0.0, 1.0\)"),
    (dict(scale=1.1), r"scale must be a pair .*got 1.1"),
    (dict(shift=1.5), r"shift must be in \[0, 1\]; got 1.5"),
    (dict(perspective=-0.1), r"perspective must be in \[0, 1\]; got -0.1"),
    (dict(hflip="yes"), r"hflip must be true or false; got 'yes'"),
    (dict(vflip=1), r"vflip must be true or false; got 1"),
    (dict(crop=1.0), r"crop must be in \[0, 1\); got 1.0"),
    (dict(shear_deg=75), r"shear_deg must be in \[0, 60\]; got 75"),
])
def test_distortion_range_validation(kwargs, match):
    with pytest.raises(ValueError, match=match):
        D.DistortionRange(**kwargs)


def test_distortion_range_accepts_lists_from_recipes():
    assert D.DistortionRange(scale=[0.8, 1.2]).scale == (0.8, 1.2)
    assert D.DistortionRange().is_identity and not FULL.is_identity


def test_function_errors():
    img = _images()
    with pytest.raises(DataError, match=r"images must be a 4-D tensor \(N, C, H, W\); got \(3, 32, 40\)"):
        D.apply_affine(img[0], 10.0, 1.0)
    with pytest.raises(DataError, match=r"images must be floating point; got torch.uint8"):
        D.apply_affine((img * 255).to(torch.uint8), 10.0, 1.0)
    with pytest.raises(DataError, match=r"unknown interpolation mode 'bicubic'; use one of bilinear, nearest"):
        D.apply_affine(img, 10.0, 1.0, mode="bicubic")
    with pytest.raises(DataError, match=r"fill must be one number or one per channel \(3\); got 2 values"):
        D.apply_affine(img, 10.0, 1.0, fill=[0.0, 1.0])
    with pytest.raises(DataError, match=r"scale must be positive; got -1"):
        D.apply_affine(img, 10.0, -1.0)
    with pytest.raises(DataError, match=r"got 3 per-image transforms for 2 images"):
        D.apply_affine(img, torch.zeros(3), 1.0)
    with pytest.raises(DataError, match=r"disagree on the number of images: sizes \[2, 3\]"):
        D.affine_matrix(torch.zeros(2), torch.ones(3))
    with pytest.raises(DataError, match=r"shift must be \(tx, ty\) or an \(N, 2\) tensor.*got shape \(4, 3\)"):
        D.apply_affine(img, 0.0, 1.0, torch.zeros(4, 3))
    with pytest.raises(DataError, match=r"startpoints must be four \(x, y\) corners.*got shape \(3, 2\)"):
        D.apply_perspective(img, [[0, 0], [1, 0], [1, 1]], [[0, 0], [1, 0], [1, 1], [0, 1]])
    with pytest.raises(DataError, match=r"perspective points are degenerate"):
        D.apply_perspective(img, [[0, 0], [1, 0], [2, 0], [3, 0]], [[0, 0], [W, 0], [W, H], [0, H]])
    with pytest.raises(DataError, match=r"perspective strength must be in \[0, 1\]; got 2"):
        D.random_perspective_points(H, W, 2, None)
    with pytest.raises(DataError, match=r"expected a DistortionRange; got dict"):
        D.sample_distortion(None, 3, {"rotation_deg": 10})
    with pytest.raises(DataError, match=r"n must be a non-negative number of images; got -1"):
        D.sample_distortion(None, -1, D.DistortionRange())
    with pytest.raises(DataError, match=r"matrix must be \(3, 3\), \(N, 3, 3\), \(2, 3\) or \(N, 2, 3\); got \(4, 4\)"):
        D.apply_homography(img, torch.eye(4))
    with pytest.raises(DataError, match=r"singular"):
        D.apply_homography(img, torch.zeros(3, 3))


def test_affine_matrix_shapes_and_values():
    m = D.affine_matrix(90.0, 2.0, (0.25, -0.5))
    assert m.shape == (2, 3) and m.dtype == torch.float64
    # common practice, no source: rotation matrix [[c, -s], [s, c]] scaled, shift doubled to normalised units
    torch.testing.assert_close(m, torch.tensor([[0.0, -2.0, 0.5], [2.0, 0.0, -1.0]], dtype=torch.float64))
    assert D.affine_matrix(torch.zeros(5), 1.0).shape == (5, 2, 3)
    assert math.isclose(float(torch.linalg.det(D.affine_matrix(33.0, 1.5, shear_deg=20.0)[:, :2])), 2.25)
