"""The closed-form meta shapes of splice.graph.rules agree with the real meta kernels, and decline when unsure.

The reference is torch's own meta kernel for the same call (shape, dtype, strides; in-place ops hand back
their input), run with no rule in the way.
"""

from __future__ import annotations

import itertools
from contextlib import nullcontext

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from splice import graph
from splice.graph import rules
from splice.graph.rules import ShapeRules, meta_rule


def _m(*shape, dtype=torch.float32):
    return torch.empty(shape, dtype=dtype, device="meta")


def _cases():
    for shape, dtype in itertools.product([(1, 8, 5, 7), (2, 3, 16, 16), (4, 6), (1, 4, 9)],
                                          [torch.float32, torch.float64, torch.float16]):
        c = shape[1]
        stats = (_m(c, dtype=dtype), _m(c, dtype=dtype))
        yield F.batch_norm, (_m(*shape, dtype=dtype), *stats), {}
        yield F.batch_norm, (_m(*shape, dtype=dtype), *stats, _m(c, dtype=dtype), _m(c, dtype=dtype)), {
            "training": False, "momentum": 0.1, "eps": 1e-5}
        yield F.batch_norm, (_m(*shape, dtype=dtype), *stats), {"training": True}
        yield F.batch_norm, (_m(*shape, dtype=dtype), None, None), {"training": True}
        last = shape[-1]
        yield F.layer_norm, (_m(*shape, dtype=dtype), (last,)), {}
        yield F.layer_norm, (_m(*shape, dtype=dtype), shape[-2:], _m(*shape[-2:], dtype=dtype),
                             _m(*shape[-2:], dtype=dtype)), {"eps": 1e-6}
        yield F.linear, (_m(*shape, dtype=dtype), _m(11, last, dtype=dtype)), {}
        yield F.linear, (_m(*shape, dtype=dtype), _m(3, last, dtype=dtype), _m(3, dtype=dtype)), {}
        yield F.linear, (_m(*shape, dtype=dtype), _m(3, last, dtype=dtype)), {"bias": _m(3, dtype=dtype)}
        if len(shape) == 4:  # a channels-last view, as convnext blocks make: the output is contiguous anyway
            view = _m(*shape, dtype=dtype).permute(0, 2, 3, 1)
            yield F.layer_norm, (view, (c,), _m(c, dtype=dtype), _m(c, dtype=dtype)), {"eps": 1e-6}
            yield F.linear, (view, _m(5, c, dtype=dtype), _m(5, dtype=dtype)), {}
            yield F.linear, (_m(*shape, dtype=dtype).transpose(2, 3), _m(5, shape[2], dtype=dtype)), {}
        for fn in (F.relu, F.relu6, F.silu, F.hardswish, F.hardsigmoid, F.mish, F.gelu, F.sigmoid, F.tanh,
                   torch.relu, torch.sigmoid, torch.tanh):
            yield fn, (_m(*shape, dtype=dtype),), {}
        yield F.hardtanh, (_m(*shape, dtype=dtype), 0.0, 6.0), {}
        yield F.leaky_relu, (_m(*shape, dtype=dtype),), {"negative_slope": 0.2}
        yield F.elu, (_m(*shape, dtype=dtype), 0.5), {}
        yield F.gelu, (_m(*shape, dtype=dtype),), {"approximate": "tanh"}
        for dims, keep in (((-1,), False), ((1,), True), (1, False), ([0, -1], True)):
            yield torch.mean, (_m(*shape, dtype=dtype), dims, keep), {}
            yield torch.Tensor.mean, (_m(*shape, dtype=dtype),), {"dim": dims, "keepdim": keep}
        if len(shape) == 4:
            x = _m(*shape, dtype=dtype)
            yield torch.Tensor.mean, (x, (2, 3)), {"keepdim": True}  # a squeeze-excite's global pool
            for kw in ({"scale_factor": 2, "mode": "bilinear"}, {"scale_factor": 1.7, "mode": "bilinear",
                                                                  "align_corners": False},
                       {"scale_factor": (0.5, 3.0), "mode": "nearest"}, {"size": (5, 6), "mode": "nearest-exact"},
                       {"size": 4, "mode": "bicubic", "align_corners": True},
                       {"size": (9, 3), "mode": "bilinear", "antialias": True}):
                yield F.interpolate, (x,), kw
            n, heads, length = shape[0], shape[1], shape[2] * shape[3]
            q, k, v = _m(n, heads, length, 8, dtype=dtype), _m(n, heads, 7, 8, dtype=dtype), _m(n, heads, 7, 5,
                                                                                                 dtype=dtype)
            yield F.scaled_dot_product_attention, (q, k, v), {}
            yield F.scaled_dot_product_attention, (q, q, q), {"is_causal": True, "scale": 0.3}
            yield F.scaled_dot_product_attention, (q.transpose(1, 2).contiguous().transpose(1, 2), k, v, None, 0.1), {}


CASES = list(_cases())


@pytest.mark.parametrize("case", range(len(CASES)))
def test_rule_matches_the_meta_kernel(case):
    func, args, kwargs = CASES[case]
    got = meta_rule(func, args, kwargs)
    assert got is not None, f"{func.__name__} declined {[getattr(a, 'shape', a) for a in args]}"
    want = func(*args, **kwargs)  # torch's own meta kernel
    assert (got.shape, got.dtype, got.stride(), got.device) == (want.shape, want.dtype, want.stride(), want.device)


@pytest.mark.parametrize("func,args,kwargs", [
    (F.relu, (), {"inplace": True}),
    (F.relu6, (True,), {}),
    (F.silu, (), {"inplace": True}),
    (F.hardswish, (True,), {}),
    (F.hardtanh, (0.0, 6.0, True), {}),
    (F.leaky_relu, (0.1, True), {}),
    (F.elu, (1.0, True), {}),
])
def test_in_place_rules_hand_back_the_input(func, args, kwargs):
    x = _m(1, 4, 6, 6)
    assert func(x, *args, **kwargs) is x  # the real in-place kernel
    assert meta_rule(func, (x, *args), kwargs) is x


@pytest.mark.parametrize("func,args,kwargs", [
    (F.batch_norm, (_m(1, 4, 5, 5), _m(3), _m(3)), {}),  # wrong channel count: the kernel names it
    (F.batch_norm, (_m(1, 4), _m(4), _m(4)), {"training": True}),  # one value per channel: refused
    (F.batch_norm, (_m(1, 4, 1, 1), _m(4), _m(4), None, None, True), {}),
    (F.batch_norm, (_m(2, 4, 5, 5), None, None), {}),  # evaluation needs running statistics
    (F.batch_norm, (_m(1, 4, 5, 5), _m(4, dtype=torch.float64), _m(4)), {}),  # mixed dtypes
    (F.layer_norm, (_m(1, 4, 5, 5), (4,)), {}),  # not the trailing shape
    (F.linear, (_m(2, 5), _m(3, 4)), {}),  # in_features do not match
    (F.linear, (_m(2, 4), _m(3, 4, dtype=torch.float64)), {}),
    (F.relu, (_m(1, 4, 5, 5).permute(0, 2, 3, 1),), {}),  # not contiguous
    (F.relu, (torch.empty(1, 4),), {}),  # not on the meta device
    (F.relu, (torch.empty(1, 4, dtype=torch.int64, device="meta"),), {}),
    (F.conv2d, (_m(1, 3, 8, 8), _m(4, 3, 3, 3)), {}),  # no rule: the meta kernel runs
    (torch.mean, (_m(1, 3, 8, 8),), {}),  # the mean of everything: not ruled
    (torch.Tensor.mean, (_m(1, 3, 8, 8), (2, 2)), {}),  # a dim twice: the kernel refuses it
    (torch.Tensor.mean, (_m(1, 3, 8, 8),), {"dim": [1, -3]}),
    (torch.Tensor.mean, (_m(1, 3, 8, 8), 4), {}),  # out of range
    (torch.Tensor.mean, (_m(1, 3, 8, 8), 1), {"dtype": torch.float64}),
    (torch.Tensor.mean, (_m(1, 3, 8, 8).permute(0, 2, 3, 1), 1), {}),  # not contiguous
    (F.interpolate, (_m(1, 3, 8, 8),), {"size": 4, "scale_factor": 2.0}),  # both: F.interpolate refuses it
    (F.interpolate, (_m(1, 3, 8, 8),), {"scale_factor": 2.0, "mode": "nearest", "align_corners": True}),
    (F.interpolate, (_m(1, 3, 8, 8),), {"scale_factor": 2.0, "mode": "area"}),  # adaptive pooling: not ruled
    (F.interpolate, (_m(1, 3, 8, 8),), {"scale_factor": 0.1}),  # an empty output: the kernel says so
    (F.interpolate, (_m(1, 3, 8, 8),), {"scale_factor": 2.0, "recompute_scale_factor": True}),
    (F.interpolate, (_m(1, 3, 8, 8).permute(0, 2, 3, 1),), {"scale_factor": 2.0}),  # not contiguous
    (F.scaled_dot_product_attention, (_m(1, 2, 5, 4), _m(1, 2, 6, 4), _m(1, 2, 5, 4)), {}),  # lengths differ
    (F.scaled_dot_product_attention, (_m(1, 2, 5, 4), _m(1, 2, 5, 4), _m(1, 2, 5, 4), _m(5, 5)), {}),  # a mask
    (F.scaled_dot_product_attention, (_m(1, 4, 5, 4), _m(1, 2, 5, 4), _m(1, 2, 5, 4)), {"enable_gqa": True}),
    (F.scaled_dot_product_attention, (_m(1, 2, 5, 4), _m(1, 2, 6, 4), _m(1, 2, 6, 4)), {"is_causal": True}),
])
def test_rules_decline_when_unsure(func, args, kwargs):
    assert meta_rule(func, args, kwargs) is None


def test_the_mode_runs_the_kernel_when_no_rule_applies():
    with ShapeRules():
        with pytest.raises(RuntimeError):
            F.linear(_m(2, 5), _m(3, 4))
        assert F.conv2d(_m(1, 3, 8, 8), _m(4, 3, 3, 3), padding=1).shape == (1, 4, 8, 8)
        assert F.batch_norm(_m(1, 4, 5, 5), _m(4), _m(4)).shape == (1, 4, 5, 5)


class _Mixed(nn.Module):
    """Leaves that call batch norm, layer norm and linear functions inside, and a module fx cannot trace."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(3, 8, 3, stride=2, padding=1), nn.BatchNorm2d(8), nn.ReLU6(inplace=True))
        self.mid = nn.Conv2d(8, 8, 3, padding=1)
        self.norm = nn.LayerNorm(8)
        self.proj = nn.Linear(8, 8)
        self.out = nn.Conv2d(8, 4, 1)

    def forward(self, x):
        y = F.silu(self.mid(self.stem(x)), inplace=True)
        y = self.proj(self.norm(y.permute(0, 2, 3, 1))).permute(0, 3, 1, 2).contiguous()
        return self.out(F.hardswish(y))


class _Opaque(nn.Module):
    """The same net behind a forward fx cannot trace (a branch on a shape): the hooks views list it."""

    def __init__(self):
        super().__init__()
        self.body = _Mixed()

    def forward(self, x):
        if x.shape[-1] > 4:
            return self.body(x)
        return x


@pytest.mark.parametrize("model", [_Mixed, _Opaque], ids=["fx", "hooks"])
def test_points_are_the_same_without_rules(monkeypatch, model):
    torch.manual_seed(0)
    net = model().eval()
    with pytest.warns() if model is _Opaque else nullcontext():
        fast = [p.to_json() for p in graph.points(net, (3, 20, 18), all=True)]
    monkeypatch.setattr(rules, "_RULES", {})
    with pytest.warns() if model is _Opaque else nullcontext():
        slow = [p.to_json() for p in graph.points(net, (3, 20, 18), all=True)]
    assert fast == slow and len(fast) > 3


def test_initialisers_are_skipped_on_meta_tensors_only():
    from splice.sources import initialisers_skipped

    torch.manual_seed(0)
    want = torch.rand(3)
    torch.manual_seed(0)
    with torch.device("meta"), initialisers_skipped():
        net = nn.Sequential(nn.Conv2d(3, 8, 3), nn.BatchNorm2d(8), nn.Linear(8, 4), nn.LayerNorm(4))
        w = torch.empty(5, 5)
        assert nn.init.trunc_normal_(w, std=0.02) is w and nn.init.kaiming_uniform_(w) is w
        assert w.mul_(2.0).add_(1.0).clamp_(-1, 1) is w
        with pytest.raises(RuntimeError):
            w.add_(torch.empty(3))  # not a number: the kernel runs and checks the shapes
    assert all(p.is_meta for p in net.parameters())
    assert torch.equal(torch.rand(3), want)  # the random generator did not move, as with the real meta kernels
    with initialisers_skipped():
        real = torch.zeros(4)
        nn.init.ones_(real)  # a real tensor is written as usual
    assert torch.equal(real, torch.ones(4))
