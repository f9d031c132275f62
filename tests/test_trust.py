"""Nothing read from a file runs code without the user's opt-in (SECURITY.md, "What a file may name").

A folder's ``splice.json`` and a run's ``run.json`` name the architecture to
rebuild. Three payloads are planted in each — ``os:system`` touching a
sentinel file, ``shutil:rmtree`` on a sentinel folder, and a ``.py`` factory
inside the folder that writes a sentinel and returns a real model — and every
command that reads such a file must refuse them (exit 2, one line naming the
spec, the file and the opt-in) while the disk shows the payload never ran.
The opt-in (``--trust-code``, ``trust_code=True``, ``SPLICE_TRUST_CODE=1``)
builds the ``.py`` factory; a spec the user types is built as it always was.
"""

from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path

import pytest

import splice
from splice.cli import main
from splice.errors import UntrustedCodeError
from splice.sources import REGISTRY_KINDS, RegistryKind, check_spec, register_kind, registry_kind_of

TRAY = "splice.models:tray_net"
FACTORY = '''
from pathlib import Path
from splice.models import tray_net

def make(**kwargs):
    Path({sentinel!r}).write_text("the factory ran")
    return tray_net()
'''


@pytest.fixture(scope="module")
def base_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("trust") / "spliced"
    splice.save(splice.insert(TRAY, at="input", warp=splice.WarpConfig(head_width=4)), folder)
    return folder


def _plant(root: Path, base_folder: Path, payload: str) -> dict:
    """A copy of ``base_folder`` whose manifest names ``payload``, and the sentinel that payload would touch."""
    folder = root / f"evil-{payload}"
    shutil.copytree(base_folder, folder)
    manifest = json.loads((folder / "splice.json").read_text())
    sentinel = root / f"SENTINEL-{payload}"
    if payload == "system":
        spec, kwargs = "os:system", {"command": f"touch {sentinel}"}
    elif payload == "rmtree":
        sentinel.mkdir()
        (sentinel / "keep.txt").write_text("mine")
        spec, kwargs = "shutil:rmtree", {"path": str(sentinel)}
    else:
        (folder / "arch.py").write_text(FACTORY.format(sentinel=str(sentinel)))
        spec, kwargs = f"{folder / 'arch.py'}:make", {}
    manifest["source"].update(spec=spec, kwargs=kwargs)
    (folder / "splice.json").write_text(json.dumps(manifest))
    return {"folder": folder, "sentinel": sentinel, "spec": spec, "payload": payload}


def _ran(planted: dict) -> bool:
    """Did the payload's side effect happen? (checked on disk)"""
    sentinel = planted["sentinel"]
    if planted["payload"] == "rmtree":
        return not (sentinel / "keep.txt").is_file()
    return sentinel.exists()


def _run_folder(root: Path, model: str, kwargs: dict) -> Path:
    """A run folder written as 'splice tune' writes one, whose run.json names ``model``."""
    run = root / "run"
    run.mkdir()
    shutil.copy(Path(splice.__file__).parent.parent / "recipes" / "baseline.toml", run / "recipe.toml")
    info = {"schema_version": 1, "format": "splice-run", "model": model, "model_kwargs": kwargs,
            "model_weights": None, "data": "digits", "recipe": "baseline", "mode": "baseline", "world_size": 1,
            "device": "cpu", "input_shape": [1, 48, 48], "class_names": None, "normalisation": None,
            "base_sha256_start": "0" * 64, "status": "running", "created": "2024-01-01T00:00:00+00:00"}
    (run / "run.json").write_text(json.dumps(info))
    (run / "metrics.jsonl").write_text("")
    return run


def _argv(command: str, folder: Path, root: Path) -> list[str]:
    out = str(root / f"out-{command}")
    return {
        "points": ["points", str(folder)],
        "insert": ["insert", str(folder), "--at", "block1_relu", "--out", out],
        "verify": ["verify", str(folder)],
        "export": ["export", str(folder), "--onnx", out + ".onnx"],
        "tune": ["tune", str(folder), "--recipe", "joint", "--data", "digits", "--epochs", "1", "--out", out],
        "inspect": ["inspect", str(folder), "--data", "digits", "--n", "4", "--out", out],
        "eval": ["eval", str(folder), "--data", "digits"],
        "eval --against": ["eval", TRAY, "--data", "digits", "--against", str(folder)],
    }[command]


COMMANDS = ["points", "insert", "verify", "export", "tune", "inspect", "eval", "eval --against"]
PAYLOADS = ["system", "rmtree", "py"]


def _one_error_line(capsys) -> str:
    err = [line for line in capsys.readouterr().err.strip().splitlines() if not line.startswith("warning:")]
    assert len(err) == 1, err
    assert "Traceback" not in err[0]
    return err[0]


@pytest.mark.parametrize("payload", PAYLOADS)
@pytest.mark.parametrize("command", COMMANDS)
def test_a_planted_manifest_is_refused_by_every_command(tmp_path, base_folder, command, payload, capsys,
                                                        monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    planted = _plant(tmp_path, base_folder, payload)
    code = main(_argv(command, planted["folder"], tmp_path))
    line = _one_error_line(capsys)
    assert code == 2, line
    opt_in = "--against-trust-code" if command == "eval --against" else "--trust-code"
    assert planted["spec"] in line and "splice.json" in line and f"pass {opt_in} " in line, line
    assert not _ran(planted), f"the {payload} payload ran on 'splice {command}'"
    assert not any(p.name.startswith("out-") for p in tmp_path.iterdir()), "something was written"


@pytest.mark.parametrize("payload", PAYLOADS)
def test_a_planted_run_json_is_refused_on_resume(tmp_path, base_folder, payload, capsys, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    planted = _plant(tmp_path, base_folder, payload)
    kwargs = json.loads((planted["folder"] / "splice.json").read_text())["source"]["kwargs"]
    run = _run_folder(tmp_path, planted["spec"], kwargs)
    before = sorted(p.name for p in run.iterdir())
    code = main(["tune", "--resume", str(run), "--quiet"])
    line = _one_error_line(capsys)
    assert code == 2, line
    assert planted["spec"] in line and "run.json" in line and "--trust-code" in line, line
    assert not _ran(planted)
    assert sorted(p.name for p in run.iterdir()) == before


def test_a_run_json_naming_a_planted_folder_is_refused_on_resume(tmp_path, base_folder, capsys, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    planted = _plant(tmp_path, base_folder, "system")
    run = _run_folder(tmp_path, str(planted["folder"]), {})
    assert main(["tune", "--resume", str(run), "--quiet"]) == 2
    assert "os:system" in _one_error_line(capsys)
    assert not _ran(planted)


def test_the_opt_in_builds_the_py_factory(tmp_path, base_folder, capsys, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    planted = _plant(tmp_path, base_folder, "py")
    # built as asked; the planted spec is an edit of the architecture after saving, which integrity names
    assert main(["verify", str(planted["folder"]), "--trust-code"]) == 1, capsys.readouterr().err
    out = capsys.readouterr().out
    assert "integrity" in out and "source.spec edited" in out, out
    assert _ran(planted)


def test_the_opt_in_is_not_remembered(tmp_path, base_folder, capsys, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    planted = _plant(tmp_path, base_folder, "py")
    assert main(["points", str(planted["folder"]), "--trust-code"]) == 0
    planted["sentinel"].unlink()
    capsys.readouterr()
    assert main(["points", str(planted["folder"])]) == 2
    assert "--trust-code" in _one_error_line(capsys)
    assert not _ran(planted)


def test_trusting_the_model_does_not_trust_the_one_it_is_compared_with(tmp_path, base_folder, capsys, monkeypatch):
    """An opt-in is for one use: --trust-code for MODEL (the user's own file) must not build what a second folder's
    manifest names; --against-trust-code does, for that folder alone."""
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    mine = _plant(tmp_path / "mine", base_folder, "py")
    theirs = _plant(tmp_path / "theirs", base_folder, "py")
    argv = ["eval", str(mine["folder"]), "--data", "digits", "--distort", "none", "--against", str(theirs["folder"])]
    assert main([*argv, "--trust-code"]) == 2
    line = _one_error_line(capsys)
    assert "error: --against: refused" in line and "pass --against-trust-code" in line, line
    assert not _ran(theirs)
    mine["sentinel"].unlink()  # built, as asked
    assert main([*argv, "--against-trust-code"]) == 2  # and the other way round
    assert "--trust-code" in _one_error_line(capsys) and not _ran(mine)
    assert main([*argv, "--trust-code", "--against-trust-code"]) == 0
    assert _ran(mine) and _ran(theirs)


# a planted spec is also an edit of splice.json after saving, warned as such (test_the_opt_in_builds_the_py_factory)
@pytest.mark.filterwarnings("ignore::splice.errors.EditedManifestWarning")
def test_the_api_and_the_environment_opt_in(tmp_path, base_folder, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    planted = _plant(tmp_path, base_folder, "py")
    with pytest.raises(UntrustedCodeError, match="trust_code=True"):
        splice.load(planted["folder"])
    assert not _ran(planted)
    assert splice.load(planted["folder"], trust_code=True).splice_info.point_names == ["input"]
    assert _ran(planted)
    planted["sentinel"].unlink()
    monkeypatch.setenv("SPLICE_TRUST_CODE", "1")
    splice.load(planted["folder"])
    assert _ran(planted)
    monkeypatch.setenv("SPLICE_TRUST_CODE", "0")
    with pytest.raises(UntrustedCodeError):
        splice.load(planted["folder"])


def test_a_spec_the_user_types_runs_as_today(tmp_path, base_folder, capsys, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    planted = _plant(tmp_path, base_folder, "py")
    assert main(["points", planted["spec"], "--input-shape", "1x48x48"]) == 0, capsys.readouterr().err
    assert _ran(planted)


def test_registry_specs_from_a_file_need_no_opt_in(tmp_path, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    origin = tmp_path / "splice.json"
    for spec in ("torchvision:resnet18", "splice.models:tray_net", "splice.models:TrayNet"):
        check_spec(spec, {}, origin=origin)
    for spec in ("torchvision:nope", "splice.models:_block", "splice.models:torch", "os:system",
                 "splice.models", "model.pt", str(tmp_path), "splice.sources.trust:check_spec"):
        with pytest.raises(UntrustedCodeError, match="--trust-code"):
            check_spec(spec, {}, origin=origin)
    check_spec("os:system", {}, origin=None)  # typed by the user: the user's own choice


def test_an_entry_point_registers_a_team_architecture(tmp_path, monkeypatch, capsys):
    """An installed package registers its factory once, under the ``splice.models`` entry-point group."""
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    site = tmp_path / "site"
    (site / "teamnets-1.0.dist-info").mkdir(parents=True)
    (site / "teamnets-1.0.dist-info" / "METADATA").write_text("Metadata-Version: 2.1\nName: teamnets\nVersion: 1.0\n")
    (site / "teamnets-1.0.dist-info" / "entry_points.txt").write_text("[splice.models]\nwide = teamnets:wide_net\n")
    (site / "teamnets.py").write_text(
        "from splice.models import tray_net\n\ndef wide_net(**kw):\n    return tray_net(width=4)\n\n"
        "wide_net.input_shape = (1, 48, 48)\n\ndef other(**kw):\n    return tray_net(width=4)\n")
    monkeypatch.syspath_prepend(str(site))
    origin = tmp_path / "splice.json"
    assert registry_kind_of("teamnets:wide_net") is not None
    check_spec("teamnets:wide_net", {}, origin=origin)
    with pytest.raises(UntrustedCodeError):
        check_spec("teamnets:other", {}, origin=origin)
    folder = splice.save(splice.insert("teamnets:wide_net", at="input"), tmp_path / "team")
    assert main(["points", str(folder)]) == 0, capsys.readouterr().err
    sys.modules.pop("teamnets", None)


def test_a_registry_kind_plugs_in(tmp_path):
    """The extension point for library sources (timm, Hugging Face): one RegistryKind."""
    kind = RegistryKind("zoo:NAME", lambda head, name, kwargs: head == "zoo" and name == "listed")
    origin = tmp_path / "run.json"
    with pytest.raises(UntrustedCodeError):
        check_spec("zoo:listed", {}, origin=origin)
    register_kind(kind)
    try:
        register_kind(kind)
        assert REGISTRY_KINDS.count(kind) == 1
        check_spec("zoo:listed", {}, origin=origin)
        with pytest.raises(UntrustedCodeError, match="zoo:NAME"):
            check_spec("zoo:unlisted", {}, origin=origin)
    finally:
        REGISTRY_KINDS.remove(kind)


def test_a_folder_naming_itself_is_refused_at_once(tmp_path, base_folder, capsys, monkeypatch):
    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    folder = tmp_path / "loop"
    shutil.copytree(base_folder, folder)
    manifest = json.loads((folder / "splice.json").read_text())
    manifest["source"]["spec"] = str(folder)
    (folder / "splice.json").write_text(json.dumps(manifest))
    assert main(["verify", str(folder)]) == 2
    assert "--trust-code" in _one_error_line(capsys)
    assert main(["verify", str(folder), "--trust-code"]) == 2
    assert "names a folder" in _one_error_line(capsys)


# a planted spec is also an edit of splice.json after saving, warned as such (test_the_opt_in_builds_the_py_factory)
@pytest.mark.filterwarnings("ignore::splice.errors.EditedManifestWarning")
def test_a_refused_against_model_names_the_python_opt_in_each_entry_point_takes(tmp_path, base_folder, monkeypatch):
    """The hint is followed as written: evaluate's against_options=ModelOptions(...), evaluate_keywords'
    against_trust_code= (the CLI's --against-trust-code is test_trusting_the_model_does_not_trust_...)."""
    from splice.evaluation import evaluate_keywords
    from splice.options import ModelOptions

    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    theirs = _plant(tmp_path, base_folder, "py")
    both = {"data": "digits", "distort": "none", "against": str(theirs["folder"])}
    with pytest.raises(UntrustedCodeError) as refused:
        splice.evaluate(str(base_folder), **both)
    hint = str(refused.value)
    assert "pass --against-trust-code (against_options=ModelOptions(trust_code=True) to evaluate, " \
           "against_trust_code=True to evaluate_keywords, or SPLICE_TRUST_CODE=1)" in hint, hint
    assert not _ran(theirs)
    limit = splice.evaluation.EvalOptions(limit=8)
    splice.evaluate(str(base_folder), **both, options=limit, against_options=ModelOptions(trust_code=True))
    assert _ran(theirs)
    theirs["sentinel"].unlink()
    evaluate_keywords(str(base_folder), **both, limit=8, against_trust_code=True)
    assert _ran(theirs)


@pytest.mark.parametrize("trust", [False, True])
def test_custom_code_asked_for_inside_a_sub_config_is_refused_before_transformers_can_prompt(tmp_path, capsys,
                                                                                              monkeypatch, trust):
    """auto_map was looked for at the top of config.json only: one inside backbone_config reached transformers'
    AutoBackbone, which asked "Do you wish to run the custom code? [y/N]" on the terminal; a "y" (here on stdin)
    imported the module the sub-config's _name_or_path pointed at, with no --trust-code. transformers asks whatever
    splice passes, so such a config is refused either way, in one line, before anything is built."""
    pytest.importorskip("transformers")
    from transformers import DepthAnythingConfig

    code, model = tmp_path / "code", tmp_path / "model"
    code.mkdir(), model.mkdir()
    sentinel = tmp_path / "RAN"
    (code / "evil.py").write_text(f"open({str(sentinel)!r}, 'w').write('ran')\n")
    config = DepthAnythingConfig().to_dict()
    config["architectures"] = ["DepthAnythingForDepthEstimation"]
    config["backbone_config"] = {"model_type": "vit", "hidden_size": 32, "num_hidden_layers": 1,
                                 "num_attention_heads": 2, "intermediate_size": 32, "image_size": 28,
                                 "patch_size": 14, "_name_or_path": str(code),
                                 "auto_map": {"AutoBackbone": "evil.EvilBackbone"}}
    (model / "config.json").write_text(json.dumps(config))
    from safetensors.torch import save_file
    import torch

    save_file({"x": torch.zeros(1)}, str(model / "model.safetensors"))
    import io

    monkeypatch.setattr(sys, "stdin", io.StringIO("y\n"))
    argv = ["points", str(model), "--input-shape", "3x28x28"] + (["--trust-code"] if trust else [])
    assert main(argv) == 2
    line = _one_error_line(capsys)
    assert "backbone_config.auto_map asks for custom code in a sub-config" in line, line
    assert not sentinel.exists()


def test_a_class_named_auto_map_is_a_label_not_custom_code():
    """Only a table (module and class names) under auto_map asks for code; a class called "auto_map" in label2id is a
    label (refused as custom code in a sub-config before)."""
    from splice.sources.huggingface import code_request

    assert code_request({"label2id": {"auto_map": 0, "ok": 1}, "id2label": {"0": "auto_map", "1": "ok"}}) is None
    assert "backbone_config.auto_map" in code_request({"backbone_config": {"auto_map": {"AutoBackbone": "m.C"}}})
