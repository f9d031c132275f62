"""timm sources, grey models' channels and normalisation, and the timm names a Hugging Face config may hold:
built by name with random weights, nothing downloaded."""

from __future__ import annotations

import json
import re
import shutil
import warnings
import sys

import pytest
import torch

import splice
from splice.compare import flatten_outputs
from splice.errors import SourceError, SpliceWarning, WeightsError
from splice.graph import TraceFallbackWarning
from splice.sources import build_model, is_hf_folder, load_source, read_hf_folder

pytest.importorskip("timm")  # both are in the test extra
pytest.importorskip("transformers")



# ----------------------------------------------------------------------------- timm


def test_timm_name_builds_with_its_pretrained_cfg():
    import timm

    src = load_source("timm:resnet18", kwargs={"num_classes": 7})
    assert src.spec == "timm:resnet18" and src.random_init
    cfg = timm.create_model("resnet18", pretrained=False).pretrained_cfg
    assert src.input_shape == tuple(cfg["input_size"])
    assert src.normalisation == {"mean": list(cfg["mean"]), "std": list(cfg["std"])}
    assert src.model(torch.randn(1, 3, 32, 32)).shape == (1, 7)


@pytest.mark.parametrize("chans", [1, 4])
def test_a_timm_model_built_for_other_channels_gets_their_shape_and_normalisation(chans):
    """timm keeps a pretrained_cfg's RGB input size, mean and std when in_chans changes; a grey model with three
    means failed its first batch ("'mean' has 3 values but the images have 1 channel(s)")."""
    import timm

    rgb = timm.create_model("resnet18", pretrained=False).pretrained_cfg
    src = load_source("timm:resnet18", kwargs={"num_classes": 3, "in_chans": chans})
    assert src.input_shape == (chans, *rgb["input_size"][1:])
    if chans == 1:  # the average of the RGB values (a grey image is about the average of its channels)
        assert src.normalisation["mean"] == pytest.approx([sum(rgb["mean"]) / 3])
        assert src.normalisation["std"] == pytest.approx([sum(rgb["std"]) / 3])
    else:  # repeated in turn, as timm's adapt_input_conv repeats the RGB filters
        assert src.normalisation["mean"] == pytest.approx([*rgb["mean"], rgb["mean"][0]])
    from splice.data import normalise

    x = torch.rand(2, chans, 8, 8)
    assert normalise(x, src.normalisation).shape == x.shape


def test_a_grey_hugging_face_folder_with_rgb_preprocessing_gets_one_value_per_channel(tmp_path):
    from transformers import ResNetConfig, ResNetForImageClassification

    config = ResNetConfig(num_channels=1, embedding_size=8, hidden_sizes=[8, 16], depths=[1, 1], num_labels=3)
    folder = tmp_path / "grey"
    ResNetForImageClassification(config).eval().save_pretrained(folder)
    (folder / "preprocessor_config.json").write_text(json.dumps({
        "image_mean": [0.485, 0.456, 0.406], "image_std": [0.229, 0.224, 0.225], "size": {"height": 40, "width": 48}}))
    src = load_source(str(folder))
    assert src.input_shape == (1, 40, 48)
    assert src.normalisation["mean"] == pytest.approx([(0.485 + 0.456 + 0.406) / 3])
    assert src.normalisation["std"] == pytest.approx([(0.229 + 0.224 + 0.225) / 3])


def test_a_folder_given_the_wrong_channels_says_so_in_one_line(tmp_path):
    from transformers import ResNetConfig, ResNetForImageClassification

    config = ResNetConfig(num_channels=1, embedding_size=8, hidden_sizes=[8, 16], depths=[1, 1], num_labels=3)
    folder = tmp_path / "grey"
    ResNetForImageClassification(config).eval().save_pretrained(folder)
    with pytest.raises(SourceError, match=r"--input-shape 3x40x40 gives 3 channel\(s\), but .*config.json' says "
                                          r"the model takes 1 \(num_channels\); pass --input-shape 1x40x40$"):
        load_source(str(folder), input_shape=(3, 40, 40))
    with pytest.raises(SourceError, match=r"pass --input-shape CxHxW .*neither preprocessor_config.json nor the "
                                          r"config gives an image size$"):
        load_source(str(folder))  # no preprocessor and no image_size in a ResNet config: no size to take
    assert load_source(str(folder), input_shape=(1, 40, 40)).input_shape == (1, 40, 40)


def test_image_channels_are_the_backbones_when_a_config_has_one():
    from splice.sources.huggingface import image_channels

    # DETR and DPT run their backbone on the images, whatever their own num_channels says (a grey DETR: 3 and 1)
    assert image_channels({"num_channels": 3, "backbone_config": {"model_type": "resnet", "num_channels": 1}}) == 1
    assert image_channels({"num_channels": 1}) == 1 and image_channels({}) == 3
    assert image_channels({"num_channels": True}) is None and image_channels({"num_channels": 0}) is None


def test_timm_takes_a_local_checkpoint(tmp_path):
    import timm

    torch.manual_seed(1)
    trained = timm.create_model("resnet18", pretrained=False, num_classes=4)
    torch.save(trained.state_dict(), tmp_path / "r18.pth")
    src = load_source("timm:resnet18", kwargs={"num_classes": 4}, weights=tmp_path / "r18.pth")
    x = torch.randn(1, 3, 32, 32)
    assert torch.equal(src.model.eval()(x), trained.eval()(x))


@pytest.mark.parametrize("key", ["pretrained", "checkpoint_path", "pretrained_cfg_overlay"])
def test_timm_never_downloads_or_reads_through_kwargs(key):
    with pytest.raises(SourceError, match=f"--kwargs '{key}' would download or read weights.*--weights FILE"):
        build_model("timm:resnet18", {key: True})


def test_unknown_timm_name_is_one_line():
    with pytest.raises(SourceError, match=r"unknown timm model 'resnet18x'; did you mean .*resnet18") as info:
        build_model("timm:resnet18x")
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("spec, package", [("timm:resnet18", "timm"), ("transformers:ResNetModel", "transformers")])
def test_a_missing_optional_library_says_how_to_install_it(monkeypatch, spec, package):
    monkeypatch.setitem(sys.modules, package, None)  # import fails as if it were not installed
    with pytest.raises(SourceError, match=f"not installed; run: pip install {package}$"):
        build_model(spec, {"config": {"model_type": "resnet"}} if package == "transformers" else {})




@pytest.mark.parametrize("name", ["hf-hub:someone/their-model", "hf_hub:someone/their-model", "local-dir:/elsewhere"])
def test_a_timm_model_named_by_a_source_is_refused_before_timm_is_asked(monkeypatch, name):
    """timm fetches an 'hf-hub:' name from the Hub and reads a 'local-dir:' one from any folder, config included,
    whatever pretrained says; a config.json (or a recorded config) chooses that name."""
    import timm

    from splice.sources import build_model

    def asked(*args, **kwargs):
        raise AssertionError("timm was asked")

    monkeypatch.setattr(timm, "create_model", asked)
    wrapper = transformers_config("TimmWrapperConfig")
    wrapper.update(architecture=name)
    backbone = transformers_config("TimmBackboneConfig")
    backbone.update(backbone=name)
    detr = transformers_config("DetrConfig")
    detr["backbone_config"].update(backbone=name)
    cases = [("TimmWrapperForImageClassification", wrapper, "architecture"),
             ("TimmBackbone", backbone, "backbone"), ("DetrForObjectDetection", detr, "backbone_config.backbone")]
    for cls, config, where in cases:
        with pytest.raises(SourceError, match=rf"names {re.escape(where)} '{name}', a model timm would fetch"):
            build_model(f"transformers:{cls}", kwargs={"config": config})
    wrapper = transformers_config("TimmWrapperConfig")
    wrapper.update(architecture="resnet18", model_args={"checkpoint_path": "/elsewhere/w.pth"})
    with pytest.raises(SourceError, match=r"model_args sets 'checkpoint_path', which makes timm download or read"):
        build_model("transformers:TimmWrapperForImageClassification", kwargs={"config": wrapper})


def transformers_config(name: str) -> dict:
    import transformers

    return getattr(transformers, name)().to_dict()
