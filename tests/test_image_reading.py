"""How image files are found and read (splice.imagefiles), and how ImageFolder splits are checked (splice.data)."""

from __future__ import annotations

import os
import struct
import unicodedata
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image, features

from splice import data, imagefiles
from splice.adapt.images import image_files
from splice.errors import DataError, DataWarning
from splice.imagefiles import image_suffixes, list_image_files, open_capped, read_image
from splice.limits import image_pixel_cap
from splice.verification.probe import read_images


def _grey(path: Path, value: int = 128, size=(6, 6)) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.new("L", size, value).save(path)
    return path


def _rel(paths, root) -> list[str]:
    return [Path(p).relative_to(root).as_posix() for p in paths]


# ---------------------------------------------------------------------------
# bit depths (finding 1)
# ---------------------------------------------------------------------------


def _float_tiff(path: Path, values: np.ndarray) -> Path:
    Image.fromarray(values.astype(np.float32)).save(path)
    with Image.open(path) as im:
        assert im.mode == "F"
    return path


def test_float_image_outside_unit_range_is_refused_not_clipped(tmp_path):
    blob = np.zeros((8, 8), np.float32)
    blob[2:6, 2:6] = 230.0  # 0..255 values, as many tools write float TIFFs
    f255 = _float_tiff(tmp_path / "f255.tif", blob)
    with pytest.raises(DataError, match=r"^image .*f255\.tif is a 32-bit float image with values 0\.\.230, outside "
                                        r"0\.\.1, .*rescale it to 0\.\.1, or save it as an 8- or 16-bit image\.$"):
        read_image(f255, (1, 8, 8))
    ct = _float_tiff(tmp_path / "ct.tif", np.linspace(-1000, 1000, 64).reshape(8, 8))  # signed, CT-like
    with pytest.raises(DataError, match=r"ct\.tif is a 32-bit float image with values -1000\.\.1000, outside 0\.\.1"):
        read_image(ct, (1, 8, 8))


def test_float_image_inside_unit_range_is_read_as_it_is(tmp_path):
    values = np.full((8, 8), 0.25, np.float32)
    values[0, 0] = 1.0004  # rounding by the writing tool, within FLOAT_SLACK: clipped, not refused
    values[0, 1] = -0.0004
    got = read_image(_float_tiff(tmp_path / "unit.tif", values), (1, 8, 8))
    assert got.shape == (1, 8, 8)
    assert float(got[0, 0, 0]) == 1.0 and float(got[0, 0, 1]) == 0.0
    assert torch.equal(got[0, 1:], torch.full((7, 8), 0.25))
    rgb = read_image(tmp_path / "unit.tif", (3, 8, 8))
    assert torch.equal(rgb[0], rgb[2]) and float(rgb[1, 5, 5]) == 0.25  # grey copied to the three channels


def test_int32_images_are_read_as_16_bit_and_refused_outside_0_to_65535(tmp_path):
    deep = np.full((8, 8), 49151, np.int32)  # 0.75 of 16-bit full scale
    Image.fromarray(deep).save(tmp_path / "i32.tif")
    with Image.open(tmp_path / "i32.tif") as im:
        assert im.mode == "I"
    torch.testing.assert_close(read_image(tmp_path / "i32.tif", (1, 8, 8)), torch.full((1, 8, 8), 49151 / 65535))
    for name, value, shown in (("big.tif", 70000, r"0\.\.70000"), ("neg.tif", -5, r"-5\.\.0")):
        arr = np.zeros((8, 8), np.int32)
        arr[0, 0] = value
        Image.fromarray(arr).save(tmp_path / name)
        with pytest.raises(DataError, match=rf"{name} is a 32-bit integer image with values {shown}, outside the "
                                            r"0\.\.65535 .*save it as an 8- or 16-bit image\.$"):
            read_image(tmp_path / name, (1, 8, 8))


def test_16_bit_images_keep_their_scale(tmp_path):
    Image.fromarray(np.full((8, 8), 4095, np.uint16)).save(tmp_path / "twelve.png")  # 12-bit data in a 16-bit PNG
    with Image.open(tmp_path / "twelve.png") as im:
        assert im.mode.startswith("I;16")
    torch.testing.assert_close(read_image(tmp_path / "twelve.png", (1, 4, 4)), torch.full((1, 4, 4), 4095 / 65535))


def test_16_bit_colour_png_is_read_at_full_depth_and_a_16_bit_colour_tiff_is_refused(tmp_path):
    cv2 = pytest.importorskip("cv2")
    rgb16 = (np.random.default_rng(0).random((10, 14, 3)) * 65535).astype(np.uint16)
    rgb16[0, 0] = (257, 258, 65535)  # low bytes an 8-bit read drops
    cv2.imwrite(str(tmp_path / "rgb16.png"), rgb16[:, :, ::-1])  # OpenCV writes BGR
    with Image.open(tmp_path / "rgb16.png") as im:
        assert im.mode == "RGB"  # what Pillow would read: 8 bits
    # reference: OpenCV's IMREAD_UNCHANGED read of the same file, divided by 65535 (README "Bit depth")
    ref = cv2.imread(str(tmp_path / "rgb16.png"), cv2.IMREAD_UNCHANGED)[:, :, ::-1].transpose(2, 0, 1) / 65535
    got = read_image(tmp_path / "rgb16.png", (3, 10, 14)).numpy()
    np.testing.assert_allclose(got, ref, atol=1e-7)
    assert got[1, 0, 0] != got[0, 0, 0]  # 258 vs 257: 16 bits kept
    # grey: Pillow's documented L conversion weights, L = R * 299/1000 + G * 587/1000 + B * 114/1000
    grey = read_image(tmp_path / "rgb16.png", (1, 10, 14)).numpy()[0]
    np.testing.assert_allclose(grey, ref[0] * 0.299 + ref[1] * 0.587 + ref[2] * 0.114, atol=1e-6)
    cv2.imwrite(str(tmp_path / "rgb16.tif"), rgb16)  # a 16-bit RGB TIFF: Pillow reads it at 8 bits
    with pytest.raises(DataError, match=r"rgb16.tif has more than 8 bits per colour sample, .* convert it to "
                                        r"16-bit grey \(PNG or TIFF\) or to 8-bit colour\.$"):
        read_image(tmp_path / "rgb16.tif", (3, 10, 14))
    eight = Image.fromarray((rgb16 >> 8).astype(np.uint8))
    eight.save(tmp_path / "rgb8.tif")  # 8-bit colour TIFF and PNG: as before
    eight.save(tmp_path / "rgb8.png")
    for name in ("rgb8.tif", "rgb8.png"):
        np.testing.assert_allclose(read_image(tmp_path / name, (3, 10, 14)).numpy(),
                                   (rgb16 >> 8).transpose(2, 0, 1) / 255, atol=1e-7)


def test_alpha_is_dropped_like_torchvision_and_grey_is_luma(tmp_path):
    rgba = Image.new("RGBA", (6, 6), (200, 100, 50, 0))  # fully transparent, yet its colour is what is read
    rgba.save(tmp_path / "clear.png")
    got = read_image(tmp_path / "clear.png", (3, 6, 6))
    torch.testing.assert_close(got[:, 0, 0], torch.tensor([200, 100, 50]) / 255.0)
    # source: Pillow's documented L conversion, L = R * 299/1000 + G * 587/1000 + B * 114/1000
    grey = read_image(tmp_path / "clear.png", (1, 6, 6))
    assert round(float(grey[0, 0, 0]) * 255) == round(200 * 0.299 + 100 * 0.587 + 50 * 0.114)


# ---------------------------------------------------------------------------
# finding files (findings 2 and 3)
# ---------------------------------------------------------------------------


def test_every_image_under_a_class_folder_belongs_to_it(tmp_path):
    root = tmp_path / "parts"
    for rel in ("train/a/0.png", "train/a/day2/cam1/1.png", "train/a/day2/2.png", "train/b/3.png",
                "train/c/only/in/sub.png", "val/a/4.png", "val/b/x/5.png", "val/c/6.png"):
        _grey(root / rel)
    _grey(root / "train" / "a" / ".hidden" / "7.png")  # hidden folder
    _grey(root / "train" / "a" / "._0.png")  # macOS companion file
    (root / "train" / "b" / "notes.txt").write_text("not an image")
    ds = data.open_data(root, "train", input_shape=(1, 6, 6))
    assert ds.classes == ["a", "b", "c"]  # c holds images only in subfolders, and still counts
    assert [(Path(p).relative_to(root / "train").as_posix(), label) for p, label in ds.samples] == [
        ("a/0.png", 0), ("a/day2/2.png", 0), ("a/day2/cam1/1.png", 0), ("b/3.png", 1), ("c/only/in/sub.png", 2)]
    ds.check()


def test_one_listing_for_imagefolder_label_free_and_verify(tmp_path):
    site = tmp_path / "site"
    for rel in ("s0.png", "deep/er/s1.jpe", "s2.dib", "s3.jfif", ".s4.png", "._s0.png", ".cache/s5.png"):
        path = site / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        fmt = {".jpe": "JPEG", ".jfif": "JPEG", ".dib": "BMP"}.get(path.suffix, "PNG")
        Image.new("L", (6, 6), 90).save(path, format=fmt)
    (site / "._s0.png").write_bytes(b"\x00\x05\x16\x07\x00\x02\x00\x00Mac OS X")  # AppleDouble, not an image
    expected = ["deep/er/s1.jpe", "s0.png", "s2.dib", "s3.jfif"]
    assert _rel(list_image_files(site), site) == expected
    assert _rel(image_files(site), site) == expected  # label-free
    batch, names = read_images(site, (1, 6, 6), None)  # verify --images
    assert _rel(names, site) == expected and batch.shape == (4, 1, 6, 6)
    assert (batch - 90 / 255).abs().max() < 3 / 255  # JPEG rounding on a flat field


def test_optional_suffixes_follow_what_pillow_can_open(monkeypatch):
    Image.init()
    assert (".avif" in image_suffixes()) == (Image.registered_extensions().get(".avif") in Image.OPEN)
    assert (".avif" in image_suffixes()) == bool(features.check("avif"))
    registered = dict(Image.registered_extensions())
    registered[".heic"] = "PNG"  # what a plugin such as pillow-heif does when it registers its reader
    monkeypatch.setattr(Image, "registered_extensions", lambda: registered)
    assert image_suffixes()[-1] == ".heic" and set(imagefiles.IMAGE_SUFFIXES) < set(image_suffixes())
    registered[".heic"] = "NOT-A-READER"
    assert ".heic" not in image_suffixes()


@pytest.mark.skipif(not features.check("avif"), reason="this Pillow reads no AVIF")
def test_avif_files_are_read_when_pillow_can(tmp_path):
    _grey(tmp_path / "t" / "train" / "a" / "0.png")
    Image.new("RGB", (16, 16), (120, 120, 120)).save(tmp_path / "t" / "train" / "a" / "1.avif")
    ds = data.open_data(tmp_path / "t", "train", input_shape=(1, 16, 16))
    assert [Path(p).name for p, _ in ds.samples] == ["0.png", "1.avif"]
    assert abs(float(ds[1][0].mean()) - 120 / 255) < 4 / 255


def test_a_file_named_as_an_image_never_reaches_a_reader_that_runs_another_program(tmp_path, monkeypatch):
    # Pillow picks its reader from the bytes, not the name; its EPS reader runs Ghostscript. A stand-in `gs` on
    # PATH records any call: it must never be made, and the file is refused in one line.
    marker = tmp_path / "gs-ran"
    fake = tmp_path / "bin" / "gs"
    fake.parent.mkdir()
    fake.write_text(f"#!/bin/sh\necho \"$@\" >> {marker}\n")
    fake.chmod(0o755)
    monkeypatch.setenv("PATH", f"{fake.parent}{os.pathsep}{os.environ['PATH']}")
    eps = tmp_path / "tray" / "train" / "7" / "part.png"
    eps.parent.mkdir(parents=True)
    _grey(tmp_path / "tray" / "train" / "1" / "ok.png")
    eps.write_bytes(b"%!PS-Adobe-3.0 EPSF-3.0\n%%BoundingBox: 0 0 8 8\nnewpath 0 0 moveto 8 8 lineto stroke\n"
                    b"showpage\n%%EOF\n")
    with Image.open(eps) as im:  # what Pillow alone makes of it
        assert im.format == "EPS"
    with pytest.raises(DataError, match=r"^cannot read image .*part.png: it is damaged, or not in a format splice "
                                        r"reads \(.*PNG.*\). Remove or replace the file.$"):
        read_image(eps, (1, 8, 8))
    bad = data.open_data(tmp_path / "tray", "train", input_shape=(1, 8, 8)).bad_headers()
    assert len(bad) == 1 and "not in a format splice reads" in bad[0]
    assert not marker.exists()
    assert "EPS" not in imagefiles.image_formats() and "PNG" in imagefiles.image_formats()


def test_links_are_followed_and_a_broken_one_is_one_line_everywhere(tmp_path):
    root = tmp_path / "tree"
    for k in range(2):
        _grey(root / "train" / "a" / f"{k}.png")
        _grey(tmp_path / "elsewhere" / f"e{k}.png")
    os.symlink(tmp_path / "elsewhere", root / "train" / "a" / "linked")
    found = _rel(list_image_files(root / "train" / "a"), root / "train" / "a")
    assert found == ["0.png", "1.png", "linked/e0.png", "linked/e1.png"]
    os.symlink(tmp_path / "gone.png", root / "train" / "a" / "broken.png")
    message = r"^1 image link\(s\) under .* point to missing files: .*broken\.png -> .*gone\.png\. Remove the links"
    with pytest.raises(DataError, match=message):
        data.open_data(root, "train", input_shape=(1, 6, 6))  # tune, eval, inspect
    with pytest.raises(DataError, match=message):
        image_files(root)  # label-free
    with pytest.raises(DataError, match=message):
        read_images(root / "train", (1, 6, 6), None)  # verify --images
    os.symlink(tmp_path / "gone.txt", root / "train" / "a" / "broken.txt")  # not an image name: not looked at
    (root / "train" / "a" / "broken.png").unlink()
    assert len(data.open_data(root, "train", input_shape=(1, 6, 6))) == 4



def test_a_broken_link_where_a_class_or_split_folder_would_be_is_refused_naming_it(tmp_path):
    from torchvision.datasets import ImageFolder

    root = _tree(tmp_path / "t", {"train": ("a", "b"), "val": ("a", "b")})
    os.symlink(tmp_path / "gone", root / "train" / "c")
    # torchvision's ImageFolder drops such a class without a word (its find_classes keeps entry.is_dir()); splice
    # would have numbered the classes without it too: it names the link instead
    assert ImageFolder(str(root / "train")).classes == ["a", "b"]
    message = r"^1 link\(s\) in .*train point to nothing, where splice reads split and class folders: .*train/c -> "
    for split in ("train", "val"):
        with pytest.raises(DataError, match=message + r".*gone\. Remove the links or restore what they point to\."):
            data.open_data(root, split, input_shape=(1, 6, 6))
    (root / "train" / "c").unlink()
    os.symlink(tmp_path / "gone", root / "test")
    with pytest.raises(DataError, match=r"^1 link\(s\) in .*t point to nothing.*t/test -> .*gone"):
        data.open_data(root, "val", input_shape=(1, 6, 6))

def test_a_link_back_up_the_tree_is_refused(tmp_path):
    _grey(tmp_path / "site" / "a" / "0.png")
    os.symlink(tmp_path / "site", tmp_path / "site" / "a" / "loop")
    with pytest.raises(DataError, match=r"loop leads back to .*site, a folder that contains it \(through a symbolic link\)"):
        list_image_files(tmp_path / "site")


# ---------------------------------------------------------------------------
# the pixel cap (finding 4)
# ---------------------------------------------------------------------------


def _bmp_header(path: Path, width: int, height: int) -> Path:
    """A BMP whose header claims ``width x height``: Pillow checks the size when it opens the header."""
    Image.fromarray(np.zeros((4, 4), np.uint8)).save(path)
    raw = bytearray(path.read_bytes())
    raw[18:26] = struct.pack("<ii", width, height)
    path.write_bytes(bytes(raw))
    return path


def test_splice_cap_is_the_only_cap_above_pillows_hard_limit(tmp_path):
    big = _bmp_header(tmp_path / "big.bmp", 20_000, 10_000)  # 200 Mpx, over 2 x Image.MAX_IMAGE_PIXELS
    assert 20_000 * 10_000 > 2 * Image.MAX_IMAGE_PIXELS
    before = Image.MAX_IMAGE_PIXELS
    # under the default cap Pillow's process-wide limit is left alone, and its refusal becomes splice's message
    with pytest.raises(DataError, match=r"big\.bmp is over 178,956,970 pixels, over the cap of "
                                        r"89,478,485; .*--max-image-pixels N"):
        read_image(big, (1, 8, 8))
    with image_pixel_cap(300_000_000), open_capped(big) as im:
        assert im.size == (20_000, 10_000)  # Pillow no longer refuses it first
        assert Image.MAX_IMAGE_PIXELS is None
    assert Image.MAX_IMAGE_PIXELS == before  # put back, also after the refusal above


def test_pillows_limit_is_lifted_for_a_whole_read_and_restored(tmp_path, monkeypatch):
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 100)  # Pillow alone would refuse 40x40 = 1600 > 2 x 100
    Image.new("L", (40, 40), 51).save(tmp_path / "grey.png")
    with image_pixel_cap(2000):
        got = read_image(tmp_path / "grey.png", (1, 5, 5))
    torch.testing.assert_close(got, torch.full((1, 5, 5), 51 / 255))
    assert Image.MAX_IMAGE_PIXELS == 100
    with image_pixel_cap(1000), pytest.raises(DataError, match=r"is 40x40 \(1,600 pixels\), over the cap of 1,000"):
        read_image(tmp_path / "grey.png", (1, 5, 5))
    assert Image.MAX_IMAGE_PIXELS == 100


# ---------------------------------------------------------------------------
# splits and class names (findings 5 and 6)
# ---------------------------------------------------------------------------


def _tree(root: Path, layout: dict[str, tuple[str, ...]]) -> Path:
    for split, classes in layout.items():
        (root / split).mkdir(parents=True, exist_ok=True)
        for k, name in enumerate(classes):
            _grey(root / split / name / "0.png", value=40 * (k + 1))
    return root


def test_only_train_and_the_opened_split_are_compared(tmp_path):
    root = _tree(tmp_path / "t", {"train": ("a", "b"), "val": ("a", "b"), "test": ("a",)})
    assert data.open_data(root, "train", input_shape=(1, 6, 6)).classes == ["a", "b"]
    assert len(data.open_data(root, "val", input_shape=(1, 6, 6))) == 2  # what tune reads
    with pytest.warns(DataWarning, match=r"^test has no images of b \(in .*test\); the other classes keep"):
        assert data.open_data(root, "test", input_shape=(1, 6, 6)).labels.tolist() == [0]
    placeholder = _tree(tmp_path / "p", {"train": ("a", "b"), "val": ("a", "b"), "test": ()})
    assert data.open_data(placeholder, "val", input_shape=(1, 6, 6)).labels.tolist() == [0, 1]
    with pytest.raises(DataError, match=r"test has no class folders"):
        data.open_data(placeholder, "test", input_shape=(1, 6, 6))


def test_class_names_are_compared_after_nfc(tmp_path):
    nfc, nfd = unicodedata.normalize("NFC", "café"), unicodedata.normalize("NFD", "café")
    assert nfc != nfd
    root = _tree(tmp_path / "t", {"train": (nfc, "b"), "val": (nfd, "b")})
    train = data.open_data(root, "train", input_shape=(1, 6, 6))
    val = data.open_data(root, "val", input_shape=(1, 6, 6))
    assert train.classes == val.classes == ["b", nfc]  # NFC, whichever way the disk spells them
    assert [(Path(p).parent.name, label) for p, label in val.samples] == [("b", 0), (nfd, 1)]
    _grey(root / "train" / nfd / "1.png")
    with pytest.raises(DataError, match=rf"holds two class folders whose names differ only in Unicode normalisation: "
                                        rf"'{nfd}' \(NFD\) and '{nfc}' \(NFC\).*merge them into one folder"):
        data.open_data(root, "train", input_shape=(1, 6, 6))


def test_classes_are_numbered_as_torchvision_numbers_the_folders_on_disk(tmp_path):
    from torchvision.datasets import ImageFolder

    # sorted as NFD, "éa" (e + combining accent) comes before "f"; as NFC after it: each tree keeps its disk order
    names = {form: unicodedata.normalize(form, "éa") for form in ("NFC", "NFD")}
    for form, name in names.items():
        root = _tree(tmp_path / form, {"train": (name, "f"), "val": (names["NFC"], "f")})
        train = data.open_data(root, "train", input_shape=(1, 6, 6))
        val = data.open_data(root, "val", input_shape=(1, 6, 6))  # spelled NFC: matched to train's NFD by NFC
        # torchvision's ImageFolder class_to_idx (sorted folder names as stored) is the reference for the labels
        reference = ImageFolder(str(root / "train")).class_to_idx
        expected = {unicodedata.normalize("NFC", k): v for k, v in reference.items()}
        assert {c: i for i, c in enumerate(train.classes)} == expected
        assert val.classes == train.classes and all(c == unicodedata.normalize("NFC", c) for c in train.classes)
        labels = sorted((Path(p).parent.name == "f", label) for p, label in val.samples)
        assert labels == [(False, expected[names["NFC"]]), (True, expected["f"])]
    assert data.open_data(tmp_path / "NFD", "train", input_shape=(1, 6, 6)).classes == [names["NFC"], "f"]
    assert data.open_data(tmp_path / "NFC", "train", input_shape=(1, 6, 6)).classes == ["f", names["NFC"]]
    # a model whose record spells its classes the other way still matches, in the same order only
    assert data.same_classes([names["NFD"], "f"], [names["NFC"], "f"])
    assert not data.same_classes(["f", names["NFD"]], [names["NFC"], "f"])


def test_without_train_the_opened_split_gives_the_classes(tmp_path):
    root = _tree(tmp_path / "t", {"test": ("x", "y", "z")})
    ds = data.open_data(root, "test", input_shape=(1, 6, 6))
    assert ds.classes == ["x", "y", "z"] and ds.labels.tolist() == [0, 1, 2]
    torch.testing.assert_close(ds[2][0], torch.full((1, 6, 6), 120 / 255))
    with pytest.raises(DataError, match=r"has no 'val' folder \(found: test\)"):
        data.open_data(root, "val", input_shape=(1, 6, 6))
    with pytest.raises(DataError, match=r"has no 'train' folder \(found: test\)"):
        data.open_data(root, "train", input_shape=(1, 6, 6))


def test_a_folder_of_class_folders_is_one_evaluation_split(tmp_path):
    flat = _tree(tmp_path, {"flat": ("u", "v")}) / "flat"
    for split in ("test", "val"):
        ds = data.open_data(flat, split, input_shape=(1, 6, 6))
        assert ds.classes == ["u", "v"] and len(ds) == 2 and ds.folder == flat
    (flat / "v" / "0.png").write_bytes(b"not a png")
    with pytest.raises(DataError, match=rf"1 of 2 images in {flat} cannot be read"):
        data.open_data(flat, "test", input_shape=(1, 6, 6)).check()
    with pytest.raises(DataError, match=r"has no 'train' folder \(found: u, v\); .*read only as a val or test split"):
        data.open_data(flat, "train", input_shape=(1, 6, 6))


def test_two_threads_share_the_lifted_limit_and_it_comes_back_once(tmp_path, monkeypatch):
    # B enters while A holds the lift; A leaves before B's Image.open. B must still read (the limit stays lifted
    # for it), and Pillow's limit must come back when both have left
    import threading

    big = _bmp_header(tmp_path / "big.bmp", 20_000, 10_000)
    before = Image.MAX_IMAGE_PIXELS
    a_inside, b_entered, a_left = threading.Event(), threading.Event(), threading.Event()
    real_open = Image.open

    def slow_open(path, *args, **kwargs):
        if threading.current_thread().name == "B":
            b_entered.set()
            a_left.wait(10)
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(Image, "open", slow_open)
    seen = {}

    def a():
        with image_pixel_cap(300_000_000), open_capped(big):
            a_inside.set()
            b_entered.wait(10)
        a_left.set()

    def b():
        a_inside.wait(10)
        try:
            with image_pixel_cap(300_000_000), open_capped(big) as im:
                seen["size"] = im.size
        except Exception as exc:  # what the thread met, for the assertion below
            seen["error"] = exc

    threads = [threading.Thread(target=a, name="A"), threading.Thread(target=b, name="B")]
    for t in threads:
        t.start()
    for t in threads:
        t.join(20)
    assert seen == {"size": (20_000, 10_000)}
    assert Image.MAX_IMAGE_PIXELS == before


def test_a_split_carries_the_pixel_cap_it_was_opened_under(tmp_path):
    # a spawned DataLoader worker gets the dataset pickled, not the caller's context where the cap was set
    import pickle

    root = tmp_path / "t"
    for split in ("train", "val"):
        Image.new("L", (40, 40), 51).save(_made(root / split / "a") / "0.png")
    with image_pixel_cap(1000):
        ds = data.open_data(root, "train", input_shape=(1, 5, 5))
    far = pickle.loads(pickle.dumps(ds))  # what a spawned worker holds, outside the block
    with pytest.raises(DataError, match=r"is 40x40 \(1,600 pixels\), over the cap of 1,000"):
        far[0]
    assert ds.bad_headers() and "over the cap of 1,000" in ds.bad_headers()[0]


def _made(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def test_verify_images_too_many_to_hold_are_refused_before_reading(tmp_path, monkeypatch):
    from splice.errors import ResourceError

    for k in range(3):
        Image.new("L", (8, 8), 40 * k).save(_made(tmp_path / "many" / f"part{k}") / f"{k}.png")
    monkeypatch.setattr("splice.limits.available_bytes", lambda: 2 * 4 * 3 * 10 * 10 - 1)  # one byte short
    with pytest.raises(ResourceError, match=r"reading 3 images of 1x10x10 for --images.*point --images at fewer"):
        read_images(tmp_path / "many", (1, 10, 10), None)
    monkeypatch.setattr("splice.limits.available_bytes", lambda: 2 * 4 * 3 * 10 * 10)
    assert read_images(tmp_path / "many", (1, 10, 10), None)[0].shape == (3, 1, 10, 10)


def test_split_folders_are_found_whatever_their_case(tmp_path):
    from torchvision.datasets import ImageFolder

    root = _tree(tmp_path / "t", {"Train": ("a", "b"), "TEST": ("a", "b"), "Val": ("a", "b")})
    _grey(root / "TEST" / "b" / "1.png")
    test = data.open_data(root, "test", input_shape=(1, 6, 6))
    # torchvision's ImageFolder over the split folder itself is the reference: its classes, labels and files
    tv = ImageFolder(str(root / "TEST"))
    assert test.classes == tv.classes == ["a", "b"] and test.folder == root / "TEST"
    assert [(str(p), label) for p, label in test.samples] == tv.samples
    assert data.open_data(root, "train", input_shape=(1, 6, 6)).folder == root / "Train"
    assert len(data.open_data(root, "val", input_shape=(1, 6, 6))) == 2
    assert _rel(image_files(root), root) == ["Train/a/0.png", "Train/b/0.png"]  # label-free reads Train/ only
    _grey(root / "test" / "a" / "0.png")
    with pytest.raises(DataError, match=r"holds two folders for the 'test' split, 'TEST' and 'test', whose names "
                                        r"differ only in case; merge them into one folder\."):
        data.open_data(root, "test", input_shape=(1, 6, 6))


def test_a_class_named_like_a_split_in_another_case_stays_a_class(tmp_path):
    from torchvision.datasets import ImageFolder

    # a flat folder of classes, one of them named Train: torchvision's ImageFolder over the folder is the reference
    flat = tmp_path / "flat"
    for k, name in enumerate(("Bus", "Car", "Train")):
        _grey(flat / name / "0.png", value=40 * (k + 1))
    tv = ImageFolder(str(flat))
    test = data.open_data(flat, "test", input_shape=(1, 6, 6))
    assert test.classes == tv.classes == ["Bus", "Car", "Train"] and test.folder == flat
    assert [(str(p), label) for p, label in test.samples] == tv.samples
    assert _rel(image_files(flat), flat) == ["Bus/0.png", "Car/0.png", "Train/0.png"]  # label-free reads them all
    # when every folder names a split in some case, they are splits (DIR/TRAIN + DIR/VAL)
    splits = _tree(tmp_path / "s", {"TRAIN": ("a", "b"), "VAL": ("a", "b")})
    val = data.open_data(splits, "val", input_shape=(1, 6, 6))
    assert val.folder == splits / "VAL" and val.classes == ImageFolder(str(splits / "VAL")).classes == ["a", "b"]
    # an exact lowercase split folder is a split beside anything, and Train beside it is then no split
    _tree(flat, {"train": ("Bus",)})
    assert data.open_data(flat, "train", input_shape=(1, 6, 6)).folder == flat / "train"
    # two splits named in another case are splits whatever is beside them (a Validation/ splice does not read)
    named = _tree(tmp_path / "v", {"Train": ("cat", "dog"), "Test": ("cat", "dog"), "Validation": ("cat", "dog")})
    test = data.open_data(named, "test", input_shape=(1, 6, 6))
    assert test.folder == named / "Test" and test.classes == ImageFolder(str(named / "Test")).classes
    assert data.open_data(named, "train", input_shape=(1, 6, 6)).folder == named / "Train"


def test_a_split_other_than_train_may_lack_a_class_and_keeps_trains_labels(tmp_path):
    from torchvision.datasets import ImageFolder

    root = _tree(tmp_path / "t", {"train": ("c0", "c1", "c2"), "val": ("c0", "c1", "c2"), "test": ("c0", "c2")})
    (root / "val" / "c1" / "0.png").unlink()  # val/c1 is an empty folder, test/ has no c1 at all
    for split in ("val", "test"):
        with pytest.warns(DataWarning, match=rf"^{split} has no images of c1 \(in .*{split}\); the other classes"):
            ds = data.open_data(root, split, input_shape=(1, 6, 6))
        # torchvision's ImageFolder(allow_empty=True) over val/ (all three class folders, c1 empty) is the reference
        reference = ImageFolder(str(root / "val"), allow_empty=True)
        assert ds.classes == reference.classes == ["c0", "c1", "c2"]
        assert ds.labels.tolist() == [label for _, label in reference.samples] == [0, 2]
    (root / "train" / "c1" / "0.png").unlink()
    with pytest.raises(DataError, match=r"train: 1 class folder\(s\) hold no images: c1"):  # train must have all
        data.open_data(root, "train", input_shape=(1, 6, 6))
    for f in (root / "val").rglob("*.png"):
        f.unlink()
    with pytest.raises(DataError, match=r"val: 3 class folder\(s\) hold no images: c0, c1, c2"):
        data.open_data(root, "val", input_shape=(1, 6, 6))
