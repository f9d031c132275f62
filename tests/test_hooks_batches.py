"""Batch sizes and modes under the hooks mechanism: the ONNX batch dimension, modules called once per image or
only in training, and inputs that merge or reach the outputs alone."""

from __future__ import annotations

import copy
import io
import json
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn

import splice
from splice import graph
from splice.cli import main
from splice.errors import GraphError, PointError, SourceError
from splice.exporting import export
from splice.graph import TraceFallbackWarning
from splice.hooks import hooks_installed
from splice.manifest import MANIFEST_NAME
from splice.store import load, save
from splice.surgery import insert, warps_of
from splice.verification import verify
from splice.warps import WarpConfig

from harness import perturb_warps_

HOOKED = f"{Path(__file__).with_name('test_hooks.py')}:hooked"  # the model of test_hooks.py, as a user's model file


def _quiet_insert(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TraceFallbackWarning)
        return insert(*args, **kwargs)


# ----------------------------------------------------------------------------- ONNX batch


class _PerImage(nn.Module):
    """Loops over the images of a batch: a traced graph holds one step per image of the traced batch."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.conv2 = nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        return torch.cat([self.conv2(self.conv(x[i:i + 1])) for i in range(x.shape[0])]).mean((2, 3))


def per_image():
    torch.manual_seed(0)
    return _PerImage()


per_image.input_shape = (3, 16, 16)


class _SplitImages(_PerImage):
    """Splits the batch into its images: the exported Split holds the traced batch's sizes."""

    def forward(self, x):
        return torch.cat([self.conv2(self.conv(t)) for t in x.split(1)]).mean((2, 3))


def split_images():
    torch.manual_seed(0)
    return _SplitImages()


split_images.input_shape = (3, 16, 16)


def test_export_is_dynamic_by_default_and_static_on_request(tmp_path, capsys):
    import onnxruntime as ort

    folder = save(_quiet_insert(HOOKED, at="recommended"), tmp_path / "hooked")
    assert main(["export", str(folder), "--trust-code", "--onnx", str(tmp_path / "dynamic.onnx")]) == 0
    assert "dynamic batch" in capsys.readouterr().out
    static = ["export", str(folder), "--trust-code", "--onnx", str(tmp_path / "static.onnx"), "--static-batch"]
    assert main(static) == 0
    assert "batch 1" in capsys.readouterr().out
    x = np.random.default_rng(0).standard_normal((2, 3, 32, 32)).astype(np.float32)
    ort.InferenceSession(str(tmp_path / "dynamic.onnx"), providers=["CPUExecutionProvider"]).run(None, {"input": x})
    static = ort.InferenceSession(str(tmp_path / "static.onnx"), providers=["CPUExecutionProvider"])
    with pytest.raises(Exception, match="dimensions"):  # onnxruntime refuses a batch of 2 for a batch-1 graph
        static.run(None, {"input": x})


def _big_cpu_allocations(fn) -> list[tuple[str, int]]:
    """The CPU allocations over 1 MiB while ``fn`` runs, as torch.profiler's memory accounting (the outside
    reference) counts them: (op name, bytes)."""
    from torch.profiler import ProfilerActivity, profile

    with profile(activities=[ProfilerActivity.CPU], profile_memory=True) as prof:
        fn()
    return [(e.name, e.cpu_memory_usage) for e in prof.events() if e.cpu_memory_usage > 2 ** 20]


def test_listing_through_hooks_allocates_no_image_sized_memory():
    """A model fx cannot trace is listed on the meta device at a large input (3x2048x2048, 48 MiB a batch): no
    image-sized CPU tensor is made, for the whole model or within a part (a real probe and its batch-2 copy were
    allocated and filled, three times the input)."""
    with pytest.warns(TraceFallbackWarning):
        assert _big_cpu_allocations(lambda: graph.points(per_image(), (3, 2048, 2048))) == []
    outer = nn.Sequential(nn.Conv2d(3, 3, 1), per_image())
    assert _big_cpu_allocations(lambda: graph.points(outer, (3, 2048, 2048), within="1")) == []


def test_modules_called_once_per_image_are_not_points():
    # a hook counts calls: at batch 2 the conv's first call would be the first image only
    with pytest.warns(TraceFallbackWarning):
        assert [p.name for p in graph.points(per_image(), (3, 16, 16), all=True)] == ["input"]


@pytest.mark.parametrize("factory", ["per_image", "split_images"])
def test_a_graph_that_depends_on_the_batch_size_is_exported_at_batch_1(tmp_path, capfd, factory):
    with pytest.warns(TraceFallbackWarning):
        spliced = insert(f"{__file__}:{factory}", at="input")
    folder = save(spliced, tmp_path / "per-image")
    with warnings.catch_warnings(record=True) as caught:  # pytest.warns would re-raise torch.onnx's own notes
        warnings.simplefilter("always")
        result = export(folder, onnx=tmp_path / "per-image.onnx", trust_code=True)["exports"][0]
    ours = [str(w.message) for w in caught if issubclass(w.category, splice.errors.SpliceWarning)]
    assert len(ours) == 1 and "depends on its batch size, so a static batch of 1" in ours[0]
    assert not result["dynamic_batch"] and result["batch_sizes"] == [1, 1]  # traced on one, checked on two
    # onnxruntime's refusal of the dynamic graph reaches the user once, in the warning, not also as its log
    assert "onnxruntime" not in capfd.readouterr().err


class _TrainOnly(nn.Module):
    """Calls its conv once more while training (as an auxiliary branch would): the call count shifts."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 4, 3, padding=1)
        self.conv = nn.Conv2d(4, 4, 3, padding=1)
        self.head = nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        if x.shape[-1] < 4:
            raise ValueError("too small")
        x = self.stem(x)
        if self.training:
            x = x + 0 * self.conv(x)
        return self.head(self.conv(x)).mean((2, 3))


def test_modules_called_more_often_in_training_are_not_points():
    with pytest.warns(TraceFallbackWarning):
        names = [p.name for p in graph.points(_TrainOnly(), (3, 16, 16), all=True)]
    assert names == ["input", "stem", "head"]


class _RefusesMetaModes(_TrainOnly):
    """A train() override that refuses the meta device, as transformers' does with hub kernels on (it
    re-kernelizes on every mode switch, and kernels know no meta device)."""

    def train(self, mode: bool = True):
        if next(self.parameters()).is_meta:
            raise ValueError("Unsupported device type 'meta'")
        return super().train(mode)


@pytest.mark.parametrize("training", [False, True])
def test_a_train_override_that_refuses_the_meta_device_still_lists_and_checks(training):
    model = _RefusesMetaModes().train(training)
    with pytest.warns(TraceFallbackWarning):
        names = [p.name for p in graph.points(model, (3, 16, 16), all=True)]
    assert names == ["input", "stem", "head"]  # the train-mode count still ran, and still drops conv
    assert model.training is training and not next(model.parameters()).is_meta


class _WithMask(nn.Module):
    """Images and a pixel mask that goes to the output untouched, as a detection backbone's (DETR's) does."""

    def __init__(self):
        super().__init__()
        self.conv1, self.conv2 = nn.Conv2d(3, 4, 3, padding=1), nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x, mask):
        return self.conv2(torch.relu(self.conv1(x))), mask


def test_a_second_input_that_reaches_the_outputs_alone_keeps_the_cuts_of_the_first():
    # the mask's own path to the outputs made nothing a cut, so --at recommended found no point at all
    pts = {p.name: p for p in graph.points(_WithMask(), [(3, 16, 16), (1, 16, 16)], all=True)}
    assert {n for n, p in pts.items() if p.cut} == {"input", "conv1", "relu", "conv2"}  # not the mask itself
    spliced = splice.insert(_WithMask(), at="recommended", input_shape=[(3, 16, 16), (1, 16, 16)])
    assert list(warps_of(spliced)) and splice.verify(spliced).passed


class _PairConcat(nn.Module):
    """Two frames concatenated, then convolved: the first frame's paths meet the second's at the cat."""

    def __init__(self):
        super().__init__()
        self.c1, self.c2 = nn.Conv2d(6, 4, 3, padding=1), nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, a, b):
        return self.c2(torch.relu(self.c1(torch.cat([a, b], 1))))


def test_inputs_that_merge_keep_their_branches_and_say_why_nothing_is_recommended():
    # a warp on one frame of a pair before they meet is in a branch; a second input that meets the first is kept
    pts = {p.name: p for p in graph.points(_PairConcat(), [(3, 16, 16), (3, 16, 16)], all=True)}
    assert not pts["input"].cut and pts["input"].join == "cat" and pts["c1"].cut and pts["c2"].cut
    with pytest.raises(PointError, match=r"'input' is not a cut: its paths meet another input's at 'cat'\); "
                                         r"choose one with --at NAME \(cuts: cat, c1, relu\)"):
        splice.insert(_PairConcat(), at="recommended", input_shape=[(3, 16, 16), (3, 16, 16)])


# ----------------------------------------------------------------------------- threads


def test_two_threads_may_run_one_hooks_splice_at_once():
    # a serving process runs one model from several threads; the hooks' per-forward state (call counts, the
    # activations kept for localisation inputs) was shared, and one thread's forward reset the other's counts
    import threading

    from test_hooks import hooked

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # points that are not cuts: what matters is that each thread warps alike
        spliced = insert(hooked(), at=["input", "block", "block_1"], input_shape=(3, 32, 32)).eval()
    perturb_warps_(spliced, scale=0.2)
    gen = torch.Generator().manual_seed(1)
    xs = [torch.randn(4, 3, 32, 32, generator=gen) for _ in range(2)]
    with torch.no_grad():
        want = [spliced(x) for x in xs]
    wrong = [0, 0]

    def run(i):
        with torch.no_grad():
            for _ in range(25):
                wrong[i] += not torch.equal(spliced(xs[i]), want[i])

    threads = [threading.Thread(target=run, args=(i,)) for i in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert wrong == [0, 0]
