"""The state of one tune run (one per process), shared by the set-up, the loop and the bookkeeping."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import torch
from torch import nn

from ..recipes import Recipe
from .distributed import LogitsOnly

__all__ = ["TuneInterrupted", "Run", "unwrap"]


class TuneInterrupted(KeyboardInterrupt):
    """Raised after Ctrl-C / SIGTERM once the checkpoint is safely written; ``signal_number`` is the signal that
    asked for the stop (``None``: a stop asked for otherwise), so that the CLI exits with 128 plus it."""

    def __init__(self, message: str = "", signal_number: int | None = None) -> None:
        super().__init__(message)
        self.signal_number = signal_number


def unwrap(model: nn.Module) -> nn.Module:
    """The model inside a :func:`~splice.training.distributed.data_parallel` wrapper (or the model itself)."""
    inner = model.module if isinstance(model, nn.parallel.DistributedDataParallel) else model
    return inner.net if isinstance(inner, LogitsOnly) else inner


@dataclass
class Run:
    """What a run was set up with (first block) and what changes while it trains (second block)."""

    ctx: Any  # splice.training.distributed.Context
    rec: Recipe
    src: Any  # splice.sources.Source
    net: nn.Module
    warps: dict[str, nn.Module]
    train: Any
    val: Any
    prepare: Callable[[torch.Tensor], torch.Tensor]
    norm: dict | None
    classes: list[str] | None
    run_dir: Path
    info: dict
    data: str
    shape: tuple[int, ...]
    where: str
    ckpt: dict | None = None
    workers: int = 0
    stop_after_steps: int | None = None
    stop_after_pretrain_steps: int | None = None
    reference: Any = None  # splice.training.reference.Reference, None for baseline
    reference_probe: torch.Tensor | None = None  # held-out reference images for reference_distance
    reference_start: torch.Tensor | None = None  # the starting model's predicted class for each of them
    trained_on: str | None = None

    bar: Any = None  # splice.progress.Progress
    flag: Any = None  # the SIGINT/SIGTERM stop flag
    amp: bool = False
    net_wrapped: nn.Module | None = None
    optimizer: torch.optim.Optimizer | None = None
    steps_per_epoch: int = 0
    total_steps: int = 0
    warmup_steps: int = 0
    per_rank: int = 0
    best: dict = field(default_factory=lambda: {"accuracy": -1.0, "epoch": -1, "step": 0})
    bad_evals: int = 0
    metrics_rows: int = 0
    epoch_time: float = 0.0
    step: int = 0
    t_run: float = 0.0
    last_good: dict | None = None  # epoch/step of the checkpoint on disk (the last finite state)
