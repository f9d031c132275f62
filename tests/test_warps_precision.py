"""Warps in narrow precision: float16 / bfloat16 models and autocast keep the exact identity and a grid that is
right to a small fraction of a pixel.

Reference for the thin-plate spline: scipy.interpolate.RBFInterpolator(kernel="thin_plate_spline", degree=1),
the same map solved independently of splice, evaluated at the output pixel centres in float64.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.interpolate import RBFInterpolator

from splice.warps import Warp, WarpConfig, grids

H, W = 96, 128  # non-square, and large enough for float16 coordinates to show their rounding


def _set_theta(warp: Warp, theta) -> Warp:
    with torch.no_grad():
        warp.head.fc2.weight.zero_()
        warp.head.fc2.bias.copy_(torch.as_tensor(theta, dtype=warp.head.fc2.bias.dtype))
    return warp


def _pixels(err_norm: torch.Tensor) -> float:
    """The largest grid error in pixels (a normalised unit is W/2 pixels across, H/2 down)."""
    scale = torch.tensor([W / 2, H / 2], dtype=torch.float64)
    return float((err_norm.detach().double().abs() * scale).max())


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
@pytest.mark.parametrize("k", [4, 8, 12])
def test_tps_grid_of_a_narrow_model_is_right_to_a_tenth_of_a_pixel(dtype, k):
    rng = np.random.default_rng(k)
    offsets = rng.uniform(-0.08, 0.08, size=(k * k, 2))
    # the offsets as the narrow head outputs them (so the comparison sees only the grid's rounding)
    theta = torch.from_numpy(offsets.ravel()).to(dtype).double()
    warp = _set_theta(Warp(WarpConfig(family="tps", tps_k=k), (1, H, W)).to(dtype), theta.to(dtype))
    grid = warp.grid(warp.predict(torch.zeros(1, 1, H, W, dtype=dtype)), H, W)
    assert grid.dtype == torch.float32  # a grid is never computed in float16 (grids.grid_dtype)

    control = grids.tps_control_points(k).numpy()
    target = control + theta.view(-1, 2).numpy()
    centres = grids.base_grid(H, W)[:, :2].numpy()
    expected = RBFInterpolator(control, target, kernel="thin_plate_spline", degree=1)(centres)
    err = _pixels(grid.reshape(-1, 2).double() - torch.from_numpy(expected))
    # float32 rounding of coordinates near 1 is ~1e-7 of W/2; before the weights were folded in float64 a
    # float16 model was 4 px off at K=8 and 16 px at K=12 on 224 px
    assert err < 1e-3, err


@pytest.mark.parametrize("family", ["affine", "projective", "tps"])
@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_a_narrow_warp_is_the_exact_identity_without_nan(family, dtype):
    # torch's CPU grid_sample in float16 returns NaN on some runs (seen with torch 2.14.1, an identity grid at
    # 224 x 224); a warp samples in float32 and returns x's dtype
    warp = Warp(WarpConfig(family=family), (3, 224, 224)).to(dtype)
    x = torch.rand(2, 3, 224, 224, generator=torch.Generator().manual_seed(0)).to(dtype)
    for _ in range(3):
        out = warp(x)
        assert out.dtype == dtype
        assert torch.equal(out, x)


@pytest.mark.parametrize("family", ["affine", "tps"])
def test_under_autocast_the_warp_is_the_exact_identity_and_the_grid_is_float32(family):
    warp = Warp(WarpConfig(family=family), (3, H, W))
    x = torch.rand(2, 3, H, W, generator=torch.Generator().manual_seed(1))
    theta = [0.9, 0.1, 0.05, -0.1, 1.1, -0.02] if family == "affine" else [0.03] * warp.n_params
    moved = _set_theta(Warp(WarpConfig(family=family), (3, H, W)), theta)
    with torch.autocast("cpu", dtype=torch.bfloat16):
        out = warp(x)
        narrow_theta = moved.predict(x)
        grid = moved.grid(narrow_theta, H, W)
    assert torch.equal(out, x)
    assert narrow_theta.dtype == torch.bfloat16 and grid.dtype == torch.float32
    # the grid of the head's bfloat16 theta is the one float32 computes from it: autocast adds no rounding
    assert torch.equal(grid, moved.grid(narrow_theta.float(), H, W))


def test_a_half_warp_keeps_float32_grid_buffers_and_loads_back():
    warp = Warp(WarpConfig(family="tps", tps_k=4), (1, 16, 20)).half()
    assert warp.base_grid.dtype == torch.float32 and warp.tps_weights.dtype == torch.float32
    assert warp.double().base_grid.dtype == torch.float64
    assert torch.equal(warp.base_grid, grids.base_grid(16, 20))


@pytest.mark.parametrize("dtype", ["float16", "bfloat16"])
def test_a_spliced_half_model_runs_after_save_and_load(tmp_path, dtype):
    """Loading adopts the saved tensors on an empty frame; the warp's pooling and identity buffers, which the file
    does not hold, must follow the parameters' dtype (they stayed float32 and the loaded model raised "expected m1
    and m2 to have the same dtype")."""
    import splice

    (tmp_path / "nets.py").write_text(
        "import torch\nfrom splice.models import tray_net\n\n"
        f"def low():\n    torch.manual_seed(0)\n    return tray_net(width=8).to(torch.{dtype})\n\n\n"
        "low.input_shape = (1, 48, 48)\n")
    spliced = splice.insert(f"{tmp_path / 'nets.py'}:low", at="input", trust_code=True)
    torch.manual_seed(1)
    with torch.no_grad():
        spliced.splice_warps.input.head.fc2.bias.add_(0.05 * torch.randn_like(spliced.splice_warps.input.head.fc2.bias))
    back = splice.load(splice.save(spliced, tmp_path / "low"), trust_code=True)
    x = torch.rand(2, 1, 48, 48).to(getattr(torch, dtype))
    assert {b.dtype for n, b in back.named_buffers() if ".head." in n} == {getattr(torch, dtype)}
    with torch.no_grad():
        assert torch.equal(back.eval()(x), spliced.eval()(x))  # the same model as before saving, bit for bit
