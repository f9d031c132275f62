"""Splicing where torch.fx cannot trace: the export view lists module outputs, forward hooks put the warps
there; --within a submodule; several inputs; the same guarantees (identity, names, gradients, folder,
verify, export) as a graph splice."""

from __future__ import annotations

import copy
import io
import json
import warnings

import numpy as np
import pytest
import torch
from torch import nn

import splice
from splice import graph
from splice.cli import main
from splice.errors import EditedManifestWarning, GraphError, PointError, SourceError
from splice.exporting import export
from splice.graph import TraceFallbackWarning
from splice.hooks import hooks_installed
from splice.manifest import MANIFEST_NAME
from splice.store import load, save
from splice.surgery import insert, warps_of
from splice.verification import verify
from splice.warps import WarpConfig

from harness import perturb_warps_

# The models below are factories in this file, so a folder naming them is rebuilt only with the opt-in
# (trust_code=True / --trust-code): the trust gate of splice.sources.trust at work.


class _Hooked(nn.Module):
    """A shape test in forward (fx cannot trace it), a residual branch, and a conv called twice."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, stride=2, padding=1)
        self.bn = nn.BatchNorm2d(8)
        self.act = nn.ReLU()
        self.block = nn.Conv2d(8, 8, 3, padding=1)
        self.down = nn.Conv2d(8, 8, 3, stride=2, padding=1)
        self.fc = nn.Linear(8, 4)

    def forward(self, x):
        if x.shape[-1] < 8:
            raise ValueError("too small")
        x = self.act(self.bn(self.stem(x)))
        x = x + self.block(x)
        x = self.block(self.down(x))
        return self.fc(x.mean((2, 3)))


class _Encoder(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(3, 8, 3, stride=2, padding=1)
        self.relu = nn.ReLU()
        self.conv2 = nn.Conv2d(8, 8, 3, stride=2, padding=1)
        self.conv3 = nn.Conv2d(8, 8, 3, padding=1)

    def forward(self, x):
        return self.conv3(self.conv2(self.relu(self.conv1(x))))


class _TwoImages(nn.Module):
    """Two inputs, an encoder that sees both images stacked in one batch (as optical-flow networks do)."""

    def __init__(self):
        super().__init__()
        self.encoder = _Encoder()
        self.head = nn.Conv2d(8, 2, 3, padding=1)

    def forward(self, image1, image2):
        if image1.shape != image2.shape:
            raise ValueError("the two images differ in shape")
        f1, f2 = self.encoder(torch.cat([image1, image2], 0)).chunk(2, 0)
        return [self.head(f1 - f2), self.head(f2 - f1)]


def hooked():
    torch.manual_seed(0)
    return _Hooked().eval()


def two_images():
    torch.manual_seed(0)
    return _TwoImages().eval()


hooked.input_shape = (3, 32, 32)
HOOKED = f"{__file__}:hooked"
TWO = f"{__file__}:two_images"
SHAPES = [(3, 32, 32), (3, 32, 32)]


def _quiet_insert(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)
        return insert(*args, **kwargs)


@pytest.fixture(scope="module")
def hooked_points():
    with pytest.warns(TraceFallbackWarning, match=r"points come from a meta-device run.*mechanism 'hooks'"):
        return {p.name: p for p in graph.points(hooked(), (3, 32, 32), all=True)}


def test_points_of_a_model_fx_cannot_trace_come_with_sites(hooked_points):
    pts = hooked_points
    assert list(pts) == ["input", "stem", "bn", "act", "block", "down", "block_1"]
    assert {p.mechanism for p in pts.values()} == {"hooks"}
    assert pts["block_1"].site == ("block", 1) and pts["act"].site == ("act", 0)
    # the residual branch: the block's first output re-joins its input at the add
    assert not pts["block"].cut and pts["block"].in_branch and pts["block"].join.endswith("add")
    assert pts["act"].cut and pts["down"].cut and pts["block_1"].cut
    assert pts["block_1"].shape == (8, 8, 8) and pts["block_1"].stride == 4


def test_a_hooks_splice_is_exact_at_the_identity_and_keeps_every_name():
    model = hooked()
    spliced = _quiet_insert(model, at=["input", "act", "block_1"], input_shape=(3, 32, 32))
    assert type(spliced) is _Hooked and not hooks_installed(model) and hooks_installed(spliced)
    info = spliced.splice_info
    assert info.mechanism == "hooks" and info.sites["block_1"] == {"module": "block", "call": 1, "shape": [8, 8, 8], "calls": 2}
    x = torch.randn(3, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(model(x), spliced(x))
    base_keys, keys = set(model.state_dict()), set(spliced.state_dict())
    assert base_keys <= keys and all(k.startswith("splice_warps.") for k in keys - base_keys)
    spliced.train()
    spliced(x).pow(2).mean().backward()
    for name, warp in warps_of(spliced).items():
        final = [m for m in warp.head.modules() if isinstance(m, nn.Linear)][-1]
        assert final.weight.grad is not None and final.weight.grad.abs().sum() > 0, name


def test_the_second_call_of_a_module_is_warped_there_only():
    model = hooked()
    spliced = _quiet_insert(model, at="block_1", input_shape=(3, 32, 32))
    perturb_warps_(spliced, scale=0.3)
    warp = warps_of(spliced)["block_1"]
    x = torch.randn(2, 3, 32, 32)
    with torch.no_grad():  # the forward written out, with the warp after the block's second call only
        h = model.act(model.bn(model.stem(x)))
        h = h + model.block(h)
        want = model.fc(warp(model.block(model.down(h))).mean((2, 3)))
        assert torch.equal(spliced(x), want)
        assert not torch.equal(spliced(x), model(x))


def test_a_hooks_splice_survives_deepcopy_and_pickle():
    spliced = _quiet_insert(hooked(), at=["input", "block_1"], input_shape=(3, 32, 32))
    perturb_warps_(spliced)
    x = torch.randn(1, 3, 32, 32)
    with torch.no_grad():
        want = spliced(x)
        twin = copy.deepcopy(spliced)
        assert torch.equal(twin(x), want)
        buf = io.BytesIO()
        torch.save(spliced, buf)  # a whole module: the hooks are plain picklable objects
        again = torch.load(io.BytesIO(buf.getvalue()), weights_only=False)
        assert torch.equal(again(x), want)
    # the copies own their warps: moving one does not move the other
    with torch.no_grad():
        for p in warps_of(twin)["input"].parameters():
            p.add_(1.0)
        assert torch.equal(spliced(x), want)


def test_the_localisation_input_must_come_first():
    with pytest.raises(PointError, match="--loc-from 'block_1' comes after point 'act'"):
        _quiet_insert(hooked(), at="act", warp=WarpConfig(loc_from="block_1"), input_shape=(3, 32, 32))
    model = hooked()
    spliced = _quiet_insert(model, at="act", warp=WarpConfig(loc_from="input"), input_shape=(3, 32, 32))
    x = torch.randn(2, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(spliced(x), model(x))


def test_a_hooks_folder_records_the_mechanism_and_rebuilds(tmp_path):
    folder = save(_quiet_insert(HOOKED, at=["input", "block_1"]), tmp_path / "hooked")
    manifest = json.loads((folder / MANIFEST_NAME).read_text())
    assert manifest["schema_version"] == 2 and manifest["mechanism"] == "hooks"
    assert manifest["sites"]["block_1"] == {"module": "block", "call": 1, "shape": [8, 8, 8], "calls": 2}
    model = load(folder, trust_code=True)
    assert hooks_installed(model) and model.splice_info.mechanism == "hooks"
    x = torch.randn(2, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(model(x), hooked()(x))
    report = verify(folder, onnx=True, trust_code=True)
    assert report.passed, [(r.check, r.detail) for r in report.checks if not r.passed]
    result = export(folder, onnx=tmp_path / "hooked.onnx", trust_code=True)["exports"][0]
    assert result["dynamic_batch"] and result["batch_sizes"] == [1, 3]
    # onnxruntime runs the file at batch sizes it was not traced with (dynamic batch by default)
    import onnxruntime as ort

    session = ort.InferenceSession(str(tmp_path / "hooked.onnx"), providers=["CPUExecutionProvider"])
    xs = torch.randn(5, 3, 32, 32)
    got = session.run(None, {"input": xs.numpy()})[0]
    with torch.no_grad():
        np.testing.assert_allclose(got, model(xs).numpy(), rtol=1e-4, atol=1e-5)  # onnxruntime, as in export


def test_a_manifest_site_the_model_lacks_is_one_line(tmp_path):
    folder = save(_quiet_insert(HOOKED, at=["block_1"]), tmp_path / "hooked")
    path = folder / MANIFEST_NAME
    manifest = json.loads(path.read_text())
    manifest["sites"]["block_1"]["module"] = "blok"
    path.write_text(json.dumps(manifest))
    # the sites are hashed beside the weights: the edit is named, then the site refused
    with pytest.warns(EditedManifestWarning, match="splice.json's sites differ"), \
            pytest.raises(PointError, match=r"sits on module 'blok', which the model does not have; did you mean"):
        load(folder, trust_code=True)


# ----------------------------------------------------------------------------- within, several inputs


def test_points_within_a_submodule_of_a_two_input_model():
    pts = graph.points(two_images(), SHAPES, within="encoder")
    assert [p.name for p in pts] == ["input", "conv1", "relu", "conv2"]  # conv3 has no conv after it
    assert pts[0].shape == (3, 32, 32) and {p.mechanism for p in pts} == {"hooks"}
    assert [p.name for p in pts if p.recommended] == ["input"]  # the input first, as at the top level


def test_within_splices_the_part_and_keeps_the_whole(tmp_path):
    spliced = insert(TWO, at="recommended", input_shape=SHAPES, within="encoder")
    info = spliced.splice_info
    assert info.within == "encoder" and info.extra_inputs == ((3, 32, 32),)
    a, b = torch.randn(2, 3, 32, 32), torch.randn(2, 3, 32, 32)
    with torch.no_grad():
        for got, want in zip(spliced(a, b), two_images()(a, b)):
            assert torch.equal(got, want)
    folder = save(spliced, tmp_path / "two")
    report = verify(folder, onnx=True, trust_code=True)
    assert report.passed, [(r.check, r.detail) for r in report.checks if not r.passed]
    result = export(folder, onnx=tmp_path / "two.onnx", trust_code=True)["exports"][0]  # raises unless parity holds
    # torch.export's solver meets a guard on the batch after cat-then-chunk that holds for every batch: the graph for
    # any batch is kept, checked at 5 and 9 too
    assert result["dynamic_batch"] and result["batch_sizes"] == [1, 3, 5, 9]


def test_within_names_a_module_that_exists():
    with pytest.raises(GraphError, match=r"--within 'encodr' is not a submodule of _TwoImages; did you mean "
                                         r"'encoder'.*Give a module qualname") as info:
        graph.points(two_images(), SHAPES, within="encodr")
    assert "\n" not in str(info.value)


def test_a_second_input_needs_its_shape():
    with pytest.raises(GraphError, match=r"forward takes 2 inputs \(image1, image2\) and 1 shape was given; give "
                                         r"one --input-shape per input"):
        graph.points(two_images(), (3, 32, 32), within="encoder")


def test_a_shape_for_an_input_the_forward_does_not_take_is_refused():
    # points listed the first shape and ignored the other; insert failed with an internal TypeError
    with pytest.raises(GraphError, match=r"forward takes 2 inputs \(image1, image2\) and 3 shapes were given"):
        graph.points(two_images(), [*SHAPES, (3, 32, 32)])
    with pytest.raises(GraphError, match=r"Sequential's forward takes 1 input \(input\) and 2 shapes were given"):
        graph.points(torch.nn.Sequential(torch.nn.Conv2d(3, 3, 1)), [(3, 8, 8), (1, 8, 8)])


def test_cli_takes_several_input_shapes_and_within(capsys):
    code = main(["points", TWO, "--input-shape", "3x32x32", "--input-shape", "3x32x32", "--within", "encoder",
                 "--json"])
    assert code == 0
    report = json.loads(capsys.readouterr().out)
    assert report["mechanism"] == "hooks" and report["input_shape"] == [3, 32, 32]
    code = main(["points", TWO, "--input-shape", "[[3, 32, 32], [3, 32, 32]]", "--within", "encoder", "--json"])
    assert code == 0 and json.loads(capsys.readouterr().out) == report


# ----------------------------------------------------------------------------- volumes and video


def test_a_volume_gets_one_line_not_a_shape_error(capsys):
    with pytest.raises(SourceError, match=r"has four dimensions; splice works on images \(C, H, W\) for now; "
                                          r"volumes and video \(5-D inputs\) come in a later release"):
        splice.load_source("splice.models:tray_net", input_shape="3x8x32x32")
    with pytest.raises(SourceError, match=r"if the first is the batch size, drop it: --input-shape 1x48x48$"):
        splice.load_source("splice.models:tray_net", input_shape="1x1x48x48")  # a shape with its batch, a slip
    video = nn.Sequential(nn.Conv3d(3, 4, 3), nn.ReLU())
    with pytest.raises(GraphError, match=r"convolves volumes or video \(Conv3d, 5-D inputs\).*a later release"):
        graph.points(video, (3, 32, 32))
    assert main(["points", "splice.models:tray_net", "--input-shape", "1x8x48x48"]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "later release" in err


def test_a_clip_shape_for_a_volume_network_gets_the_volume_line_not_the_batch_hint(tmp_path, capsys):
    # 3x16x32x32 is C x T x H x W for a model of 3-D convolutions (torch's nn.Conv3d takes (N, C, T, H, W)):
    # dropping its first number as a batch size would be wrong advice
    (tmp_path / "clips.py").write_text("import torch.nn as nn\n"
                                       "def video():\n    return nn.Sequential(nn.Conv3d(3, 4, 3))\n"
                                       "def frames():\n    return nn.Sequential(nn.Conv2d(3, 4, 3))\n")
    for shape in (["3x16x32x32"], ["[[3, 16, 32, 32]]"], ["3x16x32x32", "--input-shape", "4"]):
        assert main(["points", f"{tmp_path / 'clips.py'}:video", "--input-shape", *shape]) == 2
        err = [line for line in capsys.readouterr().err.strip().splitlines() if not line.startswith("warning:")]
        assert len(err) == 1 and "Sequential convolves volumes or video (Conv3d, 5-D inputs)" in err[0], err
        assert "batch size" not in err[0] and "drop it" not in err[0]
    video = nn.Sequential(nn.Conv3d(3, 4, 3))
    for call in (lambda: splice.points(video, input_shape=(3, 16, 32, 32)),
                 lambda: graph.points(video, (3, 16, 32, 32)),
                 lambda: splice.insert(video, at=["input"], input_shape="3x16x32x32")):
        with pytest.raises((SourceError, GraphError), match=r"convolves volumes or video") as told:
            call()
        assert "drop it" not in str(told.value)
    # a model of images given four numbers keeps the hint: the first is the batch size, a slip
    assert main(["points", f"{tmp_path / 'clips.py'}:frames", "--input-shape", "2x3x32x32"]) == 2
    err = [line for line in capsys.readouterr().err.strip().splitlines() if not line.startswith("warning:")]
    assert len(err) == 1 and err[0].endswith("if the first is the batch size, drop it: --input-shape 3x32x32"), err
    with pytest.raises(SourceError, match=r"drop it: --input-shape 3x32x32$"):
        splice.points(nn.Sequential(nn.Conv2d(3, 4, 3)), input_shape=(2, 3, 32, 32))


# ----------------------------------------------------------------------------- verify's gradient verdicts


class _ZeroHead(nn.Module):
    """A classifier whose zero-initialised head makes the output independent of the input."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.fc = nn.Linear(8, 3)
        nn.init.zeros_(self.fc.weight)
        nn.init.zeros_(self.fc.bias)

    def forward(self, x):
        return self.fc(self.conv(x).mean((2, 3)))


class _SideBranch(nn.Module):
    """A branch computed and thrown away: a warp there is cut off from the loss."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.side = nn.Conv2d(8, 8, 3, padding=1)
        self.conv2 = nn.Conv2d(8, 8, 3, padding=1)
        self.unused = None

    def forward(self, x):
        x = self.conv(x)
        self.unused = self.side(x)
        return self.conv2(x).mean((2, 3))


def zero_head():
    return _ZeroHead()


def side_branch():
    return _SideBranch()


zero_head.input_shape = side_branch.input_shape = (3, 16, 16)


def test_an_output_independent_of_the_input_is_a_warning_not_a_failure(tmp_path):
    report = verify(save(insert(f"{__file__}:zero_head", at="input"), tmp_path / "zero"), trust_code=True)
    assert report.passed
    row = report["gradients"]
    assert row.passed and row.warning and row.numbers["input_grad"] == 0.0
    assert "outputs do not depend on its input (zero gradient" in row.detail


def test_a_warp_cut_off_from_the_loss_fails(tmp_path):
    # the forward keeps the side branch on self, which a traced graph would not: a hooks model
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", splice.graph.TraceFallbackWarning)
        with pytest.warns(splice.errors.SpliceWarning, match="is not a cut"):
            spliced = insert(f"{__file__}:side_branch", at="side")
        report = verify(save(spliced, tmp_path / "side"), trust_code=True)
    assert report.failed == ["gradients"]
    assert report["gradients"].numbers["input_grad"] > 0
    assert "zero gradient" in report["gradients"].detail and not report["gradients"].warning


# ----------------------------------------------------------------------------- eval --against


def net_without_shape():
    from splice.models import tray_net

    return tray_net()


def test_eval_against_a_spec_without_a_shape_takes_the_first_models():
    result = splice.evaluate("splice.models:tray_net", data="digits", distort="rotate=0",
                             against=f"{__file__}:net_without_shape")
    assert result["n_images"] > 0 and result["against_model"] is not None


def test_eval_against_a_pickled_module_without_a_shape_takes_the_first_models(tmp_path):
    """A whole pickled model that declares no input shape is compared like a spec without one (it asked for
    --input-shape, which --against does not pass on). Both see the same images, so the same module scores alike."""
    from splice.models import tray_net
    from splice.options import ModelOptions

    torch.manual_seed(0)
    net = tray_net()
    torch.save(net, tmp_path / "whole.pt")
    torch.save(net.state_dict(), tmp_path / "weights.pt")
    result = splice.evaluate("splice.models:tray_net", data="digits", distort="rotate=0,30", against=tmp_path / "whole.pt",
                             model_options=ModelOptions(weights=tmp_path / "weights.pt"),
                             against_options=ModelOptions(trust_pickle=True))
    assert result["against"] == {"clean": result["clean"], "sweeps": result["sweeps"]}


class _NeedsReal(nn.Module):
    """Reads a value (so it must be a leaf) and calls its parent's activation."""

    def __init__(self, act: nn.Module):
        super().__init__()
        self.act = act

    def forward(self, x):
        return self.act(x) * (1.0 if x.abs().amax().item() >= 0 else 2.0)


class _SharesWithALeaf(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem, self.c1, self.c2 = nn.Conv2d(3, 8, 3, 1, 1), nn.Conv2d(8, 8, 3, 1, 1), nn.Conv2d(8, 8, 3, 1, 1)
        self.act = nn.ReLU()
        self.mid = _NeedsReal(self.act)
        self.fc = nn.Linear(8, 3)

    def forward(self, x):
        x = self.act(self.stem(x))
        if x.shape[-1] > 8:  # a size branch: reached by hooks
            x = self.mid(self.c1(x))
        x = self.act(self.c2(x))
        return self.fc(x.mean((2, 3)))


def test_a_module_also_called_inside_a_leaf_is_no_point():
    # the leaf runs for real, unseen by the recording, so its call of the shared act was not counted; at run time
    # the hook counts it, and the warp listed as the act after c2 went on the act inside the leaf
    torch.manual_seed(0)
    with pytest.warns(TraceFallbackWarning):
        names = [p.name for p in graph.points(_SharesWithALeaf(), (3, 16, 16), all=True, leaves=[_NeedsReal])]
    assert "act" not in names and "act_1" not in names
    assert {"stem", "c1", "mid", "c2"} <= set(names)


class _Siamese(nn.Module):
    """One image; the encoder sees it and its mirror image."""

    def __init__(self):
        super().__init__()
        self.encoder = _Encoder()
        self.fc = nn.Linear(8, 3)

    def forward(self, x):
        f = self.encoder(x) + self.encoder(x.flip(-1))
        return self.fc(f.mean((2, 3)))


def test_inspecting_a_warp_that_runs_twice_per_forward_is_refused():
    # the capture kept the last call's theta (the mirror image's) and drew it on the image
    from splice.errors import DataError
    from splice.inspection import capture

    torch.manual_seed(0)
    spliced = _quiet_insert(_Siamese().eval(), at="input", within="encoder", input_shape=(3, 16, 16))
    with pytest.raises(DataError, match="warp 'input' ran 2 times in one forward"):
        capture(spliced, torch.rand(2, 3, 16, 16))


class _LoopBySize(nn.Module):
    """Calls one block once per 16 pixels of width: fewer calls on a smaller input."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 4, 3, padding=1)
        self.block = nn.Conv2d(4, 4, 3, padding=1)
        self.fc = nn.Linear(4, 2)

    def forward(self, x):
        h = self.stem(x)
        for _ in range(x.shape[-1] // 16):
            h = torch.relu(self.block(h))
        return self.fc(h.mean((2, 3)))


def test_a_point_the_forward_does_not_reach_is_told():
    # spliced at the third call of a block that runs once per 16 px: at 32 px it runs twice, and the warp was
    # skipped without a word
    torch.manual_seed(0)
    spliced = _quiet_insert(_LoopBySize().eval(), at="block_2", input_shape=(3, 48, 48))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        spliced(torch.rand(1, 3, 48, 48))  # the spliced size: no warning
    with pytest.warns(splice.errors.SpliceWarning, match="did not reach point block_2, so its warp did not run"):
        spliced(torch.rand(1, 3, 32, 32))


def test_images_passed_by_keyword_go_through_the_input_warp():
    # model(x=images), as a Hugging Face caller passes pixel_values=: the pre-hook reads keywords too
    torch.manual_seed(0)
    model = _Hooked().eval()
    spliced = _quiet_insert(model, at="input", input_shape=(3, 32, 32)).eval()
    perturb_warps_(spliced, scale=0.3)  # as tuned: away from the identity
    x = torch.rand(2, 3, 32, 32)
    with torch.no_grad():
        by_position, by_name, base = spliced(x), spliced(x=x), model(x)
    assert (by_position - base).abs().max() > 1e-3  # the warp moves the outputs
    assert torch.equal(by_name, by_position)
    # a localisation head that reads the input, at a feature point, with the images passed by keyword
    spliced = _quiet_insert(model, at="act", warp=WarpConfig(loc_from="input"), input_shape=(3, 32, 32)).eval()
    perturb_warps_(spliced, scale=0.3)
    with torch.no_grad():
        assert torch.equal(spliced(x=x), spliced(x))
    # no images where the input warp looks: refused, never run unwarped
    spliced = _quiet_insert(model, at="input", input_shape=(3, 32, 32)).eval()
    with pytest.raises(RuntimeError, match=r"the warp at 'input' of _Hooked found no image tensor in this call "
                                           r"\(first argument or x=\)"):
        spliced(images=x)


class _TakesAList(nn.Module):
    """Images as a list of (C, H, W) tensors, as torchvision's detectors take them, and a shape test fx cannot
    trace."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)

    def forward(self, images):
        if isinstance(images, (list, tuple)):  # each resized to 16x16, as a detector's transform does
            images = [nn.functional.interpolate(t[None], size=(16, 16), mode="bilinear")[0] for t in images]
        x = torch.stack(list(images)) if isinstance(images, (list, tuple)) else images
        if x.shape[-1] < 8:
            raise ValueError("too small")
        return self.conv(x).mean((2, 3))


def test_a_list_of_images_goes_through_the_input_warp():
    torch.manual_seed(0)
    model = _TakesAList().eval()
    spliced = _quiet_insert(model, at="input", input_shape=(3, 16, 16)).eval()
    perturb_warps_(spliced, scale=0.3)
    x = torch.rand(2, 3, 16, 16)
    with torch.no_grad():
        batch = spliced(x)
        assert (batch - model(x)).abs().max() > 1e-3  # warped
        assert torch.equal(spliced(list(x)), batch) and torch.equal(spliced(tuple(x)), batch)
    with pytest.raises(RuntimeError, match=r"takes images of one size, and this call passes 2 \(3x16x16, 3x20x20\)"):
        spliced([x[0], torch.rand(3, 20, 20)])
    # without a warp at the input, a list of several sizes is the model's business (a detector resizes them)
    inner = _quiet_insert(model, at="conv", input_shape=(3, 16, 16)).eval()
    images = [torch.rand(3, 16, 16), torch.rand(3, 20, 24)]
    with torch.no_grad():
        assert torch.equal(inner(images), model(images))
