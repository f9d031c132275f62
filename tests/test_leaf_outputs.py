"""A leaf runs for real during a meta-device listing; what it returns goes back to the caller's code as it would at
run time: plain, mutable lists and dicts (the caller may update them in place), named tuples and dataclasses kept."""

from __future__ import annotations

import collections
import dataclasses

import pytest
import torch
from torch import nn

from splice import graph
from splice.compare import map_tensors
from splice.graph import TraceFallbackWarning


class _Proposals(nn.Module):
    """Reads values (so it must be a leaf) and returns a dict of results and a list of losses."""

    def forward(self, x):
        keep = int((x.flatten(1).abs().sum(1) >= 0).sum().item())
        return {"boxes": x.mean((2, 3))[:keep]}, [x.sum() * 0]


class _Detector(nn.Module):
    """Updates the dict and the list its leaf returned, in place, as torchvision's detectors do with losses."""

    def __init__(self):
        super().__init__()
        self.stem, self.c1 = nn.Conv2d(3, 8, 3, 1, 1), nn.Conv2d(8, 8, 3, 1, 1)
        self.proposals = _Proposals()

    def forward(self, x):
        features = self.c1(torch.relu(self.stem(x)))
        if features.shape[-1] > 4:  # a size branch: fx cannot trace it, hooks reach the convs
            found, losses = self.proposals(features)
            found.update(extra=features.amax((2, 3)))
            losses.append(features.sum() * 0)
            found["scores"] = found["boxes"].sum(1)
        return found


def test_a_leaf_returns_mutable_containers_to_the_code_that_called_it():
    # before, fx's map_aggregate handed back an immutable_dict and update() raised
    # "'immutable_dict' object does not support mutation"
    with pytest.warns(TraceFallbackWarning):
        names = [p.name for p in graph.points(_Detector(), (3, 16, 16), all=True, leaves=[_Proposals])]
    assert names[:3] == ["input", "stem", "c1"]


@dataclasses.dataclass
class _Out:
    logits: torch.Tensor
    extra: list


def test_map_tensors_keeps_each_container_type_and_makes_new_mutable_ones():
    pair = collections.namedtuple("Pair", "a b")
    value = (
        [torch.ones(1)], {"k": torch.ones(2)}, collections.OrderedDict(o=torch.ones(3)), pair(torch.ones(4), 5),
        _Out(torch.ones(1), [torch.ones(2)]), "text",
    )
    out = map_tensors(value, lambda t: t * 2)
    assert type(out) is tuple and type(out[0]) is list and type(out[1]) is dict
    assert type(out[2]) is collections.OrderedDict and type(out[3]) is pair and type(out[4]) is _Out
    assert out[0][0].item() == 2 and out[1]["k"].tolist() == [2, 2] and out[3].b == 5 and out[5] == "text"
    assert out[4].extra[0].tolist() == [2, 2] and value[4].extra[0].tolist() == [1, 1]  # the input is not touched
    out[0].append(1)
    out[1]["new"] = 1
    assert len(value[0]) == 1 and "new" not in value[1]


class _Fuse(nn.Module):
    """Updates the list of feature maps it is handed, as an FPN-style fuser does."""

    def forward(self, feats):
        if self.training:  # reads training: fx keeps the module whole even when it is not named a leaf
            feats = list(reversed(feats))
        feats[1] = feats[1] + feats[0]
        return feats[1]


class _Fused(nn.Module):
    def __init__(self):
        super().__init__()
        self.a, self.b, self.c = nn.Conv2d(1, 4, 3, padding=1), nn.Conv2d(1, 4, 3, padding=1), nn.Conv2d(4, 4, 1)
        self.fuse = _Fuse()

    def forward(self, x):
        return self.c(self.fuse([self.a(x), self.b(x)]))


@pytest.mark.parametrize("leaves", [(), (_Fuse,)])
def test_a_module_kept_whole_may_update_the_list_it_is_handed(leaves):
    # before, shape propagation handed it fx's immutable_list and failed with "'immutable_list' object does not
    # support mutation"; torch.fx's own generated code (the reference) hands it a plain list
    model = _Fused().eval()
    traced = graph.trace(model, leaves=leaves)
    x = torch.rand(2, 1, 8, 8)
    torch.testing.assert_close(traced(x), model(x), rtol=0, atol=0)
    points = {p.name: p for p in graph.points(model, (1, 8, 8), leaves=leaves)}
    assert points["fuse"].shape == (4, 8, 8) and points["fuse"].mechanism == "fx"


def test_map_tensors_makes_fx_immutable_containers_plain_and_mutable():
    from torch.fx.immutable_collections import immutable_dict, immutable_list

    value = immutable_list([torch.ones(1), immutable_dict(k=torch.ones(2)), (torch.ones(3),), torch.Size([2, 3])])
    out = map_tensors(value, lambda t: t * 2)
    assert type(out) is list and type(out[1]) is dict and type(out[2]) is tuple and type(out[3]) is torch.Size
    out[1]["new"] = out.append(1)
    assert out[0].item() == 2 and len(value) == 4


def test_map_tensors_keeps_a_hugging_face_model_output():
    from transformers.modeling_outputs import BaseModelOutputWithPooling

    # transformers' ModelOutput is the reference: each field is both an attribute and a key, None fields neither
    out = BaseModelOutputWithPooling(last_hidden_state=torch.ones(1, 2, 3), pooler_output=torch.ones(1, 3))
    mapped = map_tensors(out, lambda t: t * 2)
    assert type(mapped) is BaseModelOutputWithPooling and list(mapped.keys()) == list(out.keys())
    assert mapped.last_hidden_state is mapped["last_hidden_state"] and mapped.pooler_output.sum().item() == 6
    assert mapped.hidden_states is None and "hidden_states" not in mapped and out.pooler_output.sum().item() == 3
    assert mapped.to_tuple()[0].sum().item() == 12


@dataclasses.dataclass
class _Keyed(collections.OrderedDict):
    """A mapping and a dataclass whose __init__ does not take its keys: kept as the plain dict of its values."""

    note: str = "x"


def test_map_tensors_falls_back_to_a_dict_when_a_mapping_dataclass_cannot_be_rebuilt():
    value = _Keyed()
    value["t"] = torch.ones(1)
    out = map_tensors(value, lambda t: t * 2)
    assert type(out) is dict and out["t"].item() == 2


class _ChannelGate(nn.Module):
    """A channel-max gate that reads ``.values`` of torch.max's result, as attention blocks do."""

    def __init__(self):
        super().__init__()
        self.c1, self.c2 = nn.Conv2d(3, 8, 3, padding=1), nn.Conv2d(8, 8, 3, padding=1)

    def forward(self, x):
        h = torch.relu(self.c1(x))
        return (self.c2(h).max(dim=1, keepdim=True).values * h).mean((2, 3))


def test_a_result_type_keeps_its_fields_through_shape_propagation():
    # map_tensors turned torch.max's result into a plain tuple, and the traced getattr(.., "values") failed
    names = [p.name for p in graph.points(_ChannelGate(), (3, 16, 16))]
    assert names == ["input", "c1", "relu"]
    top = torch.rand(2, 3).max(dim=1)
    assert map_tensors(top, lambda t: t * 2).values.tolist() == (top.values * 2).tolist()  # torch's own result type


class _Pair(tuple):
    """A tuple built from separate arguments (``_Pair(a, b)``): given one list it would hold the list."""

    def __new__(cls, *items):
        return super().__new__(cls, items)


def test_a_tuple_class_built_otherwise_comes_back_as_a_plain_tuple_of_the_mapped_items():
    out = map_tensors(_Pair(torch.ones(1), torch.ones(2)), lambda t: t * 3)
    assert type(out) is tuple and [t.tolist() for t in out] == [[3.0], [3.0, 3.0]]
