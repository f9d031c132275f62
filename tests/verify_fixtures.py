"""What the verify tests share: a small tray_net splice and its folder, eight digits as PNG files, a model file
of small nets, and helpers that edit a folder as an attacker or a bug would."""

from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest
import torch
from safetensors.torch import load_file, save_file

import splice
from splice import store
from splice.fileio import file_sha256, state_dict_sha256
from splice.cli import main
from splice.errors import DataError, ManifestError, SpliceError
from splice.surgery import insert, warps_of
from splice.verification import (
    DEFAULT_TOLERANCES,
    CheckResult,
    VerifyReport,
    compare_outputs,
    probe_batch,
    render_verify,
    verify,
    verify_models,
    write_report,
)
from splice.warps import Warp, WarpConfig

ALL_CHECKS = ["integrity", "finite", "shapes", "outputs", "warps", "provenance", "gradients", "buffers"]
TRAY = "splice.models:tray_net"
SMALL = {"width": 4}

MODEL_FILE = '''
import torch
from torch import nn


class _Body(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(1, 4, 3, padding=1)
        self.bn1 = nn.BatchNorm2d(4)
        self.conv2 = nn.Conv2d(4, 4, 3, padding=1)
        self.fc = nn.Linear(4, 3)

    def features(self, x):
        x = torch.relu(self.bn1(self.conv1(x)))
        return torch.relu(self.conv2(x))


class DictNet(_Body):
    def forward(self, x):
        f = self.features(x)
        return {"logits": self.fc(f.mean((2, 3))), "map": f[:, :1]}


class TwoNet(_Body):
    def forward(self, x):
        f = self.features(x)
        return self.fc(f.mean((2, 3))), f.amax((2, 3))


class Tally(nn.Module):
    """Counts its calls in a buffer, even in eval mode (state verify must catch)."""

    def __init__(self):
        super().__init__()
        self.register_buffer("calls", torch.zeros(()))

    def forward(self, x):
        self.calls += 1
        return x


class CountingNet(_Body):
    def __init__(self):
        super().__init__()
        self.tally = Tally()

    def forward(self, x):
        return self.fc(self.tally(self.features(x)).mean((2, 3)))


class WarmingNet(CountingNet):
    """Scales its answer by a warm-up factor read from the counter, in the model's own forward: a traced graph
    computes the factor once, while tracing, unless it reads the buffer as a node."""

    def forward(self, x):
        return self.fc(self.tally(self.features(x)).mean((2, 3))) * (self.tally.calls / 10).clamp(max=1.0)


class FlatNet(_Body):
    """Flattens a fixed-size map, so a shape change makes it fail."""

    def __init__(self):
        super().__init__()
        self.head = nn.Linear(4 * 20 * 20, 3)

    def forward(self, x):
        return self.head(torch.flatten(self.features(x), 1))


def flat_net():
    return FlatNet()


def dict_net():
    return DictNet()


def two_net():
    return TwoNet()


def counting_net():
    return CountingNet()


def warming_net():
    return WarmingNet()


for _f in (dict_net, two_net, counting_net, warming_net, flat_net):
    _f.input_shape = (1, 20, 20)


class CachedBias(nn.Module):
    """Keeps, in eval mode, a bias indexed from a parameter table; branches on a size (warps go in by hooks)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3, padding=1)
        self.table = nn.Parameter(torch.randn(6))
        self.register_buffer("index", torch.tensor([0, 2, 4, 5]))
        self.cache = {}
        self.head = nn.Linear(4, 3)

    def forward(self, x):
        if self.training or "bias" not in self.cache:
            bias = self.table[self.index]
            if not self.training:
                self.cache["bias"] = bias
        bias = bias if self.training else self.cache["bias"]
        y = self.conv(x) + bias.view(1, -1, 1, 1)
        if y.shape[-1] % 2 == 0:
            y = y * 1.0
        return self.head(y.mean((2, 3)))


def cached_bias_net():
    return CachedBias()


cached_bias_net.input_shape = (1, 8, 8)
'''


# ----------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def work(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("verify")


@pytest.fixture(scope="module")
def source_weights(work) -> Path:
    """A tray_net checkpoint on disk, so provenance can compare tensor by tensor."""
    from splice.models import tray_net

    torch.manual_seed(1)

    model = tray_net(**SMALL)
    path = work / "tray_source.safetensors"
    save_file({k: v.contiguous() for k, v in model.state_dict().items()}, str(path))
    return path


@pytest.fixture(scope="module")
def tray_source(source_weights):
    return splice.load_source(TRAY, kwargs=SMALL, weights=source_weights)


@pytest.fixture(scope="module")
def tray_spliced(tray_source):
    return insert(tray_source, at=["input", "pool2"])


@pytest.fixture(scope="module")
def tray_folder(work, tray_spliced) -> Path:
    return store.save(tray_spliced, work / "tray")


@pytest.fixture(scope="module")
def digits_folder(work) -> Path:
    """Eight tray-camera digits (scikit-learn's bundled optdigits) as PNG files."""
    import numpy as np
    from PIL import Image
    from sklearn.datasets import load_digits

    folder = work / "digits"
    folder.mkdir()
    digits = load_digits()
    for i in range(8):
        img = (digits.images[i] / 16.0 * 255).astype(np.uint8)
        Image.fromarray(img, mode="L").save(folder / f"digit_{i}.png")
    return folder


@pytest.fixture(scope="module")
def model_file(work) -> Path:
    path = work / "outputs_nets.py"
    path.write_text(MODEL_FILE)
    return path


def copy_folder(src: Path, dst: Path) -> Path:
    import shutil

    shutil.copytree(src, dst)
    return dst


def rewrite_weights(folder: Path, edit) -> None:
    """Edit the safetensors file and re-record its file hash (so integrity still passes)."""
    path = folder / store.WEIGHTS_NAME
    state = load_file(str(path))
    edit(state)
    save_file(state, str(path), metadata={"format": "pt"})
    manifest_path = folder / store.MANIFEST_NAME
    manifest = json.loads(manifest_path.read_text())
    manifest["weights"]["sha256"] = file_sha256(path)
    manifest_path.write_text(json.dumps(manifest))


def final_layer(warp):
    return warp.head.final


def clone_spliced(spliced):
    """deepcopy of a spliced GraphModule; fx's deepcopy drops custom attributes, so carry splice_info over."""
    twin = copy.deepcopy(spliced)
    twin.splice_info = copy.deepcopy(spliced.splice_info)
    return twin
