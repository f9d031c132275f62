"""Lazy modules (nn.LazyConv2d, nn.LazyBatchNorm2d) that no forward has shaped yet.

A module the caller hands in is refused in one line and never run; a model splice builds from a spec is its own,
and one all-zeros batch at the input shape gives its lazy modules their weights before any weights are loaded.
"""

from __future__ import annotations

import warnings
from contextlib import contextmanager

import pytest
import torch
from safetensors.torch import save_file
from torch import nn
from torch.nn.parameter import is_lazy

import splice
from splice.errors import SourceError, SpliceWarning
from splice.sources import load_source

SHAPE = (1, 16, 16)
FACTORY = '''
import torch
from torch import nn


def net():
    return nn.Sequential(nn.LazyConv2d(4, 3, padding=1), nn.LazyBatchNorm2d(), nn.ReLU(),
                         nn.Conv2d(4, 8, 3, stride=2, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1),
                         nn.Flatten(), nn.Linear(8, 10))


net.input_shape = (1, 16, 16)


def shapeless():
    return net()
'''


def _lazy() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.LazyConv2d(4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(4, 10)).eval()


@pytest.fixture()
def factory(tmp_path):
    path = tmp_path / "lazy_models.py"
    path.write_text(FACTORY, encoding="utf-8")
    return path


@contextmanager
def _quiet():
    """The random-weights warning of a spec built without weights (told once per spec)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", ".*has random weights", SpliceWarning)
        yield


@pytest.mark.parametrize("call", ["points", "insert"])
def test_a_lazy_module_handed_in_is_refused_in_one_line_and_not_run(call):
    model = _lazy()
    with pytest.raises(SourceError, match=r"lazy modules whose weights are not made yet \(0.weight, 0.bias\); "
                                          r"run one forward at its input shape first") as caught:
        if call == "points":
            splice.points(model, input_shape=SHAPE)
        else:
            splice.insert(model, at="input", input_shape=SHAPE)
    assert "\n" not in str(caught.value)
    assert is_lazy(model[0].weight) and type(model[0]) is nn.LazyConv2d  # the caller's module was not run


def test_a_lazy_module_run_once_by_its_caller_is_spliced():
    model = _lazy()
    model(torch.zeros(1, *SHAPE))  # what the refusal asks for
    spliced = splice.insert(model, at="input", input_shape=SHAPE)
    x = torch.rand(3, *SHAPE)
    with torch.no_grad():
        assert torch.equal(spliced(x), model(x))  # the reference: the caller's own model


def test_a_lazy_spec_is_shaped_on_splices_own_model_and_round_trips(factory, tmp_path):
    spec = f"{factory}:net"
    with _quiet():
        names = [p.name for p in splice.points(spec, trust_code=True)]
        spliced = splice.insert(spec, at="input", trust_code=True)
    assert names[0] == "input" and len(names) > 1
    splice.save(spliced, tmp_path / "sp")
    loaded = splice.load(tmp_path / "sp", trust_code=True)
    x = torch.rand(2, *SHAPE)
    with torch.no_grad():
        assert torch.equal(loaded(x), spliced(x))
    assert splice.verify(tmp_path / "sp", trust_code=True).passed


def test_weights_of_a_lazy_spec_are_loaded_after_it_is_shaped(factory, tmp_path):
    # the reference: the same architecture shaped by torch's own first forward, its state dict saved
    import importlib.util

    loader = importlib.util.spec_from_file_location("lazy_ref", factory)
    module = importlib.util.module_from_spec(loader)
    loader.loader.exec_module(module)
    torch.manual_seed(7)
    reference = module.net().eval()
    reference(torch.zeros(1, *SHAPE))
    save_file({k: v.contiguous() for k, v in reference.state_dict().items()}, str(tmp_path / "w.safetensors"))
    src = load_source(f"{factory}:net", weights=str(tmp_path / "w.safetensors"))
    x = torch.rand(2, *SHAPE)
    with torch.no_grad():
        assert torch.equal(src.model(x), reference(x))


def test_a_lazy_spec_without_an_input_shape_asks_for_one(factory):
    with _quiet(), pytest.raises(SourceError, match="cannot tell the input shape .* pass --input-shape"):
        load_source(f"{factory}:shapeless")
