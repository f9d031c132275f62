"""The graph passes' shortcuts give what the long way gives: fx's own tracer, listing then tracing again,
counting calls in the recorded forward, a train-mode trace first."""

from __future__ import annotations

import pytest
import torch
import torch.fx as fx
from torch import nn

from splice import graph
from splice.graph.leaves import LeafRule
from splice.graph.tracing import _Tracer


class _Shared(nn.Module):
    """One conv called twice, a weight tied under two names, a buffer and a constant tensor read in forward."""

    def __init__(self):
        super().__init__()
        self.a = nn.Conv2d(3, 4, 3, padding=1)
        self.b = nn.Conv2d(4, 4, 3, padding=1)
        self.c = nn.Conv2d(4, 4, 3, padding=1)
        self.c.weight = self.b.weight  # tied: one tensor, two names
        self.register_buffer("scale", torch.full((1, 4, 1, 1), 2.0))
        self.offset = nn.Parameter(torch.zeros(1, 4, 1, 1))
        self.plain = torch.ones(1)  # neither a parameter nor a buffer

    def forward(self, x):
        y = self.a(x)
        y = self.b(y) * self.scale + self.offset
        y = self.c(y) + self.b(y) + self.offset * self.scale
        return y * self.plain + torch.nn.functional.conv2d(y, self.b.weight, padding=1)


def _signature(g: fx.Graph) -> list:
    return [(n.name, n.op, str(n.target), str(n.args), str(n.kwargs)) for n in g.nodes]


def test_tracer_lookups_give_fx_own_graph():
    model = _Shared().eval()
    ours = _Tracer(LeafRule(())).trace(model)
    theirs = fx.Tracer().trace(model)
    assert _signature(ours) == _signature(theirs)
    # a tied weight is read under its first name, as fx's search finds it
    targets = {n.target for n in ours.nodes if n.op == "get_attr"}
    assert {"b.weight", "offset", "scale"} <= targets and "c.weight" not in targets


def test_trace_points_lists_what_points_lists_and_traces_what_trace_traces():
    model = _Shared().eval()
    listed, gm = graph.trace_points(model, (3, 16, 16))
    assert [p.to_json() for p in listed] == [p.to_json() for p in graph.points(model, (3, 16, 16), all=True)]
    assert _signature(gm.graph) == _signature(graph.trace(model).graph)
    x = torch.randn(2, 3, 16, 16)
    with torch.no_grad():
        assert torch.equal(gm(x), model(x))
    # the GraphModule owns copies: nothing is shared with the caller's model
    ours = {id(t) for t in (*gm.parameters(), *gm.buffers())}
    assert not ours & {id(t) for t in (*model.parameters(), *model.buffers())}
    assert set(graph.point_names(gm)) >= {p.name for p in listed}


def test_trace_points_without_fx_gives_no_graph():
    class Gate(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(3, 3, 3, padding=1)

        def forward(self, x):
            if x.shape[-1] > 4:  # a shape decides: fx cannot trace it, a meta forward can run it
                return self.conv(x)
            return -self.conv(x)

    with pytest.warns(graph.TraceFallbackWarning, match="could not trace"):
        listed, gm = graph.trace_points(Gate(), (3, 8, 8))
    assert gm is None and listed[0].mechanism == "hooks"


def test_the_recorded_forward_counts_calls_as_the_counting_pass_does():
    from splice.graph.fallback import _call_counts
    from splice.graph.recorded import recorded_entries
    from splice.graph.shapes import meta_module

    class Twice(nn.Module):
        def __init__(self):
            super().__init__()
            self.stem = nn.Conv2d(3, 4, 3, padding=1)
            self.block = nn.Sequential(nn.Conv2d(4, 4, 3, padding=1), nn.BatchNorm2d(4), nn.ReLU())
            self.head = nn.Conv2d(4, 2, 1)

        def forward(self, x):
            y = self.block(self.block(self.stem(x)))  # every module of the block runs twice
            return self.head(y)

    model = Twice().eval()
    args = (torch.empty(1, 3, 8, 8),)
    for leaves in ((), (nn.Sequential,)):  # a leaf's forward is patched for the recording, and put back after it
        counts: dict[str, int] = {}
        meta = meta_module(model)
        recorded_entries(model, args, {}, LeafRule(leaves), counts, meta=meta)
        assert counts == _call_counts(meta_module(model), model, args, {}, LeafRule(leaves))
        assert counts == _call_counts(meta, model, args, {}, LeafRule(leaves))  # the same copy runs again alike
        assert "forward" not in meta.block.__dict__
    assert counts["block"] == 2 and counts["head"] == 1


class _Gated(nn.Module):
    """fx cannot trace it (a branch on a shape); its batch norms read ``training``, and with ``branch`` so does
    the root, which then calls one more module while training."""

    def __init__(self, branch: bool):
        super().__init__()
        self.branch = branch
        self.stem = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.BatchNorm2d(4), nn.ReLU())
        self.aux = nn.Conv2d(4, 4, 1)
        self.head = nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        if x.shape[-1] < 4:
            raise ValueError("too small")
        y = self.stem(x)
        if self.branch and self.training:
            y = y + 0 * self.aux(y)
        return self.head(self.aux(y))


@pytest.mark.parametrize("branch", [False, True])
def test_one_batch_2_forward_checks_the_counts_in_train_mode_only_when_a_parent_reads_the_flag(monkeypatch, branch):
    from splice.graph import fallback

    modes, real = [], fallback._call_counts

    def spy(*args, train=False):
        modes.append(train)
        return real(*args, train=train)

    monkeypatch.setattr(fallback, "_call_counts", spy)
    with pytest.warns(graph.TraceFallbackWarning):
        names = [p.name for p in graph.points(_Gated(branch).eval(), (3, 8, 8), all=True)]
    # batch norms read the flag too, but call no module: train mode cannot change anyone's call count
    assert modes == [branch]
    assert names == (["input", "stem_0", "stem_1", "stem_2", "head"] if branch
                     else ["input", "stem_0", "stem_1", "stem_2", "aux", "head"])


class _NormAct(nn.BatchNorm2d):
    """A batch norm fused with its activation, written out as such layers are (it counts batches itself)."""

    def forward(self, x):
        if self.training:
            self.num_batches_tracked.add_(1)
        y = torch.nn.functional.batch_norm(x, self.running_mean, self.running_var, self.weight, self.bias,
                                           self.training, 0.1, self.eps)
        return torch.relu(y)


class _FusedNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Conv2d(3, 4, 3, padding=1)
        self.n = _NormAct(4)
        self.b = nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        return self.b(self.n(self.a(x)))


def test_a_train_mode_trace_of_each_norm_class_alone_finds_batch_counting_norms(monkeypatch):
    from splice.graph import tracing

    roots = []
    real = tracing._run_tracer
    monkeypatch.setattr(tracing, "_run_tracer", lambda root, rule, *a, **k: roots.append(type(root).__name__) or real(root, rule, *a, **k))
    model = _FusedNet().eval()
    fast = graph.trace(model)
    fast_roots = list(roots)
    roots.clear()
    monkeypatch.setattr(tracing, "_traced_through_norms", lambda root, rule: {})
    slow = graph.trace(model)
    # the norm alone in train mode, then the tree once; against eval + train + eval of the whole tree
    assert fast_roots == ["_NormAct", "_FusedNet"] and roots == ["_FusedNet"] * 3
    assert _signature(fast.graph) == _signature(slow.graph)
    assert [n.target for n in fast.graph.nodes if n.op == "call_module"] == ["a", "n", "b"]  # the norm is a leaf
    assert model.n.num_batches_tracked.item() == 0


class _NeedsTwo(nn.BatchNorm2d):
    """A norm whose forward cannot be traced alone: it branches on a second argument, a proxy when alone."""

    def forward(self, x, scale):
        if self.training:
            self.num_batches_tracked.add_(1)
        y = super().forward(x)
        return y * scale if scale > 1 else y


class _TwoArgNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Conv2d(3, 4, 3, padding=1)
        self.n = _NeedsTwo(4)

    def forward(self, x):
        return self.n(self.a(x), 2.0)


def test_a_norm_that_cannot_be_traced_alone_is_found_by_a_whole_tree_trace(monkeypatch):
    from splice.graph import tracing

    roots = []
    real = tracing._run_tracer

    def spy(root, rule, *args, **kwargs):
        roots.append(type(root).__name__)
        return real(root, rule, *args, **kwargs)

    monkeypatch.setattr(tracing, "_run_tracer", spy)
    model = _TwoArgNet().eval()
    traced = graph.trace(model)
    assert roots[:2] == ["_NeedsTwo", "_TwoArgNet"]  # alone (fails), then the whole tree in train mode
    assert [n.target for n in traced.graph.nodes if n.op == "call_module"] == ["a", "n"]
    assert model.n.num_batches_tracked.item() == 0


class _BranchyNet(nn.Module):
    """A counting norm, then a branch on a value fx cannot trace."""

    def __init__(self):
        super().__init__()
        self.n = _NormAct(3)

    def forward(self, x):
        y = self.n(x)
        return y if y.sum() > 0 else -y


def test_norms_made_leaves_for_a_trace_that_fails_are_not_leaves_for_the_fallback():
    from splice.graph import tracing

    rule = LeafRule([])
    with pytest.raises(tracing.FxFailure):
        tracing.trace_owned(_BranchyNet().eval(), rule)
    assert not rule(_NormAct)
    assert tracing.trace_owned(_FusedNet().eval(), rule) is not None and rule(_NormAct)  # kept when it traces


def test_listing_runs_with_the_collector_paused(monkeypatch):
    import gc

    from splice.graph import listing

    seen, real = [], listing._build_points

    def spy(*args):
        seen.append(gc.isenabled())
        return real(*args)

    monkeypatch.setattr(listing, "_build_points", spy)
    graph.points(nn.Sequential(nn.Conv2d(3, 4, 3), nn.ReLU(), nn.Conv2d(4, 4, 3)), (3, 8, 8))
    assert seen == [False] and gc.isenabled()


def test_warps_go_into_the_graph_as_it_is_traced_and_the_code_is_generated_once(monkeypatch):
    """apply_plan without a trace in hand edits the graph before the GraphModule is made: one code generation,
    and the same spliced module as splicing a finished trace (which generates it twice)."""
    from splice.surgery import WARP_PREFIX, SplicePlan, apply_plan
    from splice.warps import WarpConfig

    model = _Shared().eval()
    plan = [SplicePlan("a", WarpConfig(family="affine")), SplicePlan("input", WarpConfig(family="translation"))]
    shapes = {"input": (3, 8, 8), "a": (4, 8, 8)}
    calls = []
    real = fx.GraphModule.recompile
    monkeypatch.setattr(fx.GraphModule, "recompile", lambda self: calls.append(1) or real(self))
    torch.manual_seed(0)
    edited = apply_plan(model, plan, (3, 8, 8), shapes=shapes)
    assert len(calls) == 1
    torch.manual_seed(0)
    finished = apply_plan(model, plan, (3, 8, 8), traced=graph.trace(model), shapes=shapes)
    assert len(calls) == 3
    assert _signature(edited.graph) == _signature(finished.graph)
    assert edited.code == finished.code
    assert isinstance(getattr(edited, WARP_PREFIX), nn.ModuleDict)
    assert list(getattr(edited, WARP_PREFIX)) == ["input", "a"]
    assert edited.state_dict().keys() == finished.state_dict().keys()
    x = torch.randn(2, 3, 8, 8)
    with torch.no_grad():
        assert torch.equal(edited(x), model(x)) and torch.equal(finished(x), model(x))


def test_an_edit_that_refuses_the_plan_leaves_no_graph_module():
    from splice.errors import PointError
    from splice.surgery import SplicePlan, apply_plan
    from splice.warps import WarpConfig

    with pytest.raises(PointError, match="not a 4-D point"):
        apply_plan(_Shared(), [SplicePlan("nowhere", WarpConfig())], (3, 8, 8), shapes={"input": (3, 8, 8)})


def test_verify_runs_with_the_collector_paused(monkeypatch, tmp_path):
    import gc

    import splice
    from splice.verification import run

    seen, real = [], run._run_checks

    def spy(*args, **kwargs):
        seen.append(gc.isenabled())
        return real(*args, **kwargs)

    monkeypatch.setattr(run, "_run_checks", spy)
    folder = splice.save(splice.insert("splice.models:tray_net", at="input"), tmp_path / "tray")
    assert splice.verify(folder).passed
    assert seen == [False] and gc.isenabled()


def test_a_leaf_stand_in_has_meta_tensors_ties_kept_and_leaves_the_module_as_it_was():
    from splice.graph.shapes import stand_in

    block = nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm2d(4), nn.Conv2d(4, 4, 1))
    block[2].weight = nn.Parameter(torch.randn(4, 4, 1, 1))
    tied = nn.Linear(4, 4)
    block.add_module("again", tied)
    block.add_module("twice", tied)  # the same module twice, as a shared head is
    block.scale = torch.ones(4)  # a plain tensor attribute, not a buffer
    block.train()
    before = {k: v.clone() for k, v in block.state_dict().items()}
    memo: dict = {}
    meta = stand_in(block, memo)
    assert all(t.is_meta for t in (*meta.parameters(), *meta.buffers()))
    assert all(isinstance(p, nn.Parameter) for p in meta.parameters())
    assert not meta.training and not meta[1].training and block.training and block[1].training
    assert meta.again.weight is meta.twice.weight  # one meta tensor for one weight
    assert stand_in(block, memo)[0].weight is meta[0].weight  # and across stand-ins made with the same memo
    out = meta[:3](torch.empty(1, 3, 8, 8, device="meta"))
    assert out.shape == (1, 4, 6, 6) and out.is_meta
    assert all(torch.equal(before[k], v) for k, v in block.state_dict().items())
    assert not any(t.is_meta for t in (*block.parameters(), *block.buffers()))
    assert meta.scale.is_meta and not block.scale.is_meta  # an in-place update of the stand-in's reaches nobody
