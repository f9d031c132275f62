"""splice.graph on small hand-built nets: cuts, branches, joins, leaves, fallback, errors.

Each net's cuts are worked out by hand in the comment above it; the expected
values in the test are those hand results.
"""

from __future__ import annotations

import json
import warnings

import pytest
import torch
import torch.fx as fx
import torch.nn.functional as F
from torch import nn

import splice
from splice import graph
from splice.errors import GraphError, PointError
from splice.graph import (
    Point,
    TraceFallbackWarning,
    TraceModeWarning,
    find_point,
    points,
    points_report,
)
from splice.warps import Warp, WarpConfig

from harness import Residual as _Residual, by_name as _by_name


def test_residual_block_cuts_and_join():
    pts = _by_name(points(_Residual(), (3, 16, 16), all=True))
    assert list(pts) == ["input", "stem", "conv_a", "act", "conv_b", "add", "head"]
    assert {n for n, p in pts.items() if p.cut} == {"input", "stem", "add", "head"}
    for name in ("conv_a", "act", "conv_b"):
        assert pts[name].in_branch and not pts[name].cut and pts[name].join == "add"
    for name in ("input", "stem", "add", "head"):
        assert not pts[name].in_branch and pts[name].join is None
    default = [p.name for p in points(_Residual(), (3, 16, 16))]
    assert default == ["input", "stem", "conv_a", "act", "conv_b", "add"]


# input -> stem -> conv_a ------------------> cat -> head -> output
#               \-> act -> conv_b ---------/
# Two branches re-merge at the cat: cuts input, stem, cat, head; conv_a, act and
# conv_b are in a branch that joins at 'cat'.
class _Concat(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 6, 3, padding=1)
        self.conv_a = nn.Conv2d(6, 4, 3, padding=1)
        self.act = nn.ReLU()
        self.conv_b = nn.Conv2d(6, 4, 1)
        self.head = nn.Conv2d(8, 2, 1)

    def forward(self, x):
        y = self.stem(x)
        return self.head(torch.cat([self.conv_a(y), self.conv_b(self.act(y))], dim=1))


def test_concat_branches_join_at_cat():
    pts = _by_name(points(_Concat(), (3, 12, 12), all=True))
    assert {n for n, p in pts.items() if p.cut} == {"input", "stem", "cat", "head"}
    for name in ("conv_a", "act", "conv_b"):
        assert pts[name].in_branch and pts[name].join == "cat"
    assert pts["cat"].shape == (8, 12, 12)


# input -> stem -> trunk -> head_a --------------> output[0]
#                       \-> act -> head_b -------> output[1]
# Every path to every output passes input, stem, trunk (cuts). act feeds only
# the second output, so the path through head_a avoids it: not a cut. The two
# paths only meet at the outputs, so act is not in a branch (join None).
class _TwoHeads(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 4, 3, padding=1)
        self.trunk = nn.Conv2d(4, 4, 3, padding=1)
        self.head_a = nn.Conv2d(4, 2, 1)
        self.act = nn.ReLU()
        self.head_b = nn.Conv2d(4, 3, 1)

    def forward(self, x):
        t = self.trunk(self.stem(x))
        return self.head_a(t), self.head_b(self.act(t))


def test_two_output_head_is_not_a_cut():
    pts = _by_name(points(_TwoHeads(), (3, 10, 10), all=True))
    assert {n for n, p in pts.items() if p.cut} == {"input", "stem", "trunk"}
    for name in ("act", "head_a", "head_b"):
        assert not pts[name].cut and not pts[name].in_branch and pts[name].join is None


# input -> stem (stride 2) -> pool (stride 4, 12x12) -> conv -> small (stride 8, 6x6) -> out
# with input 1x48x48. Cuts: all of them (a chain). The first cut between convs
# with stride >= 4 and at least 8x8 is 'pool'.
class _Chain(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(1, 4, 3, stride=2, padding=1)
        self.pool = nn.MaxPool2d(2)
        self.conv = nn.Conv2d(4, 8, 3, padding=1)
        self.small = nn.AvgPool2d(2)
        self.out = nn.Conv2d(8, 2, 1)

    def forward(self, x):
        return self.out(self.small(self.conv(self.pool(self.stem(x)))))


def test_recommended_rule_and_strides():
    pts = points(_Chain(), (1, 48, 48))
    assert [p.name for p in pts if p.recommended] == ["input"]  # the input first: feature points are not
    strides = {p.name: p.stride for p in pts}
    assert strides == {"input": 1, "stem": 2, "pool": 4, "conv": 4, "small": 8}
    assert all(p.cut for p in pts)
    # nothing reaches stride 4 at 8x8 or more on a 16x16 input: only the input is recommended
    assert [p.name for p in points(_Chain(), (1, 16, 16)) if p.recommended] == ["input"]


class _Tall(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Conv2d(3, 4, 3, padding=1)
        self.pool = nn.MaxPool2d((2, 1))
        self.b = nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        return self.b(self.pool(self.a(x)))


def test_unequal_stride_is_a_pair():
    pts = _by_name(points(_Tall(), (3, 16, 8)))
    assert pts["pool"].stride == (2, 1)
    assert pts["pool"].to_json()["stride"] == [2, 1]
    assert pts["pool"].shape == (4, 8, 8)


def test_json_report_schema():
    pts = points(_Residual(), (3, 16, 16))
    report = points_report("tests:_Residual", (3, 16, 16), pts)
    assert set(report) == {"model", "input_shape", "mechanism", "points"}
    assert report["model"] == "tests:_Residual" and report["input_shape"] == [3, 16, 16]
    assert report["mechanism"] == "fx"
    keys = {"name", "module", "shape", "stride", "cut", "in_branch", "join", "warp_params", "warp_macs",
            "recommended", "mechanism"}
    for row in report["points"]:
        assert set(row) == keys
        assert isinstance(row["name"], str) and isinstance(row["module"], str)
        assert isinstance(row["shape"], list) and len(row["shape"]) == 3
        assert all(type(s) is int for s in row["shape"])
        assert type(row["stride"]) is int or (isinstance(row["stride"], list) and len(row["stride"]) == 2)
        for k in ("cut", "in_branch", "recommended"):
            assert type(row[k]) is bool
        assert row["join"] is None or isinstance(row["join"], str)
        assert type(row["warp_params"]) is int and type(row["warp_macs"]) is int
    assert json.loads(json.dumps(report)) == report
    by = {r["name"]: r for r in report["points"]}
    assert by["conv_a"]["module"] == "conv_a" and by["add"]["module"] == "" and by["input"]["module"] == ""


def test_all_lists_a_superset_of_the_default():
    default = points(_Concat(), (3, 12, 12))
    every = _by_name(points(_Concat(), (3, 12, 12), all=True))
    assert set(p.name for p in default) < set(every)
    for p in default:
        assert every[p.name] == p
    assert "head" in every and "head" not in {p.name for p in default}


def test_warp_cost_matches_the_warp_module():
    for p in points(_Residual(), (3, 16, 16)):
        warp = Warp(WarpConfig(family="affine"), p.shape)
        assert p.warp_params == sum(t.numel() for t in warp.parameters()) > 0
        assert p.warp_macs > 0
    affine = _by_name(points(_Residual(), (3, 16, 16)))
    proj = _by_name(points(_Residual(), (3, 16, 16), warp="projective"))
    for name, p in proj.items():
        assert p.warp_params == sum(t.numel() for t in Warp(WarpConfig(family="projective"), p.shape).parameters())
        assert p.warp_params > affine[name].warp_params  # 8 parameters instead of 6


def test_names_are_stable_and_repeats_are_numbered():
    class Twice(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(3, 3, 3, padding=1)
            self.act = nn.ReLU()

        def forward(self, x):
            return self.conv(self.act(self.conv(self.act(x))))

    first = [p.name for p in points(Twice(), (3, 8, 8), all=True)]
    assert first == ["input", "act", "conv", "act_1", "conv_1"]
    assert [p.name for p in points(Twice(), (3, 8, 8), all=True)] == first


# ----------------------------------------------------------------------------- leaves and fallback


class _ValueGate(nn.Module):
    """Control flow on tensor values: neither fx nor the meta device can run it."""

    def forward(self, x):
        if x.mean() > 0:
            return x * 2
        return F.max_pool2d(x, 2)


class _ShapeGate(nn.Module):
    """Control flow on a shape: fx cannot trace it, a meta forward can run it."""

    def forward(self, x):
        if x.shape[-1] > 4:
            return F.max_pool2d(x, 2)
        return x


class _Gated(nn.Module):
    def __init__(self, gate):
        super().__init__()
        self.conv1 = nn.Conv2d(3, 4, 3, padding=1)
        self.gate = gate
        self.conv2 = nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        return self.conv2(self.gate(self.conv1(x)))


def _input_only(model, match, shape=(3, 8, 8)):
    """Where no pass can follow the model's Python, the input alone is listed (a warp there needs no graph), with a
    warning that says why and what to do for the points inside (``match``)."""
    with pytest.warns(TraceFallbackWarning, match=r"only 'input' is listed \(a warp there needs no graph\), no point "
                                                  r"inside .*" + match):
        pts = points(model, shape, all=True)
    assert [(p.name, p.cut, p.recommended, p.mechanism) for p in pts] == [("input", True, True, "hooks")]


def test_value_gate_without_leaf_names_the_module():
    _input_only(_Gated(_ValueGate()), r"module 'gate' \(_ValueGate\).*--leaf test_graph\._ValueGate")
    with pytest.raises(GraphError, match=r"torch\.fx cannot trace module 'gate' \(_ValueGate\)"):
        graph.trace(_Gated(_ValueGate()))


class _PartThenValues(nn.Module):
    """A part that takes the images (it traces), then a head that needs real values (as a detector's is)."""

    def __init__(self):
        super().__init__()
        self.backbone = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.Conv2d(4, 4, 3, padding=1))
        self.head = _ValueGate()

    def forward(self, x):
        return self.head(self.backbone(x))


class _Wrapped(nn.Module):
    """A wrapper around the model (as a library's task head puts it): the part to splice is one level down."""

    def __init__(self):
        super().__init__()
        self.model = _PartThenValues()

    def forward(self, x):
        return self.model(x)


def test_a_part_one_level_down_is_named_too():
    _input_only(_Wrapped(), r"tensor: model\.backbone$")


def test_when_nothing_lists_the_whole_model_the_parts_that_take_the_images_are_named():
    _input_only(_PartThenValues(), r"failed in module 'head' \(_ValueGate\).*--leaf test_graph\._ValueGate.*"
                                   r"or splice inside one part with --within NAME \(Python: within='NAME'\), "
                                   r"NAME being a part that ran on an \(N, C, H, W\) tensor: backbone$")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        inside = points(_PartThenValues(), (3, 8, 8), within="backbone")  # and the advice can be followed
    assert inside[0].name == "input" and inside[0].mechanism == "hooks"


def test_value_gate_as_leaf_works():
    model = _Gated(_ValueGate())
    for leaves in ([_ValueGate], ["_ValueGate"], ["test_graph._ValueGate"]):
        pts = _by_name(points(model, (3, 8, 8), leaves=leaves))
        assert list(pts) == ["input", "conv1", "gate"]
        # the leaf ran once on zeros, so it took the pooling branch (mean 0 is not > 0)
        assert pts["gate"].shape == (4, 4, 4) and pts["gate"].cut
    gm = graph.trace(model, leaves=[_ValueGate])
    assert [n.target for n in gm.graph.nodes if n.op == "call_module"] == ["conv1", "gate", "conv2"]


def test_shape_gate_falls_back_to_a_recorded_meta_forward():
    # the meta forward takes the branch the static shape decides: the full cut analysis, with hooks
    model = _Gated(_ShapeGate())
    with pytest.warns(TraceFallbackWarning, match=r"could not trace module 'gate' \(_ShapeGate\) \(TraceError: "
                                                  r"symbolically traced variables.*points come from a meta-device "
                                                  r"run of the forward"):
        pts = points(model, (3, 8, 8), all=True)
    assert [p.name for p in pts] == ["input", "conv1", "gate", "conv2"]
    assert [p.shape for p in pts] == [(3, 8, 8), (4, 8, 8), (4, 4, 4), (4, 4, 4)]
    assert [p.cut for p in pts] == [True, True, True, True]
    assert {p.mechanism for p in pts} == {"hooks"}
    assert [p.site for p in pts] == [None, ("conv1", 0), ("gate", 0), ("conv2", 0)]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        full = _by_name(points(model, (3, 8, 8), leaves=[_ShapeGate]))
    assert full["gate"].cut and full["gate"].shape == (4, 4, 4) and full["gate"].mechanism == "fx"


def test_the_recorded_and_exported_views_agree(monkeypatch):
    import splice.graph.fallback as fallback

    class Gated(_Residual):
        def forward(self, x):
            if x.shape[-1] > 4:  # fx cannot trace this
                x = x * 1
            return super().forward(x)

    def listing():
        with pytest.warns(TraceFallbackWarning) as caught:
            pts = points(Gated(), (3, 16, 16), all=True)
        return [(p.name, p.site, p.shape, p.cut, p.in_branch) for p in pts], str(caught[0].message)

    recorded, how = listing()
    assert "meta-device run" in how

    def refuse(*args, **kwargs):
        raise RuntimeError("needs real values")

    monkeypatch.setattr(fallback, "recorded_entries", refuse)
    exported, how = listing()
    assert "torch.export" in how
    assert recorded == exported


def test_an_output_written_again_in_place_is_still_a_point(monkeypatch):
    import splice.graph.fallback as fallback

    class InPlace(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(3, 4, 3, padding=1)
            self.bn = nn.BatchNorm2d(4)
            self.relu = nn.ReLU(inplace=True)  # writes the bn's output tensor again
            self.conv2 = nn.Conv2d(4, 4, 3, padding=1)

        def forward(self, x):
            if x.shape[-1] > 4:
                x = self.relu(self.bn(self.conv(x)))
            return self.conv2(x)

    def listing():
        with pytest.warns(TraceFallbackWarning):
            return [(p.name, p.site, p.cut) for p in points(InPlace(), (3, 8, 8), all=True)]

    recorded = listing()
    # the in-place relu hands back the bn's tensor, made before its call: no point of its own (a hook would
    # replace its return value only, never an older reference to that tensor)
    assert recorded == [("input", None, True), ("conv", ("conv", 0), True), ("bn", ("bn", 0), True),
                        ("conv2", ("conv2", 0), True)]
    monkeypatch.setattr(fallback, "recorded_entries", lambda *a, **k: 1 / 0)
    assert listing() == recorded  # torch.export agrees


def test_the_hooks_view_finds_branches():
    class Gated(_Residual):
        def forward(self, x):
            if x.shape[-1] > 4:  # fx cannot trace this
                x = x * 1
            return super().forward(x)

    with pytest.warns(TraceFallbackWarning):
        got = _by_name(points(Gated(), (3, 16, 16), all=True))
    want = _by_name(points(_Residual(), (3, 16, 16), all=True))
    # the same cut analysis as on the fx graph, for the points a hook can reach (module outputs)
    for name, p in got.items():
        assert (p.cut, p.in_branch, p.shape) == (want[name].cut, want[name].in_branch, want[name].shape), name


def test_without_export_the_module_view_lists_module_outputs(monkeypatch):
    import splice.graph.exported as exported
    import splice.graph.fallback as fallback

    def refuse(*args, **kwargs):
        raise RuntimeError("refused")

    monkeypatch.setattr(exported, "_export", refuse)
    monkeypatch.setattr(fallback, "recorded_entries", refuse)
    model = _Gated(_ShapeGate())
    with pytest.warns(TraceFallbackWarning, match=r"torch\.export failed too \(RuntimeError: refused\).*"
                                                  r"only 'input' is marked"):
        pts = points(model, (3, 8, 8), all=True)
    assert [p.name for p in pts] == ["input", "conv1", "gate", "conv2"]
    assert [p.cut for p in pts] == [True, False, False, False]
    assert [p.name for p in pts if p.recommended] == ["input"]


def test_leaf_reaches_the_meta_pass():
    # fx fails on the shape gate, torch.export and the meta pass on the value gate: marking the value gate
    # as a leaf makes it run alone, for real, and the listing works (the advice does not loop)
    class Both(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv1 = nn.Conv2d(3, 4, 3, padding=1)
            self.shape_gate, self.value_gate = _ShapeGate(), _ValueGate()
            self.conv2 = nn.Conv2d(4, 4, 3, padding=1)

        def forward(self, x):
            return self.conv2(self.value_gate(self.shape_gate(self.conv1(x))))

    # until then, the input alone is listed (a warp there needs no graph), with the advice
    _input_only(Both(), r"failed in module 'value_gate' \(_ValueGate\).*--leaf test_graph\._ValueGate", (3, 16, 16))
    with pytest.warns(TraceFallbackWarning, match="points come from a meta-device run"):
        pts = _by_name(points(Both(), (3, 16, 16), leaves=["_ValueGate"], all=True))
    # the leaf ran once on zeros (the pooling branch) and counts as one step of the recorded data flow
    assert pts["value_gate"].shape == (4, 4, 4) and pts["value_gate"].site == ("value_gate", 0)
    assert pts["value_gate"].cut and pts["shape_gate"].cut


def test_fallback_numbers_repeat_calls():
    class Repeat(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(2, 2, 1)
            self.block = nn.Sequential(nn.Conv2d(2, 2, 1), _ShapeGate())

        def forward(self, x):
            return self.conv(self.block(self.conv(x)))

    with pytest.warns(TraceFallbackWarning, match=r"module 'block\.1' \(_ShapeGate\)"):
        pts = points(Repeat(), (2, 8, 8), all=True)
    # the tensor a module call hands back, named after the innermost module that returns it
    assert [p.name for p in pts] == ["input", "conv", "block_0", "block_1", "conv_1"]
    assert [p.site for p in pts] == [None, ("conv", 0), ("block.0", 0), ("block.1", 0), ("conv", 1)]


def test_register_leaf():
    # leaves_added() with no types only scopes the registry: what register_leaf adds inside is gone after
    with graph.leaves_added():
        graph.register_leaf("test_graph._ShapeGate")
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            pts = _by_name(points(_Gated(_ShapeGate()), (3, 8, 8)))
        assert pts["gate"].shape == (4, 4, 4)
        graph.register_leaf(_ValueGate)
        assert "gate" in _by_name(points(_Gated(_ValueGate()), (3, 8, 8)))
    _input_only(_Gated(_ValueGate()), r"module 'gate' \(_ValueGate\)")
    with pytest.raises(GraphError, match=r"register_leaf: a leaf must be an nn.Module subclass.*got 3 \(int\)"):
        graph.register_leaf(3)
    with pytest.raises(GraphError, match=r"leaves: a leaf must be .*got 'not a name'"):
        points(_Residual(), (3, 8, 8), leaves=["not a name"])


def test_leaves_added_is_scoped():
    with graph.leaves_added(_ValueGate, "test_graph._ShapeGate"):
        assert "gate" in _by_name(points(_Gated(_ValueGate()), (3, 8, 8)))
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            assert _by_name(points(_Gated(_ShapeGate()), (3, 8, 8)))["gate"].cut
    with pytest.warns(TraceFallbackWarning, match=r"module 'gate' \(_ShapeGate\)"):
        points(_Gated(_ShapeGate()), (3, 8, 8))
    with pytest.raises(GraphError, match=r"module 'gate' \(_ValueGate\)"):
        graph.trace(_Gated(_ValueGate()))
    # the registry is restored when the block raises, too
    with pytest.raises(RuntimeError, match="inside"):
        with graph.leaves_added(_ValueGate):
            raise RuntimeError("inside")
    with pytest.raises(GraphError, match=r"module 'gate' \(_ValueGate\)"):
        graph.trace(_Gated(_ValueGate()))
    with pytest.raises(GraphError, match=r"leaves_added: a leaf must be .*got 3 \(int\)"):
        with graph.leaves_added(3):
            pass


def test_default_leaves_are_types():
    import torchvision.ops

    assert torchvision.ops.StochasticDepth in graph.DEFAULT_LEAVES
    assert Warp in graph.DEFAULT_LEAVES
    assert all(isinstance(t, type) and issubclass(t, nn.Module) for t in graph.DEFAULT_LEAVES)
