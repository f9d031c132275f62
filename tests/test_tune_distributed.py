"""Two processes under torchrun (gloo, CPU, loopback): one run folder, identical weights on both ranks."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

import splice
from splice.fileio import state_dict_sha256

pytestmark = pytest.mark.slow

RECIPE = """\
schema_version = 1
mode = "joint"
lr = 0.003
epochs = 2
batch_size = 64
[augment]
rotation = 10.0
[pretrain]
epochs = 1
rotation = 30.0
"""


def test_two_process_tune_ends_with_identical_weights_and_one_run_folder(tmp_path):
    from splice.sources import load_source

    src = load_source("splice.models:tray_net", kwargs={"width": 4}, input_shape=(1, 24, 24), warn_random=False)
    spliced = tmp_path / "spliced"
    splice.save(splice.insert(src, at=["input"], warp=splice.WarpConfig(head_width=4)), spliced)
    recipe = tmp_path / "tiny.toml"
    recipe.write_text(RECIPE, encoding="utf-8")
    run = tmp_path / "run"
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONWARNINGS="ignore", SPLICE_TUNE_RANK_HASHES="1")
    cmd = [sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc-per-node", "2",
           "-m", "splice", "tune", str(spliced), "--recipe", str(recipe), "--data", "digits-moved",
           "--out", str(run), "--device", "cpu"]
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]

    hashes = [(run / f"rank{r}.sha256").read_text().strip() for r in (0, 1)]
    assert hashes[0] == hashes[1]  # DDP kept the ranks in lockstep
    assert state_dict_sha256(splice.load(run / "last").state_dict()) == hashes[0]  # rank 0 saved that state

    # one run folder, written by rank 0 alone: no second folder, one row per evaluation, one progress log
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run", "spliced", "tiny.toml"]
    rows = [json.loads(line) for line in (run / "metrics.jsonl").read_text().splitlines()]
    assert [(r["phase"], r["epoch"]) for r in rows] == [("pretrain", 0), ("epoch", 1), ("epoch", 2)]
    assert rows[-1]["step"] == 2 * -(-1078 // 64)  # the global batch of 64 is split 32 + 32: same step count
    info = json.loads((run / "run.json").read_text())
    assert info["world_size"] == 2 and info["status"] == "finished"
    assert proc.stdout.count("epoch 2/2") == 1  # only rank 0 prints
    assert proc.stdout.count("data digits-moved: 1,078 train and 359 val images in 10 classes") == 1
    assert proc.stdout.count("best val accuracy") == 1


AUX_NET = '''\
import collections
import torch
from torch import nn

Outputs = collections.namedtuple("Outputs", "logits aux_logits")  # as torchvision's GoogLeNet and Inception return


class AuxNet(nn.Module):
    """A classifier with an auxiliary head that returns it only while training; the loss reads the logits."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)
        self.fc, self.aux = nn.Linear(4, 10), nn.Linear(4, 10)

    def forward(self, x):
        f = torch.relu(self.conv(x)).mean((2, 3))
        return Outputs(self.fc(f), self.aux(f)) if self.training else self.fc(f)


def aux_net():
    return AuxNet()


aux_net.input_shape = (1, 24, 24)
'''


def test_an_auxiliary_head_the_loss_does_not_read_trains_under_torchrun(tmp_path):
    # its parameters get no gradient: DDP must look for unused parameters, or it stops at the second step
    (tmp_path / "auxnet.py").write_text(AUX_NET, encoding="utf-8")
    run = tmp_path / "run"
    env = dict(os.environ, OMP_NUM_THREADS="1", SPLICE_TUNE_RANK_HASHES="1")
    env.pop("PYTHONWARNINGS", None)
    cmd = [sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc-per-node", "2",
           "-m", "splice", "tune", f"{tmp_path / 'auxnet.py'}:aux_net", "--trust-code", "--recipe", "baseline",
           "--data", "digits", "--epochs", "1", "--out", str(run), "--device", "cpu", "--quiet"]
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]
    # DDP sees the logits alone, so its search finds the auxiliary head unused (it warns when it finds nothing),
    # and the buffer option is the one this torch names (torch 2.14 deprecates broadcast_buffers)
    assert "did not find any unused parameters" not in proc.stderr
    assert "deprecated" not in proc.stderr
    hashes = [(run / f"rank{r}.sha256").read_text().strip() for r in (0, 1)]
    assert hashes[0] == hashes[1]
    rows = [json.loads(line) for line in (run / "metrics.jsonl").read_text().splitlines()]
    from splice.recipes import load_recipe

    steps = -(-1078 // load_recipe("baseline").batch_size)  # 1078 training digits; the global batch is split
    assert rows[-1]["phase"] == "epoch" and rows[-1]["step"] == steps  # every step of the epoch ran
