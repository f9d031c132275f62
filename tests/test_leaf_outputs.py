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
