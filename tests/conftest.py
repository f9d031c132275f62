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


def pytest_configure(config):
    torch.set_num_threads(max(1, min(2, torch.get_num_threads())))
