"""Hugging Face save_pretrained folders: how their images are prepared, and what their weights' errors say."""

from __future__ import annotations

import pytest
import torch

from splice.errors import NormalisationWarning, SpliceWarning, UnsafeCheckpointError, WeightsError
from splice.sources import load_source

pytest.importorskip("transformers")


def _resnet(num_labels: int = 3):
    from transformers import ResNetConfig, ResNetForImageClassification

    torch.manual_seed(0)
    config = ResNetConfig(embedding_size=8, hidden_sizes=[8, 16], depths=[1, 1], layer_type="basic",
                          num_labels=num_labels)
    return ResNetForImageClassification(config).eval()


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    path = tmp_path_factory.mktemp("hf") / "resnet"
    _resnet().save_pretrained(path)
    return path


@pytest.mark.parametrize("settings", [
    {},
    {"do_normalize": False},
    {"do_rescale": False},
    {"do_rescale": False, "do_normalize": False},
    {"rescale_factor": 1 / 127.5, "image_mean": [1.0, 1.0, 1.0], "image_std": [1.0, 1.0, 1.0]},
    {"image_mean": 0.5, "image_std": 0.25},  # one number for every channel, saved as such
    {"image_mean": 1, "image_std": [0.2, 0.25, 0.3]},
])
def test_a_folders_images_are_prepared_as_its_image_processor_prepares_them(folder, settings):
    # reference: transformers' own ViTImageProcessor, on the same 32x32 image (already its size, so not resized)
    import numpy as np
    from transformers import ViTImageProcessor

    from splice.data import normalise

    options = {"image_mean": [0.485, 0.456, 0.406], "image_std": [0.229, 0.224, 0.225], **settings}
    processor = ViTImageProcessor(size={"height": 32, "width": 32}, **options)
    processor.save_pretrained(folder)
    image = np.random.default_rng(0).integers(0, 256, (32, 32, 3), dtype=np.uint8)
    reference = processor(images=image, return_tensors="pt")["pixel_values"][0]
    import json

    assert json.loads((folder / "preprocessor_config.json").read_text())["image_std"] == options["image_std"]
    src = load_source(str(folder))
    fed = normalise(torch.from_numpy(image).permute(2, 0, 1).float() / 255, src.normalisation)
    assert src.declares_normalisation and src.input_shape == (3, 32, 32)
    assert torch.allclose(fed, reference.float(), rtol=1e-5, atol=1e-4), float((fed - reference).abs().max())
    if settings == {"do_normalize": False}:
        assert src.normalisation is None


def test_a_folder_without_an_image_processor_is_flagged(tmp_path):
    _resnet().save_pretrained(tmp_path / "bare")
    with pytest.warns(NormalisationWarning, match=r"no preprocessor_config.json .* \[0, 1\] pixels without "
                                                  r"normalisation; .*processor.save_pretrained"):
        src = load_source(str(tmp_path / "bare"), input_shape="3x32x32")
    assert src.normalisation is None and not src.declares_normalisation


def test_a_folder_whose_head_has_another_size_names_the_tensors_and_num_labels(tmp_path):
    # reference: the shapes safetensors' own load_file reads from the file, and the model's
    from safetensors.torch import load_file, save_file

    _resnet(3).save_pretrained(tmp_path / "head")
    path = tmp_path / "head" / "model.safetensors"
    five = {k: v.contiguous() for k, v in _resnet(5).state_dict().items()}
    save_file(five, str(path), metadata={"format": "pt"})
    assert tuple(load_file(str(path))["classifier.1.weight"].shape) == (5, 16)
    with pytest.raises(WeightsError, match=r"2 tensor\(s\) of another shape than ResNetForImageClassification's "
                                           r"\(classifier.1.bias \(5,\) vs \(3,\); classifier.1.weight \(5, 16\) vs "
                                           r"\(3, 16\)\); if it was trained for 5 labels, set num_labels .* to 5 in "
                                           r".*config.json'; pass --allow-partial"):
        load_source(str(tmp_path / "head"), input_shape="3x32x32")
    with pytest.warns(SpliceWarning, match=r"partial load"):
        src = load_source(str(tmp_path / "head"), input_shape="3x32x32", allow_partial=True)
    state = src.model.state_dict()
    assert tuple(state["classifier.1.weight"].shape) == (3, 16)
    assert all(torch.equal(state[k], v) for k, v in five.items() if not k.startswith("classifier.1."))


def test_an_unsafe_pickle_in_a_folder_is_refused_as_any_unsafe_checkpoint(tmp_path, capsys):
    from splice.cli import main

    marker = tmp_path / "pwned"

    class Payload:
        def __reduce__(self):
            return (open, (str(marker), "w"))

    _resnet().save_pretrained(tmp_path / "bin")
    (tmp_path / "bin" / "model.safetensors").unlink()
    torch.save({**_resnet().state_dict(), "x": Payload()}, tmp_path / "bin" / "pytorch_model.bin")
    with pytest.raises(UnsafeCheckpointError, match=r"contains pickled Python objects \(.*open\), not just tensors; "
                                                    r"unpickling can run arbitrary code.*--trust-pickle"):
        load_source(str(tmp_path / "bin"), input_shape="3x32x32")
    assert main(["points", str(tmp_path / "bin"), "--input-shape", "3x32x32"]) == 2
    err = capsys.readouterr().err
    assert "--trust-pickle" in err and "--allow-partial" not in err and "\x1b" not in err
    assert not marker.exists()


def test_transformers_errors_reach_the_user_without_terminal_codes(folder, monkeypatch):
    from transformers import ResNetForImageClassification

    def fails(*args, **kwargs):
        raise RuntimeError("\x1b[1mthe file is odd\x1b[0m. see above")

    monkeypatch.setattr(ResNetForImageClassification, "from_pretrained", fails)
    with pytest.raises(WeightsError) as caught:
        load_source(str(folder), input_shape="3x32x32")
    assert "(RuntimeError: the file is odd. see above); re-save the model with save_pretrained" in str(caught.value)
    assert "\x1b" not in str(caught.value) and "--allow-partial" not in str(caught.value)


@pytest.mark.parametrize("settings", [
    {},  # include_top: the processor divides by the std a second time
    {"include_top": False},
    {"rescale_factor": 1 / 127.5, "rescale_offset": True},  # [-1, 1] pixels
    {"rescale_offset": True, "do_normalize": False},
    {"image_mean": 0.5, "image_std": 0.25},  # scalars, divided by twice with include_top
])
def test_an_efficientnet_folder_is_prepared_as_its_image_processor_prepares_it(folder, settings):
    # reference: transformers' own EfficientNetImageProcessor (include_top and rescale_offset are its own steps)
    import numpy as np
    from transformers import EfficientNetImageProcessor

    from splice.data import normalise

    processor = EfficientNetImageProcessor(size={"height": 32, "width": 32}, do_center_crop=False, **settings)
    processor.save_pretrained(folder)
    image = np.random.default_rng(1).integers(0, 256, (32, 32, 3), dtype=np.uint8)
    reference = processor(images=image, return_tensors="pt")["pixel_values"][0]
    src = load_source(str(folder))
    fed = normalise(torch.from_numpy(image).permute(2, 0, 1).float() / 255, src.normalisation)
    assert torch.allclose(fed, reference.float(), rtol=1e-5, atol=1e-4), float((fed - reference).abs().max())


def test_a_processor_that_flips_channels_is_flagged(folder):
    from transformers import MobileViTImageProcessor

    MobileViTImageProcessor(size={"shortest_edge": 32}, crop_size={"height": 32, "width": 32}).save_pretrained(folder)
    with pytest.warns(NormalisationWarning, match="BGR"):
        load_source(str(folder))


@pytest.mark.parametrize("image_size", [None, 40])
@pytest.mark.parametrize("kind", ["shortest_edge", "crop_size", "height_width"])
def test_a_folders_input_size_is_what_its_image_processor_makes(tmp_path, kind, image_size):
    # reference: the processor itself (AutoImageProcessor from the folder), on a 50x70 image, whatever
    # config.image_size says
    import numpy as np
    from transformers import (AutoImageProcessor, ConvNextImageProcessor, ResNetConfig, ResNetForImageClassification,
                              ViTImageProcessor)

    extra = {} if image_size is None else {"image_size": image_size}
    ResNetForImageClassification(ResNetConfig(embedding_size=8, hidden_sizes=[8, 8], depths=[1, 1], num_labels=3,
                                              **extra)).save_pretrained(tmp_path)
    processor = {"shortest_edge": ConvNextImageProcessor(size={"shortest_edge": 48}, crop_pct=0.875),
                 "crop_size": ViTImageProcessor(size={"height": 72, "width": 72}, do_center_crop=True,
                                                crop_size={"height": 64, "width": 56}),
                 "height_width": ViTImageProcessor(size={"height": 36, "width": 44})}[kind]
    processor.save_pretrained(tmp_path)
    made = AutoImageProcessor.from_pretrained(tmp_path)(images=np.zeros((50, 70, 3), np.uint8),
                                                         return_tensors="pt")["pixel_values"]
    assert load_source(str(tmp_path)).input_shape == tuple(made.shape[1:])


def test_a_configs_id2label_gives_the_class_order_that_data_must_follow(tmp_path):
    import warnings

    from PIL import Image

    import splice
    from splice.errors import DataError

    # transformers' own placeholders (LABEL_0, ...) name nothing
    model = _resnet(4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model.save_pretrained(tmp_path / "plain")
        assert load_source(tmp_path / "plain", input_shape=(3, 16, 16)).class_names is None
        # the outputs' order, as transformers' pipeline labels them, not sorted by name
        labels = ["scratch", "dent", "ok", "burr"]
        model.config.id2label = dict(enumerate(labels))
        model.config.label2id = {n: i for i, n in enumerate(labels)}
        model.save_pretrained(tmp_path / "named")
        assert load_source(tmp_path / "named", input_shape=(3, 16, 16)).class_names == labels
        spliced = splice.insert(str(tmp_path / "named"), at="input", input_shape=(3, 16, 16))
    assert list(spliced.splice_info.class_names) == labels
    assert model.config.id2label == {0: "scratch", 1: "dent", 2: "ok", 3: "burr"}  # transformers' reading agrees
    # class folders read in sorted order (burr, dent, ok, scratch) would swap outputs 0 and 3: refused, not scored
    for split in ("train", "val", "test"):
        for name in labels:
            (tmp_path / "data" / split / name).mkdir(parents=True)
            Image.new("RGB", (16, 16), (40, 80, 120)).save(tmp_path / "data" / split / name / "a.png")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(DataError, match=r"trained on classes \['scratch', 'dent', 'ok', 'burr'\] but .* has "
                                            r"\['burr', 'dent', 'ok', 'scratch'\]"):
            splice.evaluate(str(tmp_path / "named"), data=str(tmp_path / "data"),
                            model_options=splice.ModelOptions(input_shape=(3, 16, 16)))
