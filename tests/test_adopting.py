"""adopt_state: the same model as ``load_state_dict(state, strict=True, assign=True)`` (torch's own, the
reference here), tied tensors kept tied, whether it assigns directly or hands the tree to torch."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from splice.sources import adopt_state
from splice.sources import adopting


class _NormAct(nn.BatchNorm2d):
    """A batch norm with an activation inside (its own ``_load_from_state_dict``, a child without tensors)."""

    def __init__(self, c: int):
        super().__init__(c)
        self.act = nn.ReLU()


class _Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, bias=False)
        self.norm = _NormAct(4)
        self.shared = nn.Linear(4, 4)
        self.again = self.shared  # one module under two names
        self.head = nn.Linear(4, 2)
        self.head.weight.requires_grad_(False)
        self.register_buffer("scale", torch.ones(1))
        self.register_buffer("cache", torch.zeros(2), persistent=False)

    def forward(self, x):
        x = self.norm.act(self.norm(self.conv(x))).mean((2, 3))
        return self.head(self.again(self.shared(x))) * self.scale


def _empty() -> nn.Module:
    with torch.device("meta"):
        model = _Net()
    model.cache = torch.zeros(2)  # the non-persistent buffer is not in the state
    return model


def _state() -> dict[str, torch.Tensor]:
    torch.manual_seed(3)
    real = _Net()
    for m in real.modules():
        if isinstance(m, nn.BatchNorm2d):
            m.running_mean.normal_()
            m.running_var.uniform_(0.5, 2.0)
            m.num_batches_tracked.fill_(7)
    return {k: v.clone() for k, v in real.state_dict().items()}


def _same_model(a: nn.Module, b: nn.Module) -> None:
    named_a = dict(a.named_parameters(remove_duplicate=False))
    named_b = dict(b.named_parameters(remove_duplicate=False))
    assert named_a.keys() == named_b.keys()
    for k in named_a:
        assert type(named_a[k]) is type(named_b[k]) is nn.Parameter
        assert named_a[k].requires_grad == named_b[k].requires_grad
        assert torch.equal(named_a[k], named_b[k])
    bufs_a, bufs_b = dict(a.named_buffers(remove_duplicate=False)), dict(b.named_buffers(remove_duplicate=False))
    assert bufs_a.keys() == bufs_b.keys()
    for k in bufs_a:
        assert bufs_a[k].dtype == bufs_b[k].dtype and torch.equal(bufs_a[k], bufs_b[k])


def test_direct_adoption_matches_torch_and_shares_the_tensors():
    state = _state()
    ours, ref = _empty(), _empty()
    assert adopting._direct_plan(ours, state) is not None  # this tree is adopted directly
    adopt_state(ours, state)
    ref.load_state_dict(state, strict=True, assign=True)
    _same_model(ours.eval(), ref.eval())
    x = torch.randn(2, 3, 8, 8)
    assert torch.equal(ours(x), ref(x))
    # adopted, not copied: the model holds the state's storage
    assert ours.conv.weight.data_ptr() == state["conv.weight"].data_ptr()
    assert ours.norm.running_mean is state["norm.running_mean"]
    # a module under two names stays one module holding one tensor
    assert ours.again.weight is ours.shared.weight
    assert not ours.head.weight.requires_grad and ours.head.bias.requires_grad


def test_tied_parameters_stay_tied():
    class Tied(nn.Module):
        def __init__(self):
            super().__init__()
            self.a = nn.Linear(3, 3)
            self.b = nn.Linear(3, 3)
            self.b.weight = self.a.weight

    with torch.device("meta"):
        model = Tied()
    state = {k: torch.randn(v.shape) for k, v in Tied().state_dict().items()}
    state["b.weight"] = state["a.weight"]
    adopt_state(model, state)
    assert model.a.weight is model.b.weight
    assert torch.equal(model.a.weight, state["a.weight"])


def test_a_load_hook_hands_the_tree_to_torch():
    """A pre-hook may change what is loaded (here it doubles a weight): only load_state_dict runs it."""
    def double(module, state_dict, prefix, *args):
        key = prefix + "weight"
        if key in state_dict:
            state_dict[key] = state_dict[key] * 2

    state = _state()
    ours, ref = _empty(), _empty()
    ours.conv.register_load_state_dict_pre_hook(double)
    ref.conv.register_load_state_dict_pre_hook(double)
    assert adopting._direct_plan(ours, state) is None
    adopt_state(ours, state)
    ref.load_state_dict(state, strict=True, assign=True)
    _same_model(ours, ref)
    assert torch.equal(ours.conv.weight, state["conv.weight"] * 2)


def test_an_own_loader_above_tensors_hands_the_tree_to_torch():
    class Block(nn.Module):
        def __init__(self):
            super().__init__()
            self.inner = nn.Linear(2, 2)

        def _load_from_state_dict(self, state_dict, prefix, *args):
            super()._load_from_state_dict(state_dict, prefix, *args)

    with torch.device("meta"):
        model = nn.Sequential(Block())
    assert adopting._direct_plan(model, {k: torch.zeros(v.shape) for k, v in model.state_dict().items()}) is None


@pytest.mark.parametrize("change", ["missing", "unexpected", "shape"])
def test_a_state_that_does_not_fit_is_refused_like_torch(change):
    state = _state()
    if change == "missing":
        del state["head.bias"]
    elif change == "unexpected":
        state["head.extra"] = torch.zeros(1)
    else:
        state["head.bias"] = torch.zeros(3)
    model = _empty()
    assert adopting._direct_plan(model, state) is None
    with pytest.raises(RuntimeError, match="Error\\(s\\) in loading state_dict"):
        adopt_state(model, state)


def test_old_state_metadata_reaches_a_norms_own_loader():
    """A state saved before batch norms counted batches (version 1 metadata, no num_batches_tracked) is
    upgraded by the norm's own loader, as load_state_dict does: here through torch, keys differ."""
    state = _state()
    del state["norm.num_batches_tracked"]
    from collections import OrderedDict

    old = OrderedDict(state)
    old._metadata = {"norm": {"version": 1}}  # type: ignore[attr-defined]
    ours, ref = _empty(), _empty()
    adopt_state(ours, old)
    ref.load_state_dict(old, strict=True, assign=True)
    assert int(ours.norm.num_batches_tracked) == int(ref.norm.num_batches_tracked) == 0
