"""Models as users write them: factories that declare several inputs, models with several inputs met by the
commands that feed one image per sample, outputs that do not depend on the input, dataclass outputs, backbones the
factory froze, channels_last models."""

from __future__ import annotations

import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn

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
