"""The folder format: manifest schema (property-based), atomic writes, no partial output."""

from __future__ import annotations

import copy
import json

import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import splice
from splice.errors import ManifestError, SpliceError, SpliceWarning
from splice.manifest import validate_manifest
from splice.store import read_manifest
from splice.surgery import insert


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    folder = tmp_path_factory.mktemp("store") / "tray"
    splice.save(insert("splice.models:tray_net", at="input", warp="similarity"), folder)
    return folder


def test_manifest_round_trip(saved):
    manifest = read_manifest(saved)
    assert manifest["schema_version"] == 1
    assert manifest["points"][0]["warp"]["family"] == "similarity"
    assert validate_manifest(copy.deepcopy(manifest)) == manifest


def test_a_similarity_folder_records_its_frame_and_an_older_one_keeps_normalised_coordinates(saved, tmp_path):
    import shutil

    from splice.manifest import MANIFEST_NAME
    from splice.surgery import warps_of

    manifest = read_manifest(saved)
    assert manifest["points"][0]["warp"]["frame"] == "pixels"
    older = tmp_path / "older"
    shutil.copytree(saved, older)
    data = json.loads((older / MANIFEST_NAME).read_text())
    del data["points"][0]["warp"]["frame"]  # as a release before frames wrote it
    from safetensors.torch import load_file, save_file

    from splice.fileio import file_sha256

    # such a release kept no points hash in the weights file either (it came later): nothing to warn about
    save_file(load_file(older / "weights.safetensors"), older / "weights.safetensors", metadata={"format": "pt"})
    data["weights"]["sha256"] = file_sha256(older / "weights.safetensors")
    (older / MANIFEST_NAME).write_text(json.dumps(data))
    (warp,) = warps_of(splice.load(older)).values()
    assert warp.config.frame == "normalised"
    (now,) = warps_of(splice.load(saved)).values()
    assert now.config.frame == "pixels"
    # an affine warp is the same in either frame: nothing is written for it
    assert "frame" not in splice.WarpConfig(family="affine").to_dict()


_JSON = st.recursive(
    st.none() | st.booleans() | st.integers(-5, 5) | st.floats(allow_nan=False, width=16) | st.text(max_size=6),
    lambda children: st.lists(children, max_size=3) | st.dictionaries(st.text(max_size=6), children, max_size=3),
    max_leaves=8,
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_edit_is_accepted_or_named(saved, data):
    """Replace or delete one field anywhere: the parser accepts it or raises ManifestError, nothing else."""
    manifest = read_manifest(saved)
    paths = []

    def walk(node, path):
        if isinstance(node, dict):
            for k, v in node.items():
                paths.append((*path, k))
                walk(v, (*path, k))
        elif isinstance(node, list):
            for i, v in enumerate(node):
                paths.append((*path, i))
                walk(v, (*path, i))

    walk(manifest, ())
    path = data.draw(st.sampled_from(paths))
    edited = copy.deepcopy(manifest)
    parent = edited
    for key in path[:-1]:
        parent = parent[key]
    if data.draw(st.booleans()) and isinstance(parent, dict):
        del parent[path[-1]]
    else:
        parent[path[-1]] = data.draw(_JSON)
    try:
        validate_manifest(edited)
    except ManifestError as exc:
        assert "violates the splice folder schema" in str(exc) or "must hold a JSON object" in str(exc)


@settings(max_examples=60, deadline=None)
@given(st.one_of(_JSON, st.text(max_size=20)))
def test_arbitrary_documents_never_crash_the_parser(doc):
    with pytest.raises(ManifestError):
        validate_manifest(doc)


def test_hand_edit_is_named(saved, tmp_path):
    bad = tmp_path / "bad"
    bad.mkdir()
    (bad / "weights.safetensors").write_bytes((saved / "weights.safetensors").read_bytes())
    manifest = json.loads((saved / "splice.json").read_text())
    manifest["input_shape"] = [1, 48]
    manifest["points"][0]["warp"]["sampler"] = "cubic"
    (bad / "splice.json").write_text(json.dumps(manifest))
    with pytest.raises(ManifestError, match=r"input_shape must be \[C, H, W\].*points\[0\]\.warp"):
        splice.load(bad)
    (bad / "splice.json").write_text("{not json")
    with pytest.raises(ManifestError, match="not valid JSON"):
        splice.load(bad)




def test_failed_write_keeps_previous_folder(saved, tmp_path, monkeypatch):
    """A save that fails half-way (disk full, simulated) leaves the old folder intact and no debris."""
    target = tmp_path / "model"
    splice.save(insert("splice.models:tray_net", at="input"), target)
    before = {p.name: p.read_bytes() for p in target.iterdir()}

    import safetensors.torch as st_torch

    def full_disk(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(st_torch, "save_file", full_disk)
    with pytest.raises(OSError, match="No space left"):
        splice.save(insert("splice.models:tray_net", at="input", warp="tps"), target, overwrite=True)
    assert {p.name: p.read_bytes() for p in target.iterdir()} == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model"], "temporary folders left behind"


def test_failed_insert_writes_nothing(tmp_path, capsys, monkeypatch):
    """insert refuses a splice that fails the identity check, and leaves no output folder."""
    from splice import surgery
    from splice.cli import main

    def broken_check(*args, **kwargs):
        return {"passed": False, "detail": "max relative error 0.5 (tolerance 1e-05)"}

    monkeypatch.setattr(surgery, "quick_check", broken_check)
    out = tmp_path / "never"
    assert main(["insert", "splice.models:tray_net", "--at", "input", "--out", str(out)]) == 1
    assert "differs from the base" in capsys.readouterr().err
    assert not out.exists() and list(tmp_path.iterdir()) == []
    assert main(["insert", "splice.models:tray_net", "--at", "input", "--out", str(out), "--force"]) == 0
    assert out.exists()


def test_existing_folder_is_not_overwritten(saved):
    with pytest.raises(SpliceError, match="already exists"):
        splice.save(insert("splice.models:tray_net", at="input"), saved)


def test_load_never_unpickles(saved, monkeypatch):
    import pickle

    def refuse(*args, **kwargs):
        raise AssertionError("pickle used while loading a splice folder")

    monkeypatch.setattr(pickle, "load", refuse)
    monkeypatch.setattr(pickle, "loads", refuse)
    monkeypatch.setattr(torch, "load", refuse)
    model = splice.load(saved)
    assert "splice_warps.input.head.fc2.weight" in model.state_dict() or any(
        k.startswith("splice_warps.input.") for k in model.state_dict())


# ----------------------------------------------------------------------------- rebuilding without a random init

_BUILDERS = '''
import torch
from torch import nn


class Plain(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(1, 4, 3, padding=1)
        self.bn = nn.BatchNorm2d(4)
        self.conv2 = nn.Conv2d(4, 4, 3, padding=1)
        self.head = nn.Linear(4, 3)

    def forward(self, x):
        x = self.conv2(torch.relu(self.bn(self.conv1(x))))
        return self.head(x.mean((2, 3)))


class WithTable(Plain):
    """A non-persistent buffer computed in __init__: it is not in the state dict."""

    def __init__(self):
        super().__init__()
        self.register_buffer("gain", torch.linspace(0.5, 1.5, 4).reshape(1, 4, 1, 1), persistent=False)

    def forward(self, x):
        x = self.conv2(torch.relu(self.bn(self.conv1(x))) * self.gain)
        return self.head(x.mean((2, 3)))


class Computing(Plain):
    """Reads a tensor value while it is built, which the meta device cannot do."""

    def __init__(self):
        super().__init__()
        self.scale = float(self.conv1.weight.detach().abs().sum() > -1.0)


class Tied(Plain):
    """One weight under two names, and one module used twice."""

    def __init__(self):
        super().__init__()
        self.conv3 = nn.Conv2d(4, 4, 3, padding=1)
        self.conv3.weight = self.conv2.weight

    def forward(self, x):
        x = self.conv2(torch.relu(self.bn(self.conv1(x))))
        x = self.conv3(self.conv2(x))
        return self.head(x.mean((2, 3)))


class BufferView(Plain):
    """Indexes with a view of a persistent buffer: the tracer lifts the view as a constant."""

    def __init__(self):
        super().__init__()
        self.register_buffer("order", torch.tensor([3, 2, 1, 0]))

    def forward(self, x):
        x = torch.relu(self.bn(self.conv1(x)))
        x = self.conv2(x[:, self.order.view(-1)])
        return self.head(x.mean((2, 3)))


class _Mixer(nn.Module):
    """Reorders channels with views of two buffers it owns, one saved and one rebuilt in __init__ (as windowed
    attention keeps its position index): the tracer lifts the views, and the graph never reads the buffers."""

    def __init__(self):
        super().__init__()
        self.proj = nn.Conv2d(4, 4, 1)
        self.register_buffer("order", torch.tensor([[3, 2], [1, 0]]))
        self.register_buffer("again", torch.tensor([[1, 0], [3, 2]]), persistent=False)

    def forward(self, x):
        return self.proj(x[:, self.order.view(-1)][:, self.again.view(-1)])


class InnerBufferView(Plain):
    def __init__(self):
        super().__init__()
        self.mix = _Mixer()

    def forward(self, x):
        x = self.conv2(self.mix(torch.relu(self.bn(self.conv1(x)))))
        return self.head(x.mean((2, 3)))


def plain():
    return Plain()


def inner_buffer_view():
    return InnerBufferView()


def buffer_view():
    return BufferView()


def tied():
    return Tied()


def with_table():
    return WithTable()


def computing():
    return Computing()
'''


@pytest.fixture(scope="module")
def builders(tmp_path_factory):
    path = tmp_path_factory.mktemp("builders") / "store_builders.py"
    path.write_text(_BUILDERS)
    return path


@pytest.mark.parametrize("factory", ["plain", "buffer_view", "inner_buffer_view", "with_table", "computing"])
def test_load_equals_the_saved_model_whichever_way_it_is_built(builders, tmp_path, factory, monkeypatch):
    """Built empty and filled (plain), or built for real when that cannot hold (the other two)."""
    from splice import store
    from splice.store import load_base

    real_builds, retraced = [], []
    rebuild, assemble = store._rebuild_base, store.assemble
    monkeypatch.setattr(store, "_rebuild_base", lambda *a, **k: real_builds.append(1) or rebuild(*a, **k))
    monkeypatch.setattr(store, "assemble", lambda *a, **k: retraced.append(1) or assemble(*a, **k))
    spliced = insert(f"{builders}:{factory}", at="input", input_shape=(1, 12, 12))
    with torch.no_grad():  # weights a fresh init would not give, so a random init cannot pass for them
        for p in spliced.parameters():
            p.add_(0.01 * torch.arange(p.numel(), dtype=p.dtype).reshape(p.shape) / max(1, p.numel()))
    folder = splice.save(spliced, tmp_path / factory)
    loaded = splice.load(folder, trust_code=True)
    assert not any(t.is_meta for t in (*loaded.parameters(), *loaded.buffers()))
    want, got = spliced.state_dict(), loaded.state_dict()
    assert set(want) == set(got)
    assert all(torch.equal(want[k], got[k]) for k in want)
    x = torch.randn(2, 1, 12, 12)
    with torch.no_grad():
        assert torch.equal(spliced.eval()(x), loaded(x))
    base = load_base(folder, trust_code=True)
    assert not any(t.is_meta for t in (*base.parameters(), *base.buffers()))
    assert all(torch.equal(v, base.state_dict()[k]) for k, v in want.items() if not k.startswith("splice_warps."))
    # plain is never built for real (no random init), nor is buffer_view (the view of a buffer its graph
    # lifts, on the meta device while the frame was traced, is taken again from the adopted buffer: no second
    # trace either); the other two are, once for load and once for load_base
    # inner_buffer_view's buffers belong to a submodule the GraphModule copies only in part (it keeps them now:
    # the view of one was taken again from a buffer it did not have); one of them is not saved, so it is built
    assert len(real_builds) == (0 if factory in ("plain", "buffer_view") else 2)
    assert len(retraced) == (0 if factory in ("plain", "buffer_view") else 1)


def test_float64_folder_loads_with_float64_warp_grids(builders, tmp_path):
    """Warps built around an empty base take the saved dtype, grids rebuilt in float64 (exact identity)."""
    spliced = insert(f"{builders}:plain", at="input", input_shape=(1, 12, 12)).double()
    folder = splice.save(spliced, tmp_path / "f64")
    loaded = splice.load(folder, trust_code=True)
    warp = loaded.get_submodule("splice_warps.input")
    assert warp.base_grid.dtype == torch.float64
    assert torch.equal(warp.base_grid, spliced.get_submodule("splice_warps.input").base_grid)
    x = torch.randn(2, 1, 12, 12, dtype=torch.float64)
    with torch.no_grad():
        assert torch.equal(warp(x), x)  # the identity, bit for bit
    assert all(p.dtype == torch.float64 for p in loaded.parameters())
    from splice.store import load_base

    assert all(p.dtype == torch.float64 for p in load_base(folder, trust_code=True).parameters())  # saved values, not rounded


def test_file_sha256_matches_hashlib(tmp_path):
    """Reference: hashlib.sha256 over the bytes read in one piece (Python standard library)."""
    import hashlib

    from splice.fileio import file_sha256

    empty = tmp_path / "empty.bin"
    empty.write_bytes(b"")
    data = tmp_path / "data.bin"
    data.write_bytes(bytes(range(256)) * 5000)
    assert file_sha256(empty) == hashlib.sha256(b"").hexdigest()
    assert file_sha256(data) == hashlib.sha256(data.read_bytes()).hexdigest()


def test_loaded_model_does_not_depend_on_the_file(saved, tmp_path):
    """A loaded model owns its tensors: truncating the weights file afterwards cannot touch it."""
    import shutil

    folder = tmp_path / "copy"
    shutil.copytree(saved, folder)
    model = splice.load(folder, trust_code=True)
    before = {k: v.clone() for k, v in model.state_dict().items()}
    with open(folder / "weights.safetensors", "r+b") as fh:
        fh.truncate(16)  # a mapped tensor would raise SIGBUS when read after this
    after = model.state_dict()
    assert all(torch.equal(before[k], after[k]) for k in before)


def test_tied_weights_stay_tied_through_save_and_load(builders, tmp_path):
    """Adopting saved tensors gives each name its own; tied names are pointed back at one tensor."""
    from splice.store import load_base
    from splice.verification import verify

    spliced = insert(f"{builders}:tied", at="input", input_shape=(1, 12, 12))
    assert spliced.conv3.weight is spliced.conv2.weight
    folder = splice.save(spliced, tmp_path / "tied")
    loaded, base = splice.load(folder, trust_code=True), load_base(folder, trust_code=True)
    assert loaded.conv3.weight is loaded.conv2.weight
    assert base.conv3.weight is base.conv2.weight
    x = torch.randn(2, 1, 12, 12)
    with torch.no_grad():
        assert torch.equal(spliced.eval()(x), loaded(x))
    with torch.no_grad():
        loaded.conv2.weight.add_(1.0)  # still one tensor: the change shows under both names
    assert torch.equal(loaded.conv3.weight, loaded.conv2.weight)
    assert verify(folder, onnx=True, trust_code=True).passed


def test_version_aware_loader_gets_its_metadata(tmp_path):
    """torchvision's MNASNet refuses a state dict without per-module versions (its _load_from_state_dict);
    safetensors keeps none, so the rebuild hands the architecture's own versions back."""
    from splice.store import load_base
    from splice.verification import verify

    src = splice.load_source("torchvision:mnasnet0_5", input_shape=(3, 64, 64), warn_random=False)
    folder = splice.save(insert(src, at="input"), tmp_path / "mnas")
    assert splice.load(folder) is not None  # torchvision:NAME is a registry lookup: no opt-in needed
    assert load_base(folder) is not None
    assert verify(folder).passed


@pytest.mark.parametrize("step", ["load", "load_base", "verify", "verify onnx", "export"])
def test_load_verify_and_export_leave_the_callers_random_numbers_alone(tmp_path, step):
    from splice.store import load_base

    folder = splice.save(insert("splice.models:tray_net", at="input"), tmp_path / "tray")
    run = {"load": lambda: splice.load(folder), "load_base": lambda: load_base(folder),
           "verify": lambda: splice.verify(folder), "verify onnx": lambda: splice.verify(folder, onnx=True),
           "export": lambda: splice.export(folder, onnx=tmp_path / "tray.onnx")}[step]
    torch.manual_seed(7)
    want = torch.rand(4)
    torch.manual_seed(7)
    run()
    assert torch.equal(torch.rand(4), want)  # the next draw is the one it would have been


def test_a_model_file_changed_since_the_splice_is_named_in_one_line(tmp_path, capsys):
    from splice.cli import main

    model_file = tmp_path / "mine.py"
    code = ("import torch.nn as nn\n"
            "def build():\n"
            "    return nn.Sequential(nn.Conv2d(3, {w}, 3, padding=1), nn.ReLU(), nn.Conv2d({w}, 2, 3, padding=1))\n"
            "build.input_shape = (3, 16, 16)\n")
    model_file.write_text(code.format(w=4))
    splice.save(splice.insert(f"{model_file}:build", at="input"), tmp_path / "spliced")
    model_file.write_text(code.format(w=8))  # someone widened the layer afterwards
    import sys

    from splice.sources.specs import FILE_MODULE_PREFIX

    for name in [n for n in sys.modules if n.startswith(FILE_MODULE_PREFIX)]:  # a new process, as the CLI runs
        del sys.modules[name]
    assert main(["verify", str(tmp_path / "spliced"), "--trust-code"]) == 2
    err = [line for line in capsys.readouterr().err.strip().splitlines() if not line.startswith("warning:")]
    assert len(err) == 1 and "internal error" not in err[0], err
    assert "wrong shape 3: 0.weight (4, 3, 3, 3) vs (8, 3, 3, 3)" in err[0]
    assert "the model's code changed since the splice" in err[0]


def test_verify_fails_provenance_when_the_model_file_changed_its_forward(tmp_path):
    """Base and splice are both rebuilt from the file: after a forward was edited they still equal each other,
    yet neither is the model that was spliced. The folder records the file's sha256, and verify compares."""
    import hashlib
    import sys

    from splice.sources.specs import FILE_MODULE_PREFIX

    model_file = tmp_path / "mine.py"
    code = ("import torch.nn as nn\n"
            "class Net(nn.Module):\n"
            "    def __init__(self):\n"
            "        super().__init__()\n"
            "        self.conv, self.fc = nn.Conv2d(3, 4, 3, padding=1), nn.Linear(4, 3)\n"
            "    def forward(self, x):\n"
            "        return self.fc(self.conv(x).{pool}((2, 3)))\n"
            "def build():\n"
            "    return Net()\n"
            "build.input_shape = (3, 16, 16)\n")
    model_file.write_text(code.format(pool="mean"))
    folder = splice.save(splice.insert(f"{model_file}:build", at="input"), tmp_path / "spliced")
    recorded = json.loads((folder / "splice.json").read_text())["source"]["code_sha256"]
    assert recorded == hashlib.sha256(model_file.read_bytes()).hexdigest()
    assert splice.verify(folder, trust_code=True).passed
    model_file.write_text(code.format(pool="amax"))  # the same weights, another forward
    for name in [n for n in sys.modules if n.startswith(FILE_MODULE_PREFIX)]:  # a new process, as the CLI runs
        del sys.modules[name]
    with pytest.warns(SpliceWarning, match=r"'.*spliced': the model file '.*mine.py' changed since the splice"):
        report = splice.verify(folder, trust_code=True)
    rows = {c.check: c for c in report.checks}
    assert not report.passed and not rows["provenance"].passed
    assert "changed since the splice" in rows["provenance"].detail and rows["outputs"].passed
    # loading it is told (tune, eval and inspect open folders the same way), and exporting it is refused: the
    # parity check would compare the new code with itself
    with pytest.warns(SpliceWarning, match="changed since the splice"):
        splice.load(folder, trust_code=True)
    with pytest.warns(SpliceWarning), pytest.raises(splice.errors.CheckFailed, match="nothing was exported"):
        splice.export(folder, onnx=tmp_path / "m.onnx", trust_code=True)
    assert not (tmp_path / "m.onnx").exists()


def test_a_run_folder_where_a_model_folder_is_wanted_names_the_models_it_saved(tmp_path):
    # the message said "give a folder written by ... 'splice tune'", which this one is
    run = tmp_path / "run"
    run.mkdir()
    (run / "run.json").write_text(json.dumps({"format": "splice-run"}))
    with pytest.raises(ManifestError, match=r"is the run folder of a 'splice tune' run; give one of the models it "
                                            r"saved: '.*best' or '.*last'"):
        splice.verify(run)
    with pytest.raises(ManifestError, match=r"is not a splice folder \(no splice.json\); give a folder written by "
                                            r"'splice insert', or the best/ or last/ folder of a 'splice tune' run$"):
        splice.verify(tmp_path)
