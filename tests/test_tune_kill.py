"""No lost work: ``splice tune`` killed with SIGKILL at random moments, or stopped with Ctrl-C.

Every checkpoint and folder left behind must load (and the spliced ones verify),
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
from splice._io import state_dict_sha256
from splice.training.checkpoint import CHECKPOINT_NAME, load_checkpoint
from splice.verification import verify

pytestmark = pytest.mark.slow

SPEC = "splice.models:tray_net"
RECIPE = """\
schema_version = 1
mode = "joint"
lr = 0.003
epochs = 6
batch_size = 64
warmup_epochs = 0.5
[augment]
rotation = 10.0
[pretrain]
epochs = 1
rotation = 30.0
"""


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
    epoch_s = max(r["time_s"] for r in rows) / max(1, sum(r["phase"] == "epoch" for r in rows))
    return root, spliced, recipe, env, _weights_hash(reference), epoch_s


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


def _check_leftovers(run: Path) -> None:
    """Whatever a killed run left behind is usable."""
    if (run / CHECKPOINT_NAME).exists():
        ckpt = load_checkpoint(run / CHECKPOINT_NAME)  # torch.load(weights_only=True) inside
        assert 0 <= ckpt["epoch"] <= 6
    for which in ("best", "last"):
        if (run / which).exists():
            splice.load(run / which)
            report = verify(run / which)
            assert report.passed, [r.detail for r in report.rows if not r.passed]
    for row in (run / "metrics.jsonl").read_text().splitlines()[:-1] if (run / "metrics.jsonl").exists() else []:
        json.loads(row)  # every complete line parses (only the last may be torn)


def _start(run: Path, spliced, recipe, env) -> subprocess.Popen:
    resumable = (run / "run.json").is_file()
    tail = ["--resume", str(run)] if resumable else ["--out", str(run)]
    if not resumable and run.exists():
        for p in sorted(run.rglob("*"), reverse=True):
            p.rmdir() if p.is_dir() else p.unlink()
        run.rmdir()
    return subprocess.Popen([*_cmd(spliced, recipe), *tail], env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)


def test_sigkill_at_ten_random_moments_then_resume_matches(setup):
    root, spliced, recipe, env, reference, epoch_s = setup
    run = root / "killed"
    rng = random.Random(1234)
    kills = 0
    for _ in range(10):
        proc = _start(run, spliced, recipe, env)
        # wait until this attempt is training (a row beyond what earlier attempts wrote), then strike
        before = _rows(run)
        deadline = time.monotonic() + 120
        while proc.poll() is None and _rows(run) <= before and time.monotonic() < deadline:
            time.sleep(0.02)
        # within about the next epoch and a half, however fast this machine trains
        time.sleep(rng.uniform(0.0, 1.5 * epoch_s))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            kills += 1
        _, err = proc.communicate(timeout=120)
        assert proc.returncode in (0, -signal.SIGKILL), err
        _check_leftovers(run)
        if proc.returncode == 0:  # it finished before the blow: nothing more to kill
            break
    assert kills >= 3
    if json.loads((run / "run.json").read_text())["status"] != "finished":
        _run([*_cmd(spliced, recipe), "--resume", str(run)], env)
    _check_leftovers(run)
    assert _weights_hash(run) == reference
    assert [json.loads(r)["epoch"] for r in (run / "metrics.jsonl").read_text().splitlines()] == list(range(7))


def test_ctrl_c_writes_a_checkpoint_and_exits_cleanly(setup):
    root, spliced, recipe, env, reference, epoch_s = setup
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
