"""splice tune in one process: run folder, recipes on the right models, frozen base, exact resume, safe writes.

The model is a narrow tray_net on 24x24 digits so that an epoch takes well under a second.
"""

from __future__ import annotations

import errno
import json
import os
from pathlib import Path

import pytest
import torch

import splice
from splice.fileio import state_dict_sha256
from splice.errors import DataError, RecipeError, SpliceError
from splice.recipes import load_recipe
from splice.surgery import WARP_PREFIX
from splice.options import ModelOptions
from splice.training import RecipeOverrides, RunOptions, read_metrics, tune, tune_keywords
from splice.training.checkpoint import CHECKPOINT_NAME, load_checkpoint

SPEC = "splice.models:tray_net"
KW = {"width": 4}
SHAPE = (1, 24, 24)
QUIET = {"progress": False}


pytestmark = pytest.mark.usefixtures("one_thread")  # see conftest.py


def _recipe(name: str, **changes):
    """A shipped recipe made tiny: 2 epochs, a short pre-training."""
    r = load_recipe(name).with_overrides(epochs=changes.pop("epochs", 2), batch_size=changes.pop("batch_size", 128))
    d = r.to_dict()
    d["pretrain"]["epochs"] = changes.pop("pretrain_epochs", 1)
    d.update(changes)
    from splice.recipes import Recipe

    return Recipe.from_dict(d)


@pytest.fixture(scope="module")
def base_run(tmp_path_factory):
    """A plain base trained briefly with baseline on upright digits."""
    out = tmp_path_factory.mktemp("base") / "run"
    summary = tune(SPEC, recipe=_recipe("baseline", epochs=2), data="digits", out=out,
                   model_options=ModelOptions(kwargs=KW, input_shape=SHAPE), run_options=RunOptions(progress=False))
    return out, summary


@pytest.fixture(scope="module")
def spliced(base_run, tmp_path_factory):
    out = tmp_path_factory.mktemp("spliced") / "affine"
    model = splice.insert(str(base_run[0] / "best"), at=["input"], warp=splice.WarpConfig(head_width=4))
    splice.save(model, out)
    return out


def _hashes(state) -> dict[str, str]:
    return {k: state_dict_sha256({k: v}) for k, v in state.items()}


def test_baseline_run_folder_layout(base_run):
    out, summary = base_run
    assert summary["rank"] == 0 and summary["out"] == str(out)
    assert {p.name for p in out.iterdir()} >= {"run.json", "recipe.toml", "metrics.jsonl", CHECKPOINT_NAME,
                                                 "best", "last"}
    rows = read_metrics(out)
    assert [r["phase"] for r in rows] == ["start", "epoch", "epoch"]
    for key in ("step", "epoch", "loss", "accuracy", "lr", "images_per_s", "warp_distance"):
        assert key in rows[-1]
    steps_per_epoch = -(-1078 // 128)  # 1078 training digits (splice.data docstring), batch 128
    assert rows[-1]["step"] == 2 * steps_per_epoch == summary["steps"]
    assert summary["best_accuracy"] == pytest.approx(max(r["accuracy"] for r in rows), abs=1e-6)
    # best/ and last/ are plain splice folders: loadable, and splice insert takes them
    manifest = json.loads((out / "best" / "splice.json").read_text())
    assert manifest["points"] == [] and manifest["class_names"] == [str(d) for d in range(10)]
    assert manifest["tuning"]["recipe"] == "baseline" and manifest["tuning"]["which"] == "best"
    assert manifest["tuning"]["epoch"] == summary["best_epoch"]
    last = json.loads((out / "last" / "splice.json").read_text())["tuning"]
    assert last["base_changed"] is True and last["epoch"] == 2
    model = splice.load(out / "last")
    assert not any(k.startswith(WARP_PREFIX) for k in model.state_dict())
    info = json.loads((out / "run.json").read_text())
    assert info["status"] == "finished" and info["data"] == "digits"
    assert (info["train_images"], info["val_images"]) == (1078, 359)  # splice.data's digits splits
    ckpt = load_checkpoint(out / CHECKPOINT_NAME)  # torch.load(weights_only=True) inside
    assert ckpt["epoch"] == 2 and ckpt["batch"] == 0 and ckpt["step"] == summary["steps"]


def test_overrides_reach_the_run(tmp_path, spliced):
    out = tmp_path / "run"
    summary = tune(str(spliced), recipe="joint", data="digits-moved", out=out,
                   overrides=RecipeOverrides(epochs=1, batch_size=256, seed=3, lr=0.01),
                   run_options=RunOptions(progress=False))
    resolved = load_recipe(out / "recipe.toml")
    assert (resolved.epochs, resolved.batch_size, resolved.seed, resolved.lr) == (1, 256, 3, 0.01)
    assert summary["steps"] == -(-1078 // 256)
    rows = read_metrics(out)
    assert rows[0]["phase"] == "pretrain" and rows[0]["reference"] == "digits"  # auto: the upright counterpart
    warm = load_recipe("joint").warmup_epochs
    assert warm > 0 and rows[-1]["lr"] < 0.01  # cosine decayed from the overridden lr


def test_a_given_reference_is_in_the_resolved_recipe_that_can_be_passed_back(tmp_path, spliced):
    # recipe.toml said reference = "auto", so passed back as --recipe it stopped: no reference known for the data
    out = tmp_path / "run"
    stop = RunOptions(progress=False, stop_after_pretrain_steps=1)
    tune(str(spliced), recipe=_recipe("warp-only", epochs=1), data="digits-moved", out=out,
         overrides=RecipeOverrides(reference="digits"), run_options=stop)
    assert load_recipe(out / "recipe.toml").pretrain.reference == "digits"
    again = tmp_path / "again"
    tune(str(spliced), recipe=str(out / "recipe.toml"), data="digits-moved", out=again, run_options=stop)
    recorded = json.loads((again / "run.json").read_text())
    assert (recorded["reference"], recorded["reference_origin"]) == ("digits", "given"), recorded


def test_a_reference_folder_is_written_to_the_resolved_recipe_by_its_absolute_path(tmp_path, spliced, monkeypatch):
    # recipe.toml kept the reference as typed ("ref"), so passed back from another directory it named another folder
    from PIL import Image

    from splice.data import open_data

    upright = open_data("digits", "val", input_shape=SHAPE).images[:12]
    for split in ("train", "val"):
        (tmp_path / "here" / "ref" / split / "0").mkdir(parents=True)
        for i, img in enumerate(upright):
            pixels = (img[0] * 255).round().to(torch.uint8).numpy()
            Image.fromarray(pixels, mode="L").save(tmp_path / "here" / "ref" / split / "0" / f"{i}.png")
    monkeypatch.chdir(tmp_path / "here")
    stop = RunOptions(progress=False, stop_after_pretrain_steps=1)
    out = tmp_path / "run"
    tune(str(spliced), recipe=_recipe("warp-only", epochs=1), data="digits-moved", out=out,
         overrides=RecipeOverrides(reference="ref/"), run_options=stop)
    # os.path.realpath: the standard library's resolved path, the reference for what the recipe records
    assert load_recipe(out / "recipe.toml").pretrain.reference == os.path.realpath(tmp_path / "here" / "ref")
    (tmp_path / "elsewhere" / "ref").mkdir(parents=True)  # a same-named folder, empty: refused if it were read
    monkeypatch.chdir(tmp_path / "elsewhere")
    again = tmp_path / "again"
    tune(str(spliced), recipe=str(out / "recipe.toml"), data="digits-moved", out=again, run_options=stop)
    recorded = json.loads((again / "run.json").read_text())
    assert (recorded["reference"], recorded["reference_origin"]) == (os.path.realpath(tmp_path / "here" / "ref"),
                                                                      "given")
    assert load_recipe(again / "recipe.toml").pretrain.reference == recorded["reference"]


def test_the_stop_line_counts_in_the_steps_of_the_phase_it_stopped_in(tmp_path, spliced, capsys):
    # a stop in warp pre-training read "stopped at warp pre-training step 3 (step 0)": two contradictory counts
    out = tmp_path / "run"
    recipe = _recipe("warp-only", epochs=1, batch_size=64)
    tune(str(spliced), recipe=recipe, data="digits-moved", out=out,
         run_options=RunOptions(quiet=True, stop_after_pretrain_steps=3))
    said = capsys.readouterr()
    lines = [line for line in (said.out + said.err).splitlines() if line.startswith("stopped at")]
    tune(resume=out, run_options=RunOptions(quiet=True, stop_after_steps=2))
    total = next(r for r in read_metrics(out) if r["phase"] == "pretrain")["pretrain_steps"]  # what pre-training ran
    said = capsys.readouterr()
    lines += [line for line in (said.out + said.err).splitlines() if line.startswith("stopped at")]
    assert lines == [f"stopped at warp pre-training step 3 of {total}; checkpoint written. Continue with: "
                     f"splice tune --resume {out}",
                     f"stopped at epoch 1, batch 2 (step 2); checkpoint written. Continue with: "
                     f"splice tune --resume {out}"]


def test_warp_only_keeps_every_base_tensor_bit_identical(tmp_path, spliced):
    before = splice.load(spliced).state_dict()
    out = tmp_path / "run"
    summary = tune_keywords(str(spliced), recipe=_recipe("warp-only"), data="digits-moved", out=out, **QUIET)
    assert summary["base_changed"] is False
    for which in ("best", "last"):
        after = splice.load(out / which).state_dict()
        base_before = {k: v for k, v in before.items() if not k.startswith(WARP_PREFIX)}
        base_after = {k: v for k, v in after.items() if not k.startswith(WARP_PREFIX)}
        assert _hashes(base_after) == _hashes(base_before)  # every tensor, BN running stats included
        assert json.loads((out / which / "splice.json").read_text())["tuning"]["base_changed"] is False
    after = splice.load(out / "last").state_dict()
    moved = [k for k in after if k.startswith(WARP_PREFIX) and not torch.equal(after[k], before[k])]
    assert moved, "the warp head did not train"
    assert any(v > 0 for v in read_metrics(out)[-1]["warp_distance"].values())


def test_a_tuned_folder_hashes_what_it_computes_and_means(tmp_path, spliced):
    """tune writes its folders with save: the normalisation and class names it records are hashed beside the
    weights, verify passes the folder as written and fails it once its normalisation is edited."""
    from safetensors import safe_open

    from splice.manifest import FIELDS_KEY, WEIGHTS_NAME

    out = tmp_path / "run"
    tune_keywords(str(spliced), recipe=_recipe("warp-only", epochs=1), data="digits-moved", out=out, **QUIET)
    best = out / "best"
    with safe_open(str(best / WEIGHTS_NAME), framework="pt") as f:  # safetensors' reader is the reference
        assert FIELDS_KEY in f.metadata()
    assert splice.verify(best).passed
    manifest = json.loads((best / "splice.json").read_text())
    manifest["class_names"] = list(reversed(manifest["class_names"]))
    (best / "splice.json").write_text(json.dumps(manifest))
    report = splice.verify(best)
    assert report.failed == ["integrity"] and report["integrity"].summary == "class_names edited"


def test_joint_changes_the_base_and_records_it(tmp_path, spliced):
    out = tmp_path / "run"
    summary = tune_keywords(str(spliced), recipe=_recipe("staged", epochs=2), data="digits-moved", out=out, **QUIET)
    assert summary["base_changed"] is True
    rows = read_metrics(out)
    assert [r["base_frozen"] for r in rows if r["phase"] == "epoch"] == [True, False]  # staged: 0.4 * 2 -> 1 epoch
    manifest = json.loads((out / "last" / "splice.json").read_text())
    assert manifest["tuning"]["base_changed"] is True and manifest["points"][0]["name"] == "input"


def test_a_seed_fixes_the_random_init_of_a_model_built_from_a_spec(tmp_path):
    """One seed, one run: the init of a spec built without weights comes from the recipe seed,
    and the caller's RNG is left as it was."""
    recipe = _recipe("baseline", epochs=1)

    def trained(name, seed):
        tune_keywords(SPEC, kwargs=KW, input_shape=SHAPE, recipe=recipe, data="digits", out=tmp_path / name, seed=seed,
                      **QUIET)
        return state_dict_sha256(splice.load(tmp_path / name / "last").state_dict())

    torch.manual_seed(7)
    expected_next = torch.rand(3)
    torch.manual_seed(7)
    first = trained("a", 0)
    assert torch.equal(torch.rand(3), expected_next)  # tune did not consume the caller's RNG
    torch.manual_seed(12345)  # a different process state before the second run
    assert trained("b", 0) == first
    assert trained("c", 1) != first


def test_a_cpu_run_is_deterministic_without_the_nan_fill_and_restores_the_callers_settings(tmp_path, monkeypatch):
    """On the CPU a run uses deterministic algorithms but does not fill fresh memory with NaN (a speed-up,
    see splice.training.tune); its weights are bit-identical to a run that fills, and the caller's three
    settings (mode, warn_only, fill) come back afterwards."""
    import importlib

    tune_module = importlib.import_module("splice.training.tune")
    real_train, seen = tune_module.train, []

    def spying(fill):
        def train(run):
            if fill is not None:
                torch.utils.deterministic.fill_uninitialized_memory = fill
            fills = torch.utils.deterministic.fill_uninitialized_memory
            seen.append((torch.are_deterministic_algorithms_enabled(), fills))
            return real_train(run)
        return train

    def trained(name, fill):
        monkeypatch.setattr(tune_module, "train", spying(fill))
        tune_keywords(SPEC, kwargs=KW, input_shape=SHAPE, recipe=_recipe("baseline", epochs=1), data="digits",
                      out=tmp_path / name, **QUIET)
        return state_dict_sha256(splice.load(tmp_path / name / "last").state_dict())

    before = (torch.are_deterministic_algorithms_enabled(), torch.is_deterministic_algorithms_warn_only_enabled(),
              torch.utils.deterministic.fill_uninitialized_memory)
    torch.use_deterministic_algorithms(True, warn_only=True)  # the caller's own choice, kept through the run
    try:
        assert trained("fast", None) == trained("filled", True)
        assert seen == [(True, False), (True, True)]
        assert torch.is_deterministic_algorithms_warn_only_enabled()
        assert torch.utils.deterministic.fill_uninitialized_memory
    finally:
        torch.use_deterministic_algorithms(before[0], warn_only=before[1])
        torch.utils.deterministic.fill_uninitialized_memory = before[2]


def test_warp_recipe_on_a_plain_model_explains_insert(tmp_path, base_run):
    with pytest.raises(RecipeError, match=r"trains warps, but .* has none; splice it first, e.g. 'splice insert"):
        tune_keywords(str(base_run[0] / "best"), recipe="warp-only", data="digits", out=tmp_path / "a", **QUIET)
    from splice.models import tray_net

    torch.save(tray_net().state_dict(), tmp_path / "my weights.pt")
    with pytest.raises(RecipeError, match=r"'splice insert splice.models:tray_net --weights '.*my weights.pt' --at "
                                          r"input --warp affine --out SPLICED'"):  # the advice keeps the weights
        tune_keywords("splice.models:tray_net", weights=tmp_path / "my weights.pt", recipe="warp-only", data="digits",
                      out=tmp_path / "b", **QUIET)


def test_baseline_on_a_spliced_model_is_refused(tmp_path, spliced):
    with pytest.raises(RecipeError, match=r"trains plain models, but .* holds warps at input; use 'joint'"):
        tune_keywords(str(spliced), recipe="baseline", data="digits", out=tmp_path / "a", **QUIET)


def test_bad_run_arguments(tmp_path, spliced):
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "x").write_text("x")
    with pytest.raises(SpliceError, match=r"already exists and is not empty; continue it with --resume"):
        tune_keywords(str(spliced), recipe="joint", out=tmp_path / "full", **QUIET)
    with pytest.raises(SpliceError, match=r"tune needs a run folder: pass --out RUN"):
        tune_keywords(str(spliced), recipe="joint", **QUIET)
    with pytest.raises(SpliceError, match=r"is not a splice tune run folder \(no run.json\)"):
        tune_keywords(resume=tmp_path / "full", **QUIET)
    with pytest.raises(DataError, match=r"model has 7 outputs but data 'digits' has 10 classes.*num_classes"):
        tune_keywords(SPEC, kwargs={"width": 4, "num_classes": 7}, input_shape=SHAPE, recipe="baseline", out=tmp_path / "b",
                      **QUIET)
    with pytest.raises(RecipeError, match=r"freeze pattern 'nope\*' matches no module"):
        tune_keywords(SPEC, kwargs=KW, input_shape=SHAPE, recipe=_recipe("baseline", freeze=["nope*"]), out=tmp_path / "c",
                      **QUIET)


def test_freeze_patterns_keep_matching_modules_fixed(tmp_path, base_run):
    start = splice.load(base_run[0] / "best").state_dict()
    out = tmp_path / "run"
    tune_keywords(str(base_run[0] / "best"), recipe=_recipe("baseline", epochs=1, freeze=["block1*"]), data="digits",
                  out=out, **QUIET)
    after = splice.load(out / "last").state_dict()
    for k, v in after.items():
        if k.startswith("block1."):
            assert torch.equal(v, start[k]), k  # weights and BN statistics (frozen modules run in eval mode)
    assert not torch.equal(after["fc.weight"], start["fc.weight"])


def _final_hash(run) -> str:
    return state_dict_sha256(splice.load(run / "last").state_dict())


def test_stopped_mid_epoch_and_resumed_matches_uninterrupted(tmp_path, spliced):
    recipe = _recipe("joint", epochs=2, batch_size=64)  # augmentation on: its randomness must replay too
    full = tmp_path / "full"
    tune_keywords(str(spliced), recipe=recipe, data="digits-moved", out=full, **QUIET)

    part = tmp_path / "part"
    stopped = tune_keywords(str(spliced), recipe=recipe, data="digits-moved", out=part, stop_after_steps=5, **QUIET)
    assert stopped["interrupted"] and stopped["resume_at"] == {"epoch": 0, "batch": 5}
    ckpt = load_checkpoint(part / CHECKPOINT_NAME)
    assert (ckpt["epoch"], ckpt["batch"], ckpt["step"]) == (0, 5, 5)
    assert json.loads((part / "run.json").read_text())["status"] == "interrupted"
    with pytest.raises(SpliceError, match=r"started with a different recipe \(differs in epochs\)"):
        tune_keywords(resume=part, epochs=9, **QUIET)
    summary = tune_keywords(resume=part, **QUIET)
    assert summary["steps"] == 2 * 17
    assert _final_hash(part) == _final_hash(full)
    # the same rows, apart from timings
    strip = ("time_s", "images_per_s")
    rows = [{k: v for k, v in r.items() if k not in strip} for r in read_metrics(part)]
    assert rows == [{k: v for k, v in r.items() if k not in strip} for r in read_metrics(full)]


class _FailingFile:
    """Writes half of what it is given, then fails like a full disk."""

    def __init__(self, fh):
        self.fh = fh

    def write(self, data):
        self.fh.write(data[: len(data) // 2])
        raise OSError(errno.ENOSPC, "No space left on device")

    def __getattr__(self, name):
        return getattr(self.fh, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.fh.close()


@pytest.mark.parametrize("failure", ["disk-full", "read-only"])
def test_failed_checkpoint_write_leaves_the_previous_one_intact(tmp_path, base_run, monkeypatch, failure):
    out = tmp_path / "run"
    tune_keywords(str(base_run[0] / "best"), recipe=_recipe("baseline", epochs=2), data="digits", out=out,
                  stop_after_steps=9, **QUIET)  # epoch 1 is 9 steps at batch 128: the checkpoint sits at an epoch end
    good = (out / CHECKPOINT_NAME).read_bytes()
    import splice.fileio as io_mod
    import splice.training.checkpoint as ckpt_mod

    def failing_write(path, data):
        """The real atomic write, with the disk failing underneath it."""
        with pytest.MonkeyPatch.context() as mp:
            if failure == "disk-full":
                real = os.fdopen
                mp.setattr(io_mod.os, "fdopen", lambda fd, mode: _FailingFile(real(fd, mode)))
            else:
                def refuse(src, dst):
                    raise OSError(errno.EROFS, "Read-only file system")
                mp.setattr(io_mod.os, "replace", refuse)
            return io_mod.atomic_write_bytes(path, data)

    monkeypatch.setattr(ckpt_mod, "atomic_write_bytes", failing_write)
    with pytest.raises(SpliceError, match=r"could not write the checkpoint .* the previous checkpoint is intact"):
        tune_keywords(resume=out, **QUIET)
    monkeypatch.undo()
    assert (out / CHECKPOINT_NAME).read_bytes() == good
    assert load_checkpoint(out / CHECKPOINT_NAME)["step"] == 9
    assert not [p for p in out.iterdir() if p.name.startswith(f".{CHECKPOINT_NAME}")]  # no temp files left
    assert tune_keywords(resume=out, **QUIET)["steps"] == 18  # and the run can still finish


class _Tty(__import__("io").StringIO):
    def isatty(self):
        return True


def test_progress_is_plain_without_a_terminal_and_honours_no_color(monkeypatch):
    import io
    import re

    from splice.progress import Progress

    plain = io.StringIO()
    with Progress(stream=plain) as bar:
        assert not bar.rich
        bar.start("epoch 1/1", 10)
        bar.update(5, loss=0.5)  # no bar, no output per step
        bar.line("epoch 1/1  step 10  val acc 0.9000")
    assert plain.getvalue() == "epoch 1/1  step 10  val acc 0.9000\n"

    quiet = _Tty()
    with Progress(stream=quiet, quiet=True) as bar:
        assert not bar.rich
        bar.line("done")
    assert quiet.getvalue() == "done\n"

    monkeypatch.setenv("NO_COLOR", "1")
    monkeypatch.setenv("TERM", "xterm-256color")
    tty = _Tty()
    with Progress(stream=tty, refresh_s=0.0) as bar:
        assert bar.rich
        bar.start("epoch 1/2", 4)
        bar.update(2, loss=0.25, acc=0.5, **{"img/s": 1234.0})
        bar.line("epoch 1/2  step 4")
    text = tty.getvalue()
    assert "epoch 1/2  step 4" in text and "loss 0.2500" in text and "1,234 img/s" in text
    assert not re.search(r"\x1b\[[0-9;]*3[0-7]m|\x1b\[38;", text)  # no colour codes under NO_COLOR


def test_lr_schedules():
    from splice.training.schedule import lr_factor

    kw = {"steps_per_epoch": 10, "total_steps": 100}
    assert lr_factor("constant", 57, **kw) == 1.0
    assert lr_factor("cosine", 0, **kw) == 1.0 and lr_factor("cosine", 100, **kw) == pytest.approx(0.0)
    assert lr_factor("cosine", 50, **kw) == pytest.approx(0.5)  # half-way down 0.5 (1 + cos(pi t))
    assert [lr_factor("cosine", s, warmup_steps=4, **kw) for s in range(4)] == [0.2, 0.4, 0.6, 0.8]
    assert lr_factor("step", 29, step_epochs=2, step_gamma=0.5, **kw) == 0.5  # epoch 2 -> one decay
    assert lr_factor("step", 40, step_epochs=2, step_gamma=0.5, **kw) == 0.25


def test_identity_penalty_is_zero_at_the_identity_and_the_mean_squared_shift_otherwise(spliced):
    from splice.surgery import warps_of
    from splice.training.loop import identity_penalty

    warp = warps_of(splice.load(spliced))["input"]
    ident = warp.head.identity.reshape(1, -1).repeat(3, 1)
    assert float(identity_penalty({"input": warp}, {"input": ident})) == 0.0
    moved = ident.clone()
    moved[:, 2], moved[:, 5] = 0.3, -0.4  # affine theta row-major: a pure translation (0.3, -0.4)
    # every grid point moves by (0.3, -0.4): the mean over both coordinates is (0.09 + 0.16) / 2
    assert float(identity_penalty({"input": warp}, {"input": moved})) == pytest.approx(0.125, rel=1e-6)


def test_pretraining_target_grid_undoes_the_distortion():
    """The grid built from the forward distortion matrix samples the distorted image back to the original."""
    import torch.nn.functional as F

    from splice.distort import DistortionRange, random_distort
    from splice.training.pretrain import target_grid

    img = torch.zeros(1, 1, 32, 32)
    img[..., 10:22, 12:20] = 1.0  # a bar well inside the frame
    gen = torch.Generator().manual_seed(3)
    moved, meta = random_distort(img.double(), DistortionRange(rotation_deg=40, scale=(0.9, 1.1), shift=0.1), gen)
    back = F.grid_sample(moved, target_grid(meta["matrix"], 32, 32, dtype=torch.float64), align_corners=False)
    # two bilinear resamplings blur the bar's edges by about a pixel; the inside must come back
    inner = torch.zeros_like(img, dtype=torch.bool)
    inner[..., 12:20, 14:18] = True
    assert float((back - img.double())[inner].abs().max()) < 0.05
    assert float((back - img.double()).abs().mean()) < 0.02


def test_options_are_checked_and_the_keyword_path_refuses_unknown_keywords(tmp_path):
    with pytest.raises(ValueError, match=r"RunOptions.workers must be an integer >= 0; got -1"):
        RunOptions(workers=-1)
    with pytest.raises(ValueError, match=r"RunOptions.stop_after_steps must be None or an integer >= 1; got 0"):
        RunOptions(stop_after_steps=0)
    with pytest.raises(ValueError, match=r"ModelOptions.leaves must be a sequence of names; got 'Conv2d'"):
        ModelOptions(leaves="Conv2d")
    with pytest.raises(TypeError, match=r"tune\(\) got unexpected keyword argument\(s\) epoch; it takes .*epochs"):
        tune_keywords(SPEC, recipe="baseline", out=tmp_path / "r", epoch=3)
    with pytest.raises(TypeError, match=r"tune's overrides must be a RecipeOverrides \(got dict\); build one"):
        tune(SPEC, recipe="baseline", data="digits", out=tmp_path / "r", overrides={"epochs": 1})
    with pytest.raises(TypeError, match=r"tune's run_options must be a RunOptions \(got dict\)"):
        tune(SPEC, recipe="baseline", data="digits", out=tmp_path / "r", run_options={"progress": False})
    assert not (tmp_path / "r").exists()


def test_training_loss_smooths_labels_and_validation_loss_does_not():
    """The shipped baseline and joint recipes smooth labels by 0.1 (Szegedy et al., CVPR 2016): the step's
    loss is (1 - e) * CE + e * mean over classes of -log p, written out here by hand; validation reports the
    plain cross-entropy, so the collapse check against ln(classes) keeps its meaning."""
    from splice.training.loop import Stepper, evaluate

    assert load_recipe("baseline").label_smoothing == pytest.approx(0.1)
    assert load_recipe("joint").label_smoothing == pytest.approx(0.1)
    torch.manual_seed(0)
    model = torch.nn.Linear(5, 4)
    x, y = torch.randn(6, 5), torch.tensor([0, 1, 2, 3, 0, 1])
    with torch.no_grad():
        logp = torch.log_softmax(model(x), dim=1)
    by_hand = float((0.9 * -logp[torch.arange(6), y] + 0.1 * -logp.mean(dim=1)).mean())
    plain = float(-logp[torch.arange(6), y].mean())
    stepper = Stepper(model, torch.optim.SGD(model.parameters(), lr=0.0), device=torch.device("cpu"),
                      label_smoothing=0.1)
    stepper.step(x, y)
    loss_sum, _, seen = stepper.totals()
    assert seen == 6 and loss_sum / seen == pytest.approx(by_hand, rel=1e-6)
    dataset = torch.utils.data.TensorDataset(x, y)
    val_sum, _, val_seen = evaluate(model, dataset, torch.arange(6), prepare=lambda t: t, device=torch.device("cpu"))
    assert val_seen == 6 and val_sum / val_seen == pytest.approx(plain, rel=1e-6)
    assert abs(by_hand - plain) > 1e-3  # the two differ, so the checks above can tell them apart


@pytest.mark.parametrize("world", [2, 4])
def test_the_ranks_of_a_step_together_hold_the_one_process_batch(world):
    # README, "Several processes": the same global batches on 1 or N processes (DistributedSampler-style strided
    # shards of one permutation, each split into batches of batch_size / world)
    from splice.training import batches as b

    order, batch = b.epoch_order(0, 3, 48), 16
    one = b.index_batches(order, batch)
    ranks = [b.index_batches(b.shard(order, r, world), batch // world) for r in range(world)]
    assert all(len(r) == len(one) for r in ranks)
    for step, expected in enumerate(one):
        assert sorted(torch.cat([r[step] for r in ranks]).tolist()) == sorted(expected.tolist())


_COUNTING_NET = '''
import torch
from torch import nn


class Counting(nn.Module):
    """A small digit classifier that counts its calls in a buffer, eval mode included."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)
        self.fc = nn.Linear(4, 10)
        self.register_buffer("calls", torch.zeros((), dtype=torch.long))

    def forward(self, x):
        with torch.no_grad():
            self.calls += 1
        return self.fc(torch.relu(self.conv(x)).mean((2, 3)))


def build():
    return Counting()
'''


def test_warp_only_on_a_model_that_counts_its_calls_records_that_only_buffers_moved(tmp_path):
    # the counter moves whenever the model runs, warp-only or not: the record says the base changed, and
    # verify says it was only buffers, not that the base was tuned "as well (joint recipe)"
    (tmp_path / "counting.py").write_text(_COUNTING_NET)
    torch.manual_seed(0)
    weights = tmp_path / "w.pt"
    spec = f"{tmp_path / 'counting.py'}:build"
    torch.save(splice.load_source(spec, input_shape=SHAPE, trust_code=True, warn_random=False).model.state_dict(),
               weights)
    src = splice.load_source(spec, weights=weights, input_shape=SHAPE, trust_code=True)
    # reached by hooks: the counter's no_grad block is the first thing a trace meets (its buffer update the next)
    with pytest.warns(UserWarning, match="switches gradients or autocast in a block of its own"):
        spliced = splice.save(splice.insert(src, at="input"), tmp_path / "sp")
    out = tmp_path / "run"
    summary = tune_keywords(str(spliced), recipe=_recipe("warp-only", epochs=1), data="digits-moved", out=out,
                            trust_code=True, **QUIET)
    assert summary["base_changed"] is True
    row = splice.verify(out / "last", trust_code=True)["provenance"]
    assert row.passed and row.summary == "base buffers moved (recorded)"
    assert row.numbers["diff"]["names"] == ["calls"] and "'warp-only'" in row.detail


def test_warp_only_after_joint_is_certified_as_both(tmp_path, spliced):
    # the warp-only run recorded base_changed False (its own start) and forgot the joint run, so verify said the
    # base "was edited after splicing"; the record now compares with the source and keeps the tuning before it
    tune_keywords(str(spliced), recipe=_recipe("joint", epochs=1), data="digits-moved", out=tmp_path / "j", **QUIET)
    summary = tune_keywords(str(tmp_path / "j" / "last"), recipe=_recipe("warp-only", epochs=1), data="digits-moved",
                            out=tmp_path / "w", **QUIET)
    assert summary["base_changed"] is True
    tuning = json.loads((tmp_path / "w" / "last" / "splice.json").read_text())["tuning"]
    assert tuning["mode"] == "warp-only" and tuning["before"]["mode"] == "joint"
    assert Path(tuning["run"]).is_absolute() and Path(tuning["before"]["run"]).is_absolute()
    row = splice.verify(tmp_path / "w" / "last")["provenance"]
    assert row.passed and "'warp-only' after 'joint'" in row.detail


def test_a_signal_stops_the_run_exits_128_plus_it_and_names_the_command_that_continues(tmp_path, spliced,
                                                                                      monkeypatch, capsys):
    # the shell's convention for a process ended by a signal: 128 + its number (SIGTERM is 15: 143)
    import signal

    from splice import cli
    from splice.progress import Progress
    from splice.training.recording import resume_command

    real = Progress.update
    sent = []

    def update(self, completed, **fields):
        if not sent:  # a scheduler's SIGTERM arrives during the first step
            sent.append(True)
            os.kill(os.getpid(), signal.SIGTERM)
        return real(self, completed, **fields)
    monkeypatch.setattr(Progress, "update", update)
    run = tmp_path / "run"
    recipe = tmp_path / "tiny.toml"
    from splice.recipes import recipe_to_toml

    recipe.write_text(recipe_to_toml(_recipe("warp-only", epochs=1, batch_size=64)), encoding="utf-8")
    code = cli.main(["tune", str(spliced), "--recipe", str(recipe), "--data", "digits-moved", "--out", str(run)])
    said = capsys.readouterr()
    err = said.out + said.err
    assert sent and code == 128 + signal.SIGTERM == 143, err
    assert json.loads((run / "run.json").read_text())["status"] == "interrupted"
    assert f"Continue with: splice tune --resume {run}" in err
    # a run of several processes is continued by as many: a plain resume would be refused
    monkeypatch.delenv("LOCAL_WORLD_SIZE", raising=False)
    assert resume_command(run, 4) == f"torchrun --nproc-per-node 4 -m splice tune --resume {run}"
    monkeypatch.setenv("LOCAL_WORLD_SIZE", "2")  # torchrun's own variable: two nodes of two processes
    assert resume_command(run, 4) == (f"torchrun --nproc-per-node 2 -m splice tune --resume {run} on each of the 2 "
                                      "nodes, with their rendezvous options")
    # a folder named relative to here, or with a space, is named so that the command works from anywhere
    monkeypatch.chdir(tmp_path)
    assert resume_command("run", 1) == f"splice tune --resume {run}"
    assert resume_command("my run", 1) == f"splice tune --resume '{tmp_path / 'my run'}'"


def test_upright_agreement_is_recorded_and_a_warp_that_moves_upright_predictions_is_a_caution(tmp_path, spliced):
    # what the base predicts for held-out upright reference images, against what the warped model predicts: no label
    # is needed, and a warp that changes those predictions costs upright accuracy
    from splice.data import normalise
    from splice.errors import UprightChangeWarning
    from splice.manifest import info_of
    from splice.training.recording import UPRIGHT_AGREEMENT
    from splice.training.reference import Reference
    from splice.training.setup import reference_probe

    run = tmp_path / "run"
    with pytest.warns(UprightChangeWarning, match=r"best/ change the base's prediction on .* % of 256 upright") as w:
        summary = tune_keywords(str(spliced), recipe=_recipe("warp-only", epochs=1, batch_size=64, lr=0.05),
                                data="digits-moved", out=run, **QUIET)
    rows = read_metrics(run)
    assert [r["phase"] for r in rows] == ["pretrain", "epoch"]
    best = next(r for r in rows if r["epoch"] == summary["best_epoch"])
    assert summary["best_reference_agreement"] == best["reference_agreement"] < UPRIGHT_AGREEMENT
    # recomputed from the folders: the spliced base (warps at the identity) against best/, on the same probe
    probe = reference_probe(Reference("digits", "upright counterpart"), None, None, SHAPE)
    base, tuned = splice.load(spliced).eval(), splice.load(run / "best").eval()
    x = normalise(probe, info_of(tuned).normalisation)
    with torch.no_grad():
        mine = float((base(x).argmax(1) == tuned(x).argmax(1)).float().mean())
    assert mine == pytest.approx(best["reference_agreement"], abs=1e-6)
    assert f"{100 * (1 - mine):.1f} %" in str(w[0].message)
    # the base agrees with itself: the start row of a run without pre-training reads exactly 1
    still = tmp_path / "still"
    tune_keywords(str(spliced), recipe=_recipe("warp-only", epochs=1, batch_size=64, pretrain_epochs=0),
                  data="digits-moved", out=still, **QUIET)
    assert read_metrics(still)[0]["phase"] == "start" and read_metrics(still)[0]["reference_agreement"] == 1.0
    # tuning best/ again: its start row compares its warps with the base, not with itself
    again = tmp_path / "again"
    tune_keywords(str(run / "best"), recipe=_recipe("warp-only", epochs=1, batch_size=64, pretrain_epochs=0),
                  data="digits-moved", out=again, **QUIET)
    assert read_metrics(again)[0]["reference_agreement"] == pytest.approx(mine, abs=1e-6)


class _AuxInTraining(torch.nn.Module):
    """Logits in eval mode, (logits, auxiliary logits) in train mode, as an Inception-style net returns them."""

    def __init__(self):
        super().__init__()
        self.body = splice.models.tray_net(width=4)

    def forward(self, x):
        out = self.body(x)
        return (out, out.detach() * 0.5) if self.training else out


def test_a_model_whose_train_mode_output_holds_no_logits_is_refused_before_any_work(tmp_path, monkeypatch):
    # the joint recipe trains the base in train mode; the refusal came after the whole warp pre-training
    import sys
    import types

    from splice.training import pretrain

    module = types.ModuleType("aux_in_training")
    module.make = _AuxInTraining
    monkeypatch.setitem(sys.modules, "aux_in_training", module)
    spliced = tmp_path / "sp"
    from splice.graph import TraceFallbackWarning

    with pytest.warns(TraceFallbackWarning):  # the forward reads its own training flag: a hooks splice
        splice.save(splice.insert(splice.load_source("aux_in_training:make", input_shape=SHAPE, warn_random=False),
                                  at="input", warp=splice.WarpConfig(head_width=4)), spliced)

    def no_pretraining(*args, **kwargs):
        raise AssertionError("warp pre-training ran before the output was checked")
    monkeypatch.setattr(pretrain, "pretrain_warps_", no_pretraining)
    monkeypatch.setattr("splice.training.epochs.pretrain_warps_", no_pretraining)
    with pytest.raises(DataError, match=r"in train mode \(the mode the recipe trains the base in\), the model "
                                        r"returns out\[0\] \(2, 10\), out\[1\] \(2, 10\)"):
        tune_keywords(str(spliced), recipe=_recipe("joint", epochs=1), data="digits-moved", out=tmp_path / "run",
                      trust_code=True, **QUIET)


def test_pre_training_without_any_range_is_a_caution(tmp_path, spliced):
    # a recipe file that leaves out every [pretrain] range: they default to no motion, and the heads would learn
    # the identity alone while the run looked normal
    from splice.errors import SpliceWarning

    d = _recipe("warp-only", epochs=1, batch_size=64).to_dict()
    d["pretrain"].update(rotation=0.0, scale=[1.0, 1.0], shift=0.0, perspective=0.0)
    from splice.recipes import Recipe

    with pytest.warns(SpliceWarning, match=r"\[pretrain\] has 1 epochs but no rotation, scale, shift or perspective"):
        tune_keywords(str(spliced), recipe=Recipe.from_dict(d), data="digits-moved", out=tmp_path / "run", **QUIET)


def test_a_run_an_older_splice_started_records_upright_agreement_after_its_resume(tmp_path, spliced):
    # its checkpoint holds no starting predictions; a warp-only base is as it started, so they are read again
    from splice.training.checkpoint import save_checkpoint

    recipe = _recipe("warp-only", epochs=2, batch_size=64)
    full, part = tmp_path / "full", tmp_path / "part"
    tune_keywords(str(spliced), recipe=recipe, data="digits-moved", out=full, **QUIET)
    tune_keywords(str(spliced), recipe=recipe, data="digits-moved", out=part, stop_after_steps=20, **QUIET)
    ckpt = load_checkpoint(part / CHECKPOINT_NAME)
    del ckpt["reference_start"]
    save_checkpoint(part / CHECKPOINT_NAME, ckpt)
    tune_keywords(resume=part, **QUIET)
    assert [r["reference_agreement"] for r in read_metrics(part)] == \
        [r["reference_agreement"] for r in read_metrics(full)]
    assert all(r["reference_agreement"] is not None for r in read_metrics(part))


def _warp_lrs(out) -> set[float]:
    groups = load_checkpoint(out / CHECKPOINT_NAME)["optimizer"]["param_groups"]
    return {g["lr"] for g in groups if g["kind"] == "warps"}


def test_warp_heads_train_at_lr_alone_and_at_warp_lr_scale_times_it_beside_the_base(tmp_path, spliced):
    from splice.recipes import Recipe

    # a hand-written warp-only recipe: warp_lr_scale keeps its default (0.1), yet the heads are all that trains
    own = Recipe.from_dict({"schema_version": 1, "mode": "warp-only", "lr": 0.01, "schedule": "constant",
                            "epochs": 1, "batch_size": 128,
                            "pretrain": {"epochs": 1, "lr": 0.002, "reference": "digits", "rotation": 30.0}})
    assert own.warp_lr_scale == 0.1
    out = tmp_path / "own"
    tune(str(spliced), recipe=own, data="digits-moved", out=out, run_options=RunOptions(progress=False))
    rows = read_metrics(out)
    assert [(r["phase"], r["lr"]) for r in rows] == [("pretrain", 0.002), ("epoch", 0.01)]
    assert _warp_lrs(out) == {0.01}
    # staged, 2 epochs (0.4 * 2 -> 1 warp-only epoch): lr while the base is frozen, 0.1 * lr once it trains too
    staged = _recipe("staged", epochs=2, lr=0.01, schedule="constant", warmup_epochs=0.0, warp_lr_scale=0.1,
                     pretrain_epochs=0)
    out = tmp_path / "staged"
    tune(str(spliced), recipe=staged, data="digits-moved", out=out,
         run_options=RunOptions(progress=False, stop_after_steps=1))
    assert _warp_lrs(out) == {0.01}
    tune_keywords(resume=out, **QUIET)
    assert list(_warp_lrs(out)) == [pytest.approx(0.001)]
    groups = load_checkpoint(out / CHECKPOINT_NAME)["optimizer"]["param_groups"]
    assert {g["lr"] for g in groups if g["kind"] == "base"} == {0.01}


def test_the_command_line_prints_a_run_caution_once(tmp_path, spliced, capsys):
    # the upright caution and the no-range pre-training caution were a run line and a warning the CLI prints too
    from splice.cli import main
    from splice.recipes.files import recipe_to_toml

    d = _recipe("warp-only", epochs=1, batch_size=64, lr=0.05).to_dict()
    d["pretrain"].update(rotation=0.0, scale=[1.0, 1.0], shift=0.0, perspective=0.0)
    from splice.recipes import Recipe

    (tmp_path / "r.toml").write_text(recipe_to_toml(Recipe.from_dict(d)))
    assert main(["tune", str(spliced), "--recipe", str(tmp_path / "r.toml"), "--data", "digits-moved",
                 "--out", str(tmp_path / "run"), "--quiet"]) == 0
    printed = capsys.readouterr()
    both = printed.out + printed.err
    assert both.count("but no rotation, scale, shift or perspective range") == 1, both
    assert both.count("change the base's prediction on") == 1, both
