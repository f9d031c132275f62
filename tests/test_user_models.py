"""Models as users write them: factories that declare several inputs, models with several inputs met by the
commands that feed one image per sample, outputs that do not depend on the input, dataclass outputs, backbones the
factory froze, channels_last models."""

from __future__ import annotations

import dataclasses
import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn

import splice
from splice.errors import SourceError
from splice.sources import load_source


class _RgbDepth(nn.Module):
    """Two inputs: an image and a depth map of the same size."""

    def __init__(self):
        super().__init__()
        self.a = nn.Conv2d(3, 4, 3, padding=1)
        self.b = nn.Conv2d(1, 4, 3, padding=1)
        self.c = nn.Conv2d(8, 4, 3, padding=1)
        self.fc = nn.Linear(4, 3)

    def forward(self, x, depth):
        h = torch.cat([F.relu(self.a(x)), F.relu(self.b(depth))], 1)
        return self.fc(self.c(h).mean((2, 3)))


def rgb_depth():
    torch.manual_seed(0)
    return _RgbDepth().eval()


rgb_depth.input_shape = [(3, 16, 16), (1, 16, 16)]


def badly_declared():
    return rgb_depth()


badly_declared.input_shape = "sixteen by sixteen"

RGB_DEPTH = f"{__file__}:rgb_depth"


@dataclasses.dataclass
class Scores:
    logits: torch.Tensor
    fmap: torch.Tensor
    note: str = "scores"


class _DataclassOut(nn.Module):
    def __init__(self):
        super().__init__()
        self.c1 = nn.Conv2d(3, 4, 3, padding=1)
        self.c2 = nn.Conv2d(4, 4, 3, padding=1)
        self.fc = nn.Linear(4, 5)

    def forward(self, x):
        f = self.c2(F.relu(self.c1(x)))
        return Scores(self.fc(f.mean((2, 3))), f)


def dataclass_out():
    torch.manual_seed(0)
    return _DataclassOut().eval()


dataclass_out.input_shape = (3, 16, 16)


def frozen_backbone():
    """A factory that freezes its backbone (BatchNorm included) itself, as users fine-tuning a head do."""
    torch.manual_seed(0)
    back = nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.BatchNorm2d(4), nn.ReLU(),
                         nn.Conv2d(4, 4, 3, stride=2, padding=1), nn.ReLU())
    for p in back.parameters():
        p.requires_grad_(False)
    return nn.Sequential(back, nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(4, 10))


frozen_backbone.input_shape = (1, 24, 24)


class _Grouped(nn.Module):
    def __init__(self):
        super().__init__()
        self.c1 = nn.Conv2d(3, 8, 3, padding=1)
        self.gn = nn.GroupNorm(2, 8)
        self.c2 = nn.Conv2d(8, 8, 3, padding=1)
        self.fc = nn.Linear(8, 5)

    def forward(self, x):
        x = F.gelu(self.gn(self.c1(x)))
        return self.fc(self.c2(x).mean((2, 3)))


def channels_last_net():
    torch.manual_seed(0)
    return _Grouped().eval().to(memory_format=torch.channels_last)


channels_last_net.input_shape = (3, 16, 16)


class Plain:  # neither a dataclass nor a container: splice cannot look into it
    def __init__(self, logits):
        self.logits = logits


class _PlainOut(_DataclassOut):
    def forward(self, x):
        return Plain(super().forward(x).logits)


class _Constant(nn.Module):
    """Outputs that do not depend on the input: the input's path to them is detached and multiplied by zero."""

    def __init__(self):
        super().__init__()
        self.c1 = nn.Conv2d(1, 4, 3, padding=1)
        self.bias = nn.Parameter(torch.randn(10))

    def forward(self, x):
        return self.bias.expand(x.shape[0], -1) + 0 * self.c1(x).mean((1, 2, 3))[:, None].detach()


def constant():
    torch.manual_seed(0)
    return _Constant().eval()


constant.input_shape = (1, 24, 24)


def _quiet_source(spec, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # random weights, on purpose
        return load_source(spec, **kwargs)


# ----------------------------------------------------------------------------- a factory that declares two inputs


def test_a_factory_may_declare_one_shape_per_input():
    # was: "malformed input shape [(3, 16, 16), (1, 16, 16)]", with or without --input-shape
    assert _quiet_source(RGB_DEPTH).input_shapes == ((3, 16, 16), (1, 16, 16))
    given = _quiet_source(RGB_DEPTH, input_shape=[(3, 8, 8), (1, 8, 8)])
    assert given.input_shapes == ((3, 8, 8), (1, 8, 8))  # the user's shapes win over the declaration


def test_a_declaration_is_read_only_when_no_shape_is_given():
    spec = f"{__file__}:badly_declared"
    assert _quiet_source(spec, input_shape=["3x16x16", "1x16x16"]).input_shapes == ((3, 16, 16), (1, 16, 16))
    with pytest.raises(SourceError, match=r"malformed input shape 'sixteen by sixteen'"):
        _quiet_source(spec)


# ----------------------------------------------------------------------------- one image per sample


@pytest.fixture(scope="module")
def two_input_folder(tmp_path_factory):
    import splice

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # random weights, on purpose
        spliced = splice.insert(RGB_DEPTH, at="input", warp=splice.WarpConfig(head_width=4))
    return splice.save(spliced, tmp_path_factory.mktemp("two") / "rgbd")


@pytest.mark.parametrize("command", ["tune", "eval", "inspect"])
def test_commands_that_feed_one_image_refuse_a_model_with_two_inputs(two_input_folder, tmp_path, capsys, command):
    from splice.cli import main

    # was: "internal error: TypeError: forward() missing 1 required positional argument: 'depth'"
    args = {"tune": ["tune", str(two_input_folder), "--recipe", "warp-only", "--data", "digits", "--epochs", "1",
                     "--out", str(tmp_path / "run"), "--quiet"],
            "eval": ["eval", str(two_input_folder), "--data", "digits", "--distort", "none"],
            "inspect": ["inspect", str(two_input_folder), "--data", "digits", "--n", "2", "--out", str(tmp_path / "i")]}
    assert main([*args[command], "--trust-code"]) == 2
    err = capsys.readouterr().err.strip()
    verb = "evaluate" if command == "eval" else command
    assert len(err.splitlines()) == 1 and "internal error" not in err
    assert f"{verb} feeds one image per sample, but the model takes 2 inputs (3x16x16, 1x16x16)" in err
    assert "in your own code" in err
    assert not (tmp_path / "run").exists() and not (tmp_path / "i").exists()  # refused before anything was written


# ----------------------------------------------------------------------------- nothing for the warps to learn


def test_tune_stops_in_one_line_when_the_outputs_ignore_the_input(tmp_path):
    import splice
    from splice.errors import SpliceError
    from splice.recipes import Recipe, load_recipe
    from splice.training import RunOptions, tune

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # random weights, on purpose
        folder = splice.save(splice.insert(f"{__file__}:constant", at="input", warp=splice.WarpConfig(head_width=4)),
                             tmp_path / "const")
    d = load_recipe("warp-only").with_overrides(epochs=1, batch_size=64).to_dict()
    d["pretrain"]["epochs"] = 0
    # was: "element 0 of tensors does not require grad and does not have a grad_fn" from loss.backward()
    with pytest.raises(SpliceError, match=r"^the loss does not depend on any parameter being trained: the model's "
                                          r"outputs do not depend on its input at all .* nothing for the warps to "
                                          r"learn; 'splice verify' shows it"):
        tune(str(folder), recipe=Recipe.from_dict(d), data="digits", out=tmp_path / "run",
             run_options=RunOptions(progress=False), model_options=splice.ModelOptions(trust_code=True))
    import json

    run = json.loads((tmp_path / "run" / "run.json").read_text())
    assert run["status"] == "failed" and run["error"].startswith("the loss does not depend on any parameter")


# ----------------------------------------------------------------------------- dataclass outputs


def test_dataclass_outputs_are_walked_field_by_field():
    from splice.compare import class_logits, detached, flatten_outputs, tensors_out

    a, b = torch.randn(2, 5, requires_grad=True), torch.randn(2, 4, 3, 3)
    out = [Scores(a, b), {"s": Scores(b, a)}]
    flat = flatten_outputs(out)
    assert list(flat) == ["out[0].logits", "out[0].fmap", "out[1].s.logits", "out[1].s.fmap"]  # declared order
    assert flat["out[0].logits"] is a and flat["out[1].s.fmap"] is a
    kept = detached(Scores(a, b, note="kept"))
    assert type(kept) is Scores and kept.note == "kept" and not kept.logits.requires_grad
    assert torch.equal(kept.logits, a) and torch.equal(kept.fmap, b)
    assert class_logits(Scores(a, b)) is a
    assert tensors_out(Scores(a, b)) == (a, b)  # what the exporters take: the tensors, in flatten order


def test_a_model_returning_a_dataclass_is_spliced_and_exported(tmp_path):
    import onnxruntime as ort

    import splice

    model = dataclass_out()
    pts = splice.points(model, input_shape=(3, 16, 16))
    assert [(p.name, p.cut) for p in pts] == [("input", True), ("c1", True), ("relu", True)]  # was: no cut at all
    spliced = splice.insert(model, at="recommended", warp=splice.WarpConfig(head_width=4), input_shape=(3, 16, 16))
    spliced.eval()
    x = torch.randn(2, 3, 16, 16)
    with torch.no_grad():
        want, got = model(x), spliced(x)
    assert type(got) is Scores and torch.equal(got.logits, want.logits) and torch.equal(got.fmap, want.fmap)
    result = splice.export(spliced, onnx=tmp_path / "m.onnx")["exports"][0]
    assert result["format"] == "onnx"
    session = ort.InferenceSession(str(tmp_path / "m.onnx"), providers=["CPUExecutionProvider"])
    outs = session.run(None, {session.get_inputs()[0].name: x.numpy()})
    # onnxruntime is the outside reference: the file's outputs are the dataclass's tensors, in field order
    assert len(outs) == 2
    torch.testing.assert_close(torch.from_numpy(outs[0]), want.logits, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(torch.from_numpy(outs[1]), want.fmap, rtol=1e-5, atol=1e-5)


def test_an_output_splice_cannot_look_into_is_named_with_what_it_supports():
    import splice
    from splice.errors import GraphError

    torch.manual_seed(0)
    with pytest.raises(GraphError, match=r"^_PlainOut returns Plain, which holds no tensors splice can find; splice "
                                         r"supports outputs that are a tensor, or tuples, lists, dicts and dataclass "
                                         r"instances holding tensors"):
        splice.points(_PlainOut().eval(), input_shape=(3, 16, 16))


# ----------------------------------------------------------------------------- parameters the factory froze


def test_joint_tune_keeps_what_the_factory_froze(tmp_path, capsys):
    import json

    from safetensors.torch import load_file

    import splice
    from splice.recipes import Recipe, load_recipe
    from splice.training import RunOptions, tune

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # random weights, on purpose
        folder = splice.save(splice.insert(f"{__file__}:frozen_backbone", at="input",
                                           warp=splice.WarpConfig(head_width=4)), tmp_path / "frozen")
    d = load_recipe("joint").with_overrides(epochs=1, batch_size=64).to_dict()
    d["pretrain"]["epochs"] = 0
    tune(str(folder), recipe=Recipe.from_dict(d), data="digits", out=tmp_path / "run",
         run_options=RunOptions(quiet=True), model_options=splice.ModelOptions(trust_code=True))
    before, after = load_file(folder / "weights.safetensors"), load_file(tmp_path / "run" / "last" / "weights.safetensors")
    frozen = [k for k, p in frozen_backbone().named_parameters() if not p.requires_grad]
    assert len(frozen) == 6
    for k in [*frozen, "0.1.running_mean", "0.1.running_var", "0.1.num_batches_tracked"]:
        assert torch.equal(before[k], after[k]), k  # bitwise unchanged (was: trained, and BatchNorm stats moved)
    for k in ["3.weight", "3.bias", "splice_warps.input.head.fc2.bias"]:
        assert not torch.equal(before[k], after[k]), k  # what is not frozen did train
    run = json.loads((tmp_path / "run" / "run.json").read_text())
    assert run["frozen_by_model"] == {"parameters": 6, "modules": ["0"]}
    out = capsys.readouterr()
    told = [line for line in (out.out + out.err).splitlines() if "requires_grad=False" in line]
    assert told == ["6 base parameters the model sets requires_grad=False stay frozen, as if the recipe's 'freeze' "
                    "named them; module 0 in eval mode"]


# ----------------------------------------------------------------------------- channels_last


def test_a_warp_returns_a_channels_last_input_in_that_layout():
    from splice.warps import Warp, WarpConfig

    warp = Warp(WarpConfig(head_width=4), (8, 16, 16)).eval()
    with torch.no_grad():
        warp.head.fc2.bias.add_(0.05)  # away from the identity: a real resample
    x = torch.randn(2, 8, 16, 16)
    cl = x.contiguous(memory_format=torch.channels_last)
    with torch.no_grad():
        plain, last = warp(x), warp(cl)
    assert plain.is_contiguous()
    assert last.is_contiguous(memory_format=torch.channels_last) and not last.is_contiguous()
    torch.testing.assert_close(last, plain, rtol=1e-6, atol=1e-6)  # torch.nn.functional.grid_sample on either


def test_a_channels_last_model_spliced_at_a_group_norm_is_bit_exact(tmp_path):
    import splice

    spec = f"{__file__}:channels_last_net"
    base = channels_last_net()
    x = torch.randn(3, 3, 16, 16)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # random weights, on purpose
        for at in ("input", "c1", "gn"):
            spliced = splice.insert(spec, at=at, warp=splice.WarpConfig(head_width=4)).eval()
            with torch.no_grad():
                assert torch.equal(spliced(x), base(x)), at  # was 6e-8 off at gn, 1e-7 at c1
        folder = splice.save(spliced, tmp_path / "cl")
    loaded = splice.load(folder, trust_code=True)
    assert loaded.c1.weight.is_contiguous(memory_format=torch.channels_last)  # was: contiguous after load
    with torch.no_grad():
        assert torch.equal(loaded(x), base(x))
    result = splice.export(folder, onnx=tmp_path / "cl.onnx", trust_code=True)["exports"][0]
    assert result["format"] == "onnx"  # written only after its onnxruntime parity check passed


class _NamedLikeAGraphModule(nn.Module):
    """A parameter named ``code``, which a traced GraphModule keeps for its generated source."""

    def __init__(self):
        super().__init__()
        self.c1, self.c2 = nn.Conv2d(3, 4, 3, padding=1), nn.Conv2d(4, 4, 3, padding=1)
        self.code = nn.Parameter(torch.full((4,), 0.1))

    def forward(self, x):
        return self.c2(torch.relu(self.c1(x) + self.code.view(1, -1, 1, 1))).mean((2, 3))


def test_a_model_attribute_named_like_a_graph_modules_goes_to_hooks():
    """It was an internal error ("Code has not been generated"); points and insert now agree on hooks."""
    from splice.graph import TraceFallbackWarning

    torch.manual_seed(0)
    with pytest.warns(TraceFallbackWarning, match="'code' share a name"):
        assert {p.mechanism for p in splice.points(_NamedLikeAGraphModule(), input_shape=(3, 16, 16))} == {"hooks"}
    with pytest.warns(TraceFallbackWarning):
        spliced = splice.insert(_NamedLikeAGraphModule(), at="recommended", input_shape=(3, 16, 16))
    assert splice.verify(spliced).passed


def test_points_json_of_a_two_input_model_lists_every_input_shape(capsys):
    import json

    from splice.cli import main

    # RGB_DEPTH declares (3, 16, 16) and (1, 16, 16); the json module is the reference reader
    assert main(["points", RGB_DEPTH, "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["input_shape"] == [3, 16, 16] and report["input_shapes"] == [[3, 16, 16], [1, 16, 16]]
    assert list(report)[:3] == ["model", "input_shape", "input_shapes"]
    assert main(["points", "splice.models:tray_net", "--json"]) == 0
    assert "input_shapes" not in json.loads(capsys.readouterr().out)  # one input: as before


class _RescalesItsInput(nn.Module):
    """A common user pattern: take 0-255 or 0-1 images, decided on the values (no tracer or meta pass follows it)."""

    def __init__(self):
        super().__init__()
        self.features = nn.Sequential(nn.Conv2d(3, 8, 3, 2, 1), nn.ReLU(), nn.Conv2d(8, 8, 3, 2, 1), nn.ReLU())
        self.fc = nn.Linear(8, 4)

    def forward(self, x):
        if x.max() > 1.0:
            x = x / 255.0
        return self.fc(self.features(x).mean((2, 3)))


def test_a_model_that_branches_on_its_input_values_is_spliced_at_the_input(tmp_path):
    from splice.graph import TraceFallbackWarning

    torch.manual_seed(0)
    model = _RescalesItsInput().eval()
    with pytest.warns(TraceFallbackWarning, match=r"only 'input' is listed .*a meta-device forward failed in the "
                                                  r"forward of _RescalesItsInput itself at test_user_models\.py:\d+ "):
        spliced = splice.insert(model, at="recommended", input_shape=(3, 32, 32))
    assert [p.name for p in spliced.splice_info.points] == ["input"]
    # the meta run stopped before any layer could check the shape: insert's identity check runs the model for real,
    # and a layer of torch's refusing the shape is one line that says where to look
    from splice.errors import SpliceError

    with pytest.raises(SpliceError, match=r"_RescalesItsInput fails on the identity check's batch of two 1x32x32 "
                                          r"inputs \(RuntimeError: .*channels.*\); check --input-shape"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            splice.insert(model, at="input", input_shape=(1, 32, 32))

    class NeedsUnitRange(_RescalesItsInput):  # the model's own check of the values: not a shape problem
        def forward(self, x):
            if x.min() < 0:
                raise ValueError("pixels must be in [0, 1]")
            return super().forward(x)

    with pytest.raises(SpliceError, match=r"\(ValueError: pixels must be in \[0, 1\]\); the check feeds seeded "
                                          r"N\(0, 1\) values"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            splice.insert(NeedsUnitRange().eval(), at="input", input_shape=(3, 32, 32))
    # both branches, through the warp at the identity: the base's own outputs (a pre-hook on the root, the
    # model's forward itself untouched)
    for x in (torch.rand(2, 3, 32, 32), 255 * torch.rand(2, 3, 32, 32)):
        with torch.no_grad():
            assert torch.equal(spliced(x), model(x))
    # and from a file, as a user splices it: the folder loads and its certificate holds
    import inspect
    import textwrap

    code = "import torch\nfrom torch import nn\n\n" + textwrap.dedent(inspect.getsource(_RescalesItsInput))
    (tmp_path / "rescales.py").write_text(code + "\n\ndef net():\n    return _RescalesItsInput()\n")
    spec = f"{tmp_path / 'rescales.py'}:net"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        folder = splice.save(splice.insert(spec, at="input", input_shape=(3, 32, 32), trust_code=True),
                             tmp_path / "rescaled")
        loaded = splice.load(folder, trust_code=True).eval()
        report = splice.verify(folder, trust_code=True)
    assert report.passed
    from splice.store import load_base

    base = load_base(folder, trust_code=True).eval()
    for x in (torch.rand(3, 3, 32, 32), 255 * torch.rand(3, 3, 32, 32)):
        with torch.no_grad():
            assert torch.equal(loaded(x), base(x))


def test_a_submodule_named_meta_is_the_users_own():
    # fx keeps a GraphModule's record in the dict `meta`; a user's model may call a submodule so (image + metadata)
    class WithMeta(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(3, 4, 3, padding=1)
            self.meta = nn.Linear(4, 4)

        def forward(self, x):
            return self.meta(self.conv(x).mean((2, 3)))

    from splice.graph import TraceFallbackWarning

    torch.manual_seed(0)
    model = WithMeta().eval()
    with pytest.warns(TraceFallbackWarning, match="'meta' share a name"):
        spliced = splice.insert(model, at="input", input_shape=(3, 16, 16))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        report = splice.verify(spliced)
    assert report.passed, report.failed
    x = torch.rand(2, 3, 16, 16)
    with torch.no_grad():
        assert torch.equal(spliced(x), model(x))


def test_a_forward_that_takes_keywords_as_kwargs_keeps_them():
    # a traced graph would accept shift= into **extra and drop it; hooks run the model's own forward
    from splice.graph import TraceFallbackWarning

    class Options(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(3, 4, 3, padding=1)

        def forward(self, x, **extra):
            return self.conv(x).mean((2, 3)) + extra.get("shift", 0.0)

    torch.manual_seed(0)
    model = Options().eval()
    with pytest.warns(TraceFallbackWarning, match=r"takes keywords as \*\*extra"):
        spliced = splice.insert(model, at="input", input_shape=(3, 16, 16))
    assert spliced.splice_info.mechanism == "hooks"
    x = torch.rand(2, 3, 16, 16)
    with torch.no_grad():
        assert torch.equal(spliced(x, shift=1.0), model(x, shift=1.0))
        assert torch.equal(spliced(x=x), model(x))
