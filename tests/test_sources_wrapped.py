"""Models splice works on the module inside (torch.compile) or refuses in one line (TorchScript, converted
int8 layers), and the quantisation-aware form it takes."""

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


def test_a_torch_compiled_model_is_spliced_through_the_module_it_compiled():
    # the compiled wrapper's forward is code neither fx nor a meta-device run can follow (points found the input
    # alone, and insert failed with an AttributeError); the module inside holds the same weights
    model = splice.models.tray_net().eval()
    compiled = torch.compile(model)  # lazy: nothing is compiled until it is called, and it never is here
    with pytest.warns(SpliceWarning, match=r"a torch.compile'd TrayNet: splice works on the module it compiled"):
        pts = splice.points(compiled, (1, 48, 48))
    assert [p.name for p in pts] == [p.name for p in splice.points(model, (1, 48, 48))] and len(pts) > 1
    with pytest.warns(SpliceWarning, match="torch.compile'd"):
        spliced = splice.insert(compiled, at="recommended", input_shape=(1, 48, 48))
    x = torch.randn(2, 1, 48, 48)
    with torch.no_grad():
        assert torch.equal(spliced(x), model(x))


class _WithScripted(torch.nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = torch.nn.Conv2d(3, 4, 3, padding=1)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # torch.jit.script is deprecated in favour of torch.compile
            self.body = torch.jit.script(torch.nn.Sequential(torch.nn.Conv2d(4, 4, 3, padding=1), torch.nn.ReLU()))
        self.head = torch.nn.Linear(4, 2)

    def forward(self, x):
        return self.head(self.body(self.stem(x)).mean((2, 3)))


def test_torchscript_is_refused_in_one_line_naming_where(tmp_path):
    # a scripted submodule failed deep inside the twin copy with a TypeError; a TorchScript archive given as
    # a checkpoint was "not a readable PyTorch checkpoint"
    with pytest.raises(SourceError, match=r"^the model given: its module 'body' \(RecursiveScriptModule\) is "
                                          r"TorchScript \(torch.jit.script or trace\), which splice can neither copy "
                                          r"nor trace; use the Python module it was scripted from"):
        splice.points(_WithScripted().eval(), (3, 8, 8))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.jit.save(torch.jit.script(torch.nn.Sequential(torch.nn.Conv2d(3, 4, 3))), str(tmp_path / "ts.pt"))
    with pytest.raises(WeightsError, match=r"is a TorchScript archive \(torch.jit.save\), not a state dict"):
        load_source(str(tmp_path / "ts.pt"), input_shape=(3, 8, 8))



def _float_net():
    return torch.nn.Sequential(torch.nn.Conv2d(3, 4, 3, padding=1), torch.nn.ReLU(), torch.nn.AdaptiveAvgPool2d(1),
                               torch.nn.Flatten(), torch.nn.Linear(4, 2)).eval()


def test_a_quantized_model_is_refused_in_one_line_and_its_qat_form_is_not(tmp_path):
    # meta-device shape propagation failed in the int8 Linear ("no fake impl"), with advice that could not help
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # torch.ao.quantization is deprecated in favour of torchao
        quantized = torch.ao.quantization.quantize_dynamic(_float_net(), {torch.nn.Linear}, dtype=torch.qint8)
    with pytest.raises(SourceError, match=r"^the model given: its module '4' \(Linear\) is quantized .*splice and "
                                          r"tune the float model, then quantize the result"):
        splice.points(quantized, (3, 8, 8))
    torch.save(quantized, tmp_path / "q.pt")
    with pytest.raises(SourceError, match="is quantized"):
        load_source(str(tmp_path / "q.pt"), input_shape=(3, 8, 8), trust_pickle=True)
    # quantization-aware training keeps float weights (with fake quantisation): that model trains, and passes
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        qat = _float_net().train()
        qat.qconfig = torch.ao.quantization.get_default_qat_qconfig("fbgemm")
        qat = torch.ao.quantization.prepare_qat(qat).eval()
        assert splice.points(qat, (3, 8, 8))
        # a float model ready to quantize: its adds are FloatFunctional modules, which live beside the int8 ones
        import torchvision

        ready = torchvision.models.quantization.mobilenet_v2(quantize=False, weights=None).eval()
        assert any(type(m).__name__ == "FloatFunctional" for m in ready.modules())
        assert splice.points(ready, (3, 32, 32))
