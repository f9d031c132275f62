"""A sweep of bad inputs across the commands: each is one line on stderr, exit 2.

Every case names the thing at fault; none shows a traceback; none runs code
from a file.
"""

from __future__ import annotations

import json
import os
import pickle

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
    recipes = {}
    for name, body in {
        "unknown_key": 'schema_version = 1\nmode = "baseline"\nlearning_rate = 0.1\n',
        "wrong_type": 'schema_version = 1\nmode = "baseline"\nepochs = "ten"\n',
        "negative_lr": 'schema_version = 1\nmode = "baseline"\nlr = -0.1\n',
    }.items():
        recipes[name] = d / f"{name}.toml"
        recipes[name].write_text(body)
    return {"dir": d, "folder": folder, "edited": edited, "tampered": tampered, "empty": empty,
            "mismatch": mismatch, "broken_img": broken_img, "recipes": recipes}


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
    ]


@pytest.mark.parametrize("label, argv, needle", _cases(), ids=[c[0] for c in _cases()])
def test_bad_input_is_one_line_exit_2(files, label, argv, needle, capsys):
    resolved = []
    for a in argv:
        if isinstance(a, tuple):
            kind, value = a
            a = {"FILE": lambda v: str(files["dir"] / v), "KEY": lambda v: str(files[v]),
                 "RECIPE": lambda v: str(files["recipes"][v])}[kind](value)
        resolved.append(a)
    code = main(resolved)
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if not line.startswith("warning:")]
    assert code == 2, f"{label}: exit {code}, stderr {err}"
    assert len(errors) == 1, f"{label}: expected one error line, got {errors}"
    assert needle in errors[0], f"{label}: {needle!r} not in {errors[0]!r}"
    assert "Traceback" not in errors[0]
    assert not (files["dir"] / "PWNED").exists(), "a pickle payload ran"


def test_sweep_is_wide_enough():
    assert len(_cases()) >= 20
