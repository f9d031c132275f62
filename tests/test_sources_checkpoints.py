"""Checkpoints as training scripts write them: averaged models, argument namespaces, EMA-only files, prefixes."""

from __future__ import annotations

import argparse
import os

import pytest
import torch

from splice.errors import SpliceWarning, UnsafeCheckpointError, WeightsError
from splice.fileio import state_dict_sha256
from splice.sources import load_source


def _net():
    from splice.models import tray_net

    torch.manual_seed(0)
    return tray_net()


def test_an_averaged_model_state_loads_without_its_counter(tmp_path):
    # reference: torch.optim.swa_utils.AveragedModel (what torchvision's ExponentialMovingAverage is): its state dict
    # is 'n_averaged' plus its module's under 'module.'; the weights are those of AveragedModel.module
    from torch.optim.swa_utils import AveragedModel, get_ema_multi_avg_fn

    model = _net()
    ema = AveragedModel(model, multi_avg_fn=get_ema_multi_avg_fn(0.9), use_buffers=True)
    ema.update_parameters(model)  # the first update copies, the second averages
    with torch.no_grad():
        for p in model.parameters():
            p.add_(1.0)
    ema.update_parameters(model)
    assert "n_averaged" in ema.state_dict() and not torch.equal(ema.module.fc.weight, model.fc.weight)
    torch.save(ema.state_dict(), tmp_path / "ema.pt")
    with pytest.warns(SpliceWarning, match=r"every name but n_averaged starts with 'module.'.*dropped"):
        src = load_source("splice.models:tray_net", weights=tmp_path / "ema.pt")
    assert src.weights_sha256 == state_dict_sha256(ema.module.state_dict())


def test_a_bookkeeping_entry_is_kept_when_stripping_does_not_make_the_rest_fit(tmp_path):
    state = _net().state_dict()
    odd = {"n_averaged": torch.tensor(1), **{f"module.{k}": v for k, v in state.items()},
           "module.extra.w": torch.ones(1)}
    torch.save(odd, tmp_path / "odd.pt")
    with pytest.raises(WeightsError, match=r"unexpected .*module\."):
        load_source("splice.models:tray_net", weights=tmp_path / "odd.pt")


def test_only_tensors_present_with_their_shape_count_as_matched(tmp_path):
    # tray_net has 26 tensors, 4 of them batch counters; a file holding only fc's 2 matches 2, not 6
    state = _net().state_dict()
    torch.save({"fc.weight": state["fc.weight"], "fc.bias": state["fc.bias"], "other.w": torch.ones(3)},
               tmp_path / "few.pt")
    with pytest.raises(WeightsError, match=rf"only 2 of {len(state)} tensors match"):
        load_source("splice.models:tray_net", weights=tmp_path / "few.pt")


class _Payload:
    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (open, (str(self.marker), "w"))


def test_a_training_checkpoint_with_its_arguments_loads_safely(tmp_path):
    # reference: torch.load(weights_only=True) under torch.serialization.safe_globals([argparse.Namespace]) reads
    # the checkpoint timm's train.py writes; a payload in place of the arguments is still refused, and never runs
    state = _net().state_dict()
    ckpt = {"epoch": 5, "arch": "tray_net", "state_dict": state, "args": argparse.Namespace(lr=0.1, model="x")}
    torch.save(ckpt, tmp_path / "model_best.pth.tar")
    src = load_source("splice.models:tray_net", weights=tmp_path / "model_best.pth.tar")
    assert src.weights_sha256 == state_dict_sha256(state)
    marker = tmp_path / "pwned"
    torch.save({**ckpt, "args": _Payload(marker)}, tmp_path / "evil.pth.tar")
    with pytest.raises(UnsafeCheckpointError, match=r"pickled Python objects.*--trust-pickle"):
        load_source("splice.models:tray_net", weights=tmp_path / "evil.pth.tar")
    with pytest.raises(UnsafeCheckpointError):  # the namespace's own attributes are checked too
        torch.save({**ckpt, "args": argparse.Namespace(cb=_Payload(marker))}, tmp_path / "evil2.pth.tar")
        load_source("splice.models:tray_net", weights=tmp_path / "evil2.pth.tar")
    assert not os.path.exists(marker)


def test_a_checkpoint_holding_only_its_moving_average_loads_it(tmp_path):
    state = _net().state_dict()
    torch.save({"state_dict_ema": state}, tmp_path / "ema_only.pth")
    with pytest.warns(SpliceWarning, match=r"holds only 'state_dict_ema', a moving average"):
        src = load_source("splice.models:tray_net", weights=tmp_path / "ema_only.pth")
    assert src.weights_sha256 == state_dict_sha256(state)


def test_a_prefix_every_name_shares_is_stripped_when_it_makes_them_fit(tmp_path):
    state = _net().state_dict()
    torch.save({"state_dict": {f"net.{k}": v for k, v in state.items()}, "epoch": 3}, tmp_path / "lightning.ckpt")
    with pytest.warns(SpliceWarning, match=r"every name starts with 'net.'.*stripped"):
        src = load_source("splice.models:tray_net", weights=tmp_path / "lightning.ckpt")
    assert src.weights_sha256 == state_dict_sha256(state)
    # a shared first part the model's names also have is theirs, not a wrapper's: kept, and told as a mismatch
    block1 = {k: v for k, v in state.items() if k.startswith("block1.")}
    torch.save(block1, tmp_path / "block1.pt")
    with pytest.raises(WeightsError, match=r"missing"):
        load_source("splice.models:tray_net", weights=tmp_path / "block1.pt")
