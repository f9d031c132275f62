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
