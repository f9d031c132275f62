"""splice.data (digits scenario, image folders, preprocessing) and the demo architecture."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import torch
from PIL import Image

from splice import data, distort
from splice.errors import DataError

# ---------------------------------------------------------------------------
# the digits scenario
# ---------------------------------------------------------------------------


def test_splits_are_disjoint_stratified_and_cover_optdigits():
    from sklearn.datasets import load_digits

    target = torch.from_numpy(load_digits().target)
    idx = data.digits_split_indices()
    every = torch.cat([idx[s] for s in data.SPLITS])
    # source: scikit-learn's load_digits documentation: 1797 samples, 10 classes
    assert len(every) == 1797 == len(target)
    assert torch.equal(every.sort().values, torch.arange(1797))  # disjoint and complete
    overall = target.bincount().double() / len(target)
    for split, fraction in zip(data.SPLITS, (0.6, 0.2, 0.2)):
        assert abs(len(idx[split]) - fraction * 1797) <= 5
        counts = target[idx[split]].bincount(minlength=10).double()
        # stratified: every class within one image of its share (common practice, no source)
        assert ((counts - overall * len(idx[split])).abs() <= 1.0).all()
        ds = data.open_data("digits", split)
        assert torch.equal(ds.labels, target[idx[split]]) and torch.equal(ds.indices, idx[split])


def test_digits_are_deterministic_bit_for_bit():
    first = {(v, s): data.open_data(v, s) for v in data.DATASETS for s in data.SPLITS}
    data._digits_all.cache_clear()
    data.digits_split_indices.cache_clear()
    for (v, s), ds in first.items():
        again = data.open_data(v, s)
        assert torch.equal(ds.images, again.images) and torch.equal(ds.labels, again.labels)


def test_digit_images_are_the_optdigits_pixels():
    from sklearn.datasets import load_digits

    raw = load_digits().images  # values 0..16
    ds = data.open_data("digits", "val")
    assert ds.images.shape == (len(ds), 1, 48, 48) and ds.images.dtype == torch.float32
    assert ds.classes == [str(d) for d in range(10)] and ds.name == "digits" and ds.split == "val"
    assert ds.reference is None and data.upright_counterpart("digits") is None
    # the canvas outside the centred 24x24 box is dark
    box = torch.zeros(48, 48, dtype=torch.bool)
    box[12:36, 12:36] = True
    assert ds.images[:, :, ~box].abs().max() == 0
    # source: scikit-image transform.resize with order=1 (bilinear, pixel-centre aligned, edge mode)
    # is the same smooth 3x upscale of the 0..16 values scaled to [0, 1]
    from skimage.transform import resize

    for k in (0, 7, 100):
        ref = resize(raw[int(ds.indices[k])] / 16.0, (24, 24), order=1, mode="edge", anti_aliasing=False)
        torch.testing.assert_close(ds.images[k, 0, 12:36, 12:36].double(), torch.from_numpy(ref),
                                   rtol=0, atol=1e-6)


def test_moved_is_the_same_membership_and_really_moved():
    from skimage import measure

    up = data.open_data("digits", "test")
    mv = data.open_data("digits-moved", "test")
    assert mv.reference == "digits" == data.upright_counterpart("digits-moved")
    assert torch.equal(up.indices, mv.indices) and torch.equal(up.labels, mv.labels)
    p = mv.params
    assert p["angle_deg"].abs().max() <= 60 and p["angle_deg"].abs().max() > 55
    assert p["scale"].min() >= 0.8 and p["scale"].max() <= 1.2
    assert p["shift"].abs().max() <= 0.25

    h, w = 48, 48
    predicted, measured, spread_up = [], [], []
    for i in range(len(mv)):
        # source: scikit-image measure.moments (intensity-weighted raw moments) for centroids
        mu = measure.moments(up.images[i, 0].double().numpy(), order=1)
        mm = measure.moments(mv.images[i, 0].double().numpy(), order=1)
        if mm[0, 0] < 0.99 * mu[0, 0] * float(p["scale"][i]) ** 2:
            continue  # part of the digit left the frame; its centroid moved for that reason too
        cu = np.array([mu[0, 1] / mu[0, 0], mu[1, 0] / mu[0, 0]])  # (x, y) in pixel indices
        cm = np.array([mm[0, 1] / mm[0, 0], mm[1, 0] / mm[0, 0]])
        a = math.radians(float(p["angle_deg"][i]))
        rot = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
        centre = np.array([(w - 1) / 2, (h - 1) / 2])
        shift_px = p["shift"][i].numpy() * np.array([w, h])
        predicted.append(float(p["scale"][i]) * rot @ (cu - centre) + centre + shift_px)
        measured.append(cm)
        spread_up.append(cu)
    predicted, measured, spread_up = map(np.array, (predicted, measured, spread_up))
    assert len(measured) > 0.9 * len(mv)
    # the moved centroid is where the recorded rotation/scale/shift puts the upright one
    assert np.abs(predicted - measured).max() < 0.5
    # upright centroids cluster at the canvas centre; moved ones are spread over the tray
    assert spread_up.std(axis=0).max() < 1.5 and measured.std(axis=0).min() > 4.0


def _major_axis_angle(img: np.ndarray) -> tuple[float, float]:
    from skimage import measure

    # source: scikit-image measure.inertia_tensor / inertia_tensor_eigvals (intensity weighted,
    # (row, col) order); the major axis is the eigenvector of the smallest eigenvalue
    tensor = measure.inertia_tensor(img)
    evals, evecs = np.linalg.eigh(tensor)
    dr, dc = evecs[:, 0]
    return math.atan2(dr, dc), evals[1] / max(evals[0], 1e-12)


def test_moved_orientation_follows_the_recorded_angle():
    up = data.open_data("digits", "test")
    mv = data.open_data("digits-moved", "test")
    errors = []
    for i in range(len(mv)):
        a_up, elong = _major_axis_angle(up.images[i, 0].double().numpy())
        if elong < 4.0:
            continue  # round digits have no well-defined axis
        a_mv, _ = _major_axis_angle(mv.images[i, 0].double().numpy())
        # positive angle turns content clockwise on screen: with y down, atan2(y, x) grows by angle
        diff = a_mv - a_up - math.radians(float(mv.params["angle_deg"][i]))
        errors.append(abs((diff + math.pi / 2) % math.pi - math.pi / 2))  # axes are defined mod pi
    assert len(errors) > 20
    assert np.median(np.degrees(errors)) < 2.0 and np.percentile(np.degrees(errors), 90) < 6.0


def test_moved_digits_stay_mostly_in_frame():
    up = data.open_data("digits", "train")
    mv = data.open_data("digits-moved", "train")
    kept = mv.images.double().sum((1, 2, 3)) / (up.images.double().sum((1, 2, 3)) * mv.params["scale"] ** 2)
    assert kept.mean() > 0.99 and kept.min() > 0.75  # common practice, no source: "mostly in frame"


def test_moved_equals_apply_affine_of_upright_and_seed_changes_it():
    up = data.open_data("digits", "val")
    mv = data.open_data("digits-moved", "val")
    p = mv.params
    again = distort.apply_affine(up.images, p["angle_deg"], p["scale"], p["shift"]).clamp(0, 1)
    assert torch.equal(again, mv.images)
    other = data.open_data("digits-moved", "val", seed=1)
    assert torch.equal(other.indices, mv.indices)
    assert not torch.equal(other.images, mv.images)
    assert torch.equal(data.open_data("digits", "val", seed=1).images, up.images)


def test_cache_cannot_be_corrupted_by_callers():
    ds = data.open_data("digits-moved", "train")
    ds.images.fill_(0.5)
    ds.labels.zero_()
    fresh = data.open_data("digits-moved", "train")
    assert fresh.images.max() == 1.0 and fresh.images.min() == 0.0 and fresh.labels.max() == 9


def test_digits_input_shape_and_channels():
    ds = data.open_data("digits-moved", "test", input_shape=(3, 64, 80))
    assert ds.images.shape == (len(ds), 3, 64, 80)
    assert torch.equal(ds.images[:, 0], ds.images[:, 1]) and torch.equal(ds.images[:, 0], ds.images[:, 2])
    up = data.open_data("digits", "test", input_shape=(1, 64, 80))
    box = torch.zeros(64, 80, dtype=torch.bool)
    box[16:48, 20:60] = True  # the digit spans half the canvas per axis, centred
    assert up.images[:, :, ~box].abs().max() == 0 and up.images[:, :, box].max() > 0.9
    image, label = ds[3]
    assert image.shape == (3, 64, 80) and label == ds.labels[3]


@pytest.mark.parametrize("shape", [(1, 4, 48), (1, 48), "48x48", (1.5, 48, 48), (0, 48, 48)])
def test_bad_input_shape(shape):
    with pytest.raises(DataError, match=r"input_shape must be \(C, H, W\) with C = 1 or 3 and H, W >= 8; got"):
        data.open_data("digits", input_shape=shape)


@pytest.mark.parametrize("channels", [2, 4])
def test_a_model_of_other_channels_is_told_what_image_folders_feed(tmp_path, channels):
    root = _tree(tmp_path / "parts")
    for spec in (str(root), "digits"):
        with pytest.raises(DataError, match=rf"^image files and the embedded digits feed 1- or 3-channel models; "
                                            rf"this model takes {channels} \(input_shape \({channels}, 16, 16\)\)"):
            data.open_data(spec, input_shape=(channels, 16, 16))


def test_unknown_names():
    with pytest.raises(DataError, match=r"unknown dataset 'digts'; did you mean 'digits'.*Use one of digits, "
                                        r"digits-moved or the path of an existing image folder"):
        data.open_data("digts")
    with pytest.raises(DataError, match=r"unknown split 'tset'; did you mean 'test'\? Use one of train, val, test"):
        data.open_data("digits", "tset")
    with pytest.raises(DataError, match=r"seed must be an integer; got '1'"):
        data.open_data("digits-moved", seed="1")


# ---------------------------------------------------------------------------
# image folders
# ---------------------------------------------------------------------------


def _save(path, size=(20, 30), colour=(200, 100, 50), mode="RGB"):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.new(mode, size, colour).save(path)


def _tree(root, splits=("train", "val"), classes=("cat", "dog"), n=2):
    for s in splits:
        for c in classes:
            for k in range(n):
                _save(root / s / c / f"{k}.png")
    return root


def test_folder_happy_path(tmp_path):
    root = _tree(tmp_path / "parts")
    (root / "train" / "cat" / "notes.txt").write_text("not an image")
    (root / "train" / "dog" / ".hidden.png").write_bytes(b"")
    ds = data.open_data(str(root), "train", input_shape=(1, 12, 16))
    assert ds.classes == ["cat", "dog"] and len(ds) == 4
    assert ds.labels.tolist() == [0, 0, 1, 1]
    image, label = ds[2]
    assert image.shape == (1, 12, 16) and image.dtype == torch.float32 and label == 1
    # source: Pillow's documented L conversion, L = R * 299/1000 + G * 587/1000 + B * 114/1000
    expected = round(200 * 0.299 + 100 * 0.587 + 50 * 0.114) / 255
    torch.testing.assert_close(image, torch.full_like(image, expected), rtol=0, atol=1 / 255 + 1e-6)
    rgb, _ = data.open_data(root, "val", input_shape=(3, 8, 8))[0]
    torch.testing.assert_close(rgb[:, 0, 0], torch.tensor([200, 100, 50]) / 255.0)
    ds.check()  # every image decodes
    loader = torch.utils.data.DataLoader(ds, batch_size=4)
    images, labels = next(iter(loader))
    assert images.shape == (4, 1, 12, 16) and labels.tolist() == [0, 0, 1, 1]


def test_folder_channel_conversions(tmp_path):
    grey = tmp_path / "grey.png"
    _save(grey, colour=77, mode="L")
    deep = tmp_path / "deep.png"
    Image.fromarray(np.full((10, 10), 49151, dtype=np.uint16)).save(deep)  # 16-bit grey, 0.75 of full scale
    with Image.open(deep) as im:
        assert im.mode.startswith("I")
    pal = tmp_path / "pal.png"
    p = Image.new("P", (10, 10), 1)
    p.putpalette([0, 0, 0, 255, 0, 0] + [0] * 762)
    p.info["transparency"] = 0
    p.save(pal, transparency=0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        batch = data.load_images([grey, deep, pal], (3, 6, 6))
    assert batch.shape == (3, 3, 6, 6)
    torch.testing.assert_close(batch[0], torch.full((3, 6, 6), 77 / 255))  # grey replicated to RGB
    torch.testing.assert_close(batch[1], torch.full((3, 6, 6), 49151 / 65535), rtol=0, atol=1e-4)
    torch.testing.assert_close(batch[2][:, 0, 0], torch.tensor([1.0, 0.0, 0.0]))
    one = data.load_images(str(grey), (1, 8, 8))
    assert one.shape == (1, 1, 8, 8)


def test_folder_errors(tmp_path):
    shape = (1, 8, 8)
    with pytest.raises(DataError, match=r"image folder '.*nowhere' does not exist; check the path"):
        data.open_data(str(tmp_path / "nowhere"), input_shape=shape)
    afile = tmp_path / "a.png"
    _save(afile)
    with pytest.raises(DataError, match=r"a.png is a file, not a folder"):
        data.open_data(str(afile), input_shape=shape)
    root = _tree(tmp_path / "ok")
    with pytest.raises(DataError, match=r"input_shape is needed to open the image folder"):
        data.open_data(str(root))

    only_val = _tree(tmp_path / "only_val", splits=("val",))
    (only_val / "extra").mkdir()
    with pytest.raises(DataError, match=r"has no 'train' folder \(found: val, extra\)"):
        data.open_data(str(only_val), "train", input_shape=shape)
    only_train = _tree(tmp_path / "only_train", splits=("train",))
    with pytest.raises(DataError, match=r"has no 'val' folder \(found: train\)"):
        data.open_data(str(only_train), "val", input_shape=shape)
    with pytest.raises(DataError, match=r"split 'test' is not available in .*ok; available splits: train, val"):
        data.open_data(str(root), "test", input_shape=shape)

    flat = tmp_path / "flat"
    _tree(flat, splits=("val",))
    _save(flat / "train" / "loose.png")
    with pytest.raises(DataError, match=r"train has no class folders; .*holds 1 image files directly"):
        data.open_data(str(flat), input_shape=shape)

    empty = _tree(tmp_path / "empty")
    (empty / "val" / "cow").mkdir()
    (empty / "val" / "cow" / "readme.txt").write_text("no images here")
    (empty / "train" / "cow").mkdir()
    with pytest.raises(DataError, match=r"train: 1 class folder\(s\) hold no images: cow"):
        data.open_data(str(empty), input_shape=shape)

    differ = _tree(tmp_path / "differ")
    _save(differ / "val" / "cow" / "0.png")
    for f in (differ / "val" / "dog").iterdir():
        f.unlink()
    (differ / "val" / "dog").rmdir()
    with pytest.raises(DataError, match=r"class folders differ between train and val .*: val has extra cow, "
                                        r"which train does not have\. Remove them from val, or add them to train"):
        data.open_data(str(differ), "val", input_shape=shape)


def test_corrupt_image(tmp_path):
    root = _tree(tmp_path / "parts")
    bad = root / "train" / "dog" / "broken.png"
    bad.write_bytes(b"\x89PNG\r\n\x1a\n this is not really a png")
    ds = data.open_data(str(root), input_shape=(1, 8, 8))
    i = [str(p) for p, _ in ds.samples].index(str(bad))
    with pytest.raises(DataError, match=r"cannot read image .*broken.png: .* Remove or replace the file"):
        ds[i]
    with pytest.raises(DataError, match=r"1 of 5 images in .*train cannot be read: .*broken.png"):
        ds.check()


def test_load_images_errors(tmp_path):
    with pytest.raises(DataError, match=r"image file not found: .*missing.png"):
        data.load_images([tmp_path / "missing.png"], (1, 8, 8))
    with pytest.raises(DataError, match=r"no image files given"):
        data.load_images([], (1, 8, 8))
    with pytest.raises(DataError, match=r"is a folder, not an image file"):
        data.load_images([tmp_path], (1, 8, 8))
    (tmp_path / "text.png").write_text("hello")
    with pytest.raises(DataError, match=r"cannot read image .*text.png"):
        data.load_images([tmp_path / "text.png"], (1, 8, 8))


# ---------------------------------------------------------------------------
# normalisation
# ---------------------------------------------------------------------------


def test_normalise_matches_torchvision():
    import torchvision.transforms.v2.functional as TF

    x = torch.rand(4, 3, 5, 6)
    spec = {"mean": [0.1, 0.2, 0.3], "std": [0.5, 0.25, 2.0]}
    # source: torchvision.transforms.v2.functional.normalize
    torch.testing.assert_close(data.normalise(x, spec), TF.normalize(x, spec["mean"], spec["std"]))
    torch.testing.assert_close(data.normalise(x[0], spec), TF.normalize(x[0], spec["mean"], spec["std"]))
    assert data.normalise(x, None) is x
    before = x.clone()
    data.normalise(x, {"mean": [0.5], "std": [0.5]})
    assert torch.equal(x, before)


@pytest.mark.parametrize("spec,match", [
    ({"mean": [0.5]}, r"exactly the keys 'mean' and 'std'; got \['mean'\]"),
    ([0.5, 0.5], r"exactly the keys 'mean' and 'std'; got list"),
    ({"mean": [0.5, 0.5], "std": [1.0]}, r"'mean' has 2 values but the images have 3 channel\(s\)"),
    ({"mean": [0.5], "std": [0.0]}, r"'std' must be finite and positive; got \[0.0\]"),
    ({"mean": ["a"], "std": [1.0]}, r"'mean' must be a list of numbers; got \['a'\]"),
])
def test_normalise_errors(spec, match):
    with pytest.raises(DataError, match=match):
        data.normalise(torch.rand(2, 3, 4, 4), spec)


# ---------------------------------------------------------------------------
# the demo architecture (splice.models)
# ---------------------------------------------------------------------------


def test_tray_net_is_small_traceable_and_fits_the_digits():
    import torch.fx

    from splice.models import tray_net

    assert tray_net.input_shape == data.DIGITS_SHAPE and tray_net.normalisation is None
    model = tray_net().eval()
    assert sum(p.numel() for p in model.parameters()) < 100_000
    convs = [n for n, m in model.named_modules() if isinstance(m, torch.nn.Conv2d)]
    assert len(convs) >= 4
    traced = torch.fx.symbolic_trace(model)
    x = data.open_data("digits-moved", "val").images[:8]
    out = model(x)
    assert out.shape == (8, 10) and torch.equal(traced(x), out)
    assert tray_net(num_classes=3, in_channels=3, width=8)(torch.rand(2, 3, 48, 48)).shape == (2, 3)
    with pytest.raises(ValueError, match=r"tray_net width must be a positive integer; got 0"):
        tray_net(width=0)


def test_a_folder_named_like_an_embedded_set_is_named_not_read_silently(tmp_path, monkeypatch):
    from pathlib import Path

    from torchvision.datasets import ImageFolder

    from splice.adapt.images import open_images
    from splice.errors import DataWarning

    monkeypatch.chdir(tmp_path)
    _tree(tmp_path / "digits", splits=("train", "val", "test"), n=1)
    _tree(tmp_path / "digits-moved", splits=("train",), n=1)
    message = r"^'digits' names splice's embedded data set; the folder \./digits is not read: pass \./digits to read it"
    with pytest.warns(DataWarning, match=message):
        embedded = data.open_data("digits", "test")
        data.open_data("digits", "val")  # one line for the folder, however many splits are opened
    assert len(embedded) == 360  # the embedded test split (splice.data docstring)
    for spelled in ("./digits", Path("digits")):
        folder = data.open_data(spelled, "test", input_shape=(1, 8, 8))
        # torchvision's ImageFolder over the same split is the reference for what the folder holds
        assert len(folder) == len(ImageFolder(str(tmp_path / "digits" / "test"))) == 2
    with pytest.warns(DataWarning, match=r"^'digits-moved' names splice's embedded data set; the folder "
                                         r"\./digits-moved is not read"):
        site = open_images("digits-moved", (1, 48, 48))
    assert len(site) == 1078


def test_class_lists_in_messages_are_never_cut_silently_and_name_the_first_difference():
    """Messages showed the first six or eight names with no ellipsis: ten digit classes whose last folder was
    renamed '9' -> 'nine' printed as two identical lists."""
    from splice.data import first_class_difference, shown_classes

    model = [str(i) for i in range(10)]
    data = model[:9] + ["nine"]
    assert first_class_difference(model, data) == "class 9 is '9' in one and 'nine' in the other"
    assert first_class_difference(model, model[:9]) == "10 classes against 9"
    assert shown_classes(model, limit=6) == "['0', '1', '2', '3', '4', '5', … 4 more]"
    assert shown_classes(model[:3]) == "['0', '1', '2']" and shown_classes(None) == "[]"
    # after Unicode NFC, as same_classes compares: a folder written on macOS (decomposed) is the same class
    assert first_class_difference(["caf\u00e9", "x"], ["cafe\u0301", "y"]) == "class 1 is 'x' in one and 'y' in the other"
