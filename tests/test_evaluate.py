"""splice.evaluation: what eval feeds the model (against torchvision), its numbers (against scikit-learn),
the --distort parser, the JSON schema and the class-count check."""

from __future__ import annotations

import json
import math

import pytest
import torch
import torchvision.transforms.v2.functional as TF
import torch.nn.functional as F
from torch import nn
from torchvision.transforms import InterpolationMode

from splice import evaluation as E
from splice.data import open_data
from splice.errors import DataError, SpliceError
from splice.sources import Source

N = 7  # images evaluated: odd, and not a multiple of the batch size, so batching is exercised
BATCH = 3
NORM = {"mean": [0.5], "std": [0.25]}
RECORDED: list[torch.Tensor] = []


class _Recorder(nn.Module):
    """A fixed linear classifier on the flattened image that also records every input it sees."""

    input_shape = (1, 48, 48)

    def __init__(self, classes: int = 10) -> None:
        super().__init__()
        gen = torch.Generator().manual_seed(3)
        self.fc = nn.Linear(48 * 48, classes)
        with torch.no_grad():
            self.fc.weight.copy_(torch.randn(classes, 48 * 48, generator=gen) * 0.05)
            self.fc.bias.zero_()

    def forward(self, x):
        RECORDED.append(x.detach().clone())
        return self.fc(x.flatten(1))


def _recorder_source():
    """A recorder as a resolved Source carrying a normalisation, as a folder's manifest would."""
    return Source(model=_Recorder(), spec="<recorder>", input_shape=(1, 48, 48), normalisation=NORM)


DISTORT = "rotate=30;scale=0.8;shift=0.2;perspective=0.3"


def _clean_images() -> tuple[torch.Tensor, torch.Tensor]:
    ds = open_data("digits", "test")
    return ds.images[:N], ds.labels[:N]


def _torchvision_versions(images: torch.Tensor) -> dict[tuple[str, float], torch.Tensor]:
    """Each sweep level of DISTORT rendered with torchvision's functional ops, image by image."""
    from splice.distort import random_perspective_points

    bil = InterpolationMode.BILINEAR
    h, w = images.shape[-2:]
    out = {}
    # source: torchvision.transforms.v2.functional.affine, angle +30 for even and -30 for odd images
    out[("rotate", 30.0)] = torch.stack([
        TF.affine(img, angle=30.0 if i % 2 == 0 else -30.0, translate=[0.0, 0.0], scale=1.0, shear=[0.0, 0.0],
                  interpolation=bil, fill=0.0) for i, img in enumerate(images)])
    # source: torchvision.transforms.v2.functional.affine, scale 0.8 about the centre
    out[("scale", 0.8)] = TF.affine(images, angle=0.0, translate=[0.0, 0.0], scale=0.8, shear=[0.0, 0.0],
                                    interpolation=bil, fill=0.0)
    # source: torchvision.transforms.v2.functional.affine, translate 0.2 of the size: right, down, left, up
    moves = [(0.2 * w, 0.0), (0.0, 0.2 * h), (-0.2 * w, 0.0), (0.0, -0.2 * h)]
    out[("shift", 0.2)] = torch.stack([
        TF.affine(img, angle=0.0, translate=list(moves[i % 4]), scale=1.0, shear=[0.0, 0.0],
                  interpolation=bil, fill=0.0) for i, img in enumerate(images)])
    # source: torchvision.transforms.v2.functional.perspective with the documented corner draw (seed 0)
    start, end = random_perspective_points(h, w, 0.3, torch.Generator().manual_seed(0), n=N)
    out[("perspective", 0.3)] = torch.stack([
        TF.perspective(img, start[i].tolist(), end[i].tolist(), interpolation=bil, fill=0.0)
        for i, img in enumerate(images)])
    return out


@pytest.fixture(scope="module")
def recorded_run():
    RECORDED.clear()
    result = E.evaluate(_recorder_source(), data="digits", split="test", distort=DISTORT,
                        options=E.EvalOptions(batch_size=BATCH, limit=N, device="cpu"))
    # the first call is evaluate's check that the model runs on its input shape at all: two images, before any batch
    assert RECORDED[0].shape == (2, 1, 48, 48)
    batches = list(RECORDED)[1:]
    RECORDED.clear()
    return result, batches


def _fed(batches: list[torch.Tensor]) -> dict:
    """Regroup the recorded batches by condition: per batch, eval runs clean then each level in order."""
    conditions = [("clean", None), ("rotate", 30.0), ("scale", 0.8), ("shift", 0.2), ("perspective", 0.3)]
    assert len(batches) == len(conditions) * math.ceil(N / BATCH)
    grouped = {c: [] for c in conditions}
    for i, x in enumerate(batches):
        grouped[conditions[i % len(conditions)]].append(x)
    return {c: torch.cat(v) for c, v in grouped.items()}


def test_eval_feeds_torchvision_distortions_normalised_afterwards(recorded_run):
    _, batches = recorded_run
    fed = _fed(batches)
    images, _ = _clean_images()
    torch.testing.assert_close(fed[("clean", None)], (images - 0.5) / 0.25, rtol=0, atol=1e-6)
    for cond, ref in _torchvision_versions(images).items():
        seen = fed[cond] * 0.25 + 0.5  # undo the model's normalisation
        # interior pixels as the contract asks (borders agree too: normalising after the
        # distortion is what makes the fill read as 0 in [0, 1] instead of the mean colour)
        torch.testing.assert_close(seen[..., 3:-3, 3:-3], ref[..., 3:-3, 3:-3], rtol=0, atol=1e-4, msg=str(cond))
        torch.testing.assert_close(seen, ref, rtol=0, atol=1e-4, msg=str(cond))


def test_eval_numbers_match_scikit_learn_on_the_same_logits(recorded_run):
    from sklearn.metrics import accuracy_score, log_loss

    result, batches = recorded_run
    fed = _fed(batches)
    _, labels = _clean_images()
    model = _Recorder()
    by_cond = {("clean", None): result["clean"]}
    for kind, entries in result["sweeps"].items():
        for e in entries:
            by_cond[(kind, e["level"])] = e
    with torch.no_grad():
        for cond, x in fed.items():
            probs = torch.softmax(model.fc(x.flatten(1)).double(), dim=1).numpy()
            # source: sklearn.metrics.accuracy_score and log_loss (mean cross-entropy)
            assert by_cond[cond]["accuracy"] == pytest.approx(accuracy_score(labels, probs.argmax(1)), abs=1e-12)
            assert by_cond[cond]["loss"] == pytest.approx(log_loss(labels, probs, labels=list(range(10))), rel=1e-5)
    RECORDED.clear()


def test_result_schema_and_against(recorded_run):
    result, _ = recorded_run
    assert set(result) == {"schema_version", "model", "against_model", "data", "split", "n_images", "classes",
                           "device", "seed", "clean", "sweeps", "against", "plot"}
    assert result["n_images"] == N and result["against"] is None and result["plot"] is None
    assert list(result["sweeps"]) == ["rotate", "scale", "shift", "perspective"]
    for entries in result["sweeps"].values():
        for e in entries:
            assert set(e) == {"level", "accuracy", "loss"} and 0.0 <= e["accuracy"] <= 1.0
    json.dumps(result)  # plain JSON types only


def test_against_sees_the_same_images_and_has_the_same_shape(tmp_path):
    from PIL import Image

    RECORDED.clear()
    first, second = _Recorder(), _Recorder()
    result = E.evaluate_keywords(first, data="digits", against=second, distort="rotate=0,45", limit=4, batch_size=4,
                        device="cpu", plot=tmp_path / "sweep.png")
    # each model's check that it runs on the input shape (two images), then batches alternate model / against per
    # condition: clean, rotate 0, rotate 45
    assert len(RECORDED) == 8 and RECORDED[0].shape == RECORDED[1].shape == (2, 1, 48, 48)
    fed = RECORDED[2:]
    for i in range(0, 6, 2):
        torch.testing.assert_close(fed[i], fed[i + 1], rtol=0, atol=0)
    RECORDED.clear()
    assert set(result["against"]) == {"clean", "sweeps"}
    assert [e["level"] for e in result["against"]["sweeps"]["rotate"]] == [0.0, 45.0]
    assert result["against"]["clean"] == result["clean"]  # identical models, identical numbers
    with Image.open(result["plot"]) as im:
        im.load()
        assert im.size == (380, 70 + 330)  # one 380x330 cell under a 70-pixel header
    from rich.console import Console

    console = Console(record=True, width=200)
    E.render_eval(result, console)
    text = console.export_text()
    assert "Δ accuracy" in text and "rotate" in text and f"{result['clean']['accuracy']:.4f}" in text


def test_class_count_mismatch_is_a_clear_error():
    with pytest.raises(DataError, match=r"outputs 5 classes but digits has 10 \(0, 1, 2.*num_classes\": 10"):
        E.evaluate_keywords(_Recorder(classes=5), data="digits", distort="none", limit=2, device="cpu")


def test_cli_json_prints_the_schema(capsys):
    from splice.cli import main

    code = main(["eval", "splice.models:tray_net", "--kwargs", '{"width": 2}', "--data", "digits", "--split", "val",
                 "--distort", "rotate=30", "--device", "cpu", "--json"])
    assert code == 0
    out = json.loads(capsys.readouterr().out)
    assert set(out["clean"]) == {"accuracy", "loss"} and 0.0 <= out["clean"]["accuracy"] <= 1.0
    assert [e["level"] for e in out["sweeps"]["rotate"]] == [30.0]
    assert out["against"] is None and out["n_images"] == len(open_data("digits", "val"))


def test_cli_seed_redraws_the_perspective_corners_as_the_api_does(capsys):
    from splice.cli import main

    def cli(seed):
        torch.manual_seed(0)  # the same random weights in every call
        assert main(["eval", "splice.models:tray_net", "--kwargs", '{"width": 2}', "--data", "digits", "--split",
                     "val", "--distort", "perspective=0.4", "--device", "cpu", "--json", "--seed", str(seed)]) == 0
        return json.loads(capsys.readouterr().out)

    torch.manual_seed(0)
    api = E.evaluate_keywords("splice.models:tray_net", kwargs={"width": 2}, data="digits", split="val",
                              distort="perspective=0.4", device="cpu", seed=7)
    seven = cli(7)
    assert seven["seed"] == 7 and seven["sweeps"] == api["sweeps"]
    assert cli(0)["sweeps"]["perspective"] != seven["sweeps"]["perspective"]  # other corners, another loss


# ----------------------------------------------------------------------------- the --distort parser


def test_parse_distort_defaults_subsets_and_none():
    assert E.parse_distort(None) == E.DEFAULT_SWEEPS
    assert E.parse_distort(" Rotate = 0, 30 ;shift=0.1; ") == {"rotate": (0.0, 30.0), "shift": (0.1,)}
    assert E.parse_distort("none") == {} and E.parse_distort("") == {}
    assert E.parse_distort({"scale": [0.8, 1.2]}) == {"scale": (0.8, 1.2)}


@pytest.mark.parametrize("spec,message", [
    ("rotat=30", r"unknown distortion 'rotat' in token 'rotat=30'; did you mean 'rotate'\?.*keys rotate, scale, "
                 r"shift, perspective"),
    ("rotate30", r"token 'rotate30' is not KEY=LEVELS in --distort 'rotate30'"),
    ("scale=0.8,big", r"level 'big' of 'scale' is not a number"),
    ("scale=0", r"level '0' of 'scale' is outside \(0, 10\]"),
    ("shift=1.5", r"level '1.5' of 'shift' is outside \[0, 1\] \(shift \(fraction of the image size\)\)"),
    ("rotate=-10", r"level '-10' of 'rotate' is outside \[0, 180\]"),
    ("perspective=nan", r"level 'nan' of 'perspective' is outside \[0, 1\]"),
    ("rotate=10;rotate=20", r"distortion 'rotate' is given twice"),
    ("rotate=", r"level '' of 'rotate' is not a number"),
    (";;", r"no KEY=LEVELS token in --distort ';;'"),
])
def test_parse_distort_errors_name_the_token_and_the_keys(spec, message):
    with pytest.raises(DataError, match=message):
        E.parse_distort(spec)


def test_cli_reports_a_bad_distort_spec(capsys):
    from splice.cli import main

    code = main(["eval", "splice.models:tray_net", "--data", "digits", "--distort", "spin=3", "--device", "cpu"])
    assert code == 2
    assert "unknown distortion 'spin'" in capsys.readouterr().err


def test_evaluate_rejects_an_unknown_device():
    with pytest.raises(SpliceError, match=r"unknown device 'gpu0'; use cpu, cuda"):
        E.evaluate_keywords(_Recorder(), data="digits", distort="none", limit=1, device="gpu0")


def test_options_are_checked_and_the_keyword_path_refuses_unknown_keywords():
    with pytest.raises(DataError, match=r"batch_size must be a positive integer; got 0"):
        E.EvalOptions(batch_size=0)
    with pytest.raises(DataError, match=r"limit must be a positive number of images or None; got -1"):
        E.EvalOptions(limit=-1)
    with pytest.raises(TypeError, match=r"evaluate\(\) got unexpected keyword argument\(s\) batchsize; it takes"):
        E.evaluate_keywords(_Recorder(), data="digits", batchsize=3)


class _SqueezesTheBatch(nn.Module):
    """Pools, squeezes (a batch of one would lose its batch dimension) and normalises over the batch: it runs on
    any batch of two or more, as every batch eval feeds it here."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)
        self.norm = nn.BatchNorm1d(4, track_running_stats=False)
        self.fc = nn.Linear(4, 10)

    def forward(self, x):
        return self.fc(self.norm(F.adaptive_avg_pool2d(self.conv(x), 1).squeeze()))


def test_the_input_check_does_not_refuse_a_model_that_needs_two_images():
    torch.manual_seed(0)
    result = E.evaluate_keywords(_SqueezesTheBatch(), data="digits", distort="none", input_shape=(1, 16, 16),
                                 limit=6, batch_size=3, device="cpu")
    assert result["n_images"] == 6
