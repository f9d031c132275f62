"""Property tests (hypothesis) for the grid maths: finiteness, identity, inverses."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from splice.warps import FAMILIES, Warp, WarpConfig, attention_scale, identity_theta, theta_to_matrix
from splice.warps import grids

H, W = 7, 9
# One warp per family and dtype, reused across examples (the grid only reads buffers).
_WARPS = {
    (family, dtype): Warp(WarpConfig(family=family, head_width=1, tps_k=3), (1, H, W), dtype=dtype)
    for family in FAMILIES
    for dtype in (torch.float32, torch.float64)
}
_SETTINGS = settings(max_examples=40, deadline=None)


def _theta(data, family: str, elements) -> list[float]:
    n = _WARPS[(family, torch.float32)].n_params
    return data.draw(st.lists(elements, min_size=n, max_size=n), label="theta")


@_SETTINGS
@given(data=st.data(), family=st.sampled_from(FAMILIES))
def test_grid_is_finite_for_bounded_head_outputs(data, family):
    # common practice, no source: any finite head output must give a finite grid.
    values = _theta(data, family, st.floats(-1e3, 1e3, width=32))
    for dtype in (torch.float32, torch.float64):
        warp = _WARPS[(family, dtype)]
        grid = warp.grid(torch.tensor([values], dtype=dtype), H, W)
        assert grid.shape == (1, H, W, 2)
        assert torch.isfinite(grid).all()


@_SETTINGS
@given(data=st.data(), family=st.sampled_from(FAMILIES))
def test_grid_is_finite_for_extreme_head_outputs(data, family):
    # Extreme but finite values of the tensor's own dtype (up to ~3.4e38 in
    # float32, ~1.8e308 in float64); parameters are clamped before use.
    for dtype, width in ((torch.float32, 32), (torch.float64, 64)):
        values = _theta(data, family, st.floats(allow_nan=False, allow_infinity=False, width=width))
        warp = _WARPS[(family, dtype)]
        theta = torch.tensor([values], dtype=dtype)
        assert torch.isfinite(theta).all()
        grid = warp.grid(theta, H, W)
        assert torch.isfinite(grid).all(), values
        # and grid_sample turns that grid into a finite image
        out = torch.nn.functional.grid_sample(
            torch.ones(1, 1, H, W, dtype=dtype), grid, align_corners=False, padding_mode="border"
        )
        assert torch.isfinite(out).all(), values


@_SETTINGS
@given(h=st.integers(1, 40), w=st.integers(1, 40), family=st.sampled_from(FAMILIES))
def test_identity_theta_gives_the_pixel_centres(h, w, family):
    # Reference: numpy's own pixel centres (2u + 1)/W - 1 in float64
    # (align_corners=False convention of torch.nn.functional.grid_sample).
    warp = _WARPS[(family, torch.float64)]
    grid = warp.grid(identity_theta(family, 3, dtype=torch.float64).view(1, -1), h, w)[0].numpy()
    xs = (2 * np.arange(w) + 1) / w - 1
    ys = (2 * np.arange(h) + 1) / h - 1
    np.testing.assert_allclose(grid[..., 0], np.broadcast_to(xs, (h, w)), rtol=0, atol=2e-16)
    np.testing.assert_allclose(grid[..., 1], np.broadcast_to(ys[:, None], (h, w)), rtol=0, atol=2e-16)
    # and bit for bit the base grid (float32 too), which is what makes the warp exact
    for dtype in (torch.float32, torch.float64):
        g = _WARPS[(family, dtype)].grid(identity_theta(family, 3, dtype=dtype).view(1, -1), h, w)
        assert torch.equal(g.reshape(-1, 2), grids.base_grid(h, w, dtype=dtype)[:, :2])


_affine = st.tuples(
    st.floats(-2, 2), st.floats(-2, 2), st.floats(-1, 1), st.floats(-2, 2), st.floats(-2, 2), st.floats(-1, 1)
).filter(lambda t: abs(t[0] * t[4] - t[1] * t[3]) > 0.1)


@_SETTINGS
@given(t=_affine)
def test_affine_composed_with_its_inverse_is_the_identity_grid(t):
    # Reference: numpy.linalg.inv for the inverse; M @ M^-1 must sample the pixel centres.
    m = theta_to_matrix("affine", torch.tensor([t], dtype=torch.float64))[0].numpy()
    both = m @ np.linalg.inv(m)
    theta = torch.from_numpy(both[:2].reshape(1, 6))
    warp = _WARPS[("affine", torch.float64)]
    grid = warp.grid(theta, H, W).reshape(-1, 2)
    torch.testing.assert_close(grid, grids.base_grid(H, W)[:, :2], rtol=0, atol=1e-9)


@_SETTINGS
@given(t=_affine)
def test_tps_reproduces_affine_maps(t):
    # Property of the thin-plate spline (Bookstein 1989, from memory): targets
    # that are an affine image of the control points give zero radial weights,
    # so the spline is that affine map everywhere.
    a = np.array([t[0:3], t[3:6]])
    control = grids.tps_control_points(3).numpy()
    offsets = control @ a[:, :2].T + a[:, 2] - control
    warp = _WARPS[("tps", torch.float64)]
    grid = warp.grid(torch.from_numpy(offsets.reshape(1, -1)), H, W).reshape(-1, 2).numpy()
    base = grids.base_grid(H, W).numpy()
    np.testing.assert_allclose(grid, base @ a.T, rtol=0, atol=1e-9)


@_SETTINGS
@given(r=st.floats(allow_nan=False, allow_infinity=False, width=32))
def test_attention_scale_is_bounded(r):
    s = float(attention_scale(torch.tensor([r]))[0])
    assert 0.0 <= s <= 1.0
    if abs(r) >= 1e-6:  # exp(-1e-6) is already below 1 in float32
        assert s < 1.0


def test_attention_scale_is_one_only_at_zero():
    assert float(attention_scale(torch.zeros(1))[0]) == 1.0
    assert float(attention_scale(torch.tensor([0.5]))[0]) == float(attention_scale(torch.tensor([-0.5]))[0]) < 1.0


@pytest.mark.parametrize("channels,block,shape", [(64, (2, 2), (2, 64, 56, 56)), (32, (2, 4), (1, 32, 40, 70)),
                                                  (3, (7, 7), (1, 3, 224, 224)), (16, (3, 3), (1, 16, 96, 96))])
def test_block_mean_is_torch_avg_pool(channels, block, shape):
    """The head's reducing pool, a depthwise conv on wide inputs, against torch.nn.functional.avg_pool2d
    (the reference: PyTorch's own average pooling), in float32 and float64."""
    from splice.warps.head import _BlockMean

    m = _BlockMean(channels, *block)
    x = torch.randn(*shape, dtype=torch.float64)
    for dtype in (torch.float32, torch.float64):
        got = m.to(dtype)(x.to(dtype))
        want = torch.nn.functional.avg_pool2d(x.to(dtype), block, block)
        assert got.shape == want.shape
        torch.testing.assert_close(got, want, rtol=0, atol=4 * torch.finfo(dtype).eps)
    assert m.depthwise == (channels >= 16 and (block[0] * block[1]) & (block[0] * block[1] - 1) == 0)
    assert "weight" not in m.state_dict()  # no state: saved folders are unchanged
