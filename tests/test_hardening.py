"""A sweep of bad inputs across the commands: each is one line on stderr, exit 2.

Every case names the thing at fault; none shows a traceback; none runs code
from a file; none writes, changes or deletes anything (the whole test folder
is compared before and after). A hypothesis property test feeds random
manifests, run.json files and recipes to the loaders: only splice's own
errors come out.
"""

from __future__ import annotations

import json
import os
import pickle
import shutil
import struct
import zlib
from pathlib import Path

import pytest
import torch

from splice.cli import main

TRAY = "splice.models:tray_net"


class _Payload:
    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (os.system, (f"touch {self.marker}",))


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """A small zoo of broken and good inputs, built once."""
    import torchvision
    from PIL import Image

    from splice.models import tray_net
    from splice.store import save
    from splice.surgery import insert

    d = tmp_path_factory.mktemp("bad")
    state = tray_net().state_dict()
    good = d / "good.pt"
    torch.save(state, good)
    (d / "zero.pt").write_bytes(b"")
    (d / "text.pt").write_text("not a checkpoint\n")
    (d / "trunc.pt").write_bytes(good.read_bytes()[:700])
    torch.save(torchvision.models.resnet18(num_classes=10).state_dict(), d / "resnet.pt")
    wrong = dict(state)
    key = next(k for k in state if k.endswith("conv.weight"))
    wrong[key] = torch.zeros(3, 3, 3, 3)
    torch.save(wrong, d / "wrongshape.pt")
    nan = {k: v.clone() for k, v in state.items()}
    nan[key].view(-1)[0] = float("nan")
    torch.save(nan, d / "nan.pt")
    with open(d / "evil.pt", "wb") as fh:
        pickle.dump({"state_dict": _Payload(d / "PWNED")}, fh, protocol=2)
    folder = d / "spliced"
    save(insert(TRAY, at="input"), folder)
    edited = d / "edited"
    save(insert(TRAY, at="input"), edited)
    manifest = json.loads((edited / "splice.json").read_text())
    manifest["input_shape"] = [1, 48]
    manifest["points"][0]["warp"]["family"] = "wobble"
    (edited / "splice.json").write_text(json.dumps(manifest))
    tampered = d / "tampered"
    save(insert(TRAY, at="input"), tampered)
    w = tampered / "weights.safetensors"
    data = bytearray(w.read_bytes())
    data[-5] ^= 0x55
    w.write_bytes(bytes(data))
    # data folders
    empty = d / "empty_data"
    (empty / "train" / "a").mkdir(parents=True)
    (empty / "val" / "a").mkdir(parents=True)
    mismatch = d / "mismatch"
    for split, classes in (("train", ("cat", "dog")), ("val", ("cat", "cow"))):
        for c in classes:
            (mismatch / split / c).mkdir(parents=True)
            Image.new("L", (48, 48), 128).save(mismatch / split / c / "0.png")
    broken_img = d / "broken_img"
    for split in ("train", "val"):
        for c in ("a", "b"):
            (broken_img / split / c).mkdir(parents=True)
            Image.new("L", (48, 48), 10).save(broken_img / split / c / "0.png")
    (broken_img / "train" / "a" / "bad.png").write_bytes(b"\x89PNG\r\n\x1a\n garbage")
    _more_files(d, folder, state, key)
    recipes = {}
    for name, body in {
        "unknown_key": 'schema_version = 1\nmode = "baseline"\nlearning_rate = 0.1\n',
        "wrong_type": 'schema_version = 1\nmode = "baseline"\nepochs = "ten"\n',
        "negative_lr": 'schema_version = 1\nmode = "baseline"\nlr = -0.1\n',
        "deep": "schema_version = 1\nx = " + "[" * 5000 + "]" * 5000 + "\n",
    }.items():
        recipes[name] = d / f"{name}.toml"
        recipes[name].write_text(body)
    return {"dir": d, "folder": folder, "edited": edited, "tampered": tampered, "empty": empty,
            "mismatch": mismatch, "broken_img": broken_img, "recipes": recipes}


def _edited_copy(d: Path, folder: Path, name: str, change) -> Path:
    """A copy of ``folder`` whose splice.json went through ``change`` (a function of the parsed dict)."""
    out = d / name
    shutil.copytree(folder, out)
    manifest = json.loads((out / "splice.json").read_text())
    change(manifest, out)
    (out / "splice.json").write_text(json.dumps(manifest))
    return out


def _png_header(path: Path, width: int, height: int) -> None:
    """A PNG whose header claims ``width`` x ``height`` (PNG specification, ISO/IEC 15948: signature, IHDR, IEND)."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)  # 8-bit greyscale
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"")) +
                     chunk(b"IEND", b""))


def _run_folder(d: Path, name: str, info_text: str) -> Path:
    run = d / name
    run.mkdir()
    (run / "run.json").write_text(info_text)
    shutil.copy(Path(__file__).resolve().parents[1] / "recipes" / "baseline.toml", run / "recipe.toml")
    return run


def _more_files(d: Path, folder: Path, state: dict, key: str) -> None:
    """The cases of the trust issue: edited manifests, damaged run folders, odd weights, a huge image header."""
    from PIL import Image
    from safetensors.torch import load_file, save_file

    from splice.fileio import file_sha256

    _edited_copy(d, folder, "nopoint", lambda m, _: m["points"][0].update(name="block9_relu"))
    _edited_copy(d, folder, "nannorm", lambda m, _: m.update(normalisation={"mean": [0.5], "std": [float("nan")]}))
    _edited_copy(d, folder, "loop", lambda m, out: m["source"].update(spec=str(out)))
    _edited_copy(d, folder, "planted", lambda m, _: m["source"].update(spec="os:system",
                                                                       kwargs={"command": f"touch {d / 'PWNED'}"}))

    def int8(m, out):
        w = out / "weights.safetensors"
        save_file({k: v.to(torch.int8) if v.is_floating_point() else v for k, v in load_file(w).items()}, w)
        m["weights"]["sha256"] = file_sha256(w)

    _edited_copy(d, folder, "int8", int8)
    _edited_copy(d, folder, "noweights", lambda m, out: (out / "weights.safetensors").unlink())
    deep = d / "deep"
    shutil.copytree(folder, deep)
    (deep / "splice.json").write_text('{"a": ' + "[" * 100_000 + "]" * 100_000 + "}")
    _run_folder(d, "deep_run", '{"a": ' + "[" * 100_000 + "]" * 100_000 + "}")
    record = {"schema_version": 1, "format": "splice-run", "model": ["not", "a", "spec"], "model_kwargs": {},
              "model_weights": None, "data": "digits", "input_shape": [1, 48, 48], "base_sha256_start": "0" * 64}
    _run_folder(d, "typed_run", json.dumps(record))
    _run_folder(d, "planted_run", json.dumps({**record, "model": "shutil:rmtree", "model_kwargs": {"path": str(d)}}))
    torch.save({k: v.to(torch.int8) if v.is_floating_point() else v for k, v in state.items()}, d / "int8.pt")
    (d / "a_file").write_text("a file, not a folder\n")
    (d / "a_dir.json").mkdir()
    _png_header(d / "huge.png", 13_000, 13_000)
    for split in ("train", "val"):
        for c in ("a", "b"):
            (d / "big_img" / split / c).mkdir(parents=True)
            Image.new("L", (64, 64), 10).save(d / "big_img" / split / c / "0.png")


def _cases():
    f = lambda name: ("FILE", name)  # noqa: E731 - resolved against the fixture
    return [
        ("missing weights", ["points", TRAY, "--weights", f("nope.pt")], "does not exist"),
        ("zero-byte weights", ["points", TRAY, "--weights", f("zero.pt")], "empty (0 bytes)"),
        ("text file as weights", ["insert", TRAY, "--weights", f("text.pt"), "--at", "input", "--out", f("o1")],
         "not a PyTorch checkpoint"),
        ("truncated weights", ["insert", TRAY, "--weights", f("trunc.pt"), "--at", "input", "--out", f("o2")],
         "truncated"),
        ("another architecture", ["insert", TRAY, "--weights", f("resnet.pt"), "--at", "input", "--out", f("o3")],
         "another architecture"),
        ("wrong shape", ["points", TRAY, "--weights", f("wrongshape.pt")], "wrong shape"),
        ("NaN weights (insert)", ["insert", TRAY, "--weights", f("nan.pt"), "--at", "input", "--out", f("o4")],
         "NaN or Inf"),
        ("pickle payload", ["insert", TRAY, "--weights", f("evil.pt"), "--at", "input", "--out", f("o5")],
         "--trust-pickle"),
        ("pickle payload as model", ["points", f("evil.pt"), "--input-shape", "1x48x48"], "arbitrary code"),
        ("unknown point", ["insert", TRAY, "--at", "block1_rleu", "--out", f("o6")], "did you mean"),
        ("not 4-D", ["insert", TRAY, "--at", "flatten", "--out", f("o7")], "not a 4-D"),
        ("same point twice", ["insert", TRAY, "--at", "input", "--at", "input", "--out", f("o8")], "given twice"),
        ("existing output", ["insert", TRAY, "--at", "input", "--out", ("KEY", "folder")], "already exists"),
        ("edited manifest", ["verify", ("KEY", "edited")], "input_shape"),
        ("tampered weights", ["points", ("KEY", "tampered")], "sha256"),
        ("input too small", ["points", TRAY, "--input-shape", "1x4x4"], "too small"),
        ("malformed shape", ["points", TRAY, "--input-shape", "48x48"], "malformed input shape"),
        ("unknown model", ["points", "torchvision:resnet181"], "did you mean"),
        ("not a folder", ["verify", f("good.pt")], "not a splice folder"),
        ("recipe unknown key", ["tune", TRAY, "--recipe", ("RECIPE", "unknown_key"), "--data", "digits",
                                "--out", f("r1")], "learning_rate"),
        ("recipe wrong type", ["tune", TRAY, "--recipe", ("RECIPE", "wrong_type"), "--data", "digits",
                               "--out", f("r2")], "epochs"),
        ("recipe negative lr", ["tune", TRAY, "--recipe", ("RECIPE", "negative_lr"), "--data", "digits",
                                "--out", f("r3")], "lr"),
        ("unknown recipe", ["tune", TRAY, "--recipe", "warp-onyl", "--data", "digits", "--out", f("r4")],
         "warp-only"),
        ("empty data folder", ["tune", TRAY, "--recipe", "baseline", "--data", ("KEY", "empty"), "--epochs", "1",
                               "--out", f("r5")], "empty_data"),
        ("class mismatch", ["tune", TRAY, "--recipe", "baseline", "--data", ("KEY", "mismatch"), "--epochs", "1",
                            "--out", f("r6")], "cow"),
        ("unreadable image", ["eval", TRAY, "--data", ("KEY", "broken_img"), "--split", "train"], "bad.png"),
        ("warp recipe on plain model", ["tune", TRAY, "--recipe", "warp-only", "--data", "digits", "--epochs", "1",
                                        "--out", f("r7")], "splice insert"),
        ("unknown data", ["eval", TRAY, "--data", "digitz"], "digits"),
        # the trust issue: internal errors that became messages, limits checked before work, OS errors
        ("point the model lacks", ["points", f("nopoint")], "block9_relu"),  # verify: its integrity row fails
        ("int8 tensors in a folder", ["points", f("int8")], "int8"),
        ("folder naming itself", ["verify", f("loop")], "--trust-code"),
        ("folder naming itself, trusted", ["verify", f("loop"), "--trust-code"], "names a folder"),
        ("planted manifest", ["export", f("planted"), "--onnx", f("o9.onnx")], "os:system"),
        ("planted run.json", ["tune", "--resume", f("planted_run"), "--quiet"], "shutil:rmtree"),
        ("deep JSON manifest", ["verify", f("deep")], "too deeply"),
        ("deep JSON run.json", ["tune", "--resume", f("deep_run"), "--quiet"], "too deeply"),
        ("deep TOML recipe", ["tune", TRAY, "--recipe", ("RECIPE", "deep"), "--out", f("r8")], "too deeply"),
        ("run.json model not a string", ["tune", "--resume", f("typed_run"), "--quiet"], "model must be a string"),
        ("missing weights file", ["verify", f("noweights")], "is missing"),
        ("NaN normalisation", ["verify", f("nannorm")], "normalisation"),
        ("input too big for memory", ["insert", TRAY, "--input-shape", "1x200000x200000", "--at", "input",
                                      "--out", f("o10")], "needs about"),
        ("probe batch too big for memory", ["verify", ("KEY", "folder"), "--batch", "4000000000"], "--batch"),
        ("head too wide", ["insert", TRAY, "--at", "input", "--head-width", "100000", "--out", f("o11")],
         "head_width"),
        ("int8 --weights", ["eval", TRAY, "--weights", f("int8.pt"), "--data", "digits"], "int8"),
        ("--out inside a file", ["insert", TRAY, "--at", "input", "--out", f("a_file/x")], "is a file"),
        ("--onnx inside a file", ["export", ("KEY", "folder"), "--onnx", f("a_file/m.onnx")], "is a file"),
        ("report target is a folder", ["verify", ("KEY", "folder"), "--report", f("a_dir.json")], "is a folder"),
        ("inspect --out inside a file", ["inspect", ("KEY", "folder"), "--data", "digits", "--n", "2",
                                         "--out", f("a_file/rep")], "is a file"),
        ("tune --out inside a file", ["tune", TRAY, "--recipe", "baseline", "--epochs", "1", "--quiet",
                                      "--out", f("a_file/run")], "a_file"),
        ("image over the default pixel cap", ["verify", ("KEY", "folder"), "--images", f("huge.png")],
         "13000x13000"),
        ("image over a pixel cap option", ["eval", TRAY, "--data", f("big_img"), "--split", "val",
                                           "--max-image-pixels", "1000"], "over the cap"),
        ("pixel cap not positive", ["eval", TRAY, "--data", "digits", "--max-image-pixels", "0"], "positive"),
        ("--workers -1", ["tune", TRAY, "--recipe", "baseline", "--workers", "-1", "--out", f("r9")], "--workers"),
        ("usage error", ["verify", ("KEY", "folder"), "--dtype", "float8"], "--help"),
        # an image too small for the model's pooling: refused before the first batch (an internal error there)
        ("input too small, eval", ["eval", TRAY, "--input-shape", "1x4x4", "--data", "digits"],
         "fails on a probe batch of two 1x4x4 images"),
        ("input too small, tune", ["tune", TRAY, "--input-shape", "1x4x4", "--recipe", "baseline", "--epochs", "1",
                                   "--quiet", "--out", f("r10")], "fails on a probe batch of two 1x4x4 images"),
    ]


def _tree(root: Path) -> dict[str, tuple]:
    """Every path under ``root`` with its kind, size, mode and modification time: what "nothing changed" means."""
    out = {}
    for p in sorted(root.rglob("*")):
        st = p.lstat()
        out[str(p.relative_to(root))] = (p.is_dir(), st.st_size if p.is_file() else 0, st.st_mode, st.st_mtime_ns)
    return out


def _call(argv) -> int:
    try:
        return main(argv)
    except SystemExit as exc:  # argparse usage errors exit from inside main
        return int(exc.code)


@pytest.mark.parametrize("label, argv, needle", _cases(), ids=[c[0] for c in _cases()])
def test_bad_input_is_one_line_exit_2(files, label, argv, needle, capsys, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    monkeypatch.delenv("SPLICE_MAX_IMAGE_PIXELS", raising=False)
    resolved = []
    for a in argv:
        if isinstance(a, tuple):
            kind, value = a
            a = {"FILE": lambda v: str(files["dir"] / v), "KEY": lambda v: str(files[v]),
                 "RECIPE": lambda v: str(files["recipes"][v])}[kind](value)
        resolved.append(a)
    before = _tree(files["dir"])
    code = _call(resolved)
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if not line.startswith("warning:")]
    assert code == 2, f"{label}: exit {code}, stderr {err}"
    assert len(errors) == 1, f"{label}: expected one error line, got {errors}"
    assert needle in errors[0], f"{label}: {needle!r} not in {errors[0]!r}"
    assert "Traceback" not in errors[0]
    assert not (files["dir"] / "PWNED").exists(), "a pickle payload ran"
    after = _tree(files["dir"])
    assert after == before, f"{label}: files changed: {sorted(set(after.items()) ^ set(before.items()))[:4]}"


def test_sweep_is_wide_enough():
    assert len({label for label, _, _ in _cases()}) >= 50


# ----------------------------------------------------------------------------- beyond the table


def test_a_read_only_target_names_the_target(files, tmp_path, capsys, monkeypatch):
    """The error names the folder the user gave, never the temporary file splice writes beside it."""
    import tempfile

    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    if os.geteuid() == 0:  # root writes anywhere: make the temporary folder fail as it would for a user
        def refuse(*args, dir=None, **kwargs):  # noqa: A002 - tempfile's own keyword
            raise PermissionError(13, "Permission denied", str(Path(dir) / ".x.abc123.tmp"))

        monkeypatch.setattr(tempfile, "mkdtemp", refuse)
        monkeypatch.setattr(tempfile, "mkstemp", refuse)
    try:
        for argv, target in ((["insert", TRAY, "--at", "input", "--out", str(ro / "spliced")], ro / "spliced"),
                             (["export", str(files["folder"]), "--onnx", str(ro / "m.onnx")], ro / "m.onnx")):
            assert main(argv) == 2
            err = [line for line in capsys.readouterr().err.splitlines() if not line.startswith("warning:")]
            assert len(err) == 1 and f"'{target}'" in err[0] and "permission denied" in err[0], err
            assert ".tmp" not in err[0]
        assert list(ro.iterdir()) == []
    finally:
        ro.chmod(0o755)


@pytest.mark.parametrize("umask", [0o022, 0o027, 0o002])
def test_written_files_follow_the_umask(tmp_path, umask):
    """weights.safetensors gets the permissions of any other file the user writes (0666 less the umask)."""
    import stat

    import splice

    old = os.umask(umask)
    try:
        folder = splice.save(splice.insert(TRAY, at="input", warp=splice.WarpConfig(head_width=4)), tmp_path / "f")
    finally:
        os.umask(old)
    modes = {p.name: stat.S_IMODE(p.stat().st_mode) for p in folder.iterdir()}
    assert modes == {"splice.json": 0o666 & ~umask, "weights.safetensors": 0o666 & ~umask}
    assert stat.S_IMODE(folder.stat().st_mode) == 0o777 & ~umask


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_half_precision_weights_are_accepted_with_a_note(tmp_path, dtype, capsys):
    from splice.models import tray_net

    state = {k: v.to(dtype) if v.is_floating_point() else v for k, v in tray_net().state_dict().items()}
    torch.save(state, tmp_path / "half.pt")
    assert main(["points", TRAY, "--weights", str(tmp_path / "half.pt"), "--json"]) == 0
    notes = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(notes) == 1 and str(dtype).replace("torch.", "") in notes[0] and "cast" in notes[0], notes


def test_the_pixel_cap_is_an_option(files):
    """Within image_pixel_cap the cap is the caller's; outside it, the default (Pillow's threshold) again."""
    from splice.data import load_images
    from splice.errors import DataError
    from splice.limits import MAX_IMAGE_PIXELS, image_pixel_cap, max_image_pixels

    image = files["dir"] / "big_img" / "train" / "a" / "0.png"  # 64 x 64
    with image_pixel_cap(64 * 64 - 1), pytest.raises(DataError, match="4,096 pixels"):
        load_images([image], (1, 48, 48))
    with image_pixel_cap(64 * 64):
        assert load_images([image], (1, 48, 48)).shape == (1, 1, 48, 48)
    assert max_image_pixels() == MAX_IMAGE_PIXELS


# ----------------------------------------------------------------------------- property test

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_JSON = st.recursive(
    st.none() | st.booleans() | st.integers(-10**6, 10**6) | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12,
)


def _good_manifest() -> dict:
    import splice
    from splice.manifest import SpliceInfo

    info = SpliceInfo(spec=TRAY, input_shape=(1, 48, 48), points=({"name": "input", "warp": {"family": "affine"}},))
    manifest = info.to_manifest(weights={"file": "weights.safetensors", "sha256": "0" * 64, "base_sha256": "0" * 64},
                                versions={"splice": splice.__version__}, created="2024-01-01T00:00:00+00:00")
    return json.loads(json.dumps(manifest))


def _mutated(base: dict, data) -> dict:
    """``base`` with a few keys (at the top or one level down) replaced by random JSON or removed."""
    out = json.loads(json.dumps(base))
    for _ in range(data.draw(st.integers(1, 3))):
        holder = out
        if data.draw(st.booleans()):
            nested = [k for k, v in out.items() if isinstance(v, dict)]
            if nested:
                holder = out[data.draw(st.sampled_from(nested))]
        keys = sorted(holder) or ["extra"]
        key = data.draw(st.sampled_from(keys))
        if data.draw(st.integers(0, 4)) == 0:
            holder.pop(key, None)
        else:
            holder[key] = data.draw(_JSON)
    return out


_GOOD_RUN = {"schema_version": 1, "format": "splice-run", "model": TRAY, "model_kwargs": {}, "model_weights": None,
             "data": "digits", "input_shape": [1, 48, 48], "base_sha256_start": "0" * 64}
_GOOD_RECIPE = {"schema_version": 1, "mode": "joint", "lr": 0.01, "epochs": 2, "batch_size": 8,
                "augment": {"rotation": 10.0}, "pretrain": {"epochs": 1}}
_PROPERTY = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def test_the_property_tests_start_from_good_records(tmp_path):
    """The random records are mutations of records that load, so the loaders get past their first check."""
    from splice.manifest import SpliceInfo
    from splice.recipes import load_recipe
    from splice.training.runfolder import read_run_info

    assert SpliceInfo.from_manifest(_good_manifest()).point_names == ["input"]
    assert load_recipe(_GOOD_RECIPE).mode == "joint"
    (tmp_path / "run.json").write_text(json.dumps(_GOOD_RUN))
    assert read_run_info(tmp_path)["model"] == TRAY


@_PROPERTY
@given(data=st.data())
def test_random_manifests_raise_only_splice_errors(tmp_path, data):
    from splice.errors import SpliceError
    from splice.manifest import SpliceInfo
    from splice.store import read_manifest

    manifest = data.draw(_JSON) if data.draw(st.integers(0, 5)) == 0 else _mutated(_good_manifest(), data)
    folder = tmp_path / "m"
    folder.mkdir(exist_ok=True)
    (folder / "splice.json").write_text(json.dumps(manifest))
    for load in (lambda: SpliceInfo.from_manifest(manifest), lambda: read_manifest(folder)):
        try:
            load()
        except SpliceError:
            pass


@_PROPERTY
@given(data=st.data())
def test_random_run_records_raise_only_splice_errors(tmp_path, data):
    from splice.errors import SpliceError
    from splice.training.runfolder import read_run_info

    record = _mutated(_GOOD_RUN, data)
    run = tmp_path / "run"
    run.mkdir(exist_ok=True)
    (run / "run.json").write_text(json.dumps(record))
    try:
        info = read_run_info(run)
    except SpliceError:
        return
    assert isinstance(info["model"], str) and isinstance(info["data"], str)


@_PROPERTY
@given(data=st.data())
def test_random_recipes_raise_only_splice_errors(tmp_path, data):
    from splice.errors import SpliceError
    from splice.recipes import load_recipe

    recipe = _mutated(_GOOD_RECIPE, data)
    text = data.draw(st.text(max_size=60))
    (tmp_path / "r.toml").write_text(text, encoding="utf-8")
    for load in (lambda: load_recipe(recipe), lambda: load_recipe(tmp_path / "r.toml")):
        try:
            load()
        except SpliceError:
            pass
