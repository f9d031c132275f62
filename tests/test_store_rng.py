"""Opening a folder leaves the caller's random generators alone: the warps, whose weights are about to be adopted
from the folder, are built without their random initialisers, and every opener hands the generators back as they
were. ``insert`` draws a new head's initial weights from torch's global generator, like any torch module."""

from __future__ import annotations

import random

import numpy as np
import pytest
import torch

import splice
from splice import store
from splice.evaluation import EvalOptions
from splice.sources import initialisers_skipped
from splice.surgery import insert
from splice.warps import Warp, WarpConfig
from splice.warps.families import FAMILIES


@pytest.fixture(scope="module", params=["fx", "hooks"])
def folder(request, tmp_path_factory):
    """A small tray net spliced at its input (a graph splice), or inside ``block2`` (a hooks splice)."""
    src = splice.load_source("splice.models:tray_net", kwargs={"width": 4})
    within = "" if request.param == "fx" else "block2"
    saved = store.save(insert(src, at="input", within=within), tmp_path_factory.mktemp("rng") / "f")
    assert splice.load(saved).splice_info.mechanism == request.param
    return saved


def _next_draws_after(call) -> tuple:
    """The caller's next draws (torch, Python, NumPy) after ``call``, from a seed set just before it."""
    torch.manual_seed(123)
    random.seed(123)
    np.random.seed(123)
    call()
    return torch.rand(4), random.random(), np.random.rand()


def _unmoved(call) -> bool:
    after = _next_draws_after(call)
    untouched = _next_draws_after(lambda: None)  # torch.manual_seed's own stream is the reference
    return torch.equal(after[0], untouched[0]) and after[1:] == untouched[1:]


def test_opening_a_folder_draws_nothing_from_the_callers_generators(folder):
    assert _unmoved(lambda: store.open_source(folder))
    # the fast path (a base built on the meta device) draws nothing at all, not even inside the call
    opened = store.open_folder(folder)
    before = torch.get_rng_state()
    model = opened.spliced()
    assert torch.equal(torch.get_rng_state(), before)
    saved = splice.load(folder).state_dict()
    assert all(torch.equal(v, saved[k]) for k, v in model.state_dict().items())


def test_evaluate_and_inspect_leave_the_callers_generators(folder, tmp_path):
    assert _unmoved(lambda: splice.evaluate(folder, data="digits", options=EvalOptions(limit=8)))
    assert _unmoved(lambda: splice.inspect(folder, data="digits", out=tmp_path / "insp", n=4, pictures=False,
                                           overwrite=True))


def test_insert_draws_the_new_heads_from_the_global_generator():
    """README: torch.manual_seed before insert makes the new heads' initial weights reproducible."""
    src = splice.load_source("splice.models:tray_net", kwargs={"width": 4})
    heads = []
    for _ in range(2):
        torch.manual_seed(7)
        heads.append(insert(src, at="input").state_dict())
    assert all(torch.equal(heads[0][k], heads[1][k]) for k in heads[0])


@pytest.mark.parametrize("shape", [(1, 48, 48), (16, 64, 64)])  # (16, 64, 64): the head's depthwise block mean
@pytest.mark.parametrize("family", sorted(FAMILIES))
def test_a_warp_built_on_meta_computes_the_buffers_a_real_one_holds(family, shape):
    """A warp built without values (as a folder's frame is) and given CPU memory rebuilds every buffer it does not
    load: the same bits as a warp built on the CPU, the reference."""
    config = WarpConfig(family=family)
    real = Warp(config, shape)
    with initialisers_skipped():
        empty = Warp(config, shape, device="meta")
    empty.to_empty(device="cpu")
    own = dict(real.named_buffers())
    assert own and set(own) == {k for k, _ in empty.named_buffers()}
    assert all(torch.equal(b, own[k]) and b.dtype == own[k].dtype for k, b in empty.named_buffers())
