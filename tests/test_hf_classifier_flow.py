"""A Hugging Face classifier (its forward returns a ModelOutput, not a tensor) through the whole job: tune
(warp-only, baseline with its head reset, label-free), eval and inspect read its logits."""

from __future__ import annotations

import collections
import json
import warnings

import pytest
import torch

import splice
from splice.compare import class_logits
from splice.data import DIGITS_SHAPE
from splice.recipes import Recipe, load_recipe
from splice.training import RecipeOverrides, RunOptions

transformers = pytest.importorskip("transformers")

QUIET = RunOptions(progress=False)


def test_class_logits_finds_a_classifier_s_logits_in_the_usual_outputs():
    x = torch.randn(2, 3)
    aux = torch.randn(2, 3)
    inception = collections.namedtuple("InceptionOutputs", "logits aux_logits")  # torchvision's, by its fields
    assert class_logits(x) is x
    assert class_logits(transformers.modeling_outputs.ImageClassifierOutput(logits=x)) is x
    assert class_logits(inception(x, aux)) is x
    assert class_logits({"logits": x, "aux": aux}) is x
    assert class_logits({"out": x, "aux": aux}) is x  # the first tensor of a dict, tuple or list
    assert class_logits((x, aux)) is x and class_logits([x]) is x
    assert class_logits("no tensor") == "no tensor"  # handed back: the caller says what it needed


@pytest.fixture(scope="module")
def hf_digits(tmp_path_factory):
    """A tiny grey ResNet for the embedded digits, saved as save_pretrained writes it, and its affine splice."""
    root = tmp_path_factory.mktemp("hf")
    torch.manual_seed(0)
    config = transformers.ResNetConfig(num_channels=1, num_labels=10, embedding_size=8, hidden_sizes=[8, 16],
                                       depths=[1, 1])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        transformers.ResNetForImageClassification(config).eval().save_pretrained(root / "base")
        spliced = splice.save(splice.insert(str(root / "base"), at="input", input_shape=DIGITS_SHAPE),
                              root / "affine")
    return root / "base", spliced


@pytest.mark.parametrize("recipe", ["warp-only", "baseline"])
def test_tune_reads_the_logits_of_a_model_output(tmp_path, hf_digits, recipe):
    base, spliced = hf_digits
    model = str(spliced if recipe == "warp-only" else base)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        summary = splice.tune(model, recipe=recipe, data="digits", out=tmp_path / "run",
                              overrides=RecipeOverrides(epochs=1), model_options=splice.ModelOptions(
                                  input_shape=DIGITS_SHAPE) if recipe == "baseline" else None,
                              run_options=RunOptions(progress=False, stop_after_steps=3))
    assert summary["steps"] == 3 and summary["interrupted"]
    rows = [json.loads(line) for line in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    assert 0.0 <= rows[0]["accuracy"] <= 1.0 and rows[0]["val_loss"] > 0
    if recipe == "baseline":  # the head is found through the ModelOutput: the classifier's Linear
        assert rows[0]["head_reset"] in ("classifier.1", None)


def test_eval_and_inspect_read_the_logits_of_a_model_output(tmp_path, hf_digits):
    _, spliced = hf_digits
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = splice.evaluate(str(spliced), data="digits", distort="rotate=0,30")
        report = splice.inspect(str(spliced), data="digits", n=360, out=tmp_path / "insp", pictures=False)
    clean = result["clean"]["accuracy"]
    assert 0.0 <= clean <= 1.0 and report["accuracy"] == pytest.approx(clean, abs=1e-9)  # two paths, one model


def test_label_free_reads_the_logits_of_a_model_output(tmp_path, hf_digits):
    _, spliced = hf_digits
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        d = load_recipe("label-free").to_dict()  # made small: one epoch of probe and of pre-training
        d["pretrain"].update(epochs=1)
        d["site"].update(probe_epochs=1, probe_width=4)
        summary = splice.tune(str(spliced), recipe=Recipe.from_dict(d), site="digits-moved", out=tmp_path / "lf",
                              overrides=RecipeOverrides(reference="digits"),
                              run_options=RunOptions(progress=False, stop_after_steps=2))
    assert summary["interrupted"] and summary["steps"] == 2
    rows = [json.loads(line) for line in (tmp_path / "lf" / "metrics.jsonl").read_text().splitlines()]
    assert 0.0 < rows[0]["site"]["confidence"] <= 1.0
