"""Hugging Face save_pretrained folders: how their images are prepared, and what their weights' errors say."""

from __future__ import annotations

import pytest
import torch

from splice.errors import NormalisationWarning
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
