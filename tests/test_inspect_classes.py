"""inspect's accuracy is given only when the data's classes are the ones the model was trained on."""

from __future__ import annotations

import warnings
from pathlib import Path

import pytest
import torch

import splice
from splice.data import DIGITS_SHAPE, open_data
from splice.errors import RandomWeightsWarning


def _folder(path, class_names):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RandomWeightsWarning)
        model = splice.insert("splice.models:tray_net", at="input")
    return splice.save(model, path, class_names=class_names)


@pytest.mark.parametrize("same", [True, False])
def test_accuracy_only_when_the_classes_line_up(tmp_path, same, capsys):
    from splice.cli import main

    digits = open_data("digits", "test").classes
    names = list(digits) if same else [f"part-{c}" for c in digits]
    folder = _folder(tmp_path / "spliced", names)
    result = splice.inspect(folder, data="digits", n=8, out=tmp_path / "report", pictures=False)
    if same:
        # the whole test split (360 images): the accuracy eval reports for the same model, on another code path
        whole = splice.inspect(folder, data="digits", n=360, out=tmp_path / "whole", pictures=False)
        clean = splice.evaluate(folder, data="digits", distort="none")["clean"]["accuracy"]
        assert whole["accuracy"] == pytest.approx(clean, abs=1e-9) and whole["accuracy_note"] is None
        assert result["accuracy"] in {k / 8 for k in range(9)}
    else:
        assert result["accuracy"] is None
        assert "trained on classes ['part-0'" in result["accuracy_note"] and "would not line up" in result["accuracy_note"]
        assert main(["inspect", str(folder), "--data", "digits", "--n", "8", "--out", str(tmp_path / "cli")]) == 0
        out = capsys.readouterr().out
        assert "no accuracy: the model was trained on classes" in out and "accuracy on them" not in out


def test_a_folder_of_unlabelled_images_is_inspected_without_an_accuracy(tmp_path):
    # a new site's images arrive unlabelled, in one folder: what the warp does on them is what a user wants to see
    import csv

    import numpy as np
    from PIL import Image

    site = tmp_path / "site"
    site.mkdir()
    digits = open_data("digits-moved", "test").images[:5]
    for k, img in enumerate(digits):
        Image.fromarray((img[0].numpy() * 255).round().astype(np.uint8)).save(site / f"part{k}.png")
    (site / "notes.txt").write_text("not an image")
    folder = _folder(tmp_path / "spliced", [str(d) for d in range(10)])
    result = splice.inspect(folder, data=str(site), n=8, out=tmp_path / "report", pictures=True)
    assert result["n_images"] == 5 and result["split"] is None and result["accuracy"] is None
    assert result["accuracy_note"].startswith("no accuracy: the images carry no labels")
    with open(tmp_path / "report" / "warps.csv") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == 5 and all(r["label"] == "" and r["predicted"] != "" for r in rows)
    assert sorted(Path(r["file"]).name for r in rows) == [f"part{k}.png" for k in range(5)]  # traced to its file
    # the predictions are the model's own on those files
    from splice.imagefiles import load_images

    model = splice.load(folder).eval()
    files = [r["file"] for r in rows]
    with torch.no_grad():
        own = model(load_images(files, DIGITS_SHAPE)).argmax(1).tolist()
    assert [int(r["predicted"]) for r in rows] == own
    assert (tmp_path / "report" / "sheet_input.png").is_file()


@pytest.mark.parametrize("layout", ["days", "mixed"])
def test_a_site_folder_with_subfolders_is_read_as_tune_reads_a_site(tmp_path, layout):
    """A site's images in day1/ and day2/ were read as two classes (and the predictions dropped, 10 scores against 2
    classes, under a 'test' split that is not there); images beside one subfolder were skipped without a word (10
    of 30 read). Every image is read, without labels, as 'tune --site' reads the folder (splice.adapt's
    open_images, the reference here)."""
    import numpy as np
    from PIL import Image

    from splice.adapt.images import open_images

    site = tmp_path / "site"
    digits = open_data("digits-moved", "test").images[:9]
    places = ["day1", "day1", "day1", "day2", "day2", "day2", "day2", "day2", "day2"] if layout == "days" else \
        ["", "", "", "", "", "", "day2", "day2", "day2"]
    for k, (img, sub) in enumerate(zip(digits, places)):
        (site / sub).mkdir(parents=True, exist_ok=True)
        Image.fromarray((img[0].numpy() * 255).round().astype(np.uint8)).save(site / sub / f"part{k}.png")
    folder = _folder(tmp_path / "spliced", [str(d) for d in range(10)])
    result = splice.inspect(folder, data=str(site), n=20, out=tmp_path / "report", pictures=False)
    assert result["n_images"] == 9 == len(open_images(str(site), DIGITS_SHAPE))
    assert result["split"] is None and result["accuracy"] is None
    assert result["accuracy_note"].startswith("no accuracy: the images carry no labels")


def test_class_folders_named_as_the_models_classes_stay_labelled(tmp_path):
    import numpy as np
    from PIL import Image

    data = tmp_path / "labelled"
    moved = open_data("digits-moved", "test")
    for k in range(6):
        label = int(moved.labels[k])
        (data / str(label)).mkdir(parents=True, exist_ok=True)
        Image.fromarray((moved.images[k][0].numpy() * 255).round().astype(np.uint8)).save(data / str(label) / f"{k}.png")
    folder = _folder(tmp_path / "spliced", [str(d) for d in range(10)])
    result = splice.inspect(folder, data=str(data), n=20, out=tmp_path / "report", pictures=False)
    # folders of some of the model's classes (a labelled batch from a site): scored by name, not refused as a
    # count of classes that differs from the outputs; reference: the model's own predictions on the same files
    assert result["n_images"] == 6 and result["accuracy_note"] is None
    from splice.imagefiles import load_images

    files = sorted(data.rglob("*.png"))
    truth = torch.tensor([int(f.parent.name) for f in files])
    with torch.no_grad():
        own = splice.load(folder).eval()(load_images([str(f) for f in files], DIGITS_SHAPE)).argmax(1)
    assert result["accuracy"] == pytest.approx(float((own == truth).double().mean()), abs=1e-9)


@pytest.mark.parametrize("odd", ["typo", "loose"])
def test_a_class_tree_with_a_typo_or_a_loose_image_stays_labelled(tmp_path, odd):
    """A class folder renamed ('nine' for '9') or a preview image beside the class folders: still the model's class
    tree (splice eval reads it so), with the mismatch named, not a site's unlabelled images."""
    import numpy as np
    from PIL import Image

    data = tmp_path / "tree"
    test = open_data("digits", "test")
    chosen = [int(i) for d in range(10) for i in (test.labels == d).nonzero().flatten()[:2]]  # two of each class
    for k in chosen:
        label = int(test.labels[k])
        name = "nine" if odd == "typo" and label == 9 else str(label)
        (data / name).mkdir(parents=True, exist_ok=True)
        Image.fromarray((test.images[k][0].numpy() * 255).round().astype(np.uint8)).save(data / name / f"{k}.png")
    if odd == "loose":
        Image.fromarray((test.images[0][0].numpy() * 255).round().astype(np.uint8)).save(data / "preview.png")
    folder = _folder(tmp_path / "spliced", [str(d) for d in range(10)])
    result = splice.inspect(folder, data=str(data), n=40, out=tmp_path / "report", pictures=False)
    assert result["n_images"] == 20
    if odd == "typo":
        assert result["accuracy"] is None and "is '9' in one and 'nine' in the other" in result["accuracy_note"]
    else:
        assert result["accuracy_note"] is None and result["accuracy"] is not None


@pytest.mark.parametrize("extra", ["empty", "images"])
def test_an_extra_folder_beside_the_classes_is_passed_over_when_empty_and_named_when_not(tmp_path, extra):
    """An unzipped tree with __MACOSX/ (hidden files only) beside the class folders lost its accuracy and predictions
    ("the classes are 11"); an extra folder of images is named in the note."""
    import numpy as np
    from PIL import Image

    data = tmp_path / "tree"
    test = open_data("digits", "test")
    for k in [int(i) for d in range(10) for i in (test.labels == d).nonzero().flatten()[:2]]:
        (data / str(int(test.labels[k]))).mkdir(parents=True, exist_ok=True)
        Image.fromarray((test.images[k][0].numpy() * 255).round().astype(np.uint8)).save(
            data / str(int(test.labels[k])) / f"{k}.png")
    (data / "__MACOSX").mkdir()
    if extra == "empty":
        (data / "__MACOSX" / "._0.png").write_bytes(b"\x00\x05\x16\x07")
    else:
        Image.fromarray((test.images[0][0].numpy() * 255).round().astype(np.uint8)).save(data / "__MACOSX" / "x.png")
    folder = _folder(tmp_path / "spliced", [str(d) for d in range(10)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the empty folder is also warned of as a class without images
        result = splice.inspect(folder, data=str(data), n=40, out=tmp_path / "report", pictures=False)
    if extra == "empty":
        assert result["accuracy_note"] is None and result["accuracy"] is not None
    else:
        assert result["accuracy"] is None and "none of the model's classes: ['__MACOSX']" in result["accuracy_note"]
