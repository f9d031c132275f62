"""A point's stride is the cumulative stride from the input, not input size / point size.

References: the receptive-field arithmetic of Dumoulin & Visin, "A guide to
convolution arithmetic for deep learning" (2016), section 2, worked by hand
in each test (the jump of layer l is the jump of layer l-1 times its stride),
and torch autograd, which measures the stride of a real model: the
receptive fields of two neighbouring output pixels start ``stride`` input
pixels apart.
"""

from __future__ import annotations

import warnings
from fractions import Fraction

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from splice.graph import TraceFallbackWarning, points
from splice.graph.exported import export_entries
from splice.graph.leaves import LeafRule
from splice.graph.recorded import recorded_entries
from splice.graph.strides import size_stride

from harness import by_name


class _SixDown(nn.Module):
    """Six 3x3 convs of stride 2 and padding 1: 37 -> 19 -> 10 -> 5 -> 3 -> 2 -> 1."""

    def __init__(self):
        super().__init__()
        self.cs = nn.ModuleList([nn.Conv2d(3 if i == 0 else 4, 4, 3, stride=2, padding=1) for i in range(6)])

    def forward(self, x):
        for c in self.cs:
            x = F.relu(c(x))
        return x.mean((2, 3))


def _jumps(strides: list[int]) -> list[int]:
    # receptive-field arithmetic (Dumoulin & Visin 2016): jump_l = jump_(l-1) * stride_l, jump_0 = 1
    out, jump = [], 1
    for s in strides:
        jump *= s
        out.append(jump)
    return out


def _measured_stride(model: nn.Module, upto: int, shape: tuple[int, int, int], axis: int) -> int | None:
    """The distance between where the receptive fields of output pixels 1 and 2 of conv ``upto`` start along
    ``axis`` (2: H, 3: W), by autograd on the real model with all-positive weights; None when the map is too small."""
    net = _SixDown().double()
    with torch.no_grad():
        for c in net.cs:
            c.weight.fill_(0.1)
            c.bias.zero_()
    starts = []
    for i in (1, 2):
        x = torch.ones(1, *shape, dtype=torch.float64, requires_grad=True)
        y = x
        for c in net.cs[: upto + 1]:
            y = F.relu(c(y))
        if y.shape[axis] <= 2:
            return None
        y.select(axis, i).sum().backward()
        touched = x.grad.abs().sum(dim=[d for d in range(4) if d != axis]).nonzero().flatten()
        starts.append(int(touched.min()))
    return starts[1] - starts[0]


@pytest.mark.parametrize("shape", [(3, 37, 53), (3, 64, 64)])
def test_six_stride_two_convs_give_powers_of_two_at_any_size(shape):
    pts = by_name(points(_SixDown(), shape, all=True))
    got = [pts[f"relu{'' if i == 0 else f'_{i}'}"].stride for i in range(6)]
    assert got == [2, 4, 8, 16, 32, 64]  # not [1.9474, 1.963], [3.7, 3.7857], ... at 37x53
    assert got == _jumps([c.stride[0] for c in _SixDown().cs])
    for i, stride in enumerate(got):
        for axis in (2, 3):
            measured = _measured_stride(_SixDown(), i, shape, axis)  # torch autograd on the real model
            assert measured is None or measured == stride, (i, axis, measured)
    # the autograd measurement did reach the first four layers at 37x53
    assert _measured_stride(_SixDown(), 3, (3, 37, 53), 2) == 16


class _Functional(nn.Module):
    """The functional forms: conv (stride 2), max pool (3, stride 2), avg pool (2), conv transpose (stride 2),
    interpolate (x2), a slice with step 2 on W only, padding: strides 2, 4, 8, 4, 2, (2, 4), (2, 4)."""

    def __init__(self):
        super().__init__()
        self.w = nn.Parameter(torch.randn(4, 3, 3, 3))
        self.t = nn.Parameter(torch.randn(4, 4, 2, 2))

    def forward(self, x):
        a = F.conv2d(x, self.w, stride=2, padding=1)
        b = F.max_pool2d(a, 3, 2, 1)
        c = F.avg_pool2d(b, 2)
        d = F.conv_transpose2d(c, self.t, stride=2)
        e = F.interpolate(d, scale_factor=2.0)
        f = e[:, :, :, ::2]
        g = F.pad(f, (1, 1, 1, 1))
        return g.mean((2, 3))


def test_functional_ops_give_their_own_strides():
    pts = by_name(points(_Functional(), (3, 37, 53), all=True))
    got = {n: pts[n].stride for n in ("conv2d", "max_pool2d", "avg_pool2d", "conv_transpose2d", "interpolate",
                                      "getitem", "pad")}
    # by hand (Dumoulin & Visin's arithmetic; a transposed conv and an upsampling divide the jump)
    assert got == {"conv2d": 2, "max_pool2d": 4, "avg_pool2d": 8, "conv_transpose2d": 4, "interpolate": 2,
                   "getitem": (2, 4), "pad": (2, 4)}


class _Upsample15(nn.Module):
    def __init__(self):
        super().__init__()
        self.down = nn.Conv2d(3, 4, 3, stride=2, padding=1)
        self.up = nn.Upsample(scale_factor=1.5)
        self.conv = nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        return self.conv(self.up(self.down(x)))


def test_a_fractional_upsampling_gives_a_fractional_stride():
    pts = by_name(points(_Upsample15(), (3, 37, 53), all=True))
    assert pts["down"].stride == 2
    assert pts["up"].stride == pts["conv"].stride == round(2 / 1.5, 4) == 1.3333  # 2 * (1 / 1.5), by hand
    assert pts["up"].to_json()["stride"] == 1.3333


class _Stem(nn.Module):
    """Two 3x3 convs of stride 2 inside one module that is kept a leaf (a step splice has no rule for)."""

    def __init__(self):
        super().__init__()
        self.a = nn.Conv2d(3, 4, 3, stride=2, padding=1)
        self.b = nn.Conv2d(4, 4, 3, stride=2, padding=1)

    def forward(self, x):
        return self.b(F.relu(self.a(x)))


class _WithStem(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = _Stem()
        self.conv = nn.Conv2d(4, 4, 3, padding=1)
        self.down = nn.Conv2d(4, 4, 3, stride=2, padding=1)
        self.head = nn.Conv2d(4, 4, 1)

    def forward(self, x):
        return self.head(self.down(F.relu(self.conv(self.stem(x)))))


def test_an_op_without_a_rule_takes_the_integer_its_sizes_fit():
    # the rule of splice.graph.strides.size_stride: s when out == floor(in / s) or ceil(in / s)
    assert size_stride(37, 19) == 2  # ceil(37 / 2): a 3x3 conv, stride 2, padding 1
    assert size_stride(299, 149) == 2  # floor(299 / 2): a 3x3 conv, stride 2, no padding
    assert size_stride(37, 10) == 4 and size_stride(53, 14) == 4  # two of those in one leaf
    assert size_stride(5, 2) == 2  # floor(5 / 2) and ceil(5 / 3) both fit: the smaller
    assert size_stride(7, 1) == 7  # a global pool: the map's own size
    assert size_stride(37, 37) == 1
    assert size_stride(5, 10) == Fraction(1, 2) and size_stride(10, 15) == Fraction(2, 3)  # upsamplings
    assert size_stride(38, 18) == Fraction(38, 18)  # off by more than one pixel from 38 / 2: the exact ratio
    pts = by_name(points(_WithStem(), (3, 37, 53), leaves=[_Stem]))
    assert pts["stem"].shape == (4, 10, 14) and pts["stem"].stride == 4  # 2 * 2 inside the leaf, by hand
    assert pts["down"].stride == 8  # the leaf's 4, times the conv's own 2


class _Joins(nn.Module):
    """A residual block whose shortcut is a stride-2 1x1 conv, then a U-Net-like upsampling joined to a skip: the
    add is at stride 2 (both inputs), the cat at stride 1 (the largest of 1 and 1), the SE-like gate keeps 2."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 4, 3, padding=1)
        self.a = nn.Conv2d(4, 4, 3, stride=2, padding=1)
        self.b = nn.Conv2d(4, 4, 3, padding=1)
        self.short = nn.Conv2d(4, 4, 1, stride=2)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.up = nn.Upsample(scale_factor=2.0)
        self.out = nn.Conv2d(8, 4, 3, padding=1)

    def forward(self, x):
        s = self.stem(x)
        r = self.b(F.relu(self.a(s))) + self.short(s)
        g = r * torch.sigmoid(self.pool(r))
        u = self.up(g)[:, :, : s.shape[2], : s.shape[3]]
        return self.out(torch.cat([u, s], 1))


def test_joins_take_the_largest_input_stride():
    pts = by_name(points(_Joins(), (3, 37, 53), all=True))
    assert pts["add"].stride == 2 and pts["pool"].stride == (38, 54)  # 2 * 19, 2 * 27: the global pool
    assert pts["mul"].stride == 2  # the gate broadcast back: 38 / 19 = 2, the same as r's
    assert pts["up"].stride == 1 and pts["cat"].stride == 1 and pts["out"].stride == 1


class _TwoIn(nn.Module):
    """Two images concatenated: the first input is no cut, so the first cut of stride >= 4 is recommended."""

    def __init__(self):
        super().__init__()
        self.c0 = nn.Conv2d(6, 8, 3, padding=1)
        self.d1 = nn.Conv2d(8, 8, 3, stride=2, padding=1)
        self.d2 = nn.Conv2d(8, 16, 3, stride=2, padding=1)
        self.c3 = nn.Conv2d(16, 16, 3, padding=1)
        self.c4 = nn.Conv2d(16, 16, 3, padding=1)

    def forward(self, x, y):
        z = F.relu(self.c0(torch.cat([x, y], 1)))
        z = F.relu(self.c4(F.relu(self.c3(F.relu(self.d2(F.relu(self.d1(z))))))))
        return z.mean((2, 3))


@pytest.mark.parametrize("hw", [(64, 64), (37, 53)])
def test_the_recommended_feature_point_does_not_depend_on_the_input_size(hw):
    import splice

    shapes = [(3, *hw), (3, *hw)]
    pts = points(_TwoIn(), shapes)
    assert [p.name for p in pts if p.recommended] == ["d2"]  # stride 4 by hand (2 * 2), and 8x8 or more
    assert by_name(pts)["d2"].stride == 4 and not by_name(pts)["input"].cut
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the warp at a point that is not the input: told, not refused
        spliced = splice.insert(_TwoIn(), at="recommended", input_shape=shapes)
    assert list(spliced.splice_warps) == ["d2"]


class _Hooked(nn.Module):
    """fx cannot trace the branch on a size; the hooks views follow the same strides."""

    def __init__(self):
        super().__init__()
        self.cs = nn.ModuleList([nn.Conv2d(3 if i == 0 else 4, 4, 3, stride=2, padding=1) for i in range(4)])
        self.pool = nn.MaxPool2d(3, 2, 1)
        self.head = nn.Conv2d(4, 4, 1)

    def forward(self, x):
        for c in self.cs:
            x = c(x)
        if x.shape[-1] > 2:
            x = self.pool(x)
        return self.head(x)


def test_the_hooks_views_follow_the_same_strides():
    with pytest.warns(TraceFallbackWarning):
        pts = by_name(points(_Hooked(), (3, 37, 53), all=True))
    assert {p.mechanism for p in pts.values()} == {"hooks"}
    want = dict(zip(["cs_0", "cs_1", "cs_2", "cs_3", "pool", "head"], _jumps([2, 2, 2, 2, 2, 1])))
    assert {n: pts[n].stride for n in want} == want
    # the torch.export view, called directly (it serves models whose forward needs real values)
    x = torch.zeros(1, 3, 37, 53)
    exported = {e.name: e.stride for e in export_entries(_Hooked().eval(), (x,), {})}
    assert {n: exported[n] for n in want} == {n: (s, s) for n, s in want.items()}
    recorded = {e.name: e.stride for e in recorded_entries(_Hooked(), (x,), {}, LeafRule(()))}
    assert {n: recorded[n] for n in want} == {n: (s, s) for n, s in want.items()}


def test_inception_v3_at_its_own_size_has_whole_strides():
    import torchvision

    # torchvision's inception_v3 at 3x299x299: valid 3x3 convs and pools of stride 2 map 299 to 149, 73, 35,
    # 17, 8 (ratios 2.0067, 4.0959, ...); the strides are 2, 4, 8, 16, 32 (the torchvision source's strides)
    model = torchvision.models.inception_v3(weights=None, aux_logits=False, init_weights=False)
    pts = by_name(points(model, (3, 299, 299), all=True))
    assert all(type(p.stride) is int for p in pts.values()), {n: p.stride for n, p in pts.items()}
    want = {"Conv2d_1a_3x3_relu": 2, "maxpool1": 4, "maxpool2": 8, "Mixed_6a_cat": 16, "Mixed_7c_cat_2": 32}
    assert {n: pts[n].stride for n in want} == want


class _CropsAndJoins(nn.Module):
    """Crops (narrow, chunk, tensor_split) take part of a map at the same sampling, and a cat along W puts two maps
    side by side: none of them resamples, whatever the sizes say (they were read as strides 2 and 0.5)."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, stride=2, padding=1)
        self.a, self.b, self.c = (nn.Conv2d(8, 8, 3, padding=1) for _ in range(3))

    def forward(self, x):
        y = torch.relu(self.stem(x))
        top = self.a(y.narrow(2, 0, y.shape[2] // 2))
        left = self.b(y.chunk(2, dim=3)[0])
        middle = self.c(torch.tensor_split(y, 3, dim=2)[1])
        return torch.cat([top, top], dim=3).mean((2, 3)) + left.mean((2, 3)) + middle.mean((2, 3))


def test_crops_and_side_by_side_joins_keep_the_stride():
    torch.manual_seed(0)
    import splice

    pts = {p.name: p for p in splice.points(_CropsAndJoins(), input_shape=(3, 64, 64), all=True)}
    by_module = {p.module: p.stride for p in pts.values() if p.module in ("a", "b", "c")}
    assert by_module == {"a": 2, "b": 2, "c": 2}  # after the stride-2 stem, the crops sample as it does
    cat = next(p for p in pts.values() if p.name.startswith("cat"))
    assert cat.stride == 2 and cat.shape == (8, 16, 64)
