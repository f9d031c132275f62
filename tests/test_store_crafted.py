"""Folders whose splice.json asks for an architecture their weights do not fit: refused before a real build."""

from __future__ import annotations

import json

import pytest
import torch

import splice
from splice.errors import SourceError, WeightsError
from splice.sources import load_source


@pytest.fixture()
def folder(tmp_path):
    src = load_source("splice.models:tray_net", kwargs={"width": 4}, warn_random=False)
    return splice.save(splice.insert(src, at="input"), tmp_path / "tray")


def _ask_for(folder, **kwargs):
    manifest = json.loads((folder / "splice.json").read_text())
    manifest["source"]["kwargs"].update(kwargs)
    (folder / "splice.json").write_text(json.dumps(manifest))


@pytest.mark.parametrize("num_classes", [20, 10**12])
def test_a_folder_asking_for_another_head_is_refused_before_any_real_build(folder, monkeypatch, num_classes):
    # the saved fc is (10, 16); the record asks for (num_classes, 16): the meta-device build already shows it, so
    # the architecture is never built on a real device (a trillion classes would be 64 TB)
    import splice.store as store

    real = []
    built = store.build_model

    def watched(*args, **kwargs):
        real.append(torch.empty(0).device.type != "meta")
        return built(*args, **kwargs)

    monkeypatch.setattr(store, "build_model", watched)
    _ask_for(folder, num_classes=num_classes)
    for opener in (splice.load, splice.store.load_base):
        # the builder's arguments are hashed beside the weights: the edit is named first, then refused
        with pytest.warns(splice.errors.EditedManifestWarning, match="splice.json's source.kwargs differ"), \
                pytest.raises(WeightsError, match=rf"wrong shape 2: fc.weight \(10, 16\) vs \({num_classes}, 16\)"):
            opener(folder)
    assert real and not any(real)


@pytest.mark.parametrize("spec", ["splice.models:tray_net", "torchvision:resnet18"])
def test_a_build_that_cannot_allocate_is_one_line(spec):
    # reference: torch's own allocator refuses a (10**13, C) weight with "can't allocate memory"
    with pytest.raises(SourceError, match=rf"building {spec} ran out of memory \(.*allocate.*\); its builder "
                                          r"arguments .* ask for a larger model than this machine holds"):
        load_source(spec, kwargs={"num_classes": 10**13}, warn_random=False)


def test_an_edited_warp_config_in_splice_json_fails_verify_integrity(tmp_path):
    # a tuned folder whose padding or frame was edited by hand computes something else with the same weights; the
    # weights file holds the hash of the points it was written with
    import json as _json

    import splice
    from splice.manifest import MANIFEST_NAME
    from splice.verification import verify

    folder = splice.save(splice.insert("splice.models:tray_net", at="input", warp="similarity"), tmp_path / "sp")
    assert verify(folder)["integrity"].passed
    data = _json.loads((folder / MANIFEST_NAME).read_text())
    data["points"][0]["warp"]["padding"] = "border"
    (folder / MANIFEST_NAME).write_text(_json.dumps(data, indent=2))
    report = verify(folder)
    assert report.failed == ["integrity"]
    assert "splice.json was edited after saving" in report["integrity"].detail


def test_opening_a_folder_whose_points_were_edited_warns_and_verify_still_fails_its_row(tmp_path):
    import json as _json
    import warnings

    from safetensors.torch import load_file, save_file

    import splice
    from splice.errors import EditedManifestWarning
    from splice.fileio import file_sha256
    from splice.manifest import MANIFEST_NAME, WEIGHTS_NAME
    from splice.store import load_base
    from splice.verification import verify

    folder = splice.save(splice.insert("splice.models:tray_net", at="input", warp="similarity"), tmp_path / "sp")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # an unedited folder opens silently
        splice.load(folder)
    data = _json.loads((folder / MANIFEST_NAME).read_text())
    data["points"][0]["warp"]["padding"] = "border"
    (folder / MANIFEST_NAME).write_text(_json.dumps(data, indent=2))
    for opener in (splice.load, load_base):
        with pytest.warns(EditedManifestWarning) as caught:
            opener(folder)
        (message,) = [str(w.message) for w in caught]
        assert message.startswith(f"'{folder}': splice.json's points differ from those its weights were written")
        assert "verify's integrity row fails" in message and "\n" not in message
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # verify reports it in its row, once, and warns nothing
        report = verify(folder)
    assert report.failed == ["integrity"] and report["integrity"].summary == "points edited"
    # a folder written before the hash was kept (safetensors metadata without it, as safetensors.safe_open reads
    # it): nothing to compare, no warning
    weights = folder / WEIGHTS_NAME
    save_file(load_file(weights), weights, metadata={"format": "pt"})
    data["weights"]["sha256"] = file_sha256(weights)
    (folder / MANIFEST_NAME).write_text(_json.dumps(data, indent=2))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        splice.load(folder)


def _edit(folder, change) -> None:
    import json as _json

    from splice.manifest import MANIFEST_NAME

    data = _json.loads((folder / MANIFEST_NAME).read_text())
    change(data)
    (folder / MANIFEST_NAME).write_text(_json.dumps(data, indent=2))


_EDITS = {
    "normalisation": lambda d: d.update(normalisation={"mean": [0.0], "std": [1.0]}),
    "class_names": lambda d: d.update(class_names=[str(9 - i) for i in range(10)]),
    "leaves": lambda d: d.update(leaves=["ReLU"]),
    "input_shape": lambda d: d.update(input_shape=[1, 40, 40]),
}


@pytest.fixture
def digits_folder(tmp_path):
    """A tray net spliced at its input, with the normalisation and class names of the embedded digits."""
    import splice

    spliced = splice.insert("splice.models:tray_net", at="input")
    return splice.save(spliced, tmp_path / "sp", normalisation={"mean": [0.1], "std": [0.3]},
                       class_names=[str(i) for i in range(10)])


@pytest.mark.parametrize("field", sorted(_EDITS))
def test_an_edit_that_changes_what_the_model_computes_or_means_fails_integrity_and_warns(digits_folder, field):
    """splice.json's normalisation and class names were outside every hash: an edit passed verify silently and
    shipped in the ONNX metadata. Every field of manifest.MODEL_FIELDS is hashed beside the tensors now."""
    import warnings

    import splice
    from splice.errors import EditedManifestWarning
    from splice.verification import verify

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # an untouched folder opens silently and passes
        splice.load(digits_folder)
        assert verify(digits_folder).passed
    _edit(digits_folder, _EDITS[field])
    with pytest.warns(EditedManifestWarning) as caught:
        splice.load(digits_folder)
    (message,) = [str(w.message) for w in caught if issubclass(w.category, EditedManifestWarning)]
    assert message.startswith(f"'{digits_folder}': splice.json's {field} differ from those its weights were written")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        report = verify(digits_folder)
    assert report.failed == ["integrity"] and report["integrity"].summary == f"{field} edited"
    assert report["integrity"].numbers["edited_fields"] == [field]
    # and nothing is exported from it: the file would ship what the integrity row fails
    from splice.errors import CheckFailed

    target = digits_folder.parent / f"edited-{field}.onnx"
    with pytest.raises(CheckFailed, match=rf"splice\.json's {field} differ .*; nothing was exported"):
        splice.export(digits_folder, onnx=target)
    assert not target.exists()


def test_a_new_layout_of_the_same_values_is_no_edit(digits_folder):
    import warnings

    import splice
    from splice.verification import verify

    _edit(digits_folder, lambda d: d.update(normalisation={"std": [0.3], "mean": [0.1]}, leaves=[]))  # same values
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        splice.load(digits_folder)
        assert verify(digits_folder).passed


def test_a_folder_written_before_the_fields_were_hashed_keeps_its_points_check(digits_folder):
    """An older folder holds the points hash only (safetensors metadata, as safetensors.safe_open reads it): its
    normalisation is not checked and nothing new is said; an edit of its points still fails."""
    import warnings

    from safetensors.torch import load_file, save_file

    import splice
    from splice.fileio import file_sha256
    from splice.manifest import FIELDS_KEY, POINTS_KEY, WEIGHTS_NAME
    from splice.verification import verify

    weights = digits_folder / WEIGHTS_NAME
    from safetensors import safe_open

    with safe_open(str(weights), framework="pt") as f:
        meta = f.metadata()
    assert FIELDS_KEY in meta and POINTS_KEY in meta  # a new folder keeps both
    save_file(load_file(weights), weights, metadata={"format": "pt", POINTS_KEY: meta[POINTS_KEY]})
    _edit(digits_folder, lambda d: (_EDITS["normalisation"](d), d["weights"].update(sha256=file_sha256(weights))))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        splice.load(digits_folder)
        assert verify(digits_folder).passed
    _edit(digits_folder, lambda d: d["points"][0]["warp"].update(padding="border"))
    with pytest.warns(splice.errors.EditedManifestWarning):
        splice.load(digits_folder)
    assert verify(digits_folder)["integrity"].summary == "points edited"


def test_a_spec_edited_to_a_twin_architecture_fails_integrity_and_is_not_exported(tmp_path):
    """timm's resnet18 and resnetblur18 have the same state dict (names and shapes) and compute different things
    (blur pooling). A folder whose source.spec was edited from one to the other loaded silently, passed verify
    (the provenance row rebuilt the edited spec too) and was exported. Reference: timm itself, the edited folder's
    base computes exactly what timm's resnetblur18 does with those weights."""
    import warnings

    pytest.importorskip("timm")
    import timm

    import splice
    from splice.errors import CheckFailed, EditedManifestWarning

    folder = splice.save(splice.insert(splice.load_source("timm:resnet18", kwargs={"num_classes": 3},
                                                          input_shape=(3, 32, 32), warn_random=False), at="input"),
                         tmp_path / "sp")
    _edit(folder, lambda d: d["source"].update(spec="timm:resnetblur18"))
    with pytest.warns(EditedManifestWarning, match=r"splice\.json's source\.spec differ"):
        base = splice.store.load_base(folder)
    twin = timm.create_model("resnetblur18", pretrained=False, num_classes=3).eval()
    twin.load_state_dict(base.state_dict())
    x = torch.rand(2, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(base(x), twin(x))  # the edit is a real change of architecture
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EditedManifestWarning)
        report = splice.verify(folder)
    assert report.failed == ["integrity"] and report["integrity"].numbers["edited_fields"] == ["source.spec"]
    with pytest.raises(CheckFailed, match=r"source\.spec differ .*; nothing was exported"):
        splice.export(folder, onnx=tmp_path / "edited.onnx")
    assert not (tmp_path / "edited.onnx").exists()


def test_a_model_file_moved_to_another_folder_is_no_edit_of_the_spec(tmp_path):
    """A path/file.py:factory spec names its file by an absolute path; moving the file and pointing splice.json at
    the new place changes no architecture (what the file holds is code_sha256's to check)."""
    import shutil
    import warnings

    import splice

    (tmp_path / "a").mkdir()
    code = tmp_path / "a" / "bench_net.py"
    code.write_text("from splice.models import tray_net\n\ndef make():\n    return tray_net()\n")
    src = splice.load_source(f"{code}:make", input_shape=(1, 24, 24), warn_random=False, trust_code=True)
    folder = splice.save(splice.insert(src, at="input"), tmp_path / "sp")
    shutil.move(str(tmp_path / "a"), str(tmp_path / "b"))
    _edit(folder, lambda d: d["source"].update(spec=f"{tmp_path / 'b' / 'bench_net.py'}:make"))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        splice.load(folder, trust_code=True)
        assert splice.verify(folder, trust_code=True).passed
    _edit(folder, lambda d: d["source"].update(spec=f"{tmp_path / 'b' / 'bench_net.py'}:other"))
    from splice.manifest import WEIGHTS_NAME, edited_fields
    import json as _json

    assert edited_fields(folder / WEIGHTS_NAME, _json.loads((folder / "splice.json").read_text())) == ["source.spec"]
