"""No lost work: ``splice tune`` killed with SIGKILL at random moments, or stopped with Ctrl-C.

Ten SIGKILLs, the first ones during warp-head pre-training: every checkpoint
left behind must load (``torch.load(weights_only=True)``) and fit the model,
every folder left behind must pass ``splice verify``, no live lock may remain,
``--resume`` must complete, and the result must equal, bit for bit, a run that
was never interrupted (CPU, deterministic, one thread in every process).
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

import splice
from splice import cli
from splice.fileio import state_dict_sha256
from splice.folders import lock_holder
from splice.training.checkpoint import CHECKPOINT_NAME, load_checkpoint
from splice.verification import verify

pytestmark = pytest.mark.slow

SPEC = "splice.models:tray_net"
RECIPE = """\
schema_version = 1
mode = "joint"
lr = 0.003
epochs = 10
batch_size = 64
warmup_epochs = 0.5
[augment]
rotation = 10.0
[pretrain]
epochs = 4
rotation = 30.0
"""
EPOCHS, PRETRAIN_EPOCHS = 10, 4
KILLS = 10


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("kill")
    from splice.sources import load_source

    src = load_source(SPEC, kwargs={"width": 4}, input_shape=(1, 24, 24), warn_random=False)
    spliced = root / "spliced"
    splice.save(splice.insert(src, at=["input"], warp=splice.WarpConfig(head_width=4)), spliced)
    recipe = root / "tiny-joint.toml"
    recipe.write_text(RECIPE, encoding="utf-8")
    env = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1", PYTHONWARNINGS="ignore")
    reference = root / "reference"
    _run([*_cmd(spliced, recipe), "--out", str(reference)], env)
    rows = [json.loads(line) for line in (reference / "metrics.jsonl").read_text().splitlines()]
    pre_s = rows[0]["time_s"]  # the pre-training row comes first; time_s counts from the start of training
    epoch_s = (rows[-1]["time_s"] - pre_s) / EPOCHS
    return root, spliced, recipe, env, _weights_hash(reference), epoch_s, pre_s / PRETRAIN_EPOCHS


def _cmd(spliced: Path, recipe: Path) -> list[str]:
    return [sys.executable, "-m", "splice", "tune", str(spliced), "--recipe", str(recipe),
            "--data", "digits-moved", "--quiet"]


def _run(cmd, env) -> subprocess.CompletedProcess:
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    return proc


def _weights_hash(run: Path) -> str:
    return state_dict_sha256(splice.load(run / "last").state_dict())


def _rows(run: Path) -> int:
    path = run / "metrics.jsonl"
    return len(path.read_text().splitlines()) if path.is_file() else 0


def _check_leftovers(run: Path, spliced: Path) -> dict | None:
    """Whatever a killed run left behind is usable; returns the checkpoint (or None)."""
    assert lock_holder(run) is None  # the killed process holds no lock: the next run may go in
    ckpt = None
    if (run / CHECKPOINT_NAME).exists():
        ckpt = load_checkpoint(run / CHECKPOINT_NAME)  # torch.load(weights_only=True) inside
        assert 0 <= ckpt["epoch"] <= EPOCHS
        model = splice.load(spliced)
        model.load_state_dict(ckpt["model"], strict=True)  # it fits the model, every tensor
        assert all(bool(v.isfinite().all()) for v in ckpt["model"].values() if v.is_floating_point())
    for which in ("best", "last"):
        if (run / which).exists():
            report = verify(run / which)
            assert report.passed, [r.detail for r in report.rows if not r.passed]
    for row in (run / "metrics.jsonl").read_text().splitlines()[:-1] if (run / "metrics.jsonl").exists() else []:
        json.loads(row)  # every complete line parses (only the last may be torn)
    return ckpt


def _start(run: Path, spliced, recipe, env) -> subprocess.Popen:
    resumable = (run / "run.json").is_file()
    tail = ["--resume", str(run)] if resumable else ["--out", str(run)]
    if not resumable and run.exists():
        for p in sorted(run.rglob("*"), reverse=True):
            p.rmdir() if p.is_dir() else p.unlink()
        run.rmdir()
    return subprocess.Popen([*_cmd(spliced, recipe), *tail], env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)


def _mtime(path: Path) -> int:
    return path.stat().st_mtime_ns if path.exists() else -1


def _wait_for(proc, ready, timeout: float = 180.0) -> None:
    deadline = time.monotonic() + timeout
    while proc.poll() is None and not ready() and time.monotonic() < deadline:
        time.sleep(0.01)


def test_ten_sigkills_pretraining_included_then_resume_matches(setup):
    root, spliced, recipe, env, reference, epoch_s, pre_epoch_s = setup
    run = root / "killed"
    rng = random.Random(1234)
    kills, in_pretraining = 0, 0
    for attempt in range(KILLS):
        marked = _mtime(run / "run.json")
        proc = _start(run, spliced, recipe, env)
        if attempt == 0:
            # strike inside pre-training, after its first epoch's checkpoint
            _wait_for(proc, lambda: (run / CHECKPOINT_NAME).exists())
            time.sleep(rng.uniform(0.0, 0.6 * pre_epoch_s))
        else:
            # once this attempt has set up (run.json rewritten as running), within about the next epoch and a half
            _wait_for(proc, lambda marked=marked: _mtime(run / "run.json") > marked)
            unit = pre_epoch_s if attempt == 1 else epoch_s
            time.sleep(rng.uniform(0.2, 1.5) * unit)
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            kills += 1
        _, err = proc.communicate(timeout=120)
        assert proc.returncode in (0, -signal.SIGKILL), err
        ckpt = _check_leftovers(run, spliced)
        in_pretraining += ckpt is not None and "pretrain" in ckpt
        if proc.returncode == 0:  # it finished before the blow: nothing more to kill
            break
    assert kills == KILLS
    assert in_pretraining >= 1  # at least one kill left a pre-training checkpoint, which the next attempt resumed
    if json.loads((run / "run.json").read_text())["status"] != "finished":
        _run([*_cmd(spliced, recipe), "--resume", str(run)], env)
    _check_leftovers(run, spliced)
    assert cli.main(["verify", str(run / "last")]) == 0  # the command itself, on the final folder
    assert _weights_hash(run) == reference
    assert [json.loads(r)["epoch"] for r in (run / "metrics.jsonl").read_text().splitlines()] == list(range(EPOCHS + 1))
    assert json.loads((run / "run.json").read_text())["status"] == "finished"


def test_ctrl_c_writes_a_checkpoint_and_exits_cleanly(setup):
    root, spliced, recipe, env, reference, epoch_s, _ = setup
    run = root / "interrupted"
    proc = _start(run, spliced, recipe, env)
    deadline = time.monotonic() + 120
    while proc.poll() is None and _rows(run) < 2 and time.monotonic() < deadline:  # pre-training row + 1 epoch
        time.sleep(0.02)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "interrupted" in err
    ckpt = load_checkpoint(run / CHECKPOINT_NAME)
    assert ckpt["step"] > 0
    assert json.loads((run / "run.json").read_text())["status"] == "interrupted"
    _run([*_cmd(spliced, recipe), "--resume", str(run)], env)
    assert _weights_hash(run) == reference
