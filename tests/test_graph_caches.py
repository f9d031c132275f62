"""Listing points runs the model on the meta device: a library function that caches a tensor it builds from plain
numbers (``functools.lru_cache``) must not keep a meta tensor from that pass for the caller's later real calls."""

from __future__ import annotations

import functools
import warnings

import torch
from torch import nn

import splice
from splice.caches import caches_kept, model_caches


@functools.lru_cache(maxsize=4)
def _ramp(n: int) -> torch.Tensor:
    return torch.arange(n, dtype=torch.float32) / n


def _wrapping_cache(fn):
    cached = functools.lru_cache(maxsize=4)(fn)

    @functools.wraps(fn)
    def wrapper(*args):  # a decorator that keeps the cached function in its closure (some libraries do)
        return cached(*args)
    return wrapper


class _Ramped(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)

    @staticmethod
    @_wrapping_cache
    def column_bias(n: int) -> torch.Tensor:
        return torch.linspace(0.0, 1.0, n)

    def forward(self, x):
        if x.shape[-1] > 4:  # Python control flow on the input: fx cannot trace it, the listing runs on meta
            x = x + _ramp(x.shape[-1]) + self.column_bias(x.shape[-1])
        return self.conv(x).mean((2, 3))


def test_the_caches_near_a_model_are_found():
    found = model_caches(_Ramped())
    assert _ramp in found and len(found) == 2  # the module-level one and the one in the decorator's closure


def test_listing_points_leaves_no_meta_tensor_in_a_library_cache():
    torch.manual_seed(0)
    model = _Ramped().eval()
    _ramp.cache_clear()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        splice.points(model, input_shape=(1, 16, 16))
        spliced = splice.insert(model, at="input", input_shape=(1, 16, 16))
    assert _ramp(16).device.type == "cpu" and _Ramped.column_bias(16).device.type == "cpu"
    x = torch.rand(2, 1, 16, 16)
    # the reference: the same sums written out with torch's own arange and linspace
    expected = model.conv(x + torch.arange(16.0) / 16 + torch.linspace(0.0, 1.0, 16)).mean((2, 3))
    with torch.no_grad():
        assert torch.allclose(model(x), expected, atol=1e-6) and torch.allclose(spliced(x), expected, atol=1e-6)


class _BuiltFromCache(nn.Module):
    """A model whose constructor takes a buffer from a cached function (as positional tables often are)."""

    def __init__(self, size: int = 8):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)
        self.register_buffer("offset", _ramp(size), persistent=False)

    def forward(self, x):
        return self.conv(x + self.offset).mean((2, 3))


def make_built_from_cache():
    return _BuiltFromCache()


def test_a_model_built_on_the_meta_device_leaves_no_meta_tensor_in_a_cache(tmp_path, monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "built_from_cache", sys.modules[__name__])
    src = splice.load_source("built_from_cache:make_built_from_cache", input_shape=(1, 8, 8), warn_random=False)
    folder = tmp_path / "sp"
    splice.save(splice.insert(src, at="input"), folder)
    _ramp.cache_clear()
    splice.load(folder, trust_code=True)  # built empty on the meta device, then filled from its weights
    assert _ramp(8).device.type == "cpu"
    with caches_kept() as kept:  # a cache hit while the block runs is left as it is (it holds a real tensor)
        kept["model"] = _BuiltFromCache()
    assert _ramp.cache_info().currsize == 1
    _ramp.cache_clear()
    with caches_kept() as kept:  # one the block fills is emptied after it
        kept["model"] = _BuiltFromCache()
    assert _ramp.cache_info().currsize == 0


def test_caches_reached_through_another_module_or_kept_on_the_instance_are_guarded_too(monkeypatch):
    import sys
    import types

    util = types.ModuleType("splice_test_position_util")  # a helper module the model's own module never names
    exec("import functools, torch\n"
         "@functools.lru_cache(maxsize=4)\n"
         "def index(n):\n    return torch.arange(n) % 3\n", util.__dict__)
    monkeypatch.setitem(sys.modules, util.__name__, util)

    class Indexed(nn.Module):
        def __init__(self):
            super().__init__()
            self.table = nn.Parameter(torch.randn(3))
            self.own = functools.lru_cache(maxsize=4)(lambda n: torch.arange(n) % 2)  # a cache on the instance

        def forward(self, x):
            rows = [r for r in x]  # iterating over the batch: fx cannot trace it, the listing runs on meta
            x = torch.stack(rows)
            n = x.shape[-1]
            return x.mean((1, 2)) + self.table[sys.modules[util.__name__].index(n)] + self.own(n).float()

    torch.manual_seed(0)
    model = Indexed().eval()
    x = torch.rand(2, 1, 8, 8)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        splice.points(model, input_shape=(1, 8, 8))
    assert util.index(8).device.type == "cpu" and model.own(8).device.type == "cpu"
    expected = x.mean((1, 2)) + model.table[torch.arange(8) % 3] + (torch.arange(8) % 2).float()
    with torch.no_grad():
        assert torch.equal(model(x), expected)
