"""Model sources: spec strings, safe weight loading and their errors (library and CLI)."""

from __future__ import annotations

import os
import pickle
import subprocess
import sys
import textwrap
import warnings

import pytest
import torch
from torch import nn

from splice.fileio import state_dict_sha256
from splice.cli import main
from splice.errors import RandomWeightsWarning, SourceError, UnsafeCheckpointError, WeightsError
from splice.sources import load_source, parse_input_shape, read_safetensors, read_weights


def _small_state():
    from splice.models import tray_net

    return tray_net().state_dict()


def test_torchvision_builds_without_download_and_warns():
    with pytest.warns(RandomWeightsWarning, match="random weights"):
        src = load_source("torchvision:resnet18", kwargs={"num_classes": 10})
    assert src.input_shape == (3, 224, 224)
    assert src.model.fc.out_features == 10
    assert src.random_init and src.normalisation["mean"][0] == pytest.approx(0.485)


def test_unknown_torchvision_name_suggests():
    with pytest.raises(SourceError, match=r"unknown torchvision model 'resnet81'.*did you mean 'resnet18'"):
        load_source("torchvision:resnet81")


def test_factory_from_module_declares_shape():
    src = load_source("splice.models:tray_net")
    assert src.input_shape == (1, 48, 48)


def test_factory_from_file(tmp_path):
    f = tmp_path / "mynet.py"
    f.write_text(textwrap.dedent("""
        import torch.nn as nn
        def build(width=4):
            return nn.Sequential(nn.Conv2d(3, width, 3, padding=1), nn.ReLU(), nn.Conv2d(width, 2, 3, padding=1))
        build.input_shape = (3, 16, 16)
    """))
    src = load_source(f"{f}:build", kwargs='{"width": 6}')
    assert src.input_shape == (3, 16, 16)
    assert src.model[0].out_channels == 6
    with pytest.raises(SourceError, match="has no callable 'biuld'.*did you mean 'build'"):
        load_source(f"{f}:biuld")
    with pytest.raises(SourceError, match="does not exist"):
        load_source(f"{tmp_path / 'nope.py'}:build")


def test_a_class_of_a_model_file_is_named_so_that_leaf_matches_it(tmp_path, capsys):
    # a model file is imported under splice's own module name: the --leaf advice names the class alone, and
    # following it works (it named the import module, salted per process, so it could never match)
    from splice.cli import main

    f = tmp_path / "gated.py"
    f.write_text(textwrap.dedent("""
        import torch.nn as nn
        class Gate(nn.Module):  # a branch on a value: fx, torch.export and the meta pass all need real values
            def __init__(self):
                super().__init__()
                self.a, self.b = nn.Conv2d(4, 4, 3, padding=1), nn.Conv2d(4, 4, 1)
            def forward(self, x):
                return self.a(x) if x.mean() > 0 else self.b(x)
        def net():
            return nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), Gate(), nn.Conv2d(4, 2, 3, padding=1))
    """))
    argv = ["points", f"{f}:net", "--trust-code", "--input-shape", "3x16x16"]
    assert main(argv) == 0  # the input alone is listed, with the advice for the points inside
    said = capsys.readouterr()
    assert "--leaf Gate (Python: leaves=[Gate])" in said.err and "_splice_user_" not in said.err
    assert "1 points;" in said.out
    assert main([*argv, "--leaf", "Gate"]) == 0
    out = capsys.readouterr().out
    assert "points;" in out and "1 points;" not in out


@pytest.mark.parametrize("wrap", ["plain", "state_dict", "model", "module_prefix", "orig_mod_prefix", "nested_prefix"])
def test_nested_and_prefixed_state_dicts(tmp_path, wrap):
    state = _small_state()
    payload = {
        "plain": state,
        "state_dict": {"state_dict": state, "epoch": 3},
        "model": {"model": state, "optimizer": {}},
        "module_prefix": {f"module.{k}": v for k, v in state.items()},
        "orig_mod_prefix": {f"_orig_mod.{k}": v for k, v in state.items()},
        "nested_prefix": {"state_dict": {f"model.module.{k}": v for k, v in state.items()}},
    }[wrap]
    path = tmp_path / "w.pth"
    torch.save(payload, path)
    src = load_source("splice.models:tray_net", weights=path)
    assert src.weights_sha256 == state_dict_sha256(state)


def test_safetensors_weights(tmp_path):
    from safetensors.torch import save_file

    state = _small_state()
    path = tmp_path / "w.safetensors"
    save_file({k: v.contiguous() for k, v in state.items()}, str(path))
    assert load_source("splice.models:tray_net", weights=path).weights_sha256 == state_dict_sha256(state)


def test_missing_unexpected_and_mismatched_keys_are_named(tmp_path):
    state = _small_state()
    name = next(k for k in state if k.endswith("weight") and state[k].ndim == 4)
    bad = dict(state)
    bad.pop(name)
    bad["extra.weight"] = torch.zeros(1)
    path = tmp_path / "w.pt"
    torch.save(bad, path)
    with pytest.raises(WeightsError, match=rf"missing 1: {name}.*unexpected 1: extra.weight.*--allow-partial"):
        load_source("splice.models:tray_net", weights=path)
    with pytest.warns(UserWarning, match="partial load"):
        load_source("splice.models:tray_net", weights=path, allow_partial=True)
    wrong = dict(state)
    wrong[name] = torch.zeros(1, 1, 1, 1)
    torch.save(wrong, path)
    with pytest.raises(WeightsError, match=rf"wrong shape 1: {name}"):
        load_source("splice.models:tray_net", weights=path)


def test_a_checkpoint_without_batch_counters_loads_as_torch_loads_it(tmp_path):
    # reference: torch's own strict load_state_dict accepts a state dict without num_batches_tracked (older
    # checkpoints, hand-built ones), filling the counter in; the running statistics are what count
    from splice.models import tray_net

    state = {k: v for k, v in _small_state().items() if not k.endswith("num_batches_tracked")}
    reference = tray_net()
    reference.load_state_dict(state, strict=True)
    path = tmp_path / "old_bn.pt"
    torch.save(state, path)
    model = load_source("splice.models:tray_net", weights=path).model
    for key, value in reference.state_dict().items():
        assert torch.equal(model.state_dict()[key], value), key


def test_a_folder_records_its_model_file_by_absolute_path(tmp_path, monkeypatch):
    import splice

    project = tmp_path / "project"
    project.mkdir()
    (project / "mynet.py").write_text(textwrap.dedent("""
        import torch.nn as nn
        def build():
            return nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.Conv2d(4, 2, 3, padding=1))
        build.input_shape = (3, 16, 16)
    """))
    monkeypatch.chdir(project)
    src = load_source("mynet.py:build")
    assert src.spec == f"{project / 'mynet.py'}:build"
    splice.save(splice.insert(src, at="input"), tmp_path / "spliced")
    monkeypatch.chdir(tmp_path)  # read from elsewhere, as a colleague or a CI job would
    assert splice.load(tmp_path / "spliced", trust_code=True).splice_info.point_names == ["input"]


def test_a_model_file_imports_what_lies_beside_it_and_its_errors_are_its_own(tmp_path, capsys):
    nets = tmp_path / "nets"
    nets.mkdir()
    (nets / "blocks_of_mine.py").write_text("import torch.nn as nn\ndef stem():\n    return nn.Conv2d(3, 4, 3)\n")
    (nets / "model.py").write_text(textwrap.dedent("""
        import torch.nn as nn
        from blocks_of_mine import stem  # beside this file, as `python model.py` would find it
        def build():
            return nn.Sequential(stem(), nn.ReLU())
        def broken():
            raise RuntimeError("no camera calibration found")
        build.input_shape = broken.input_shape = (3, 16, 16)
    """))
    before = list(sys.path)
    assert load_source(f"{nets / 'model.py'}:build").model[0].out_channels == 4
    assert sys.path == before  # the folder was importable while the file ran, and only then
    assert main(["points", f"{nets / 'model.py'}:broken"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "raised RuntimeError: no camera calibration found; fix the factory" in err[0], err
    assert "internal error" not in err[0]


@pytest.mark.parametrize("wrapper", ["torch.compile", "nn.DataParallel"])
def test_a_factory_that_wraps_its_model_gives_the_module_it_wraps(tmp_path, wrapper):
    """A training script's factory often returns its model compiled or data-parallel; the checkpoint holds the
    plain module's names (no _orig_mod. / module.), and a folder rebuilds it the same way."""
    import splice
    from splice.errors import SpliceWarning

    (tmp_path / "wrapped.py").write_text(textwrap.dedent(f"""
        import torch
        import torch.nn as nn
        def build():
            net = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.Conv2d(4, 2, 3, padding=1))
            return {wrapper}(net)
        build.input_shape = (3, 16, 16)
    """))
    plain = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.Conv2d(4, 2, 3, padding=1))
    torch.save(plain.state_dict(), tmp_path / "w.pt")
    spec = f"{tmp_path / 'wrapped.py'}:build"
    with pytest.warns(SpliceWarning, match="splice works on the module it"):
        src = load_source(spec, weights=tmp_path / "w.pt")
    assert isinstance(src.model, nn.Sequential)
    assert torch.equal(src.model[0].weight, plain[0].weight)
    splice.save(splice.insert(src, at="input"), tmp_path / "spliced")
    with pytest.warns(SpliceWarning, match="splice works on the module it"):
        assert splice.verify(tmp_path / "spliced", trust_code=True).passed


def test_a_model_pickled_from_a_scripts_main_gets_advice_that_can_work(tmp_path):
    """A training script's torch.save(model) names its class on __main__, which is splice's own when splice loads
    it: "put the folder on PYTHONPATH" cannot help. Reference: Python's pickle, the same file fails in a fresh
    interpreter whose __main__ lacks the class."""
    import subprocess

    script = tmp_path / "train.py"
    script.write_text("import torch, torch.nn as nn\nclass Net(nn.Sequential):\n    pass\n"
                      f"torch.save(Net(nn.Conv2d(3, 4, 3)), {str(tmp_path / 'whole.pt')!r})\n")
    subprocess.run([sys.executable, str(script)], check=True)
    fresh = subprocess.run([sys.executable, "-c", f"import torch; torch.load({str(tmp_path / 'whole.pt')!r}, "
                            "weights_only=False)"], capture_output=True, text=True)
    assert fresh.returncode != 0 and "__main__" in fresh.stderr
    with pytest.raises(WeightsError, match=r"pickled from a script run as __main__ \(class 'Net'\), which only that "
                                           r"script can unpickle; save its state_dict there .* defines Net"):
        load_source(str(tmp_path / "whole.pt"), trust_pickle=True, input_shape=(3, 8, 8))


def test_a_pickled_module_whose_class_is_gone_says_so(tmp_path, monkeypatch):
    code = tmp_path / "code"
    code.mkdir()
    (code / "traycam_net.py").write_text("import torch.nn as nn\nclass Net(nn.Sequential):\n    pass\n")
    monkeypatch.syspath_prepend(str(code))
    import traycam_net

    torch.save(traycam_net.Net(nn.Conv2d(3, 4, 3)), tmp_path / "whole.pt")
    monkeypatch.delitem(sys.modules, "traycam_net")
    monkeypatch.setattr(sys, "path", [p for p in sys.path if p != str(code)])
    with pytest.raises(WeightsError, match=r"holds a pickled object whose class cannot be found \(No module named "
                                           r"'traycam_net'\); put the folder that holds its code on PYTHONPATH"):
        load_source(str(tmp_path / "whole.pt"), trust_pickle=True, input_shape=(3, 8, 8))
    # the advice works with the installed 'splice' command, which does not search the current folder: the same
    # command fails from the code's folder and lists the points with the folder on PYTHONPATH
    import os
    import shutil
    import subprocess

    command = [shutil.which("splice"), "points", str(tmp_path / "whole.pt"), "--trust-pickle", "--input-shape",
               "3x8x8"]
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    there = subprocess.run(command, cwd=code, env=env, capture_output=True, text=True)
    assert there.returncode == 2 and "PYTHONPATH" in there.stderr
    fixed = subprocess.run(command, cwd=tmp_path, env={**env, "PYTHONPATH": str(code)}, capture_output=True, text=True)
    assert fixed.returncode == 0 and "input" in fixed.stdout


def test_trained_weights_for_a_factory_that_declares_no_normalisation_are_flagged(tmp_path):
    from splice.errors import NormalisationWarning

    (tmp_path / "nets.py").write_text(textwrap.dedent("""
        import torch.nn as nn
        def plain():
            return nn.Sequential(nn.Conv2d(3, 4, 3))
        def declared():
            return nn.Sequential(nn.Conv2d(3, 4, 3))
        plain.input_shape = declared.input_shape = (3, 16, 16)
        declared.normalisation = None  # it takes [0, 1] pixels, and says so
    """))
    torch.save(nn.Sequential(nn.Conv2d(3, 4, 3)).state_dict(), tmp_path / "w.pt")
    with pytest.warns(NormalisationWarning, match=r"declares no normalisation, so images reach it as \[0, 1\]"):
        load_source(f"{tmp_path / 'nets.py'}:plain", weights=tmp_path / "w.pt")
    with warnings.catch_warnings():
        warnings.simplefilter("error", NormalisationWarning)
        load_source(f"{tmp_path / 'nets.py'}:declared", weights=tmp_path / "w.pt")


def test_a_volume_network_without_a_shape_is_told_about_volumes_not_asked_for_a_shape(tmp_path, capsys):
    (tmp_path / "ct.py").write_text("import torch.nn as nn\ndef net():\n    return nn.Sequential(nn.Conv3d(1, 4, 3))\n")
    assert main(["points", f"{tmp_path / 'ct.py'}:net"]) == 2
    err = [line for line in capsys.readouterr().err.strip().splitlines() if not line.startswith("warning:")]
    assert len(err) == 1 and "convolves volumes or video (Conv3d, 5-D inputs)" in err[0], err
    assert "--input-shape" not in err[0]


def test_a_checkpoint_with_another_number_of_classes_is_told_how_to_build_for_it(tmp_path):
    state = _small_state()
    state["fc.weight"], state["fc.bias"] = torch.zeros(5, state["fc.weight"].shape[1]), torch.zeros(5)
    torch.save(state, tmp_path / "w5.pt")
    with pytest.raises(WeightsError, match=r"if it was trained for 5 classes, build the model for them \(e\.g\. "
                                           r"--kwargs '\{\"num_classes\": 5\}'\)"):
        load_source("splice.models:tray_net", weights=tmp_path / "w5.pt")


def test_two_model_files_each_import_their_own_neighbours_and_an_edit_is_run(tmp_path):
    """Both folders hold a layers.py; each model file gets its own. A file edited within one session is run again,
    and the hash the splice records is that of the code it ran."""
    import hashlib

    import splice

    for name, act in (("a", "relu"), ("b", "tanh")):
        (tmp_path / name).mkdir()
        (tmp_path / name / "layers.py").write_text(f"import torch\ndef act(x):\n    return torch.{act}(x)\n")
        (tmp_path / name / "net.py").write_text(textwrap.dedent("""
            import torch.nn as nn
            from layers import act
            class Net(nn.Module):
                def __init__(self):
                    super().__init__()
                    self.conv = nn.Conv2d(3, 2, 1)
                def forward(self, x):
                    return act(self.conv(x))
            def build():
                return Net()
            build.input_shape = (3, 8, 8)
        """))
    x = -torch.ones(1, 3, 8, 8)
    a = load_source(f"{tmp_path / 'a' / 'net.py'}:build").model
    b = load_source(f"{tmp_path / 'b' / 'net.py'}:build").model
    with torch.no_grad():
        assert (a(x) >= 0).all() and torch.equal(b(x), torch.tanh(b.conv(x)))
    assert "layers" not in sys.modules
    net = tmp_path / "a" / "net.py"
    net.write_text(net.read_text().replace("return act(self.conv(x))", "return -act(self.conv(x))"))
    edited = splice.insert(f"{net}:build", at="input")
    with torch.no_grad():
        assert (edited(x) <= 0).all()  # the new code ran, not the module cached from the first build
    assert edited.splice_info.code_sha256 == hashlib.sha256(net.read_bytes()).hexdigest()


def test_a_module_saved_with_its_spec_records_the_code_it_was_built_from(tmp_path):
    import splice

    (tmp_path / "net.py").write_text("import torch.nn as nn\ndef build():\n    return nn.Sequential(nn.Conv2d(3, 2, 1))\n"
                                     "build.input_shape = (3, 8, 8)\n")
    spec = f"{tmp_path / 'net.py'}:build"
    module = load_source(spec).model
    folder = splice.save(splice.insert(module, at="input", input_shape=(3, 8, 8)), tmp_path / "out", source=spec)
    import json

    assert json.loads((folder / "splice.json").read_text())["source"]["code_sha256"] == load_source(spec).code_sha256


def test_a_checkpoint_with_an_ema_copy_says_which_weights_it_loads(tmp_path):
    from splice.errors import SpliceWarning

    state = _small_state()
    ema = {k: v + 1 if v.is_floating_point() else v for k, v in state.items()}
    torch.save({"model": state, "model_ema": ema, "epoch": 3}, tmp_path / "ckpt.pt")
    with pytest.warns(SpliceWarning, match=r"holds 'model' and 'model_ema'; splice loads 'model'"):
        src = load_source("splice.models:tray_net", weights=tmp_path / "ckpt.pt")
    assert src.weights_sha256 == state_dict_sha256(state)


def test_weights_for_another_architecture(tmp_path):
    import torchvision

    path = tmp_path / "vgg.pt"
    torch.save(torchvision.models.vgg11().state_dict(), path)
    with pytest.raises(WeightsError, match="another architecture"):
        load_source("torchvision:resnet18", weights=path)


@pytest.mark.parametrize("case", ["missing", "empty", "truncated", "not_a_checkpoint", "truncated_safetensors"])
def test_broken_files(tmp_path, case):
    path = tmp_path / ("w.safetensors" if "safetensors" in case else "w.pt")
    if case == "empty":
        path.write_bytes(b"")
    elif case == "truncated":
        torch.save(_small_state(), path)
        path.write_bytes(path.read_bytes()[:500])
    elif case == "not_a_checkpoint":
        path.write_text("hello, I am a text file\n")
    elif case == "truncated_safetensors":
        from safetensors.torch import save_file

        save_file({k: v.contiguous() for k, v in _small_state().items()}, str(path))
        path.write_bytes(path.read_bytes()[:300])
    pattern = {"missing": "does not exist", "empty": "empty", "truncated": "truncated",
               "not_a_checkpoint": "not a readable", "truncated_safetensors": "not a readable safetensors"}[case]
    with pytest.raises(WeightsError, match=pattern):
        read_weights(path)


class _Payload:
    """Unpickling this object would create a marker file (the classic pickle exploit)."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (os.system, (f"touch {self.marker}",))


def test_pickle_payload_never_runs_without_trust(tmp_path):
    marker = tmp_path / "pwned"
    path = tmp_path / "evil.pt"
    with open(path, "wb") as fh:
        pickle.dump({"state_dict": _Payload(marker)}, fh)
    with pytest.raises(UnsafeCheckpointError, match="--trust-pickle"):
        load_source("splice.models:tray_net", weights=path)
    with pytest.raises(UnsafeCheckpointError, match="arbitrary code"):
        load_source(str(path), input_shape="1x48x48")
    assert not marker.exists()


def test_whole_module_pickle_needs_trust(tmp_path):
    from splice.models import tray_net

    path = tmp_path / "whole.pt"
    torch.save(tray_net(), path)
    with pytest.raises(UnsafeCheckpointError, match="pickled Python objects"):
        load_source(str(path), input_shape="1x48x48")
    src = load_source(str(path), input_shape="1x48x48", trust_pickle=True)
    assert isinstance(src.model, nn.Module)


@pytest.mark.parametrize("text", ["3x224", "axbxc", "0x10x10", "3x-1x4", ""])
def test_malformed_input_shape(text):
    with pytest.raises(SourceError, match="malformed input shape"):
        parse_input_shape(text)


def test_input_shape_rule_for_sequences():
    assert parse_input_shape([3, 224, 224]) == (3, 224, 224)
    assert parse_input_shape(torch.Size([1, 48, 48])) == (1, 48, 48)
    assert parse_input_shape(None) is None
    # bools and non-integral numbers are refused, never rounded
    for bad in [(3.5, 8, 8), (3.0, 8, 8), (True, 8, 8), (3, 8), (3, 0, 8), 3]:
        with pytest.raises(SourceError, match="malformed input shape"):
            parse_input_shape(bad)


def test_read_safetensors_round_trip(tmp_path):
    from safetensors.torch import save_file

    state = {k: v.contiguous() for k, v in _small_state().items()}
    path = tmp_path / "w.safetensors"
    save_file(state, str(path))
    back = read_safetensors(str(path))
    assert set(back) == set(state) and all(torch.equal(back[k], state[k]) for k in state)
    path.write_bytes(path.read_bytes()[:300])
    with pytest.raises(WeightsError, match="not a readable safetensors file"):
        read_safetensors(path)


def test_nan_weights_named(tmp_path):
    state = _small_state()
    name = next(k for k in state if k.endswith("weight"))
    state[name] = state[name].clone().fill_(float("nan"))
    path = tmp_path / "nan.pt"
    torch.save(state, path)
    with pytest.raises(WeightsError, match=rf"NaN or Inf.*{name}"):
        load_source("splice.models:tray_net", weights=path)


@pytest.mark.parametrize(
    "argv, needle",
    [
        (["points", "torchvision:resnet81"], "did you mean"),
        (["points", "splice.models:tray_net", "--weights", "/nonexistent/w.pt"], "does not exist"),
        (["points", "torchvision:resnet18", "--input-shape", "3x224"], "malformed input shape"),
        (["points", "nonsense"], "cannot read model spec"),
    ],
)
def test_cli_errors_are_one_line_exit_2(argv, needle, capsys):
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert needle in err
    assert len(err.splitlines()) == 1 and "Traceback" not in err


def test_cli_truncated_checkpoint_and_debug(tmp_path, capsys):
    path = tmp_path / "w.pt"
    torch.save(_small_state(), path)
    path.write_bytes(path.read_bytes()[:400])
    assert main(["points", "splice.models:tray_net", "--weights", str(path)]) == 2
    assert "truncated" in capsys.readouterr().err
    # --debug adds the traceback and keeps the exit code (2, as without it)
    assert main(["points", "splice.models:tray_net", "--weights", str(path), "--debug"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("Traceback (most recent call last):") and "WeightsError" in err
    assert err.rstrip().splitlines()[-1].startswith("splice points: error: ") and "truncated" in err


def test_python_dash_m_entry_point():
    out = subprocess.run([sys.executable, "-m", "splice", "--version"], capture_output=True, text=True, check=True)
    assert out.stdout.startswith("splice ")


def test_import_is_cheap():
    code = ("import sys, splice, splice.sources, splice.surgery, splice.store; "
            "import torch; "
            "bad = [m for m in ('onnx', 'onnxruntime', 'matplotlib', 'sklearn', 'scipy') if m in sys.modules]; "
            "assert not bad, bad; assert not torch.cuda.is_initialized(); print('ok')")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
