"""Splicing: identity at step zero, reference-free promises, round trip, gradients.

The identity tolerance (1e-5 of the output's scale in float32, 1e-10 in
float64) is the acceptance bar of the warp issue; the identity grid reproduces
pixel centres exactly, so the observed error is usually exactly zero.
"""

from __future__ import annotations


import pytest
import torch
import torchvision
from torch import nn

import splice
from splice.errors import IntegrityError, PointError, SpliceError, SpliceWarning
from splice.surgery import insert, warps_of
from splice.warps import FAMILIES, WarpConfig

from harness import check_splice, perturb_warps_

FAST_MODELS = ["resnet18", "mobilenet_v3_small"]
SLOW_MODELS = ["resnet50", "efficientnet_b0", "densenet121", "vgg11", "convnext_tiny", "regnet_y_400mf"]
SHAPE = (3, 64, 64)  # small inputs keep the suite fast; every model accepts 64x64


def _feature_point(model, shape):
    pts = splice.points(model, input_shape=shape)
    # the first cut between convs at stride 4 or more (the feature point the listing used to recommend)
    deep = [p for p in pts if p.cut and p.name != "input" and min(p.stride if isinstance(p.stride, tuple)
                                                                  else (p.stride,)) >= 4]
    return (deep or [p for p in pts if p.recommended])[0].name


def _model(name):
    return torchvision.models.get_model(name, weights=None, num_classes=10).eval()


@pytest.mark.parametrize("name", FAST_MODELS + [pytest.param(n, marks=pytest.mark.slow) for n in SLOW_MODELS])
def test_every_family_is_the_identity(name):
    """All four promises once (affine), then the identity for every other family."""
    from splice.compare import compare_outputs

    model = _model(name)
    at = _feature_point(model, SHAPE)
    check_splice(model, SHAPE, at=at, warp="affine")
    x = torch.randn(2, *SHAPE)
    with torch.no_grad():
        ref = model(x)
        for family in FAMILIES:
            spliced = insert(model, at=at, warp=family, input_shape=SHAPE, check=False).eval()
            cmp = compare_outputs(ref, spliced(x), tol=1e-5)
            assert cmp["passed"], f"{family}: {cmp['detail']}"
            assert cmp["top1"] == 1.0


@pytest.mark.parametrize("family", FAMILIES)
def test_identity_float64(family):
    model = _model("resnet18").double()
    check_splice(model, (3, 32, 32), at=["input", "maxpool"], warp=family, dtype=torch.float64)


class _TwoHeads(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU())
        self.body = nn.Conv2d(8, 8, 3, padding=1)
        self.cls = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 4))
        self.seg = nn.Conv2d(8, 2, 1)

    def forward(self, x):
        f = self.body(self.stem(x))
        return {"logits": self.cls(f), "mask": self.seg(f)}


def test_dict_output_model_and_loc_from_input():
    check_splice(_TwoHeads(), (3, 20, 24), at="stem_1", warp=WarpConfig(family="similarity", loc_from="input"))


def test_round_trip_is_bit_identical_and_tamper_is_refused(tmp_path):
    src = splice.load_source("torchvision:resnet18", kwargs={"num_classes": 10}, input_shape=SHAPE)
    model = src.model
    spliced = insert(src, at=["input", "maxpool"], warp="projective")
    perturb_warps_(spliced)
    folder = splice.save(spliced, tmp_path / "r18")
    again = splice.load(folder)
    x = torch.randn(2, *SHAPE)
    with torch.no_grad():
        assert torch.equal(spliced.eval()(x), again(x))
    base_keys = set(model.state_dict())
    assert {k for k in again.state_dict() if not k.startswith("splice_warps.")} == base_keys
    for k, v in model.state_dict().items():
        assert torch.equal(again.state_dict()[k], v), k
    # flip one byte near the end of the weights file
    wfile = folder / "weights.safetensors"
    data = bytearray(wfile.read_bytes())
    data[-10] ^= 0xFF
    wfile.write_bytes(bytes(data))
    with pytest.raises(IntegrityError, match="does not match the sha256"):
        splice.load(folder)


def test_save_refuses_existing_folder_and_overwrites_on_request(tmp_path):
    spliced = insert("splice.models:tray_net", at="input", warp="affine")
    splice.save(spliced, tmp_path / "m")
    with pytest.raises(SpliceError, match="already exists.*--overwrite"):
        splice.save(spliced, tmp_path / "m")
    splice.save(spliced, tmp_path / "m", overwrite=True)
    assert sorted(p.name for p in (tmp_path / "m").iterdir()) == ["splice.json", "weights.safetensors"]


def test_insert_never_touches_the_callers_model():
    model = _model("resnet18")
    before = {k: v.clone() for k, v in model.state_dict().items()}
    spliced = insert(model, at="maxpool", input_shape=SHAPE)
    perturb_warps_(spliced)
    for p in spliced.parameters():
        p.data.add_(1.0)
    assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())
    assert not hasattr(model, "splice_warps")


def test_point_errors():
    model = _model("resnet18")
    with pytest.raises(PointError, match="unknown point 'layer1_relu'.*did you mean.*splice points"):
        insert(model, at="layer1_relu", input_shape=SHAPE)
    with pytest.raises(PointError, match="given twice"):
        insert(model, at=["maxpool", "maxpool"], input_shape=SHAPE)
    with pytest.raises(PointError, match="not a 4-D .* activation"):
        insert(model, at="flatten", input_shape=SHAPE)
    with pytest.raises(PointError, match="comes after point"):
        insert(model, at="maxpool", warp=WarpConfig(loc_from="layer2_0_relu"), input_shape=SHAPE)


def test_non_cut_point_warns_but_splices():
    model = _model("resnet18")
    with pytest.warns(SpliceWarning, match="not a cut.*re-join at 'layer1_0_add'"):
        spliced = insert(model, at="layer1_0_relu", input_shape=SHAPE)
    assert list(warps_of(spliced)) == ["layer1_0_relu"]


def test_cli_insert_writes_folder(tmp_path, capsys):
    from splice.cli import main

    out = tmp_path / "tray"
    assert main(["insert", "splice.models:tray_net", "--at", "input", "--warp", "attention", "--out", str(out)]) == 0
    assert "identity check: passed" in capsys.readouterr().out
    assert main(["insert", "splice.models:tray_net", "--at", "input", "--out", str(out)]) == 2
    assert "already exists" in capsys.readouterr().err
    assert main(["points", str(out), "--json"]) == 0
    listing = capsys.readouterr().out
    assert '"splice_warps_input"' in listing or "splice_warps" in listing
    assert main(["points", str(out)]) == 0  # the way on names the original model, not the folder insert refuses
    text = " ".join(capsys.readouterr().out.split())
    assert "splice insert splice.models:tray_net --at input --at NAME" in text
    assert main(["insert", str(out), "--at", "pool1", "--out", str(tmp_path / "again")]) == 2
    assert "already spliced (warps at input; base splice.models:tray_net)" in capsys.readouterr().err


def test_a_spliced_model_in_memory_is_not_spliced_again():
    spliced = insert("splice.models:tray_net", at="input")
    with pytest.raises(PointError, match="already spliced .warps at input; base splice.models:tray_net"):
        splice.insert(spliced, at="pool1")


def test_a_spliced_model_survives_torch_save_and_load(tmp_path):
    # torch.load re-traces a pickled GraphModule with its recorded tracer class, made without arguments
    import io

    spliced = insert("splice.models:tray_net", at="input")
    buf = io.BytesIO()
    torch.save(spliced, buf)
    buf.seek(0)
    again = torch.load(buf, weights_only=False)  # a whole pickled module: the caller's own choice to unpickle
    x = torch.randn(2, 1, 28, 28)
    with torch.no_grad():
        assert torch.equal(again.eval()(x), spliced.eval()(x))
    assert again.splice_info.point_names == ["input"]
