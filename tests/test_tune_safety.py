"""No run ends worse than its last good state: divergence, NaN images, the run-folder lock, --overwrite,
and exact resume of warp pre-training.

The model built to diverge is a small convolutional net with a layer that
counts its training calls and, from a given call on, returns NaN (or plants an
infinite weight while the loss stays finite). Its count is a buffer, so it is
checkpointed and replayed like every other state.
"""

from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys

import numpy as np
import pytest
import torch
from safetensors.torch import load_file

import splice
from splice import cli
from splice.fileio import state_dict_sha256
from splice.data import ImageSet, open_data
from splice.errors import DataError, SpliceError, SpliceWarning, TrainingDiverged
from splice.folders import LOCK_FILE, FolderBusy, FolderLock, check_replaceable, lock_holder
from splice.options import ModelOptions
from splice.recipes import Recipe, load_recipe
from splice.training import RunOptions, read_metrics, tune
from splice.training.checkpoint import CHECKPOINT_NAME, load_checkpoint
from splice.training.pretrain import pretrain_warps_

QUIET = RunOptions(progress=False)
STEPS_PER_EPOCH = -(-1078 // 128)  # 1078 training digits (splice.data docstring), batch 128

DIVERGE = '''\
import torch
from torch import nn


class Trip(nn.Module):
    """Counts its training calls; from call `trip` on it returns NaN ("loss") or makes `spare` infinite ("weight")."""

    def __init__(self, trip, where):
        super().__init__()
        self.trip, self.where = trip, where
        self.register_buffer("calls", torch.zeros((), dtype=torch.long))
        self.spare = nn.Parameter(torch.zeros(1))

    def forward(self, x):
        if self.training:
            self.calls += 1
            if int(self.calls) >= self.trip:
                if self.where == "loss":
                    return x * float("nan")
                with torch.no_grad():
                    self.spare.fill_(float("inf"))
        return x


def factory(trip=1000, where="loss"):
    return nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.ReLU(), Trip(trip, where), nn.AdaptiveAvgPool2d(4),
                         nn.Flatten(), nn.Linear(64, 10))


factory.input_shape = (1, 24, 24)
'''


pytestmark = pytest.mark.usefixtures("one_thread")  # see conftest.py


@pytest.fixture(scope="module")
def diverging_spec(tmp_path_factory):
    path = tmp_path_factory.mktemp("models") / "diverge.py"
    path.write_text(DIVERGE, encoding="utf-8")
    return f"{path}:factory"


def _baseline(epochs=3):
    return load_recipe("baseline").with_overrides(epochs=epochs, batch_size=128)


def _run_diverging(spec, out, **kwargs):
    with pytest.raises(TrainingDiverged) as caught:
        tune(spec, recipe=_baseline(), data="digits", out=out, run_options=QUIET,
             model_options=ModelOptions(kwargs=kwargs))
    return caught.value


def _folder_state(folder):
    return load_file(str(folder / "weights.safetensors"))  # the tensors alone: no model code runs


def _all_finite(state) -> bool:
    return all(bool(torch.isfinite(t).all()) for t in state.values() if t.is_floating_point())


@pytest.mark.filterwarnings("ignore::splice.errors.RandomWeightsWarning")
def test_a_nan_loss_stops_the_run_and_keeps_the_last_finite_state(tmp_path, diverging_spec):
    out = tmp_path / "run"
    trip = STEPS_PER_EPOCH + 3  # the 3rd step of epoch 2
    exc = _run_diverging(diverging_spec, out, trip=trip)
    msg = str(exc)
    assert "\n" not in msg
    assert f"the training loss became nan at epoch 2/3, step {trip}" in msg
    assert f"keep the last finite state (epoch 1, step {STEPS_PER_EPOCH})" in msg
    info = json.loads((out / "run.json").read_text())
    assert info["status"] == "diverged"
    assert info["diverged"] == {"phase": "epoch", "epoch": 2, "step": trip, "what": "the training loss became nan"}
    ckpt = load_checkpoint(out / CHECKPOINT_NAME)
    assert (ckpt["epoch"], ckpt["batch"], ckpt["step"]) == (1, 0, STEPS_PER_EPOCH)
    assert _all_finite(ckpt["model"])
    last = _folder_state(out / "last")
    assert _all_finite(last)
    assert state_dict_sha256(last) == state_dict_sha256(ckpt["model"])  # last/ is the checkpointed state
    assert [r["epoch"] for r in read_metrics(out)] == [0, 1]  # no row of the diverged epoch
    assert not (out / LOCK_FILE).exists()  # the lock went with the run


@pytest.mark.filterwarnings("ignore::splice.errors.RandomWeightsWarning")
def test_an_infinite_weight_with_a_finite_loss_is_caught_before_it_is_saved(tmp_path, diverging_spec):
    out = tmp_path / "run"
    exc = _run_diverging(diverging_spec, out, trip=STEPS_PER_EPOCH + 1, where="weight")
    assert f"'2.spare' became NaN or infinite at epoch 2/3, step {2 * STEPS_PER_EPOCH}" in str(exc)
    assert json.loads((out / "run.json").read_text())["status"] == "diverged"
    ckpt = load_checkpoint(out / CHECKPOINT_NAME)
    assert ckpt["epoch"] == 1 and _all_finite(ckpt["model"])
    assert _all_finite(_folder_state(out / "last")) and _all_finite(_folder_state(out / "best"))


def test_the_cli_exits_1_with_one_line_naming_epoch_and_step(tmp_path, diverging_spec, capsys):
    out = tmp_path / "run"
    code = cli.main(["tune", diverging_spec, "--kwargs", '{"trip": 2}', "--recipe", "baseline", "--data", "digits",
                     "--epochs", "2", "--batch-size", "128", "--out", str(out), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1
    lines = [line for line in err if not line.startswith("splice tune: note") and "RandomWeights" not in line
             and "random weights" not in line]
    assert len(lines) == 1, err
    assert lines[0].startswith("splice tune: training diverged: the training loss became nan at epoch 1/2, step 2;")
    assert json.loads((out / "run.json").read_text())["status"] == "diverged"


def test_diverged_pretraining_raises_before_the_step():
    spliced = splice.insert(splice.models.tray_net(width=4), at=["input"], input_shape=(1, 24, 24),
                            warp=splice.WarpConfig(head_width=4))
    warps = {n: m for n, m in spliced.named_modules() if isinstance(m, splice.warps.Warp)}
    images = torch.rand(8, 1, 24, 24)
    images[3, 0, 5, 5] = float("nan")  # one bad pixel in memory (files with one are refused when read)
    ref = ImageSet(images, torch.zeros(8, dtype=torch.long), ["0"], "bad", "train")
    before = {k: v.clone() for k, v in spliced.state_dict().items()}
    cfg = load_recipe("joint").pretrain
    with pytest.raises(TrainingDiverged, match=r"grid loss or its gradient became nan at pre-training epoch 1/\d+, "
                                               r"step 1;") as caught:
        pretrain_warps_(spliced, warps, ref, cfg, seed=0, prepare=lambda x: x)
    assert caught.value.where["phase"] == "pretrain"
    after = spliced.state_dict()
    assert all(torch.equal(before[k], after[k]) for k in before)  # no step was taken


def test_pretraining_gives_each_module_its_own_mode_back():
    # pre-training runs the model in eval mode; afterwards a norm the caller kept frozen stays frozen (the root's
    # mode used to be set on every module)
    spliced = splice.insert(splice.models.tray_net(width=4), at=["input"], input_shape=(1, 24, 24),
                            warp=splice.WarpConfig(head_width=4)).train()
    frozen = next(m for m in spliced.modules() if isinstance(m, torch.nn.BatchNorm2d))
    frozen.eval()
    modes = {n: m.training for n, m in spliced.named_modules()}
    warps = {n: m for n, m in spliced.named_modules() if isinstance(m, splice.warps.Warp)}
    ref = ImageSet(torch.rand(8, 1, 24, 24), torch.zeros(8, dtype=torch.long), ["0"], "ok", "train")
    cfg = dataclasses.replace(load_recipe("joint").pretrain, epochs=1)
    pretrain_warps_(spliced, warps, ref, cfg, seed=0, prepare=lambda x: x)
    assert {n: m.training for n, m in spliced.named_modules()} == modes and not frozen.training


# ----------------------------------------------------------------------------- NaN / Inf images


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
def test_a_float_image_with_a_non_finite_pixel_is_refused_when_read(tmp_path, bad):
    from PIL import Image

    root = tmp_path / "data"
    for split in ("train", "val"):
        for cls in ("a", "b"):
            (root / split / cls).mkdir(parents=True)
            for i in range(2):
                arr = np.full((8, 8), 0.5, dtype=np.float32)
                Image.fromarray(arr, mode="F").save(root / split / cls / f"{i}.tif")
    poisoned = root / "train" / "b" / "1.tif"
    arr = np.full((8, 8), 0.5, dtype=np.float32)
    arr[2, 3] = bad
    Image.fromarray(arr, mode="F").save(poisoned)
    ds = open_data(str(root), "train", input_shape=(1, 8, 8))
    index = [i for i, (p, _) in enumerate(ds.samples) if p == poisoned][0]
    with pytest.raises(DataError, match=r"image .*1\.tif holds 1 NaN or infinite pixel value\(s\)"):
        ds[index]
    with pytest.raises(DataError, match=r"1 of 4 images .* cannot be read: .*1\.tif"):
        ds.check()
    assert torch.isfinite(ds[0][0]).all()  # good float images still read


def _two_classes(root, n: int = 3):
    """An ImageFolder of 8x8 grey PNGs: train/ and val/, classes a and b, ``n`` images each."""
    from PIL import Image

    for split in ("train", "val"):
        for cls in ("a", "b"):
            (root / split / cls).mkdir(parents=True)
            for i in range(n):
                Image.fromarray(np.full((8, 8), 40 * i, dtype=np.uint8)).save(root / split / cls / f"{i}.png")
    return root


def test_an_unreadable_image_read_by_a_worker_is_one_line_naming_it(tmp_path, capsys):
    # a DataLoader worker wraps an error in its own traceback; the run says what the main process would
    root = _two_classes(tmp_path / "data")
    from PIL import Image

    # a header that reads and pixels cut short: found only when a worker decodes the file
    noise = np.random.default_rng(0).integers(0, 256, (64, 64), dtype=np.uint8)
    Image.fromarray(noise).save(root / "train" / "b" / "broken.png")
    whole = (root / "train" / "b" / "broken.png").read_bytes()
    (root / "train" / "b" / "broken.png").write_bytes(whole[: len(whole) // 2])
    out = tmp_path / "run"
    code = cli.main(["tune", "splice.models:tray_net", "--kwargs", '{"num_classes": 2}', "--recipe", "baseline",
                     "--epochs", "1", "--quiet", "--data", str(root), "--out", str(out), "--workers", "1"])
    err = [line for line in capsys.readouterr().err.strip().splitlines() if not line.startswith("warning:")]
    assert code != 0 and len(err) == 1, err
    assert "broken.png" in err[0] and "Remove or replace the file" in err[0] and "Caught" not in err[0]
    recorded = json.loads((out / "run.json").read_text())["error"]
    assert "broken.png" in recorded and "Caught" not in recorded


def test_resuming_on_changed_data_says_the_batches_differ(tmp_path):
    root = _two_classes(tmp_path / "data", n=6)
    out = tmp_path / "run"
    options = ModelOptions(kwargs={"num_classes": 2})
    recipe = dataclasses.replace(load_recipe("baseline"), batch_size=4, epochs=2)
    with pytest.warns(SpliceWarning):  # random weights
        tune("splice.models:tray_net", recipe=recipe, data=str(root), out=out, model_options=options,
             run_options=RunOptions(progress=False, stop_after_steps=1))
    assert json.loads((out / "run.json").read_text())["train_images"] == 12
    (root / "train" / "b" / "5.png").rename(root / "train" / "b" / "6.png")  # as many files, but not the same
    with pytest.warns(SpliceWarning, match=r"resuming with other image files than the run started with \(12 train "
                                           r"and 12 val, as before\): from here on its batches are not the ones"):
        tune(resume=out, run_options=dataclasses.replace(QUIET, stop_after_steps=2))
    from PIL import Image

    Image.fromarray(np.full((9, 7), 200, np.uint8)).save(root / "train" / "b" / "6.png")  # replaced in place
    with pytest.warns(SpliceWarning, match=r"resuming with other image files than the run started with"):
        tune(resume=out, run_options=dataclasses.replace(QUIET, stop_after_steps=3))
    (root / "train" / "b" / "6.png").unlink()  # a bad file removed before resuming
    with pytest.warns(SpliceWarning, match=r"resuming with 11 train and 12 val images where the run started with "
                                           r"12 and 12: from here on its batches are not the ones"):
        tune(resume=out, run_options=QUIET)


_TINY_BASELINE = dataclasses.replace(load_recipe("baseline"), batch_size=4, epochs=2)
_TWO = ModelOptions(kwargs={"num_classes": 2})


def _started_here(tmp_path, monkeypatch, steps: int):
    """A baseline run started in tmp_path/here on the folder typed as 'data', stopped after ``steps`` steps."""
    root = _two_classes(tmp_path / "here" / "data", n=6)
    monkeypatch.chdir(tmp_path / "here")
    with pytest.warns(SpliceWarning):  # random weights
        tune("splice.models:tray_net", recipe=_TINY_BASELINE, data="data", out=tmp_path / "run", model_options=_TWO,
             run_options=RunOptions(progress=False, stop_after_steps=steps))
    return root, tmp_path / "run"


def test_a_run_resumed_from_another_directory_reads_the_folder_it_started_on(tmp_path, monkeypatch):
    root, out = _started_here(tmp_path, monkeypatch, steps=2)
    whole = tmp_path / "whole"
    with pytest.warns(SpliceWarning):  # random weights
        tune("splice.models:tray_net", recipe=_TINY_BASELINE, data=str(root), out=whole, model_options=_TWO,
             run_options=QUIET)
    # another directory with a folder of the same name (other classes): read, it would be refused or warned about
    _two_classes(tmp_path / "elsewhere" / "data", n=2)
    monkeypatch.chdir(tmp_path / "elsewhere")
    tune(resume=out, run_options=QUIET)
    resumed, uninterrupted = _folder_state(out / "last"), _folder_state(whole / "last")
    assert resumed.keys() == uninterrupted.keys()
    assert all(torch.equal(resumed[k], uninterrupted[k]) for k in resumed)  # bit for bit: the same images
    info = json.loads((out / "run.json").read_text())
    # os.path.realpath: the standard library's resolved path, the reference for data_path
    assert info["data"] == "data" and info["data_path"] == os.path.realpath(root) and info["status"] == "finished"


def test_the_run_folder_typed_otherwise_is_the_same_data(tmp_path, monkeypatch):
    root, out = _started_here(tmp_path, monkeypatch, steps=1)
    monkeypatch.chdir(tmp_path)
    for steps, given in enumerate((f"{root}/", "here/data/", "here/./data", "here/data"), start=2):
        tune(resume=out, data=given, run_options=RunOptions(progress=False, stop_after_steps=steps))
    assert json.loads((out / "run.json").read_text())["data_path"] == os.path.realpath(root)
    with pytest.raises(SpliceError, match=r"was started with data 'data', but 'digits' was given"):
        tune(resume=out, data="digits", run_options=QUIET)


def test_a_moved_data_folder_is_named_on_resume_and_recorded_where_it_is_now(tmp_path, monkeypatch, capsys):
    root, out = _started_here(tmp_path, monkeypatch, steps=1)
    moved = root.rename(tmp_path / "moved")
    code = cli.main(["tune", "--resume", str(out), "--quiet"])
    err = [line for line in capsys.readouterr().err.strip().splitlines() if not line.startswith("warning:")]
    assert code == 2 and len(err) == 1, err
    assert f"was started on the data folder '{os.path.realpath(root)}' (run.json), which no longer exists; pass " \
           "--data with the folder's new place" in err[0]
    tune(resume=out, data=str(moved), run_options=RunOptions(progress=False, stop_after_steps=2))  # same files
    info = json.loads((out / "run.json").read_text())
    assert info["data"] == info["data_path"] == os.path.realpath(moved)
    tune(resume=out, run_options=QUIET)  # found again without --data
    assert json.loads((out / "run.json").read_text())["status"] == "finished"


def test_another_copy_of_the_data_is_taken_only_with_the_same_files(tmp_path, monkeypatch):
    import shutil

    root, out = _started_here(tmp_path, monkeypatch, steps=1)
    copy = tmp_path / "copy"
    shutil.copytree(root, copy)
    tune(resume=out, data=str(copy), run_options=RunOptions(progress=False, stop_after_steps=2))
    assert json.loads((out / "run.json").read_text())["data_path"] == os.path.realpath(copy)
    (root / "train" / "b" / "5.png").rename(root / "train" / "b" / "6.png")  # as many files, not the same
    with pytest.raises(DataError, match=r"the run's data folder '.*copy' still exists and '.*data' holds other image "
                                        r"files; omit --data to resume on the run's own data"):
        tune(resume=out, data=str(root), run_options=QUIET)
    assert json.loads((out / "run.json").read_text())["data_path"] == os.path.realpath(copy)


def test_resuming_after_class_folders_were_renamed_is_refused(tmp_path):
    # a renamed class folder reorders the classes: each output would go on meaning another class
    root = _two_classes(tmp_path / "data", n=6)
    out = tmp_path / "run"
    recipe = dataclasses.replace(load_recipe("baseline"), batch_size=4, epochs=2)
    with pytest.warns(SpliceWarning):  # random weights
        tune("splice.models:tray_net", recipe=recipe, data=str(root), out=out,
             model_options=ModelOptions(kwargs={"num_classes": 2}), run_options=RunOptions(progress=False,
                                                                                           stop_after_steps=1))
    for split in ("train", "val"):
        (root / split / "a").rename(root / split / "z")
    with pytest.raises(DataError, match=r"the run started with classes \['a', 'b'\] but data .* now has \['b', 'z'\] "
                                        r"\(class 0 is 'a' in one and 'b' in the other\)"):
        tune(resume=out, run_options=QUIET)
    assert json.loads((out / "run.json").read_text())["class_names"] == ["a", "b"]


def test_every_file_that_is_no_image_is_named_before_the_run_starts(tmp_path):
    root = _two_classes(tmp_path / "data")
    for name in ("x.png", "y.jpg"):
        (root / "train" / "a" / name).write_bytes(b"not an image at all")
    (root / "val" / "b" / "z.png").write_bytes(b"")
    out = tmp_path / "run"
    with pytest.warns(SpliceWarning), pytest.raises(DataError) as caught:  # random weights
        tune("splice.models:tray_net", recipe="baseline", data=str(root), out=out,
             model_options=ModelOptions(kwargs={"num_classes": 2}), run_options=QUIET)
    message = str(caught.value)
    assert "3 of 15 images of data" in message and all(n in message for n in ("x.png", "y.jpg", "z.png"))
    assert not out.exists()  # refused before the run folder was made


# ----------------------------------------------------------------------------- the run-folder lock


def test_lock_names_the_holder_and_a_dead_holder_is_stale(tmp_path):
    folder = tmp_path / "f"
    folder.mkdir()
    lock = FolderLock(folder).acquire()
    record = json.loads((folder / LOCK_FILE).read_text())
    assert record["pid"] == os.getpid()
    assert lock_holder(folder)["pid"] == os.getpid()
    with pytest.raises(FolderBusy, match=rf"'{folder}' is in use by process {os.getpid()} \(splice tune\)"):
        FolderLock(folder).acquire()  # a second open file description: refused like another process
    lock.release()
    assert not (folder / LOCK_FILE).exists() and lock_holder(folder) is None
    # a lock file left by a process that died (SIGKILL leaves it behind): stale, taken over
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (folder / LOCK_FILE).write_text(json.dumps({"pid": dead.pid, "command": "splice tune"}))
    assert lock_holder(folder) is None
    with FolderLock(folder) as again:
        assert again.stale["pid"] == dead.pid


@pytest.mark.filterwarnings("ignore::splice.errors.RandomWeightsWarning")
def test_a_second_run_into_a_locked_folder_is_refused(tmp_path, capsys):
    out = tmp_path / "run"
    tune("splice.models:tray_net", recipe=_baseline(epochs=1), data="digits", out=out, run_options=QUIET,
         model_options=ModelOptions(kwargs={"width": 4}, input_shape=(1, 24, 24)))
    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    with FolderLock(out):  # a run is writing to it
        with pytest.raises(FolderBusy, match=rf"in use by process {os.getpid()}"):
            tune(resume=out, run_options=QUIET)
        code = cli.main(["tune", "--resume", str(out), "--quiet"])
        err = capsys.readouterr().err.strip().splitlines()
        assert code == 2 and len(err) == 1 and f"in use by process {os.getpid()}" in err[0]
        fresh = tmp_path / "fresh"
        fresh.mkdir()
        with FolderLock(fresh), pytest.raises(FolderBusy, match="in use by process"):
            tune("splice.models:tray_net", recipe=_baseline(epochs=1), data="digits", out=fresh, run_options=QUIET)
        with pytest.raises(FolderBusy, match="cannot replace .* in use by process"):
            check_replaceable(out)
    after = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    assert after == before  # the refused runs wrote nothing


# ----------------------------------------------------------------------------- --overwrite


@pytest.fixture(scope="module")
def spliced_folder(tmp_path_factory):
    out = tmp_path_factory.mktemp("ow") / "spliced"
    src = splice.load_source("splice.models:tray_net", kwargs={"width": 4}, input_shape=(1, 24, 24),
                             warn_random=False)
    splice.save(splice.insert(src, at=["input"]), out)
    return out


def _insert(target, *extra):
    return cli.main(["insert", "splice.models:tray_net", "--kwargs", '{"width": 4}', "--input-shape", "1x24x24",
                     "--at", "input", "--out", str(target), *extra])


@pytest.mark.filterwarnings("ignore::splice.errors.RandomWeightsWarning")
def test_overwrite_refuses_a_folder_splice_did_not_write(tmp_path, capsys):
    mine = tmp_path / "photos"
    (mine / "album").mkdir(parents=True)
    (mine / "a.jpg").write_bytes(b"x")
    (mine / "notes.txt").write_text("keep me")
    assert _insert(mine, "--overwrite") == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert "replaces only a spliced folder" in err[0] and "holds a.jpg, album/, notes.txt" in err[0]
    assert (mine / "notes.txt").read_text() == "keep me" and (mine / "album").is_dir()
    a_file = tmp_path / "file.bin"
    a_file.write_bytes(b"data")
    assert _insert(a_file, "--overwrite") == 2
    assert "is a file" in capsys.readouterr().err and a_file.read_bytes() == b"data"
    # a manifest that only looks like ours is not ours
    fake = tmp_path / "fake"
    fake.mkdir()
    (fake / "splice.json").write_text('{"format": "something-else"}')
    assert _insert(fake, "--overwrite") == 2
    assert (fake / "splice.json").exists()


@pytest.mark.filterwarnings("ignore::splice.errors.RandomWeightsWarning")
def test_overwrite_replaces_a_spliced_folder_a_run_folder_or_an_empty_one(tmp_path, spliced_folder, capsys):
    import shutil

    target = tmp_path / "spliced"
    shutil.copytree(spliced_folder, target)
    # what splice writes beside a splice (a certificate, an inspect report, an export) goes with it; a file of the
    # user's is never deleted: the replacement is refused, naming it, until it is moved out
    from splice.cli import main

    assert main(["verify", str(target), "--report", str(target / "certificate.json")]) == 0
    (target / "inspect").mkdir()
    (target / "inspect" / "summary.json").write_text(json.dumps({"format": "splice-inspect-report"}))
    (target / "photo.png").write_bytes(b"a picture of the user's")  # a name alone does not make it splice's
    (target / "notes.txt").write_text("mine")
    capsys.readouterr()
    assert _insert(target, "--overwrite") == 2
    assert "also holds 'notes.txt', 'photo.png', not written by splice" in capsys.readouterr().err
    assert (target / "notes.txt").read_text() == "mine" and (target / "certificate.json").is_file()
    (target / "notes.txt").unlink()
    (target / "photo.png").unlink()
    assert _insert(target, "--overwrite") == 0
    assert sorted(p.name for p in target.iterdir()) == ["splice.json", "weights.safetensors"]
    run = tmp_path / "run"
    run.mkdir()
    (run / "run.json").write_text(json.dumps({"format": "splice-run", "schema_version": 1}))
    assert _insert(run, "--overwrite") == 0 and not (run / "run.json").exists()
    empty = tmp_path / "empty"
    empty.mkdir()
    assert _insert(empty, "--overwrite") == 0
    capsys.readouterr()
    with pytest.raises(SpliceError, match="already exists; pass --overwrite"):
        splice.save(splice.load(target), target)


def test_overwrite_never_deletes_what_the_command_reads(tmp_path, spliced_folder, capsys, monkeypatch):
    import shutil

    run = tmp_path / "run"
    run.mkdir()
    (run / "run.json").write_text(json.dumps({"format": "splice-run", "schema_version": 1}))
    shutil.copytree(spliced_folder, run / "best")
    argv = ["insert", str(run / "best"), "--at", "input", "--out", str(run), "--overwrite"]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "would delete" in err[0] and "read by this command" in err[0], err
    assert (run / "best" / "splice.json").is_file() and (run / "run.json").is_file()
    weights = run / "w.pt"
    torch.save({}, weights)
    assert _insert(run, "--weights", str(weights), "--overwrite") == 2
    assert "would delete" in capsys.readouterr().err and weights.is_file()
    # a registry spec names no file: an output folder that happens to share its head is no input
    monkeypatch.chdir(tmp_path)
    (tmp_path / "splice.models").mkdir()
    assert _insert(tmp_path / "splice.models", "--overwrite") == 0


# ----------------------------------------------------------------------------- pre-training resume


def _joint(pretrain_epochs=2):
    d = load_recipe("joint").with_overrides(epochs=1, batch_size=128).to_dict()
    d["pretrain"]["epochs"] = pretrain_epochs
    return Recipe.from_dict(d)


def _last_hash(run):
    return state_dict_sha256(_folder_state(run / "last"))


@pytest.mark.parametrize("stop_at", [3, None], ids=["mid-epoch", "epoch-end"])
def test_pretraining_checkpoints_and_resumes_exactly(tmp_path, spliced_folder, stop_at):
    full = tmp_path / "full"
    tune(str(spliced_folder), recipe=_joint(), data="digits-moved", out=full, run_options=QUIET)
    ckpt = load_checkpoint(full / CHECKPOINT_NAME)
    assert "pretrain" not in ckpt and ckpt["epoch"] == 1
    per_epoch = json.loads((full / "metrics.jsonl").read_text().splitlines()[0])["pretrain_steps"] // 2
    stop = stop_at if stop_at is not None else per_epoch  # the end of pre-training epoch 1
    part = tmp_path / "part"
    summary = tune(str(spliced_folder), recipe=_joint(), data="digits-moved", out=part,
                   run_options=RunOptions(progress=False, stop_after_pretrain_steps=stop))
    assert summary["interrupted"]
    ckpt = load_checkpoint(part / CHECKPOINT_NAME)
    pre = ckpt["pretrain"]
    assert pre["step"] == stop
    assert (pre["epoch"], pre["batch"]) == ((0, stop) if stop_at is not None else (1, 0))
    assert ckpt["step"] == 0 and read_metrics(part) == []
    assert json.loads((part / "run.json").read_text())["status"] == "interrupted"
    tune(resume=part, run_options=QUIET)
    assert _last_hash(part) == _last_hash(full)
    strip = ("time_s", "images_per_s")
    rows = [{k: v for k, v in r.items() if k not in strip} for r in read_metrics(part)]
    assert rows == [{k: v for k, v in r.items() if k not in strip} for r in read_metrics(full)]
    assert json.loads((part / "run.json").read_text())["status"] == "finished"
