"""Shared fixtures: a fixed seed for every test, small models, CPU threads."""

from __future__ import annotations

import random

import numpy as np
import pytest
import torch


@pytest.fixture(autouse=True)
def _fixed_seed():
    """Every test starts from the same RNG state (torch, numpy, random)."""
    random.seed(0)
    np.random.seed(0)
    torch.manual_seed(0)
    yield


@pytest.fixture(scope="module")
def one_thread():
    """One intra-op thread for a module's tests (``pytestmark = pytest.mark.usefixtures("one_thread")``): their
    models are too small to gain from more, and spinning OpenMP threads make timings erratic on a busy 2-core
    machine. The count comes back afterwards."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


@pytest.fixture(scope="module")
def tray_folder(tmp_path_factory):
    """A small tray net (width 4) spliced at pool2 and saved: the folder the export tests export."""
    import splice
    from splice import store
    from splice.surgery import insert

    src = splice.load_source("splice.models:tray_net", kwargs={"width": 4})
    return store.save(insert(src, at="pool2"), tmp_path_factory.mktemp("export") / "tray")


def pytest_configure(config):
    torch.set_num_threads(max(1, min(2, torch.get_num_threads())))
