"""Models pruned with torch.nn.utils.prune: once they have run a forward with grad on, the pruned ``weight`` is a
tensor computed from ``weight_orig * weight_mask`` (not a leaf of autograd), which ``copy.deepcopy`` refuses.
Every copy splice makes of a module goes through ``splice.copies.tree_copy``, which copies it detached."""

from __future__ import annotations

import pytest
import torch
import torch.nn.utils.prune as prune
from torch import nn

import splice
from splice.copies import tree_copy
from splice.errors import SpliceWarning
from splice.recipes import Recipe, load_recipe
from splice.training import RecipeOverrides, RunOptions
from splice.verification import verify_models

SHAPE = (1, 16, 16)


pytestmark = pytest.mark.usefixtures("one_thread")  # see conftest.py


def _pruned() -> nn.Module:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.ReLU(), nn.Conv2d(4, 8, 3, stride=2, padding=1),
                          nn.ReLU(), nn.AdaptiveAvgPool2d(2), nn.Flatten(), nn.Linear(32, 10)).eval()
    prune.l1_unstructured(model[2], "weight", amount=0.5)
    model(torch.rand(2, *SHAPE))  # a forward with grad on: model[2].weight is now part of an autograd graph
    assert not model[2].weight.is_leaf
    return model


def _removed(model: nn.Module) -> nn.Module:
    """The outside reference: torch's own prune.remove makes the masked weight a plain parameter."""
    plain = _pruned()
    plain.load_state_dict(model.state_dict())
    prune.remove(plain[2], "weight")
    return plain


def test_tree_copy_copies_a_graph_module_around_a_pruned_convolution():
    # a GraphModule copies itself its own way (its __deepcopy__): the computed weight must be in the memo first
    spliced = splice.insert(_pruned(), at="input", input_shape=SHAPE)
    spliced(torch.rand(1, *SHAPE))
    twin = tree_copy(spliced)
    x = torch.rand(3, *SHAPE)
    with torch.no_grad():
        assert torch.equal(twin(x), spliced(x))
    assert twin.get_submodule("2").weight_orig is not spliced.get_submodule("2").weight_orig


def test_a_pruned_model_after_a_forward_is_evaluated_tuned_and_verified(tmp_path):
    model = _pruned()
    before = {k: v.clone() for k, v in model.state_dict().items()}
    spliced = splice.insert(model, at="input", input_shape=SHAPE)
    spliced(torch.rand(2, *SHAPE))
    options = splice.ModelOptions(input_shape=SHAPE)
    ours = splice.evaluate(model, data="digits", distort="rotate=30", model_options=options)
    reference = splice.evaluate(_removed(model), data="digits", distort="rotate=30", model_options=options)
    assert ours["clean"] == reference["clean"] and ours["sweeps"] == reference["sweeps"]
    assert splice.evaluate(spliced, data="digits", distort="none")["clean"] == reference["clean"]  # at the identity

    recipe = load_recipe("joint").to_dict()
    recipe["pretrain"].update(epochs=1, batch_size=256)  # a short warp pre-training: its copy of the model too
    with pytest.warns(SpliceWarning, match="made from a module object"):
        summary = splice.tune(spliced, recipe=Recipe.from_dict(recipe), data="digits", out=tmp_path / "run",
                              overrides=RecipeOverrides(epochs=1, batch_size=256),
                              run_options=RunOptions(progress=False))
    assert summary["steps"] == -(-1078 // 256)  # 1078 training digits (splice.data), batch 256
    assert verify_models(model, spliced, dtype="float64").passed
    assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())  # the caller's model as it was


class _CachedBias(nn.Module):
    """An attention-bias cache as some vision transformers keep one: a dict filled, in train mode, with a tensor
    computed from a parameter (so not a leaf), read back in later calls."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)
        self.bias_table = nn.Parameter(torch.randn(4, 1, 1))
        self.cache: dict[str, torch.Tensor] = {}

    def forward(self, x):
        if "bias" not in self.cache:
            self.cache["bias"] = self.bias_table * 2.0
        return (self.conv(x) + self.cache["bias"]).mean((2, 3))


def test_a_cache_of_computed_tensors_in_a_dict_is_copied_detached():
    model = _CachedBias().train()
    model(torch.rand(2, *SHAPE))
    assert not model.cache["bias"].is_leaf
    twin = tree_copy(model)
    assert twin.cache["bias"].is_leaf and torch.equal(twin.cache["bias"], model.cache["bias"].detach())
    assert twin.cache["bias"] is not model.cache["bias"] and twin.bias_table is not model.bias_table
    x = torch.rand(3, *SHAPE)
    assert torch.equal(twin(x), model(x))


def test_computed_tensors_at_any_depth_and_in_any_container_are_copied_detached():
    import collections

    model = _CachedBias().train()
    model(torch.rand(2, *SHAPE))
    computed = model.bias_table * 3.0
    pair = collections.namedtuple("Pair", "tensor tag")
    model.kept = [[[[computed]]], pair(computed, 1), {0: collections.deque([computed])}]
    twin = tree_copy(model)
    found = [twin.kept[0][0][0][0], twin.kept[1].tensor, twin.kept[2][0][0]]
    assert all(t.is_leaf and torch.equal(t, computed.detach()) for t in found)
    assert found[0] is found[1] is found[2]  # one tensor in the original: one in the copy
