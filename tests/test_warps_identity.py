"""A fresh Warp is the exact identity; the config, cost model and gradients behave."""

from __future__ import annotations

import itertools

import pytest
import torch
from torch.nn import functional as F
from torch.utils.flop_counter import FlopCounterMode

from splice.errors import SpliceError
from splice.warps import (
    FAMILIES,
    PADDINGS,
    SAMPLERS,
    Warp,
    WarpConfig,
    WarpError,
    family_param_count,
    identity_theta,
    theta_to_matrix,
    warp_cost,
)
from splice.warps import grids
from splice.warps.head import head_sizes
from splice.warps.module import SAMPLER_TAPS, needs_rounding_correction

# Odd, non-square, tiny, power-of-two and larger-than-32 (head pre-pool) sizes.
SHAPES = [(3, 31, 33), (2, 7, 100), (1, 1, 1), (4, 16, 8), (1, 48, 40)]


def _random_head(warp: Warp, scale: float = 0.05) -> None:
    """Perturb the final layer so the warp is no longer the identity."""
    with torch.no_grad():
        warp.head.fc2.weight.normal_(0.0, scale)
        warp.head.fc2.bias.add_(torch.randn_like(warp.head.fc2.bias) * scale)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("family", FAMILIES)
def test_fresh_warp_returns_its_input(family, dtype):
    # Reference: torch.nn.functional.grid_sample docs -- with align_corners=False
    # a grid at the pixel centres (2u + 1) / W - 1 reads each pixel back, so the
    # identity warp must return the input. We require bit equality, which is
    # stronger than the 1e-6 (float32) / 1e-12 (float64) relative budget.
    # Every sampler x padding on an odd non-square size and on one that uses
    # the head's pre-pool; every size with the defaults. A narrow head keeps it
    # fast (the identity does not depend on the head's width).
    cases = [(sp, shape) for sp in itertools.product(SAMPLERS, PADDINGS) for shape in SHAPES[::4]]
    cases += [(("bilinear", "zeros"), shape) for shape in SHAPES[1:4]]
    for (sampler, padding), shape in cases:
        cfg = WarpConfig(family=family, sampler=sampler, padding=padding, head_width=4)
        warp = Warp(cfg, shape, dtype=dtype)
        x = torch.randn(2, *shape, dtype=dtype)
        y = warp(x)
        assert y.shape == x.shape
        assert torch.equal(y, x), (sampler, padding, shape, (y - x).abs().max().item())


@pytest.mark.parametrize("family", FAMILIES)
def test_identity_with_separate_localisation_tensor(family):
    # Reference: the input itself (identity warp), as above.
    warp = Warp(WarpConfig(family=family), (4, 9, 13), loc_shape=(6, 40, 35))
    x = torch.randn(3, 4, 9, 13)
    loc = torch.randn(3, 6, 40, 35)
    assert torch.equal(warp(x, loc), x)


def test_plain_grid_sample_is_not_exact_which_is_why_the_correction_exists():
    # Reference: torch.nn.functional.grid_sample on its own. At W=33 the float32
    # unnormalisation (x + 1) * W / 2 - 0.5 misses some pixel centres by an ulp,
    # so the plain call leaks neighbours into an identity warp; this is what
    # needs_rounding_correction() compensates for. If torch ever makes this
    # exact, the correction can go.
    h, w = 31, 33
    x = torch.randn(1, 1, h, w)
    base = grids.base_grid(h, w, dtype=torch.float32)[:, :2].reshape(1, h, w, 2)
    plain = F.grid_sample(x, base, align_corners=False)
    assert not torch.equal(plain, x)
    assert needs_rounding_correction("bilinear", h, w)
    assert not needs_rounding_correction("bilinear", 16, 64)
    assert not needs_rounding_correction("nearest", h, w)
    # powers of two are exact without the correction
    x2 = torch.randn(1, 1, 16, 64)
    base2 = grids.base_grid(16, 64, dtype=torch.float32)[:, :2].reshape(1, 16, 64, 2)
    assert torch.equal(F.grid_sample(x2, base2, align_corners=False), x2)


@pytest.mark.parametrize("family", FAMILIES)
def test_identity_grid_is_the_pixel_centres(family):
    # Reference: torch.nn.functional.affine_grid with the identity matrix and
    # align_corners=False gives the pixel centres (used here only as a reference).
    warp = Warp(WarpConfig(family=family), (1, 5, 7), dtype=torch.float64)
    theta = identity_theta(family, dtype=torch.float64).expand(2, -1)
    ref = F.affine_grid(torch.eye(2, 3, dtype=torch.float64).expand(2, 2, 3), [2, 1, 5, 7], align_corners=False)
    torch.testing.assert_close(warp.grid(theta, 5, 7), ref, rtol=0, atol=1e-15)


def test_affine_grid_matches_torch_affine_grid_off_identity():
    # Reference: torch.nn.functional.affine_grid (align_corners=False).
    warp = Warp(WarpConfig(family="affine"), (1, 9, 12), dtype=torch.float64)
    theta = torch.tensor([[0.9, -0.3, 0.1, 0.25, 1.1, -0.2]], dtype=torch.float64)
    ref = F.affine_grid(theta.view(1, 2, 3), [1, 1, 9, 12], align_corners=False)
    torch.testing.assert_close(warp.grid(theta, 9, 12), ref, rtol=0, atol=1e-14)
    # a different run-time size builds its grid on the fly
    ref2 = F.affine_grid(theta.view(1, 2, 3), [1, 1, 5, 20], align_corners=False)
    torch.testing.assert_close(warp.grid(theta, 5, 20), ref2, rtol=0, atol=1e-14)


@pytest.mark.parametrize("family", FAMILIES)
def test_other_runtime_size_matches_a_warp_built_for_it(family):
    # Reference: a Warp built for the run-time size with the same weights
    # (common practice, no source): building the grid on the fly must not change results.
    a = Warp(WarpConfig(family=family), (3, 16, 16))
    _random_head(a)
    b = Warp(WarpConfig(family=family), (3, 21, 11))
    b.load_state_dict(a.state_dict())
    x = torch.randn(2, 3, 21, 11)
    torch.testing.assert_close(a(x), b(x), rtol=0, atol=0)


def test_reset_parameters_and_identity_distance():
    # Reference: the input itself (identity warp) after reset.
    warp = Warp(WarpConfig(family="similarity"), (2, 12, 10))
    assert warp.identity_distance() == 0.0
    _random_head(warp, 0.1)
    x = torch.randn(2, 2, 12, 10)
    assert not torch.equal(warp(x), x)
    dist = warp.identity_distance()
    fc2 = warp.head.fc2
    expected = torch.sqrt(
        fc2.weight.detach().double().pow(2).sum()
        + (fc2.bias.detach().double() - identity_theta("similarity", dtype=torch.float64)).pow(2).sum()
    )
    assert dist == pytest.approx(float(expected), rel=1e-12)
    warp.reset_parameters()
    assert warp.identity_distance() == 0.0
    assert torch.equal(warp(x), x)


def test_casting_to_float64_keeps_the_identity_exact():
    # Reference: the input itself. The buffers are rebuilt from float64 on
    # .double() instead of widening float32-rounded centres.
    warp = Warp(WarpConfig(family="tps", sampler="bicubic"), (2, 13, 27)).double()
    assert warp.base_grid.dtype == torch.float64
    torch.testing.assert_close(warp.base_grid, grids.base_grid(13, 27), rtol=0, atol=0)
    x = torch.randn(2, 2, 13, 27, dtype=torch.float64)
    assert torch.equal(warp(x), x)


def test_grid_buffers_are_not_saved():
    # common practice, no source: base grids are non-persistent buffers.
    warp = Warp(WarpConfig(family="tps"), (2, 8, 8))
    names = set(warp.state_dict())
    assert not any("base_grid" in n or "tps_" in n or n.endswith("rows") for n in names)
    assert {"head.fc2.weight", "head.fc2.bias"} <= names


def test_record_keeps_the_last_theta():
    warp = Warp(WarpConfig(family="attention"), (1, 6, 6))
    x = torch.randn(4, 1, 6, 6)
    warp(x)
    assert warp.last_theta is None
    warp.record = True
    warp(x)
    assert warp.last_theta.shape == (4, 3)
    assert not warp.last_theta.requires_grad
    torch.testing.assert_close(warp.last_theta, warp.predict(x).detach())


def test_matrix_is_none_only_for_tps():
    for family in FAMILIES:
        warp = Warp(WarpConfig(family=family), (1, 4, 4))
        theta = identity_theta(family).expand(3, -1)
        m = warp.matrix(theta)
        if family == "tps":
            assert m is None
        else:
            assert torch.equal(m, torch.eye(3).expand(3, 3, 3))


# -- config ---------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"family": "afine"}, r"family='afine'.*did you mean 'affine'.*translation, attention"),
        ({"sampler": "cubic"}, r"sampler='cubic'.*bilinear, nearest, bicubic"),
        ({"padding": "wrap"}, r"padding='wrap'.*zeros, border, reflection"),
        ({"head_width": 0}, r"head_width=0.*integer between 1 and 1024"),
        ({"head_width": True}, r"head_width=True.*integer"),
        ({"tps_k": 1}, r"tps_k=1.*between 2 and 16"),
        ({"tps_k": 4.0}, r"tps_k=4.0.*integer"),
        ({"loc_from": ""}, r"loc_from=''.*point name"),
    ],
)
def test_config_rejects_bad_values(kwargs, match):
    with pytest.raises(ValueError, match=match):
        WarpConfig(**kwargs)
    with pytest.raises(SpliceError, match=match):
        WarpConfig(**kwargs)


def test_config_round_trip_and_unknown_keys():
    cfg = WarpConfig(family="tps", sampler="bicubic", padding="border", head_width=8, tps_k=5, loc_from="input")
    assert WarpConfig.from_dict(cfg.to_dict()) == cfg
    assert cfg.n_params == 50 == family_param_count("tps", 5)
    with pytest.raises(WarpError, match=r"unknown warp config key\(s\) 'familly'.*did you mean 'family'"):
        WarpConfig.from_dict({"familly": "affine"})
    with pytest.raises(WarpError, match=r"'colour', 'size'.*known keys: family, sampler"):
        WarpConfig.from_dict({"size": 1, "colour": 2})
    with pytest.raises(WarpError, match=r"must be a mapping.*list"):
        WarpConfig.from_dict(["affine"])


def test_module_errors():
    with pytest.raises(WarpError, match=r"shape=\(3, 0, 4\) is not a \(C, H, W\) shape"):
        Warp(WarpConfig(), (3, 0, 4))
    with pytest.raises(WarpError, match=r"loc_shape=\(1, 3, 4, 4\) is not a \(C, H, W\)"):
        Warp(WarpConfig(), (3, 4, 4), loc_shape=(1, 3, 4, 4))
    with pytest.raises(WarpError, match=r"Warp needs a WarpConfig, got str"):
        Warp("affine", (3, 4, 4))
    with pytest.raises(WarpError, match=r"warp_cost needs a WarpConfig, got dict"):
        warp_cost({"family": "affine"}, (3, 4, 4))
    warp = Warp(WarpConfig(), (3, 4, 4))
    with pytest.raises(WarpError, match=r"expects a \(N, C, H, W\) tensor, got shape \(3, 4, 4\)"):
        warp(torch.zeros(3, 4, 4))
    with pytest.raises(WarpError, match=r"takes theta of shape \(N, 6\), got \(2, 4\)"):
        warp.grid(torch.zeros(2, 4), 4, 4)
    with pytest.raises(WarpError, match=r"'tps' has no sampling matrix"):
        theta_to_matrix("tps", torch.zeros(1, 32))
    with pytest.raises(WarpError, match=r"family 'affine' takes theta of shape \(N, 6\), got \(6,\)"):
        theta_to_matrix("affine", torch.zeros(6))
    with pytest.raises(WarpError, match=r"family='homography'.*choose one of"):
        identity_theta("homography")


# -- cost model -----------------------------------------------------------------


@pytest.mark.parametrize("family", FAMILIES)
def test_warp_cost_params_equal_the_real_count(family):
    for shape, loc, width, sampler in [
        ((3, 20, 24), None, 16, "bilinear"),
        ((8, 64, 80), (5, 40, 16), 4, "bicubic"),
        ((1, 1, 1), None, 1, "nearest"),
        ((2, 16, 16), None, 32, "bilinear"),
    ]:
        cfg = WarpConfig(family=family, sampler=sampler, head_width=width, tps_k=3)
        warp = Warp(cfg, shape, loc)
        params, _ = warp_cost(cfg, shape, loc)
        assert params == sum(p.numel() for p in warp.parameters()), (shape, loc, width)


@pytest.mark.parametrize("family", FAMILIES)
def test_warp_cost_macs_match_torch_flop_counter(family):
    # Reference: torch.utils.flop_counter.FlopCounterMode counts 2 FLOPs per
    # multiply-accumulate of every convolution and matrix product. It does not
    # count grid_sample, average pooling or elementwise division, so those
    # documented terms are added back here from warp_cost's formula.
    for shape, loc, sampler in [
        ((3, 20, 24), None, "bilinear"),
        ((3, 64, 80), (5, 40, 16), "bicubic"),
        ((2, 16, 16), None, "nearest"),
    ]:
        cfg = WarpConfig(family=family, sampler=sampler)
        warp = Warp(cfg, shape, loc)
        x = torch.randn(1, *shape)
        l = torch.randn(1, *loc) if loc else None
        with FlopCounterMode(display=False) as counter:
            warp(x, l)
        c, h, w = shape
        lc, lh, lw = loc or shape
        s = head_sizes(loc or shape)
        uncounted = SAMPLER_TAPS[sampler] * c * h * w
        if needs_rounding_correction(sampler, h, w):
            uncounted += SAMPLER_TAPS[sampler] * c * h * w + c * h * w
        if s["kh"] > 1 or s["kw"] > 1:
            uncounted += lc * s["h0"] * s["kh"] * s["w0"] * s["kw"]
        if family == "projective":
            uncounted += 2 * h * w
        _, macs = warp_cost(cfg, shape, loc)
        assert macs == counter.get_total_flops() // 2 + uncounted, (shape, loc, sampler)


def test_head_size_formula_example():
    # The docstring example: C=3, w=16, affine -> 11190 parameters.
    assert warp_cost(WarpConfig(), (3, 32, 32))[0] == 11190


# -- gradients ------------------------------------------------------------------


def _loss(warp: Warp, x: torch.Tensor) -> torch.Tensor:
    target = torch.randn_like(x)
    return (warp(x) * target).sum()


@pytest.mark.parametrize("sampler", ["bilinear", "bicubic"])
@pytest.mark.parametrize("family", FAMILIES)
def test_gradients_reach_the_head(family, sampler):
    # common practice, no source. Honest statement of what happens:
    # at the exact identity the final layer's weight is 0, so every earlier
    # layer's gradient passes through a zero matrix and is exactly 0; only the
    # final layer learns on step one. Once it has moved (here: a small random
    # final weight) every head parameter gets a non-zero gradient.
    warp = Warp(WarpConfig(family=family, sampler=sampler), (3, 15, 18))
    x = torch.randn(4, 3, 15, 18)
    _loss(warp, x).backward()
    for name, p in warp.named_parameters():
        if name.startswith("head.fc2."):
            assert p.grad is not None and p.grad.abs().sum() > 0, name
        else:
            assert p.grad is None or torch.count_nonzero(p.grad) == 0, name
    warp.zero_grad(set_to_none=True)
    with torch.no_grad():
        warp.head.fc2.weight.normal_(0.0, 1e-2)
    _loss(warp, x).backward()
    for name, p in warp.named_parameters():
        assert p.grad is not None and torch.count_nonzero(p.grad) > 0, name


def test_attention_scale_has_a_gradient_at_the_identity():
    # The scale s = exp(-|r|) is written with |r| = where(r >= 0, r, -r) so that
    # ds/dr = -1 at r = 0; torch.abs would give 0 there and freeze the scale.
    warp = Warp(WarpConfig(family="attention"), (1, 12, 12))
    yy, xx = torch.meshgrid(torch.linspace(-1, 1, 12), torch.linspace(-1, 1, 12), indexing="ij")
    x = (xx.pow(2) + yy.pow(2)).view(1, 1, 12, 12).expand(2, 1, 12, 12).contiguous()
    warp(x).sum().backward()
    assert warp.head.fc2.bias.grad[0] != 0


def test_nearest_sampler_gives_the_head_no_gradient():
    # Documented limitation: nearest sampling is piecewise constant in the grid,
    # so torch.nn.functional.grid_sample returns a zero grid gradient; a head
    # with a nearest sampler does not learn. Use bilinear or bicubic to train.
    warp = Warp(WarpConfig(family="affine", sampler="nearest"), (1, 10, 10))
    with torch.no_grad():
        warp.head.fc2.weight.normal_(0.0, 1e-2)
    _loss(warp, torch.randn(2, 1, 10, 10)).backward()
    assert torch.count_nonzero(warp.head.fc2.bias.grad) == 0


@pytest.mark.parametrize("family", ["affine", "tps"])
def test_meta_device_then_to_empty_and_reset(family):
    # Reference: the input itself. Built on the meta device (as shape tools do),
    # materialised with to_empty(): buffers are rebuilt, reset_parameters()
    # restores the exact identity.
    warp = Warp(WarpConfig(family=family), (3, 20, 24), device="meta")
    assert warp.base_grid.is_meta and warp.head.fc2.weight.is_meta
    warp.to_empty(device="cpu")
    warp.reset_parameters()
    torch.testing.assert_close(warp.base_grid, grids.base_grid(20, 24, dtype=torch.float32), rtol=0, atol=0)
    x = torch.randn(2, 3, 20, 24)
    assert torch.equal(warp(x), x)
