"""Models that count or track what they see in their own forward (a counter buffer, a tensor attribute, a running
statistic of the root): listed and spliced without hanging, spliced faithfully, and the caller's tensors left as
they were."""

from __future__ import annotations

import warnings

import pytest
import torch
from torch import nn

import splice
from splice.copies import private_buffers
from splice.graph import TraceFallbackWarning
from splice.verification import verify_models


class _Counted(nn.Module):
    """Counts the images it has seen: ``self.seen += x.shape[0]``, in a buffer or a plain tensor attribute."""

    def __init__(self, buffer: bool):
        super().__init__()
        torch.manual_seed(0)
        self.conv, self.head = nn.Conv2d(3, 4, 3, padding=1), nn.Linear(4, 3)
        if buffer:
            self.register_buffer("seen", torch.zeros(()))
        else:
            self.seen = torch.zeros(())

    def forward(self, x):
        self.seen += x.shape[0]
        return self.head(torch.relu(self.conv(x)).mean((2, 3)))


@pytest.mark.parametrize("buffer", [True, False])
def test_a_counting_root_is_listed_and_spliced_and_its_count_is_left_alone(buffer):
    # tracing left the Proxy of the update in the twin's buffer, which shape propagation then fed back into the
    # finished tracer: points never returned; a plain tensor attribute was shared with the caller and counted
    model = _Counted(buffer).eval()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)
        assert [p.name for p in splice.points(model, (3, 8, 8))] == ["input"]
        spliced = splice.insert(model, at="input", input_shape=(3, 8, 8))
        report = verify_models(model, spliced)
    assert report.passed, report.failed
    assert float(model.seen) == 0.0  # listing, tracing, the identity check and verify ran on copies
    x = torch.rand(3, 3, 8, 8)
    with torch.no_grad():
        assert torch.equal(spliced(x), model(x))
    assert float(model.seen) == 3.0 and float(spliced.seen) == 3.0  # each counts its own calls, as the base does


class _Monitored(nn.Module):
    """Keeps a running mean of its features in a buffer of the root, updated in place under no_grad."""

    def __init__(self):
        super().__init__()
        torch.manual_seed(0)
        self.conv, self.head = nn.Conv2d(3, 4, 3, padding=1), nn.Linear(4, 3)
        self.register_buffer("feature_mean", torch.full((4,), 0.5))

    def forward(self, x):
        h = torch.relu(self.conv(x))
        with torch.no_grad():
            self.feature_mean.mul_(0.9).add_(0.1 * h.mean((0, 2, 3)))
        return self.head(h.mean((2, 3)))


def test_a_root_statistic_updated_while_tracing_sends_the_model_to_hooks():
    # the tracer ran mul_(0.9) on the real buffer once and recorded only the add_: the spliced graph's statistic
    # drifted from the base's from the first call (0.4027 against 0.5423 after three), unseen by every check
    model = _Monitored().eval()
    # the trace stops at the no_grad block now, before the update (a block it would drop), with the same outcome
    with pytest.warns(TraceFallbackWarning, match="changes its buffer .feature_mean.|switches gradients or autocast"):
        spliced = splice.insert(model, at="input", input_shape=(3, 8, 8))
    assert spliced.splice_info.mechanism == "hooks"
    reference = _Monitored().eval()
    for _ in range(3):
        x = torch.rand(2, 3, 8, 8)
        with torch.no_grad():
            assert torch.equal(spliced(x), reference(x))
    assert torch.equal(spliced.feature_mean, reference.feature_mean)
    assert torch.equal(model.feature_mean, torch.full((4,), 0.5))


def test_a_twin_copies_plain_tensor_attributes_and_keeps_views_of_buffers():
    model = nn.Module()
    model.register_buffer("grid", torch.arange(6.0).reshape(2, 3))
    model.row = model.grid[0]  # a view of a buffer: shared, as a view must stay one
    model.tally = torch.zeros(())  # the twin's own
    model.weight_cache = nn.Parameter(torch.ones(2)) * 2  # part of an autograd graph: shared
    twin = private_buffers(model)
    assert twin.tally is not model.tally and torch.equal(twin.tally, model.tally)
    twin.tally += 1
    assert float(model.tally) == 0.0
    assert twin.row is model.row and twin.weight_cache is model.weight_cache


class _Tally(nn.Module):
    def __init__(self, kind: str):
        super().__init__()
        self.kind, self.conv = kind, nn.Conv2d(4, 4, 3, padding=1)
        if kind == "buffer":
            self.register_buffer("seen", torch.zeros(()))
        elif kind == "tensor":
            self.seen = torch.zeros(())
        else:
            self.seen = 0

    def forward(self, x):
        self.seen += x.shape[0]
        return self.conv(x)


class _Inner(nn.Module):
    def __init__(self, kind: str):
        super().__init__()
        self.a, self.tally, self.head = nn.Conv2d(3, 4, 3, padding=1), _Tally(kind), nn.Linear(4, 2)

    def forward(self, x):
        return self.head(self.tally(self.a(x)).mean((2, 3)))


@pytest.mark.parametrize("kind", ["buffer", "tensor", "int"])
def test_a_counting_submodule_stays_one_step_and_counts_in_the_splice(kind):
    # a buffer the trace replaced with a Proxy crashed the next round ("symbolically traced variables cannot be
    # used as inputs to control flow"); a tensor attribute hung shape propagation; an int counted once, tracing
    model = _Inner(kind).eval()
    assert "tally" in [p.module for p in splice.points(model, (3, 8, 8), all=True)]
    spliced = splice.insert(model, at=["input", "a"], input_shape=(3, 8, 8))
    assert spliced.splice_info.mechanism == "fx" and float(model.tally.seen) == 0
    x = torch.rand(2, 3, 8, 8)
    with torch.no_grad():
        assert torch.equal(spliced(x), model(x))
    assert float(spliced.get_submodule("tally").seen) == 2 and float(model.tally.seen) == 2


class _Warmup(nn.Module):
    """Doubles its logits after three calls: a schedule kept in a Python int."""

    def __init__(self):
        super().__init__()
        torch.manual_seed(0)
        self.conv, self.head, self.calls = nn.Conv2d(3, 4, 3, padding=1), nn.Linear(4, 2), 0

    def forward(self, x):
        self.calls += 1
        y = self.head(self.conv(x).mean((2, 3)))
        return y * 2 if self.calls > 3 else y


class _FlipSometimes(nn.Module):
    """Flips its input on a draw from Python's random generator (a test-time augmentation)."""

    def __init__(self):
        super().__init__()
        torch.manual_seed(0)
        self.conv, self.head = nn.Conv2d(3, 4, 3, padding=1), nn.Linear(4, 2)

    def forward(self, x):
        import random

        if random.random() < 0.5:
            x = x.flip(-1)
        return self.head(torch.relu(self.conv(x)).mean((2, 3)))


@pytest.mark.parametrize("make, why", [(_Warmup, "changes its attribute 'calls'"),
                                       (_FlipSometimes, "draws from Python's or NumPy's random generator")])
def test_python_state_a_trace_would_fix_sends_the_model_to_hooks(make, why):
    # traced, the call count and the draw were fixed at their values while tracing: insert, verify --onnx and
    # export passed, and from the fourth call the splice and its ONNX file were 0.16 off the base
    import random

    model = make().eval()
    with pytest.warns(TraceFallbackWarning, match=why):
        spliced = splice.insert(model, at="input", input_shape=(3, 8, 8))
    assert spliced.splice_info.mechanism == "hooks"
    reference = make().eval()
    for call in range(5):
        x = torch.rand(2, 3, 8, 8)
        random.seed(call)
        with torch.no_grad():
            want = reference(x)
        random.seed(call)
        with torch.no_grad():
            assert torch.equal(spliced(x), want), call
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)
        assert verify_models(make().eval(), splice.insert(make().eval(), at="input", input_shape=(3, 8, 8))).passed
