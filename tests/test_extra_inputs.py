"""A model whose second input is not an image (forward(x, meta), meta a vector per sample): described by its
per-sample shape, recorded, probed, spliced at the identity and exported with a dynamic batch, under both
mechanisms; the first input stays (C, H, W)."""

from __future__ import annotations

import json
import textwrap

import numpy as np
import pytest
import torch

import splice
from splice.cli import main
from splice.errors import ManifestError, SourceError, SpliceError
from splice.options import ModelOptions
from splice.schema import validate_manifest
from splice.sources import parse_input_shapes
from splice.store import load

_MODELS = textwrap.dedent("""
    import torch
    import torch.nn as nn


    class Meta(nn.Module):
        # an image and metadata per sample, a vector (N, 4) or a table (N, 10, 4), met after the pooling
        def __init__(self):
            super().__init__()
            self.c, self.c2 = nn.Conv2d(3, 8, 3, 2, 1), nn.Conv2d(8, 8, 3, 2, 1)
            self.m, self.fc = nn.Linear(4, 8), nn.Linear(8, 3)

        def forward(self, x, meta):
            rows = self.m(meta).reshape(x.shape[0], -1, 8).mean(1)
            return self.fc(self.c2(torch.relu(self.c(x))).mean((2, 3)) + rows)


    class Masked(nn.Module):
        # an image and a pixel mask (N, H, W) that weighs its features: the mask has pixels a warp would misalign
        def __init__(self):
            super().__init__()
            self.c, self.c2 = nn.Conv2d(3, 8, 3, 1, 1), nn.Conv2d(8, 8, 3, 2, 1)

        def forward(self, x, mask):
            return self.c2(self.c(x) * mask.unsqueeze(1)).mean((2, 3))


    def masked():
        return Masked()


    class Hooked(Meta):
        # a shape test in forward: fx cannot trace it, so the warps go in by hooks
        def forward(self, x, meta):
            if x.shape[-1] > 4096:
                x = x[..., ::2]
            return self.fc(self.c2(torch.relu(self.c(x))).mean((2, 3)) + self.m(meta).mean(1))


    def meta():
        return Meta()


    def hooked():
        return Hooked()


    hooked.input_shape = [(3, 32, 32), (10, 4)]
""")


def _two_inputs() -> torch.nn.Module:
    class Two(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.c, self.m = torch.nn.Conv2d(3, 4, 3), torch.nn.Linear(4, 4)

        def forward(self, x, meta):
            return self.c(x).mean((2, 3)) + self.m(meta)

    return Two()


@pytest.fixture
def models(tmp_path):
    (tmp_path / "metanets.py").write_text(_MODELS)
    return tmp_path / "metanets.py"


def test_an_input_after_the_first_takes_any_per_sample_shape_and_the_first_stays_an_image():
    assert parse_input_shapes(["3x32x32", "4"]) == ((3, 32, 32), (4,))
    assert parse_input_shapes("[[3, 32, 32], [10, 4]]") == ((3, 32, 32), (10, 4))
    assert parse_input_shapes([(3, 32, 32), 4, (2, 3, 8, 8)]) == ((3, 32, 32), (4,), (2, 3, 8, 8))
    with pytest.raises(SourceError, match=r"malformed input shape '4'; expected CxHxW"):
        parse_input_shapes(["4", "3x32x32"])
    with pytest.raises(SourceError, match=r"'10xa' for input 2; an input after the first takes its per-sample "
                                          r"shape, one or more positive integers, e\.g\. --input-shape 4 or 10x4$"):
        parse_input_shapes(["3x32x32", "10xa"])
    for bad in ("0", [], [True], 1.5):
        with pytest.raises(SourceError, match=r"for input 2; an input after the first takes its per-sample shape"):
            parse_input_shapes([(3, 32, 32), bad])
    # a model told only its image is told how to name the rest
    with pytest.raises(splice.errors.GraphError, match=r"takes 2 inputs \(x, meta\) and 1 shape was given; give one "
                                                       r"--input-shape per input, CxHxW for the images and then each "
                                                       r"other input's per-sample shape, e\.g\. 4 for a vector"):
        splice.points(_two_inputs(), input_shape=(3, 32, 32))
    # a vector described as an image (4x1x1) fails in the Linear that reads it, and the line says how to name it
    with pytest.raises(splice.errors.GraphError, match=r"module 'm' \(Linear\).*\(each input after the first by its "
                                                       r"per-sample shape: 4 for a vector of shape \(N, 4\)\)"):
        splice.points(_two_inputs(), input_shape=[(3, 32, 32), (4, 1, 1)])
    # written back as the flags of the next command, a vector given as an int included
    assert ModelOptions(input_shape=[(3, 32, 32), 4]).as_flags() == " --input-shape 3x32x32 --input-shape 4"


def test_metadata_does_not_take_the_cut_of_the_image_away_but_a_mask_does(models, capsys):
    # a vector has no pixels, and a table meets the image's path only after the pooling: neither misaligns
    for extra in ("4", "10x4"):
        assert main(["points", f"{models}:meta", "--input-shape", "3x32x32", "--input-shape", extra, "--json"]) == 0
        report = json.loads(capsys.readouterr().out)
        assert report["input_shape"] == [3, 32, 32]
        assert report["input_shapes"] == [[3, 32, 32], [int(v) for v in extra.split("x")]]
        first = report["points"][0]
        assert first["name"] == "input" and first["cut"] and not first["in_branch"] and first["recommended"]
    # a mask that weighs the features pixel by pixel: warping the image alone would misalign them
    assert main(["points", f"{models}:masked", "--input-shape", "3x16x16", "--input-shape", "16x16", "--json"]) == 0
    first = json.loads(capsys.readouterr().out)["points"][0]
    assert first["name"] == "input" and not first["cut"] and first["in_branch"] and first["join"] == "mul"
    # a second image that meets the first at a concat still makes the input a branch
    class Pair(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.c = torch.nn.Conv2d(6, 4, 3)

        def forward(self, a, b):
            return self.c(torch.cat([a, b], 1))

    pts = splice.points(Pair(), input_shape=[(3, 16, 16), (3, 16, 16)])
    assert pts[0].name == "input" and not pts[0].cut and pts[0].in_branch


@pytest.mark.parametrize("factory, shapes, mechanism", [("meta", ["3x32x32", "10x4"], "fx"),
                                                        ("hooked", [], "hooks")])
def test_a_model_with_a_vector_input_is_spliced_verified_and_exported(models, tmp_path, factory, shapes,
                                                                      mechanism):
    ort = pytest.importorskip("onnxruntime")
    out = tmp_path / "spliced"
    flags = [f for s in shapes for f in ("--input-shape", s)]
    assert main(["insert", f"{models}:{factory}", *flags, "--at", "recommended", "--out", str(out)]) == 0
    manifest = json.loads((out / "splice.json").read_text())
    assert manifest["input_shape"] == [3, 32, 32] and manifest["extra_inputs"] == [[10, 4]]
    assert manifest.get("mechanism", "fx") == mechanism
    validate_manifest(manifest)  # the record passes its own schema
    spliced = load(out, trust_code=True)
    base = splice.load_source(f"{models}:{factory}", warn_random=False, input_shape=[(3, 32, 32), (10, 4)]).model
    base.load_state_dict({k: v for k, v in spliced.state_dict().items() if not k.startswith("splice_warps.")})
    onnx_file = tmp_path / "m.onnx"
    assert main(["verify", str(out), "--onnx", "--batch", "2", "--trust-code"]) == 0
    assert main(["export", str(out), "--onnx", str(onnx_file), "--trust-code"]) == 0
    session = ort.InferenceSession(str(onnx_file), providers=["CPUExecutionProvider"])
    assert [i.shape for i in session.get_inputs()] == [["batch", 3, 32, 32], ["batch", 10, 4]]
    gen = torch.Generator().manual_seed(3)
    for n in (1, 2):
        x, meta = torch.randn(n, 3, 32, 32, generator=gen), torch.randn(n, 10, 4, generator=gen)
        with torch.no_grad():
            want, got = base(x, meta), spliced(x, meta)
        # the spliced model at the identity is the base (torch), exactly
        assert got.shape == (n, 3) and torch.equal(got, want)
        # the exported file computes what torch does (onnxruntime)
        ran = session.run(None, {"input": x.numpy(), "input_1": meta.numpy()})[0]
        np.testing.assert_allclose(ran, want.numpy(), rtol=1e-5, atol=1e-5)


def test_the_record_of_extra_inputs_is_checked_and_commands_that_feed_one_image_say_so(models, tmp_path):
    out = tmp_path / "spliced"
    assert main(["insert", f"{models}:hooked", "--at", "input", "--out", str(out)]) == 0
    manifest = json.loads((out / "splice.json").read_text())
    for bad in ([[0]], [[]], [["4"]], [4]):
        with pytest.raises(ManifestError, match=r"extra_inputs must be a list of per-sample shapes, each a list "
                                                r"of positive integers"):
            validate_manifest({**manifest, "extra_inputs": bad})
    with pytest.raises(SpliceError, match=r"^evaluate feeds one image per sample, but the model takes 2 inputs "
                                          r"\(3x32x32, 10x4\)"):
        splice.evaluate(out, data="digits", model_options=ModelOptions(trust_code=True))
