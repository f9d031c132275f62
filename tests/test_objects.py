"""Splices of a module object (not a spec): checked, exported and inspected in memory, and saved with a spec.

Only the caller's Python knows how such a module was made, so no folder can
rebuild its base; these tests hold splice to what a notebook user expects
instead: ``splice.verify(splice.insert(model))`` works, and a folder that
cannot be rebuilt says so in one line with the two ways out.
"""

from __future__ import annotations

import gc
import warnings

import pytest
import torch
from torch import nn

import splice
from splice.errors import ManifestError, SpliceError
from splice.objects import MODULE_SPEC
from splice.store import open_source
from splice.verification import verify_models


def _net(channels: int = 8) -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(1, channels, 3, padding=1), nn.BatchNorm2d(channels), nn.ReLU(),
                         nn.Conv2d(channels, 8, 3, stride=2, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1),
                         nn.Flatten(), nn.Linear(8, 10)).eval()


def _spliced(base: nn.Module) -> nn.Module:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return splice.insert(base, at="recommended", input_shape=(1, 16, 16))


def test_a_module_object_is_recorded_as_such():
    assert splice.load_source(_net(), input_shape=(1, 16, 16)).spec == MODULE_SPEC
    assert splice.manifest.info_of(_spliced(_net())).spec == MODULE_SPEC


def test_verify_and_export_run_in_memory_against_the_module_it_was_made_from(tmp_path):
    base = _net()
    spliced = _spliced(base)
    report = splice.verify(spliced, onnx=True)
    assert report.passed, report.failed
    assert "integrity" not in [c.check for c in report.checks]  # no folder was written: nothing to hash
    result = splice.export(spliced, onnx=tmp_path / "net.onnx")
    assert (tmp_path / "net.onnx").is_file() and result["exports"][0]["max_abs"] < 1e-5
    # onnxruntime on the written file agrees with the model (outside reference)
    import onnxruntime as ort

    x = torch.randn(3, 1, 16, 16)
    sess = ort.InferenceSession(str(tmp_path / "net.onnx"), providers=["CPUExecutionProvider"])
    got = sess.run(None, {sess.get_inputs()[0].name: x.numpy()})[0]
    with torch.no_grad():
        assert torch.allclose(torch.from_numpy(got), base(x), atol=1e-5)


def test_verify_needs_the_base_as_it_was():
    base = _net()
    spliced = _spliced(base)
    with torch.no_grad():
        base[0].weight.add_(1.0)  # trained on after splicing: no longer the base of this splice
    with pytest.raises(SpliceError, match="has changed since.*verify_models"):
        splice.verify(spliced)
    assert verify_models(_net(), spliced).passed  # the same weights, in another object


def test_a_base_the_caller_holds_no_name_for_is_kept_for_verify():
    spliced = _spliced(_net())  # splice.insert(Net()): the caller keeps no name for the base
    gc.collect()
    assert splice.verify(spliced).passed  # the splice keeps its base alive


def test_verify_of_a_copy_says_how_to_pass_the_base():
    import copy

    twin = copy.deepcopy(_spliced(_net()))  # deepcopy and pickle do not carry the base
    with pytest.raises(SpliceError, match=r"no reference to it for this model \(it is a copy.*"
                                          r"verify_models\(base, spliced\)"):
        splice.verify(twin)
    assert verify_models(_net(), twin).passed


def test_a_folder_of_a_module_object_says_it_cannot_be_rebuilt(tmp_path):
    with pytest.warns(splice.errors.SpliceWarning, match="load and verify cannot rebuild"):
        folder = splice.save(_spliced(_net()), tmp_path / "net")
    for step in (lambda: splice.load(folder), lambda: splice.load(folder, trust_code=True),
                 lambda: splice.verify(folder)):
        with pytest.raises(ManifestError, match="module object given in memory.*load_state_dict.*"
                                                "source='pkg.module:factory'"):
            step()
    # the way out the message gives: the folder's weights load into a splice of the same module
    from safetensors.torch import load_file

    again = _spliced(_net())
    again.load_state_dict(load_file(str(folder / "weights.safetensors")))


def test_saved_with_the_spec_that_builds_it_the_folder_loads_and_verifies(tmp_path):
    from splice.models import tray_net

    src = splice.load_source("splice.models:tray_net", warn_random=False)
    base = tray_net()
    base.load_state_dict(src.model.state_dict())
    spliced = _spliced_tray(base.eval())
    folder = splice.save(spliced, tmp_path / "tray", source="splice.models:tray_net")
    loaded = splice.load(folder)
    x = torch.randn(2, *src.input_shape)
    with torch.no_grad():
        assert torch.equal(loaded(x), spliced(x))
    assert splice.verify(folder).passed
    with pytest.raises(SpliceError, match="does not build this splice's base"):
        splice.save(_spliced(_net()), tmp_path / "wrong", source="splice.models:tray_net")
    assert not (tmp_path / "wrong").exists()


def _spliced_tray(base):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return splice.insert(base, at="input", input_shape=(1, 28, 28))


def test_commands_take_the_input_shape_from_the_record_a_spliced_model_carries(tmp_path):
    spliced = _spliced(_net())
    src = open_source(spliced)
    assert src.input_shape == (1, 16, 16) and src.spec == MODULE_SPEC and src.model is spliced
    result = splice.inspect(spliced, data="digits", n=4, out=tmp_path / "inspect", pictures=False)
    assert result["model"] == MODULE_SPEC and result["n_images"] == 4


@pytest.mark.slow
def test_tune_of_a_module_object_splice_says_what_its_run_folders_are(tmp_path):
    from safetensors.torch import load_file

    from splice.training import RecipeOverrides, RunOptions

    spliced = _spliced_tray(_tray())
    with pytest.warns(splice.errors.SpliceWarning, match="run's folders keep its weights, but load and verify cannot"):
        splice.tune(spliced, recipe="warp-only", data="digits", out=tmp_path / "run",
                    overrides=RecipeOverrides(epochs=1), run_options=RunOptions(quiet=True, progress=False))
    again = _spliced_tray(_tray())
    again.load_state_dict(load_file(str(tmp_path / "run" / "best" / "weights.safetensors")))  # the way out it names


def _tray():
    from splice.models import tray_net

    torch.manual_seed(0)
    return tray_net().eval()


_LOOKALIKES = """
import torch
from torch import nn


class Same(nn.Sequential):
    def __init__(self):
        super().__init__(nn.Conv2d(1, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
                         nn.Conv2d(8, 8, 3, stride=2, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(8, 10))


class Other(Same):
    # the same tensors, another forward: a sigmoid where the base has its first ReLU
    def forward(self, x):
        return super().forward(torch.sigmoid(x))


def same():
    return Same()


def other():
    return Other()
"""


def test_save_records_a_spec_only_if_it_rebuilds_the_same_network(tmp_path):
    # a spec with the splice's tensors but another forward loaded and passed every check as a different model
    path = tmp_path / "lookalikes.py"
    path.write_text(_LOOKALIKES)
    spliced = _spliced(_net())
    torch.manual_seed(3)
    want = torch.rand(3)
    torch.manual_seed(3)
    with pytest.raises(SpliceError, match=r"builds a network with this splice's tensors but other outputs"):
        splice.save(spliced, tmp_path / "other", source=f"{path}:other")
    assert not (tmp_path / "other").exists()
    folder = splice.save(spliced, tmp_path / "same", source=f"{path}:same")
    assert torch.equal(torch.rand(3), want)  # building the spec to check it drew none of the caller's numbers
    loaded = splice.load(folder, trust_code=True)
    x = torch.randn(2, 1, 16, 16)
    with torch.no_grad():
        assert torch.equal(loaded(x), spliced(x))
    assert splice.verify(folder, trust_code=True).passed


def test_a_compiled_splice_of_a_module_object_is_checked_as_the_module_it_wraps(tmp_path):
    base = _net()
    compiled = torch.compile(_spliced(base))  # wrapping only: nothing compiles until it is called
    with pytest.warns(splice.errors.SpliceWarning, match="torch.compile'd"):
        report = splice.verify(compiled)
    assert report.passed, report.failed
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")  # the exporter's own deprecation notes too
        splice.export(compiled, onnx=tmp_path / "net.onnx")
    assert any("torch.compile'd" in str(w.message) for w in seen)
    assert (tmp_path / "net.onnx").is_file()


def test_the_kept_base_goes_with_its_splice_even_when_it_refers_to_it():
    import weakref

    base = _net()
    spliced = _spliced(base)
    handle = base.register_forward_hook(lambda module, args, out, keep=spliced: None)  # base -> splice -> base
    alive = weakref.ref(base), weakref.ref(spliced)
    del base, spliced, handle
    gc.collect()
    assert all(ref() is None for ref in alive)


_SCALED = '''
import torch
from torch import nn


class Scaled(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv, self.head = nn.Conv2d(3, 4, 3, padding=1), nn.Linear(4, 2)
        self.register_buffer("scale", torch.ones(4), persistent=False)

    def forward(self, x):
        return self.head((self.conv(x) * self.scale.view(1, -1, 1, 1)).mean((2, 3)))


def net():
    return Scaled()


net.input_shape = (3, 8, 8)
'''


def test_checking_a_splice_in_memory_tells_of_state_a_folder_does_not_carry(tmp_path):
    # a non-persistent buffer set after building: verify and export checked the rebuilt model (the exported file
    # was 0.016 off the model in hand), and nothing said so
    import warnings

    from splice.errors import SpliceWarning

    path = tmp_path / "scaled.py"
    path.write_text(_SCALED)
    src = splice.load_source(f"{path}:net", trust_code=True, warn_random=False)
    src.model.scale.fill_(2.0)
    spliced = splice.insert(src, at="input", trust_code=True)
    with pytest.warns(SpliceWarning, match=r"holds tensors a folder does not carry .*scale.* that differ from those "
                                           r"its spec builds"):
        splice.verify(spliced, trust_code=True)
    fresh = splice.insert(f"{path}:net", at="input", trust_code=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error", SpliceWarning)
        assert splice.verify(fresh, trust_code=True).passed  # the same as its spec builds: nothing to tell


class _Counting(nn.Module):
    """A call counter and a running mean updated in every forward, eval mode included."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 3)
        self.register_buffer("calls", torch.zeros((), dtype=torch.long))
        self.register_buffer("mean", torch.zeros(4))

    def forward(self, x):
        h = torch.relu(self.conv(x))
        with torch.no_grad():
            self.calls += 1
            self.mean.mul_(0.9).add_(0.1 * h.mean((0, 2, 3)))
        return self.fc(h.mean((2, 3)))


def test_provenance_of_an_in_memory_splice_that_ran_names_the_buffers_its_forward_moved():
    # no source file: the row compared hashes only and said "the weights were edited after splicing" once the splice
    # had run; it now compares with the module the splice was made from, and names what moved
    torch.manual_seed(0)
    base = _Counting().eval()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        spliced = splice.insert(base, at="input", input_shape=(3, 16, 16))
        fresh = splice.verify(spliced)["provenance"]  # it warned "only hashes compared"
        assert fresh.passed and not fresh.warning and "compared with the module it was spliced from" in fresh.detail
        with torch.no_grad():
            spliced(torch.rand(2, 3, 16, 16))
        row = splice.verify(spliced)["provenance"]
    assert not row.passed and row.summary == "base buffers changed"
    diff = row.numbers["diff"]
    assert diff["names"] == ["mean", "calls"]  # values first, the counter after them
    assert {d["name"]: d["max_abs_diff"] for d in diff["largest"]}["calls"] == 1.0
    assert "compared with the module it was spliced from" in row.detail and "edited" not in row.detail
    assert int(base.calls) == 0  # the caller's module never ran
