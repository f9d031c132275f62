"""Warps against outside implementations: scipy, OpenCV and scikit-image.

Coordinate conversion used throughout (``align_corners=False``): the image
spans [-1, 1] from the outer edge of pixel 0 to the outer edge of pixel W-1,
so each pixel is 2/W wide and pixel index ``u`` has its centre at

    x = -1 + (2/W) * (u + 1/2) = (2u + 1)/W - 1,    and back    u = ((x + 1) W - 1) / 2.

As a homogeneous matrix, pixel -> normalised is

    N = [[2/W, 0,   1/W - 1],
         [0,   2/H, 1/H - 1],
         [0,   0,   1      ]]

so a normalised sampling matrix M (output -> input) becomes the pixel-space
map ``P = N^-1 M N`` (output pixel (u, v) -> input pixel (u', v')). OpenCV and
scikit-image use (x=column, y=row) like P; scipy.ndimage uses (row, column), so
its matrix is P with both axes swapped.

Only interior pixels are compared: output pixels whose source lies at least one
pixel inside the input and that are at least MARGIN pixels from the output
border, so that the libraries' differing edge rules never enter.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from splice.warps import Warp, WarpConfig
from splice.warps import grids

H, W = 37, 45
MARGIN = 2

# Non-identity parameters per family (raw theta, as the head would output).
THETAS = {
    "translation": [0.15, -0.1],
    "attention": [0.3, 0.1, -0.05],
    "similarity": [0.3, 0.1, 0.05, -0.08],
    "affine": [0.9, -0.2, 0.05, 0.15, 1.1, -0.1],
    "projective": [1.05, 0.1, 0.05, -0.08, 0.95, 0.02, 0.15, -0.1],
}


def _expected_matrix(family: str, t: list[float]) -> np.ndarray:
    """The family's normalised 3x3 sampling matrix, written out independently of splice."""
    if family == "translation":
        return np.array([[1, 0, t[0]], [0, 1, t[1]], [0, 0, 1]], dtype=float)
    if family == "attention":
        s = math.exp(-abs(t[0]))
        return np.array([[s, 0, t[1]], [0, s, t[2]], [0, 0, 1]], dtype=float)
    if family == "similarity":  # rigid in pixels: the rotation is conjugated by D = diag(W/2, H/2)
        a, k = t[0], math.exp(t[1])
        c, s = k * math.cos(a), k * math.sin(a)
        return np.array([[c, -s * H / W, t[2]], [s * W / H, c, t[3]], [0, 0, 1]], dtype=float)
    if family == "affine":
        return np.array([t[0:3], t[3:6], [0, 0, 1]], dtype=float)
    return np.array([t[0:3], t[3:6], [t[6], t[7], 1.0]], dtype=float)


def _pixel_matrix(m: np.ndarray, h: int, w: int) -> np.ndarray:
    n = np.array([[2 / w, 0, 1 / w - 1], [0, 2 / h, 1 / h - 1], [0, 0, 1]])
    return np.linalg.inv(n) @ m @ n


def _image(h: int = H, w: int = W) -> np.ndarray:
    """Smooth float64 test image (neighbour differences ~0.1), so OpenCV's quantised weights stay small."""
    v, u = np.mgrid[0:h, 0:w].astype(float)
    return (
        np.sin(u / 5.0) * np.cos(v / 7.0)
        + 0.5 * np.cos((u + 2 * v) / 9.0)
        + 0.02 * u
        + 0.3
    )


def _run_warp(family: str, theta, image: np.ndarray, **cfg) -> np.ndarray:
    """Run a float64 Warp whose head outputs ``theta`` for every input."""
    h, w = image.shape
    warp = Warp(WarpConfig(family=family, **cfg), (1, h, w), dtype=torch.float64)
    with torch.no_grad():
        warp.head.fc2.weight.zero_()
        warp.head.fc2.bias.copy_(torch.as_tensor(theta, dtype=torch.float64))
    x = torch.from_numpy(image).view(1, 1, h, w)
    return warp(x)[0, 0].detach().numpy()


def _interior(p: np.ndarray, h: int, w: int) -> np.ndarray:
    """Mask of output pixels whose source (under pixel map p) is >= 1 px inside the input."""
    v, u = np.mgrid[0:h, 0:w].astype(float)
    q = p @ np.stack([u.ravel(), v.ravel(), np.ones(u.size)])
    su, sv = (q[0] / q[2]).reshape(h, w), (q[1] / q[2]).reshape(h, w)
    mask = (su >= 1) & (su <= w - 2) & (sv >= 1) & (sv <= h - 2)
    mask[:MARGIN] = mask[-MARGIN:] = False
    mask[:, :MARGIN] = mask[:, -MARGIN:] = False
    return mask


def _opencv_tolerance(image: np.ndarray) -> float:
    # OpenCV's bilinear warps quantise the sub-pixel position to 1/32 pixel
    # (INTER_BITS = 5, from memory), so each axis may be off by 1/64 pixel:
    # bound the error by the largest neighbour difference times 2/64.
    step = max(np.abs(np.diff(image, axis=0)).max(), np.abs(np.diff(image, axis=1)).max())
    return 2.0 * step / 64.0 + 1e-9


def test_a_similarity_warp_is_rigid_in_pixels_on_a_tensor_that_is_not_square():
    # the pixel map of the warp (output pixel -> input pixel) has a scaled rotation as its linear part: the same
    # angle and scale along both axes, whatever the aspect ratio (37x45 here)
    theta = THETAS["similarity"]
    warp = Warp(WarpConfig(family="similarity"), (1, H, W), dtype=torch.float64)
    m = warp.matrix(torch.tensor([theta], dtype=torch.float64))[0].numpy()
    linear = _pixel_matrix(m, H, W)[:2, :2]
    k, a = math.exp(theta[1]), theta[0]
    np.testing.assert_allclose(linear, k * np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]]),
                               atol=1e-12)
    # a folder written before frames were recorded keeps the normalised-coordinate angle it was trained with
    old = Warp(WarpConfig(family="similarity", frame="normalised"), (1, H, W), dtype=torch.float64)
    c, s = k * math.cos(a), k * math.sin(a)
    np.testing.assert_allclose(old.matrix(torch.tensor([theta], dtype=torch.float64))[0].numpy(),
                               [[c, -s, theta[2]], [s, c, theta[3]], [0, 0, 1]], atol=1e-12)


@pytest.mark.parametrize("family", ["translation", "attention", "similarity", "affine"])
def test_matrix_families_match_scipy_and_opencv(family):
    import cv2
    from scipy import ndimage

    image = _image()
    ours = _run_warp(family, THETAS[family], image)
    p = _pixel_matrix(_expected_matrix(family, THETAS[family]), H, W)
    mask = _interior(p, H, W)
    assert mask.sum() > 0.3 * mask.size  # the comparison covers a real part of the image

    # Reference: scipy.ndimage.affine_transform(order=1) maps output (row, col)
    # to input matrix @ (row, col) + offset -- P with the axes swapped.
    rc = np.array([[p[1, 1], p[1, 0]], [p[0, 1], p[0, 0]]])
    offset = np.array([p[1, 2], p[0, 2]])
    ref = ndimage.affine_transform(image, rc, offset=offset, order=1, mode="constant", cval=0.0)
    np.testing.assert_allclose(ours[mask], ref[mask], rtol=0, atol=1e-10)

    # Reference: OpenCV cv2.warpAffine with INTER_LINEAR | WARP_INVERSE_MAP
    # (dst(x, y) = src(P (x, y, 1))), in (x=col, y=row) order.
    ref_cv = cv2.warpAffine(image, p[:2], (W, H), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP)
    np.testing.assert_allclose(ours[mask], ref_cv[mask], rtol=0, atol=_opencv_tolerance(image))


def test_affine_bicubic_matches_opencv_cubic():
    import cv2

    # Reference: OpenCV INTER_CUBIC uses the same cubic convolution kernel
    # (a = -0.75) as torch's bicubic grid_sample (from memory); tolerance as for
    # the bilinear case (OpenCV's 1/32-pixel quantisation).
    image = _image()
    theta = THETAS["affine"]
    ours = _run_warp("affine", theta, image, sampler="bicubic")
    p = _pixel_matrix(_expected_matrix("affine", theta), H, W)
    mask = _interior(p, H, W)
    # bicubic reads 2 pixels on each side: shrink the mask by one more pixel
    mask &= np.roll(mask, 1, 0) & np.roll(mask, -1, 0) & np.roll(mask, 1, 1) & np.roll(mask, -1, 1)
    ref_cv = cv2.warpAffine(image, p[:2], (W, H), flags=cv2.INTER_CUBIC | cv2.WARP_INVERSE_MAP)
    np.testing.assert_allclose(ours[mask], ref_cv[mask], rtol=0, atol=2 * _opencv_tolerance(image))


def test_projective_matches_opencv_and_scikit_image():
    import cv2
    from skimage.transform import ProjectiveTransform, warp

    image = _image()
    theta = THETAS["projective"]
    ours = _run_warp("projective", theta, image)
    p = _pixel_matrix(_expected_matrix("projective", theta), H, W)
    mask = _interior(p, H, W)
    assert mask.sum() > 0.3 * mask.size

    # Reference: scikit-image skimage.transform.warp with a ProjectiveTransform
    # as the inverse map (output (col, row) -> input (col, row)), order=1.
    ref_sk = warp(image, ProjectiveTransform(matrix=p), order=1, mode="constant", cval=0.0, preserve_range=True)
    np.testing.assert_allclose(ours[mask], ref_sk[mask], rtol=0, atol=1e-10)

    # Reference: OpenCV cv2.warpPerspective with INTER_LINEAR | WARP_INVERSE_MAP.
    ref_cv = cv2.warpPerspective(image, p, (W, H), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP)
    np.testing.assert_allclose(ours[mask], ref_cv[mask], rtol=0, atol=_opencv_tolerance(image))


@pytest.mark.parametrize("k", [3, 4])
def test_tps_mapping_matches_scipy_rbf_interpolator(k):
    from scipy import ndimage
    from scipy.interpolate import RBFInterpolator

    rng = np.random.default_rng(7)
    offsets = 0.08 * rng.standard_normal((k * k, 2))
    warp = Warp(WarpConfig(family="tps", tps_k=k), (1, H, W), dtype=torch.float64)
    theta = torch.from_numpy(offsets.reshape(1, -1))
    grid = warp.grid(theta, H, W)[0].numpy().reshape(-1, 2)

    # Control points: a k x k grid over [-1, 1]^2, row-major with y outer.
    t = np.linspace(-1.0, 1.0, k)
    cy, cx = np.meshgrid(t, t, indexing="ij")
    control = np.stack([cx.ravel(), cy.ravel()], axis=1)
    # Pixel centres in normalised coordinates, x = (2u + 1)/W - 1 (row-major).
    v, u = np.mgrid[0:H, 0:W].astype(float)
    points = np.stack([((2 * u + 1) / W - 1).ravel(), ((2 * v + 1) / H - 1).ravel()], axis=1)

    # Reference: scipy.interpolate.RBFInterpolator(kernel="thin_plate_spline",
    # degree=1) interpolating control -> control + offsets. Its kernel r^2 log r
    # is half of U(r) = r^2 log r^2; the interpolant is the same.
    rbf = RBFInterpolator(control, control + offsets, kernel="thin_plate_spline", degree=1)
    expected = rbf(points)
    np.testing.assert_allclose(grid, expected, rtol=0, atol=1e-10)
    # Interpolation property of the TPS system (its definition): evaluated at
    # the control points themselves, the map lands on the targets.
    c = torch.from_numpy(control)
    c_h = torch.cat([c, torch.ones(k * k, 1, dtype=torch.float64)], dim=1)
    at_control = grids.tps_grid(c_h, grids.tps_weights(c_h, c), theta.view(1, -1, 2), k, k)
    np.testing.assert_allclose(at_control.reshape(-1, 2).numpy(), control + offsets, rtol=0, atol=1e-12)

    # Reference: scipy.ndimage.map_coordinates(order=1) at the same points,
    # converted to (row, col) pixels with u = ((x + 1) W - 1) / 2.
    image = _image()
    ours = _run_warp("tps", offsets.ravel(), image, tps_k=k)
    su = ((expected[:, 0] + 1) * W - 1) / 2
    sv = ((expected[:, 1] + 1) * H - 1) / 2
    ref = ndimage.map_coordinates(image, [sv, su], order=1, mode="constant", cval=0.0).reshape(H, W)
    mask = ((su >= 1) & (su <= W - 2) & (sv >= 1) & (sv <= H - 2)).reshape(H, W)
    np.testing.assert_allclose(ours[mask], ref[mask], rtol=0, atol=1e-10)


def test_base_grid_matches_the_pixel_centre_formula():
    # Reference: torch.nn.functional.grid_sample docs (align_corners=False:
    # -1 and 1 are the outer edges of the corner pixels) -> centres (2u + 1)/W - 1.
    b = grids.base_grid(3, 4).numpy()
    np.testing.assert_array_equal(b[:4, 0], [-0.75, -0.25, 0.25, 0.75])
    np.testing.assert_array_equal(b[::4, 1], [-2 / 3, 0.0, 2 / 3])
    np.testing.assert_array_equal(b[:, 2], np.ones(12))
