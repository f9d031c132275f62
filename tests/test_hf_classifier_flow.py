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
    assert class_logits({"out": x}) is x and class_logits((x,)) is x and class_logits([x]) is x  # the one tensor
    # several tensors and no logits (an embedding beside the scores, a map beside an auxiliary one): no guess
    assert class_logits({"out": x, "aux": aux}) is None and class_logits((x, aux)) is None
    assert class_logits("no tensor") is None


def test_an_output_without_logits_is_refused_in_one_line_naming_what_it_holds(tmp_path):
    from splice.errors import DataError

    class Embeds(torch.nn.Module):  # (embedding, scores): which one is the classifier's is not for splice to guess
        def __init__(self):
            super().__init__()
            self.conv = torch.nn.Conv2d(1, 4, 3, padding=1)
            self.embed, self.fc = torch.nn.Linear(4, 16), torch.nn.Linear(16, 10)

        def forward(self, x):
            e = self.embed(self.conv(x).mean((2, 3)))
            return e, self.fc(e)

    spliced = splice.insert(Embeds().eval(), at="input", input_shape=DIGITS_SHAPE)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(DataError, match=r"the model returns out\[0\] \(2, 16\), out\[1\] \(2, 10\); this needs "
                                            r"\(N, classes\) logits: return them alone, or as the output's \.logits"):
            splice.tune(spliced, recipe="warp-only", data="digits", out=tmp_path / "run", run_options=QUIET)
        with pytest.raises(DataError, match=r"returns out\[0\] \(\d+, 16\), out\[1\] \(\d+, 10\)"):
            splice.evaluate(spliced, data="digits")
        report = splice.inspect(spliced, data="digits", n=4, out=tmp_path / "insp", pictures=False)
    assert report["accuracy"] is None and "no (N, classes) logits" in report["accuracy_note"]


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
        from splice.training.head import final_layer

        net = splice.load_source(str(base), input_shape=[DIGITS_SHAPE], warn_random=False).model
        assert final_layer(net, torch.zeros(1, *DIGITS_SHAPE)) == "classifier.1"


def test_eval_and_inspect_read_the_logits_of_a_model_output(tmp_path, hf_digits):
    _, spliced = hf_digits
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = splice.evaluate(str(spliced), data="digits", distort="rotate=0,30")
        report = splice.inspect(str(spliced), data="digits", n=360, out=tmp_path / "insp", pictures=False)
    clean = result["clean"]["accuracy"]
    assert report["accuracy"] == pytest.approx(clean, abs=1e-9)  # two paths, one model
    # and by hand: the folder's model, its recorded normalisation, the logits of the ModelOutput
    from splice.data import normalise, open_data

    test = open_data("digits", "test")
    model = splice.load(spliced).eval()
    with torch.no_grad():
        logits = model(normalise(test.images, model.splice_info.normalisation)).logits
    assert clean == pytest.approx(float((logits.argmax(1) == test.labels).double().mean()), abs=1e-9)


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
