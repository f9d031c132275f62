"""Code with a backward of its own: fx would trace through activation checkpointing (every activation kept) and
through a custom autograd Function (its backward dropped), so a forward that has such code is spliced by hooks, whose
copy runs the model's own forward.
Outside references: torch's own autograd on the base model (outputs, gradients, how often a checkpointed block
runs per training step) and torch.autograd.graph.saved_tensors_hooks (bytes saved for the backward pass)."""

from __future__ import annotations

import threading
import warnings

import pytest
import torch
import torch.utils.checkpoint as cp
from torch import nn

import splice
from splice.graph import TraceFallbackWarning
from splice.manifest import info_of
from splice.graph.backward import backward_refused

DROPPED = "the forward has code with a backward of its own"


class Blocks(nn.Module):
    """Eight conv blocks, each checkpointed by ``how``: 'plain' (none), 'reentrant', 'nonreentrant', 'sequential'
    (checkpoint_sequential) or 'caught' (a forward that catches a failing checkpoint call and runs the block)."""

    def __init__(self, how: str):
        super().__init__()
        self.how = how
        self.stem = nn.Conv2d(3, 8, 3, 1, 1)
        self.blocks = nn.Sequential(*[nn.Sequential(nn.Conv2d(8, 8, 3, 1, 1), nn.ReLU()) for _ in range(8)])
        self.fc = nn.Linear(8, 5)

    def forward(self, x):
        h = self.stem(x)
        if self.how == "sequential":
            h = cp.checkpoint_sequential(self.blocks, 4, h, use_reentrant=False)
        else:
            for b in self.blocks:
                if self.how == "plain":
                    h = b(h)
                elif self.how == "caught":
                    try:
                        h = cp.checkpoint(b, h, use_reentrant=False)
                    except Exception:
                        h = b(h)
                else:
                    h = cp.checkpoint(b, h, use_reentrant=self.how == "reentrant")
        return self.fc(h.mean((2, 3)))


def _calls(module: nn.Module) -> list[int]:
    count = [0]
    module.register_forward_pre_hook(lambda m, a: count.__setitem__(0, count[0] + 1))
    return count


def _step(model: nn.Module, x: torch.Tensor) -> tuple[torch.Tensor, dict[str, torch.Tensor], int]:
    """One training step's output, gradients by name and bytes the forward saved for backward (saved_tensors_hooks)."""
    saved = [0]

    def pack(t):
        saved[0] += t.numel() * t.element_size()
        return t

    model.train()
    model.zero_grad()
    with torch.autograd.graph.saved_tensors_hooks(pack, lambda t: t):  # what the forward keeps, not recomputes
        out = model(x)
    out.square().sum().backward()
    return out.detach(), {n: p.grad.clone() for n, p in model.named_parameters() if p.grad is not None}, saved[0]


def _check_kept(base: nn.Module, block_of, input_shape, x: torch.Tensor) -> tuple[int, int]:
    """Spliced by hooks with the reason said; a checkpointed block runs twice per step (forward, recomputation)
    as in the base; outputs and gradients equal the base's at identity. The bytes saved, base's and spliced."""
    with pytest.warns(TraceFallbackWarning, match=DROPPED):
        sp = splice.insert(base, at="recommended", warp="affine", input_shape=input_shape)
    assert not isinstance(sp, torch.fx.GraphModule)
    assert info_of(sp).mechanism == "hooks"
    counts = _calls(block_of(base)), _calls(block_of(sp))
    out_b, grads_b, saved_b = _step(base, x)
    out_s, grads_s, saved_s = _step(sp, x)
    assert counts[0][0] == 2 and counts[1][0] == 2  # the base's own count (torch): once forward, once recomputed
    torch.testing.assert_close(out_s, out_b, rtol=0, atol=1e-6)
    for name, g in grads_b.items():
        torch.testing.assert_close(grads_s[name], g, rtol=1e-5, atol=1e-6)
    return saved_b, saved_s


# torch's reentrant checkpoint warns of a forward run without gradients, as splice's checks run it (so does the
# model's own forward under torch.no_grad())
@pytest.mark.filterwarnings("ignore:None of the inputs have requires_grad=True:UserWarning")
@pytest.mark.parametrize("how", ["nonreentrant", "reentrant", "sequential", "caught"])
def test_checkpointed_forward_is_spliced_by_hooks_and_keeps_checkpointing(how):
    torch.manual_seed(0)
    base = Blocks(how)
    x = torch.randn(2, 3, 32, 32)
    saved_b, saved_s = _check_kept(base, lambda m: m.blocks[0], (3, 32, 32), x)  # checkpointed in every form
    # what checkpointing saves (torch's saved_tensors_hooks count): the base and the splice each with it turned off
    base.how = "plain"
    saved_b_plain = _step(base, x)[2]
    sp_plain = splice.insert(base, at="recommended", warp="affine", input_shape=(3, 32, 32))
    saved_s_plain = _step(sp_plain, x)[2]
    assert saved_b < 0.8 * saved_b_plain
    assert saved_s_plain - saved_s == saved_b_plain - saved_b  # the splice saves what the base's checkpointing saves


def test_a_forward_without_checkpointing_still_traces_with_fx():
    torch.manual_seed(0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        sp = splice.insert(Blocks("plain"), at="recommended", warp="affine", input_shape=(3, 32, 32))
    assert isinstance(sp, torch.fx.GraphModule)


@pytest.mark.filterwarnings("ignore:None of the inputs have requires_grad=True:UserWarning")
def test_checkpointing_works_after_a_trace_and_in_other_threads_during_one():
    names = ("_checkpoint_impl", "_checkpoint_without_reentrant_generator",
             "_checkpoint_without_reentrant_generator_impl", "CheckpointFunction")
    before = {n: getattr(cp, n, None) for n in names}
    torch.manual_seed(0)
    with pytest.warns(TraceFallbackWarning, match=DROPPED):
        splice.points(Blocks("reentrant"), (3, 16, 16))
    assert {n: getattr(cp, n, None) for n in names} == before  # put back after the failing trace
    # torch's checkpointing itself, reentrant or not, against the same block run plainly
    block = nn.Sequential(nn.Conv2d(3, 3, 3, 1, 1), nn.Tanh())
    x = torch.randn(1, 3, 8, 8, requires_grad=True)
    want = torch.autograd.grad(block(x).sum(), x)[0]
    for reentrant in (False, True):
        x.grad = None
        cp.checkpoint(block, x, use_reentrant=reentrant).sum().backward()  # the reentrant one refuses .grad()
        torch.testing.assert_close(x.grad, want)
    # while one thread traces, another checkpoints as usual
    results = []
    with backward_refused():
        worker = threading.Thread(target=lambda: results.append(cp.checkpoint(block, x, use_reentrant=False)))
        worker.start()
        worker.join()
    torch.testing.assert_close(results[0], block(x))
    assert {n: getattr(cp, n, None) for n in names} == before


def test_timm_grad_checkpointing_is_kept():
    timm = pytest.importorskip("timm")
    torch.manual_seed(0)
    base = timm.create_model("resnet18", pretrained=False, num_classes=5)
    base.set_grad_checkpointing(True)
    x = torch.randn(2, 3, 64, 64)
    saved_b, saved_s = _check_kept(base, lambda m: m.layer2[0], (3, 64, 64), x)
    assert saved_s < 1.5 * saved_b  # fx's graph kept 11 times the base's (54.3 MB against 4.9 at batch 4)


class _Stage(nn.Module):
    def __init__(self):
        super().__init__()
        self.b = nn.ModuleList([nn.Sequential(nn.Conv2d(8, 8, 3, 1, 1), nn.ReLU()) for _ in range(3)])

    def forward(self, h):
        for b in self.b:
            h = cp.checkpoint(b, h, use_reentrant=False)
        return h


class _Staged(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem, self.stage, self.fc = nn.Conv2d(3, 8, 3, 2, 1), _Stage(), nn.Linear(8, 2)

    def forward(self, x):
        return self.fc(self.stage(self.stem(x)).mean((2, 3)))


def test_a_submodule_that_checkpoints_is_named_and_as_a_leaf_keeps_it_under_fx():
    torch.manual_seed(0)
    base = _Staged()
    with pytest.warns(TraceFallbackWarning, match=r"module 'stage' \(_Stage\) \(GraphError: the forward has code with a backward"):
        splice.insert(base, at="recommended", warp="affine", input_shape=(3, 32, 32))
    sp = splice.insert(base, at="recommended", warp="affine", input_shape=(3, 32, 32), leaves=[_Stage])
    assert isinstance(sp, torch.fx.GraphModule)
    counts = _calls(base.stage.b[0]), _calls(sp.stage.b[0])
    x = torch.randn(2, 3, 32, 32)
    out_b, grads_b, _ = _step(base, x)
    out_s, grads_s, _ = _step(sp, x)
    assert counts[0][0] == counts[1][0] == 2  # as torch runs the base: forward, then recomputed in backward
    torch.testing.assert_close(out_s, out_b, rtol=0, atol=1e-6)
    for name, g in grads_b.items():
        torch.testing.assert_close(grads_s[name], g, rtol=1e-5, atol=1e-6)


class _Reverse(torch.autograd.Function):
    """A gradient reversal: identity forward, negated backward (domain-adversarial training)."""

    @staticmethod
    def forward(ctx, x):
        return x.view_as(x)

    @staticmethod
    def backward(ctx, grad):
        return -grad


class _Adversarial(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem, self.head = nn.Conv2d(3, 4, 3, 1, 1), nn.Linear(4, 3)

    def forward(self, x):
        return self.head(_Reverse.apply(torch.relu(self.stem(x))).mean((2, 3)))


def test_a_custom_autograd_function_keeps_its_backward():
    # torch.fx alone traces through it and drops the backward: gradients come out unreversed
    torch.manual_seed(0)
    base = _Adversarial()
    x = torch.randn(2, 3, 16, 16)
    traced = torch.fx.symbolic_trace(base)
    traced(x).sum().backward()
    plain = base.stem.weight.grad.clone()
    base.zero_grad()
    base(x).sum().backward()  # the reference: torch's autograd on the model itself
    reference = base.stem.weight.grad.clone()
    assert torch.allclose(plain, -reference)
    base.zero_grad()
    with pytest.warns(TraceFallbackWarning, match=DROPPED):
        spliced = splice.insert(base, at="input", input_shape=(3, 16, 16))
    assert info_of(spliced).mechanism == "hooks"
    spliced(x).sum().backward()
    got = dict(spliced.named_parameters())["stem.weight"].grad
    assert torch.allclose(got, reference, atol=1e-6)


def test_points_inside_a_reentrant_checkpoint_are_not_offered():
    # torch recomputes a re-entrant checkpoint's region in the backward pass, where a forward hook's warp is not
    # applied again: a warp there would get no gradient and the layers before it the unwarped region's
    torch.manual_seed(0)
    with pytest.warns(TraceFallbackWarning, match=DROPPED), warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="None of the inputs have requires_grad")  # torch's, other passes
        names = [p.name for p in splice.points(Blocks("reentrant"), (3, 16, 16), all=True)]
    with pytest.warns(TraceFallbackWarning, match=DROPPED):
        plain = [p.name for p in splice.points(Blocks("nonreentrant"), (3, 16, 16), all=True)]
    assert names == ["input", "stem"]
    assert any(n.startswith("blocks") for n in plain)  # not seen there without gradients: the backward refuses


GRAD_MODE = "the forward switches gradients or autocast in a block of its own"


class Frozen(nn.Module):
    """A frozen backbone (``how``: 'no_grad', 'inference_mode', 'set_grad_enabled' as a plain call and back,
    'decorated' (a method under @torch.no_grad()), 'autocast' (bfloat16) or 'detach') and a trainable head."""

    def __init__(self, how: str):
        super().__init__()
        self.how = how
        self.backbone = nn.Sequential(nn.Conv2d(3, 8, 3, 2, 1), nn.ReLU(), nn.Conv2d(8, 8, 3, 2, 1), nn.ReLU())
        self.head = nn.Sequential(nn.Conv2d(8, 8, 3, 1, 1), nn.ReLU())
        self.fc = nn.Linear(8, 3)

    @torch.no_grad()
    def frozen_features(self, x):
        return self.backbone(x)

    def features(self, x):
        if self.how == "no_grad":
            with torch.no_grad():
                return self.backbone(x)
        if self.how == "inference_mode":
            with torch.inference_mode():
                f = self.backbone(x)
            return f.clone()  # a normal tensor again (torch's advice for inference tensors)
        if self.how == "set_grad_enabled":
            before = torch.is_grad_enabled()
            torch.set_grad_enabled(False)
            f = self.backbone(x)
            torch.set_grad_enabled(before)
            return f
        if self.how == "decorated":
            return self.frozen_features(x)
        if self.how == "autocast":
            with torch.autocast("cpu", dtype=torch.bfloat16):
                return self.backbone(x).float()
        return self.backbone(x).detach()

    def forward(self, x):
        return self.fc(self.head(self.features(x)).mean((2, 3)))


@pytest.mark.parametrize("how", ["no_grad", "inference_mode", "set_grad_enabled", "decorated", "autocast"])
def test_a_grad_mode_or_autocast_block_in_the_forward_is_kept_by_hooks(how):
    """fx ran such a block while tracing and kept its operations only: the spliced backbone got gradients it never
    had (norm 0.116 on the reporter's model) and the autocast dtype was lost. Reference: torch's own autograd and
    autocast on the base (which parameters get a gradient, and the outputs)."""
    torch.manual_seed(0)
    base = Frozen(how).eval()
    with pytest.warns(TraceFallbackWarning, match=GRAD_MODE):
        sp = splice.insert(base, at="head_1", warp="affine", input_shape=(3, 32, 32))
    assert info_of(sp).mechanism == "hooks"
    x = torch.randn(2, 3, 32, 32)
    sp.train(), base.train()
    out_b, out_s = base(x), sp(x)
    torch.testing.assert_close(out_s, out_b, rtol=0, atol=0)
    out_b.square().sum().backward()
    out_s.square().sum().backward()
    got_b = {n for n, p in base.named_parameters() if p.grad is not None}
    got_s = {n for n, p in sp.named_parameters() if p.grad is not None and not n.startswith("splice_warps")}
    assert got_s == got_b and any(n.startswith("backbone") for n in got_b) == (how == "autocast")
    if how == "autocast":  # the block really computes in bfloat16: the same model without it answers otherwise
        base.how = "detach"
        assert not torch.equal(base(x), out_b)
    assert all(p.grad is not None for n, p in sp.named_parameters() if n.startswith("splice_warps"))


def test_grad_mode_blocks_outside_a_trace_and_after_it_run_as_torch_runs_them():
    with backward_refused():
        pass
    with torch.no_grad():
        assert not torch.is_grad_enabled()
    with torch.enable_grad():
        assert torch.is_grad_enabled()
    assert torch.no_grad.__enter__.__module__.startswith("torch")  # torch's own, put back


@pytest.mark.parametrize("how", ["no_grad", "detach"])
def test_verify_fails_a_warp_before_a_cut_of_the_gradient(how):
    """A warp at the input of a model whose backbone runs under no_grad (or is detached) can never train: verify
    said WARN "the outputs do not depend on the input at all", the diagnosis of a zero-initialised head. The outputs
    do move with the input (torch, the base run on two inputs), so it fails, naming the cut; a warp after the cut
    passes."""
    torch.manual_seed(0)
    base = Frozen(how).eval()
    with torch.no_grad():
        assert not torch.equal(base(torch.randn(2, 3, 32, 32)), base(torch.randn(2, 3, 32, 32)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        before = splice.insert(base, at="input", warp="affine", input_shape=(3, 32, 32))
        after = splice.insert(base, at="head_1", warp="affine", input_shape=(3, 32, 32))
        bad, good = splice.verify(before), splice.verify(after)
    row = bad["gradients"]
    assert not row.passed and row.summary == "gradient cut before the outputs", row.detail
    assert "cuts the gradient" in row.detail and row.numbers["input_grad"] == 0.0
    assert good["gradients"].passed and not good["gradients"].warning
