"""Which module calls a forward hook can really warp, and what the hooks do at run time when a point turns out
not to be one: outputs that alias older tensors, per-image loops, the model's own hooks, localisation inputs."""

from __future__ import annotations

import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn

import splice
from splice import graph
from splice.graph import TraceFallbackWarning
from splice.hooks import apply_hooks, hooks_installed
from splice.surgery import SplicePlan, insert, warps_of
from splice.warps import WarpConfig

# a fixed, clearly non-identity affine matrix (rows of theta, as torch's F.affine_grid takes it)
THETA = (0.9, -0.2, 0.1, 0.15, 1.05, -0.08)


def _quiet(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)
        return fn(*args, **kwargs)


def _set_theta_(spliced, point: str) -> None:
    """The warp at ``point`` made to apply THETA whatever it reads (its head's last layer: no weights, THETA bias)."""
    final = [m for m in warps_of(spliced)[point].head.modules() if isinstance(m, nn.Linear)][-1]
    with torch.no_grad():
        final.weight.zero_()
        final.bias.copy_(torch.tensor(THETA))


def reference_warp(x: torch.Tensor) -> torch.Tensor:
    """The outside reference: torch's own F.affine_grid + F.grid_sample (bilinear, zeros, align_corners=False)."""
    theta = torch.tensor(THETA, dtype=x.dtype).view(1, 2, 3).expand(x.shape[0], 2, 3)
    grid = F.affine_grid(theta, list(x.shape), align_corners=False)
    return F.grid_sample(x, grid, mode="bilinear", padding_mode="zeros", align_corners=False)


# ----------------------------------------------------------------------------- outputs that alias older tensors


class _Contiguous(nn.Module):
    def forward(self, x):
        return x.contiguous()  # the same object when x is contiguous already


class _Aliasing(nn.Module):
    """``skip`` keeps the tensor a module then hands back again: in place (``ReLU(inplace=True)``), unchanged (an
    eval-mode ``Dropout``) or as itself (``x.contiguous()``). ``*args`` keeps fx out (the hooks view lists it);
    ``warp_at`` names a module whose output the hand-written reference warps for every reader."""

    def __init__(self, kind: str, needs_real: bool = False):
        super().__init__()
        self.needs_real = needs_real
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.mid = {"inplace": nn.ReLU(inplace=True), "dropout": nn.Dropout(0.0), "contiguous": _Contiguous()}[kind]
        self.c2 = nn.Conv2d(8, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 4, 3, padding=1)
        self.warp_at = None

    def forward(self, *args):
        x = self.stem(args[0])
        if self.needs_real:  # a real value: the meta recording fails, torch.export lists the points
            x = x * torch.ones(1).item()
        if self.warp_at == "stem":
            x = reference_warp(x)
        skip = x
        y = self.mid(x)
        return self.head(self.c2(y) + skip).mean((2, 3))


@pytest.mark.parametrize("kind", ["inplace", "dropout", "contiguous"])
@pytest.mark.parametrize("needs_real", [False, True], ids=["recorded", "exported"])
def test_a_module_that_hands_back_an_older_tensor_is_no_point(kind, needs_real):
    torch.manual_seed(0)
    model = _Aliasing(kind, needs_real).eval()
    names = {p.name for p in _quiet(graph.points, model, (3, 16, 16), all=True)}
    assert "mid" not in names and {"stem", "c2"} <= names
    # the point before it still warps every reader: the reference applies torch's own affine_grid/grid_sample to
    # the stem's output in a hand-written forward
    spliced = _quiet(insert, model, at="stem", input_shape=(3, 16, 16))
    _set_theta_(spliced, "stem")
    x = torch.randn(3, 3, 16, 16)
    with torch.no_grad():
        got = spliced(x)
        model.warp_at = "stem"
        want = model(x)
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-5)


def test_a_site_that_hands_back_its_input_is_cautioned_once_at_run_time():
    # a record naming such a site (a folder made before the listing knew better) still runs as it was made, which
    # was right unless the model kept a reference from before the call; it says so once (refusing it broke folders
    # spliced at a timm BatchNormAct's in-place activation, where nothing else refers to the tensor)
    from splice.errors import SiteMovedWarning

    torch.manual_seed(0)
    model = _Aliasing("inplace").eval()
    plan = [SplicePlan("mid", WarpConfig())]
    spliced = apply_hooks(model, plan, {"mid": ("mid", 0)}, {"mid": (8, 16, 16)})
    x = torch.randn(1, 3, 16, 16)
    with pytest.warns(SiteMovedWarning, match="point 'mid' hands back its own input .* re-create the splice there"):
        out = spliced(x)
    with torch.no_grad():
        assert torch.equal(out, model(x))  # at the identity it computes what the base does
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        spliced(x)  # once


# ----------------------------------------------------------------------------- loops over parts of the batch


class _Chunked(nn.Module):
    """Runs ``per`` on the batch two images at a time: at batch 1 and 2 it is called once, as at batch 3 twice."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.per = nn.Conv2d(8, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 4, 3, padding=1)

    def forward(self, *args):
        x = self.stem(args[0])
        return self.head(torch.cat([self.per(c) for c in x.split(2)])).mean((2, 3))


def test_a_site_reached_once_per_part_of_the_batch_is_refused_at_run_time():
    # a record says `per` ran once per forward when it was spliced; a forward that runs it again on part of the
    # batch is a loop over chunks, whose warp would see some images only
    # (a folder written before the count was recorded is held to one call: a second on part of the batch is refused)
    torch.manual_seed(0)
    model = _Chunked().eval()
    for calls in ({"per": 1}, None):
        spliced = apply_hooks(model, [SplicePlan("per", WarpConfig())], {"per": ("per", 0)}, {"per": (8, 16, 16)},
                              calls=calls)
        with torch.no_grad():
            spliced(torch.randn(2, 3, 16, 16))  # one chunk holds the whole batch: every image is warped
            with pytest.raises(RuntimeError, match="point 'per' is reached once per part of the batch .* on 1 of the "
                                                   "3 images.* at another point"):
                spliced(torch.randn(3, 3, 16, 16))


class _Prototypes(nn.Module):
    """One backbone runs on the queries, then on the support images (fewer of them): two calls, each legitimate."""

    def __init__(self):
        super().__init__()
        self.backbone = nn.Sequential(nn.Conv2d(1, 8, 3, padding=1), nn.ReLU())
        self.out = nn.Linear(8, 8)

    def forward(self, query, support):
        q = self.backbone(query).mean((2, 3))
        s = self.backbone(support).mean((2, 3))
        if query.shape[-1] > 8:  # a shape branch: fx cannot trace it, hooks reach the backbone
            q = q + 0
        return self.out(q) @ s.mean(0, keepdim=True).t()


def test_a_module_run_again_on_another_input_with_fewer_images_is_no_loop():
    # the guard refused the support call (2 of the 4 query images) though the module runs twice at any batch
    torch.manual_seed(0)
    model = _Prototypes().eval()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the fx fallback, and 'not a cut' (the support path joins at the end)
        spliced = insert(model, at=["backbone_1"], input_shape=[(1, 16, 16), (1, 16, 16)])
    assert spliced.splice_info.sites["backbone_1"]["calls"] == 2
    q, support = torch.randn(4, 1, 16, 16), torch.randn(2, 1, 16, 16)
    with torch.no_grad(), warnings.catch_warnings():
        warnings.simplefilter("error")
        assert torch.equal(spliced(q, support), model(q, support))


class _BagPool(nn.Module):
    """Pools the views of one part (the batch) into one map before a conv: a module that returns one image for the
    batch, once, which a hook warps whole."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.pool = nn.Conv2d(8, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 4, 3, padding=1)

    def forward(self, *args):
        x = self.stem(args[0])
        return self.head(self.pool(x.amax(0, keepdim=True))).mean((2, 3))


def test_a_module_that_reduces_the_batch_once_is_warped_not_refused():
    # the run-time guard refused it (1 of the 2 images) though the listing offers it; only a module that runs again
    # on part of the batch is a loop over parts
    torch.manual_seed(0)
    model = _BagPool().eval()
    spliced = apply_hooks(model, [SplicePlan("pool", WarpConfig())], {"pool": ("pool", 0)}, {"pool": (8, 16, 16)})
    _set_theta_(spliced, "pool")
    x = torch.randn(2, 3, 16, 16)
    with torch.no_grad():
        expected = model.head(reference_warp(model.pool(model.stem(x).amax(0, keepdim=True)))).mean((2, 3))
        torch.testing.assert_close(spliced(x), expected)  # the reference: torch's own affine_grid + grid_sample


# ----------------------------------------------------------------------------- the model's own hooks


def _stash(module, args, output):
    module.stashed = output  # a feature tap the forward reads later


class _OwnHook(nn.Module):
    """A forward hook of the model's own keeps ``mid``'s output, which the forward adds back later."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.mid = nn.Conv2d(8, 8, 3, padding=1)
        self.c3 = nn.Conv2d(8, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 4, 3, padding=1)
        self.mid.register_forward_hook(_stash)

    def forward(self, *args):
        y = self.mid(self.stem(args[0]))
        return self.head(self.c3(y) + self.mid.stashed).mean((2, 3))


def test_the_models_own_hooks_see_the_warped_output():
    torch.manual_seed(0)
    model = _OwnHook().eval()
    spliced = _quiet(insert, model, at="mid", input_shape=(3, 16, 16))
    _set_theta_(spliced, "mid")
    x = torch.randn(2, 3, 16, 16)
    with torch.no_grad():
        got = spliced(x)
        # outside reference: the forward written out by hand, torch's own affine_grid/grid_sample on mid's output,
        # read by both of its readers
        y = reference_warp(model.mid(model.stem(x)))
        want = model.head(model.c3(y) + y).mean((2, 3))
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-5)


def _stash_input(module, args):
    module.stashed = args[0]  # the model's own pre-hook keeps the input it was given


class _OwnPreHook(_OwnHook):
    def __init__(self):
        super().__init__()
        self.register_forward_pre_hook(_stash_input)

    def forward(self, *args):
        return self.head(self.c3(self.stem(args[0]))).mean((2, 3)) + self.stashed.mean((1, 2, 3))[:, None]


def test_the_models_own_pre_hooks_see_the_warped_input():
    torch.manual_seed(0)
    model = _OwnPreHook().eval()
    spliced = _quiet(insert, model, at="input", input_shape=(3, 16, 16))
    _set_theta_(spliced, "input")
    x = torch.randn(2, 3, 16, 16)
    with torch.no_grad():
        got = spliced(x)
        # outside reference: torch's own affine_grid/grid_sample on the input, read by the forward and the pre-hook
        xw = reference_warp(x)
        want = model.head(model.c3(model.stem(xw))).mean((2, 3)) + xw.mean((1, 2, 3))[:, None]
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-5)


# ----------------------------------------------------------------------------- localisation inputs


class _Traceable(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.c2 = nn.Conv2d(8, 8, 3, stride=2, padding=1)
        self.head = nn.Conv2d(8, 4, 3, padding=1)

    def forward(self, x):
        return self.head(self.c2(torch.relu(self.stem(x)))).mean((2, 3))


class _Untraceable(_Traceable):
    def forward(self, *args):  # *args: fx cannot trace it, the hooks view lists it
        return _Traceable.forward(self, args[0])


def _sample(x, theta):
    """Torch's own F.affine_grid + F.grid_sample (the outside reference for the sampling); ``theta`` as the warp's
    head predicts it, the six entries of each 2x3 matrix row by row."""
    grid = F.affine_grid(theta.view(-1, 2, 3), list(x.shape), align_corners=False)
    return F.grid_sample(x, grid, mode="bilinear", padding_mode="zeros", align_corners=False)


@pytest.mark.parametrize("first", ["input", "stem"])
def test_a_localisation_head_reads_the_unwarped_point_under_hooks_as_under_fx(first):
    cfg = WarpConfig(family="affine", loc_from=first)
    torch.manual_seed(0)
    fx_model = _Traceable().eval()
    hk_model = _Untraceable().eval()
    hk_model.load_state_dict(fx_model.state_dict())
    by_fx = insert(fx_model, at=[first, "c2"], warp=cfg, input_shape=(3, 16, 16))
    by_hooks = _quiet(insert, hk_model, at=[first, "c2"], warp=cfg, input_shape=(3, 16, 16))
    assert isinstance(by_fx, torch.fx.GraphModule) and hooks_installed(by_hooks)
    gen = torch.Generator().manual_seed(1)
    warps_fx, warps_hk = warps_of(by_fx), warps_of(by_hooks)
    for name, warp in warps_fx.items():  # the same non-identity heads in both
        for p, q in zip(warp.parameters(), warps_hk[name].parameters()):
            with torch.no_grad():
                p.add_(0.05 * torch.randn(p.shape, generator=gen))
                q.copy_(p)
    x = torch.randn(3, 3, 16, 16)
    with torch.no_grad():
        got_fx, got_hooks = by_fx(x), by_hooks(x)
        # outside reference: the forward written out by hand, torch's own affine_grid/grid_sample at each point, the
        # thetas from the warps' heads; c2's head reads the unwarped tensor at `first`
        m, w = fx_model, warps_fx
        if first == "input":
            seen = x
            st = m.stem(_sample(x, w["input"].predict(x)))
        else:
            seen = m.stem(x)
            st = _sample(seen, w["stem"].predict(seen))
        c = m.c2(torch.relu(st))
        want = m.head(_sample(c, w["c2"].predict(seen))).mean((2, 3))
    torch.testing.assert_close(got_fx, want, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(got_hooks, want, rtol=1e-5, atol=1e-5)


def test_a_loop_over_chunks_of_two_images_is_no_point():
    # batch 1 and batch 2 call `per` once each; batch 3 twice: the listing compares batch 3 with batch 1
    names = {p.name for p in _quiet(graph.points, _Chunked().eval(), (3, 16, 16), all=True)}
    assert "per" not in names and {"stem", "head"} <= names


class _Twice(nn.Module):
    """Needs one real value (the meta recording fails, torch.export lists it) and calls ``block`` twice."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.block = nn.Conv2d(8, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 4, 3, padding=1)

    def forward(self, *args):
        x = self.stem(args[0]) * torch.ones(1).item()
        return self.head(self.block(self.block(x))).mean((2, 3))


def test_without_a_count_at_another_batch_a_module_called_twice_is_no_point():
    # the batch-3 count runs on the meta device, which this forward cannot: `block` may be a loop over the images
    pts = _quiet(graph.points, _Twice().eval(), (3, 16, 16), all=True)
    assert [p.module for p in pts] == ["", "stem", "head"]


class _KeywordOnly(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)

    def forward(self, *, x):
        return self.conv(x)


def test_a_keyword_only_input_is_told_to_wrap_the_model():
    from splice.errors import GraphError

    with pytest.raises(GraphError, match="forward takes its input x by keyword only, which splice does not support; "
                                         "wrap the model in a module whose forward takes the image positionally"):
        graph.points(_KeywordOnly(), (3, 16, 16))


class _LayerDrop(nn.Module):
    """Python's random decides, in train mode, whether block 0 runs; one activation module serves every block."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.act = nn.ReLU()
        self.convs = nn.ModuleList(nn.Conv2d(8, 8, 3, padding=1) for _ in range(3))

    def forward(self, x):
        import random

        x = self.stem(x)
        for i, conv in enumerate(self.convs):
            if i == 0 and self.training and random.random() < 0.5:
                continue
            x = x + self.act(conv(x))
        return x.mean((2, 3))


def test_the_listing_draws_the_same_numbers_every_time_and_leaves_the_callers_generators():
    import random

    import numpy as np

    model = _LayerDrop()
    random.seed(3)
    np.random.seed(3)
    torch.manual_seed(3)
    states = random.getstate(), np.random.get_state()[1].copy(), torch.get_rng_state()
    listings = {tuple(p.name for p in _quiet(graph.points, model, (3, 16, 16), all=True)) for _ in range(8)}
    assert len(listings) == 1
    assert random.getstate() == states[0]
    assert (np.random.get_state()[1] == states[1]).all() and torch.equal(torch.get_rng_state(), states[2])


class _Pyramid(nn.Module):
    """Halves its map with one conv until it is 6 pixels wide: the conv's calls follow the input size."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.down = nn.Conv2d(8, 8, 3, stride=2, padding=1)
        self.head = nn.Conv2d(8, 4, 3, padding=1)

    def forward(self, x):
        x = self.stem(x)
        while x.shape[-1] > 6:
            x = self.down(x)
        return self.head(x).mean((2, 3))


def pyramid() -> nn.Module:
    """A factory for the folder round trip (a spec typed here; loading the folder needs trust_code)."""
    torch.manual_seed(0)
    return _Pyramid()


pyramid.input_shape = (3, 24, 24)
pyramid.normalisation = None


def test_a_site_module_that_runs_more_often_than_when_spliced_warns(tmp_path):
    # spliced at 24 px, `down` runs twice (12, 6) and the warp sits on its second call; at 48 px it runs three times
    # and that call is the 12x12 map, another tensor: the run now says so, once, and a folder keeps the count
    from splice.errors import SiteMovedWarning

    with pytest.warns(TraceFallbackWarning):
        spliced = splice.insert(f"{__file__}:pyramid", at="down_1")
    assert spliced.splice_info.sites["down_1"]["calls"] == 2
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        spliced(torch.rand(2, 3, 24, 24))  # the spliced size: silent
    with pytest.warns(SiteMovedWarning, match=r"'down_1' ran more than the 2 times"):
        spliced(torch.rand(2, 3, 48, 48))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        spliced(torch.rand(2, 3, 48, 48))  # once per spliced model
    folder = splice.save(spliced, tmp_path / "pyramid")
    loaded = splice.load(folder, trust_code=True)
    assert loaded.splice_info.sites["down_1"]["calls"] == 2
    with pytest.warns(SiteMovedWarning):
        loaded(torch.rand(1, 3, 48, 48))


class _LocNet(nn.Module):
    """Warps at the input and at ``f_2``, whose head reads the input (``*args`` keeps fx out)."""

    def __init__(self):
        super().__init__()
        self.f = nn.Sequential(nn.Conv2d(1, 8, 3, padding=1), nn.ReLU(), nn.Conv2d(8, 8, 3, padding=1),
                               nn.Conv2d(8, 8, 3, padding=1))
        self.fc = nn.Linear(8, 4)

    def forward(self, *xs):
        return self.fc(self.f(xs[0]).mean((2, 3)))


def loc_net() -> nn.Module:
    torch.manual_seed(0)
    return _LocNet()


loc_net.input_shape = (1, 16, 16)
loc_net.normalisation = None


def test_an_older_hooks_folder_keeps_the_localisation_reading_it_was_tuned_with(tmp_path):
    # hooks fed f_2's head the WARPED input until 2026-12-05, fx the unwarped one; a folder written before then
    # (no loc_reads in splice.json) was tuned so and must compute as it did, a new one as fx does
    import json

    from splice.manifest import MANIFEST_NAME

    with pytest.warns(TraceFallbackWarning):
        spliced = splice.insert(f"{__file__}:loc_net", at=["input", "f_2"],
                                warp={"input": WarpConfig(), "f_2": WarpConfig(loc_from="input")})
    torch.manual_seed(1)
    with torch.no_grad():
        for p in warps_of(spliced)["input"].parameters():
            p.add_(0.3 * torch.randn_like(p))  # off the identity, as tuning leaves it
        for p in warps_of(spliced)["f_2"].parameters():
            p.add_(0.3 * torch.randn_like(p))
    folder = splice.save(spliced, tmp_path / "new")
    manifest = json.loads((folder / MANIFEST_NAME).read_text())
    assert manifest["loc_reads"] == "unwarped"
    manifest.pop("loc_reads")  # as an older splice wrote it, with its weights keeping the points hash only
    from safetensors.torch import load_file, save_file

    from splice.fileio import file_sha256
    from splice.manifest import POINTS_KEY, WEIGHTS_NAME, points_sha256

    weights = folder / WEIGHTS_NAME
    save_file(load_file(weights), weights, metadata={"format": "pt", POINTS_KEY: points_sha256(manifest["points"])})
    manifest["weights"]["sha256"] = file_sha256(weights)
    (folder / MANIFEST_NAME).write_text(json.dumps(manifest))
    older = splice.load(folder, trust_code=True)
    x = torch.rand(3, 1, 16, 16)
    base, warps = loc_net().eval(), warps_of(spliced)
    with torch.no_grad():  # the two readings, written out by hand around the same warp modules
        moved = warps["input"](x)
        stem = base.f[2](base.f[1](base.f[0](moved)))
        unwarped_read = base.fc(base.f[3](warps["f_2"](stem, x)).mean((2, 3)))
        warped_read = base.fc(base.f[3](warps["f_2"](stem, moved)).mean((2, 3)))
        assert (unwarped_read - warped_read).abs().max() > 1e-4  # the two readings differ
        torch.testing.assert_close(spliced(x), unwarped_read)
        torch.testing.assert_close(older(x), warped_read)
    again = splice.save(older, tmp_path / "again")
    assert json.loads((again / MANIFEST_NAME).read_text())["loc_reads"] == "warped"  # kept when written again
