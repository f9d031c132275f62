"""The identity checks compare the splice, not the probe: a base that normalises its input in place, or that keeps
dropout active in eval mode (Monte Carlo dropout), is the same model after a splice at the identity.

Reference for the ONNX row: onnxruntime (CPUExecutionProvider), through splice's export parity.
"""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch import nn

import splice
from splice.surgery import warps_of


class InPlaceNormNet(nn.Module):
    """Normalises its input in place, as some deployment code does to save a copy."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)
        self.head = nn.Linear(4, 3)

    def forward(self, x):
        x.sub_(0.5).div_(0.25)
        return self.head(F.adaptive_avg_pool2d(torch.relu(self.conv(x)), 1).flatten(1))


class DropoutAlwaysNet(nn.Module):
    """Keeps dropout on in eval mode (Monte Carlo dropout): every call draws new masks."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 8, 3, padding=1)
        self.head = nn.Linear(8, 3)

    def forward(self, x):
        h = F.dropout(torch.relu(self.conv(x)), p=0.3, training=True)
        return self.head(F.adaptive_avg_pool2d(h, 1).flatten(1))


def _rows(report) -> dict[str, bool]:
    return {c.check: c.passed for c in report.checks}


def test_a_base_that_changes_its_input_in_place_passes_insert_verify_and_onnx():
    torch.manual_seed(0)
    base = InPlaceNormNet()
    spliced = splice.insert(base, at="input", input_shape=(1, 16, 16))  # its identity check used to see 5.16 off
    report = splice.verify(spliced, onnx=True)
    assert report.passed, _rows(report)
    assert _rows(report)["outputs"] and _rows(report)["onnx"]
    x = torch.rand(2, 1, 16, 16)
    with torch.no_grad():
        assert torch.equal(base(x.clone()), spliced(x.clone()))


def test_a_base_that_samples_in_eval_mode_is_compared_under_the_same_draws():
    torch.manual_seed(0)
    base = DropoutAlwaysNet().eval()
    x = torch.rand(2, 1, 16, 16)
    with torch.no_grad():
        assert not torch.equal(base(x), base(x))  # the dice, which a check must not mistake for the splice
    spliced = splice.insert(base, at="input", input_shape=(1, 16, 16))
    report = splice.verify(spliced)
    assert report.passed, _rows(report)
    state = torch.random.get_rng_state()
    splice.verify(spliced)
    assert torch.equal(torch.random.get_rng_state(), state)  # the caller's generator is left as it was


def test_a_warp_that_moves_is_still_caught_under_the_same_draws():
    torch.manual_seed(0)
    spliced = splice.insert(DropoutAlwaysNet().eval(), at="input", input_shape=(1, 16, 16))
    warp = next(iter(warps_of(spliced).values()))
    with torch.no_grad():
        warp.head.fc2.bias.add_(torch.tensor([0.0, 0.0, 0.3, 0.0, 0.0, 0.0]))  # a shift of 0.3 half-widths
    report = splice.verify(spliced)
    assert not report.passed and not _rows(report)["warps"]


def test_eval_gives_each_model_and_condition_the_images_themselves():
    torch.manual_seed(0)
    base = InPlaceNormNet()
    base.head = nn.Linear(4, 10)  # the digits' ten classes
    result = splice.evaluate(base, data="digits", against=base, distort="rotate=0",
                             model_options=splice.ModelOptions(input_shape=(1, 16, 16)))
    mine, theirs = result, result["against"]
    assert mine["clean"] == theirs["clean"]  # the second model used to get the first's normalised images
    assert mine["sweeps"]["rotate"][0]["accuracy"] == mine["clean"]["accuracy"]
    assert mine["sweeps"]["rotate"][0]["loss"] == pytest.approx(mine["clean"]["loss"], rel=1e-6)
