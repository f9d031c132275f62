"""Options of :func:`splice.training.tune` that travel together: recipe overrides and how the run runs."""

from __future__ import annotations

import os
from dataclasses import dataclass

__all__ = ["RecipeOverrides", "RunOptions"]


def _optional_int(owner: str, name: str, value, low: int) -> None:
    if value is not None and (isinstance(value, bool) or not isinstance(value, int) or value < low):
        raise ValueError(f"{owner}.{name} must be None or an integer >= {low}; got {value!r}")


@dataclass(frozen=True)
class RecipeOverrides:
    """Command-line overrides of the recipe (``None`` keeps the recipe's value).

    ``epochs``, ``lr``, ``batch_size`` and ``seed`` replace the recipe's keys
    (and are checked by it); ``reference`` replaces ``[pretrain] reference``
    for this run only.
    """

    epochs: int | None = None
    lr: float | None = None
    batch_size: int | None = None
    seed: int | None = None
    reference: str | os.PathLike | None = None

    def __post_init__(self) -> None:
        if isinstance(self.reference, os.PathLike):  # a folder given as a path is recorded as its string
            object.__setattr__(self, "reference", os.fspath(self.reference))
        if self.reference is not None and (not isinstance(self.reference, str) or not self.reference):
            raise ValueError(f"RecipeOverrides.reference must be None, a data set name or a folder; "
                             f"got {self.reference!r}")

    def recipe_keys(self) -> dict:
        """The overrides of recipe keys, for :meth:`splice.recipes.Recipe.with_overrides`."""
        return {"epochs": self.epochs, "lr": self.lr, "batch_size": self.batch_size, "seed": self.seed}

    @property
    def any_recipe_key(self) -> bool:
        return any(v is not None for v in self.recipe_keys().values())


@dataclass(frozen=True)
class RunOptions:
    """How a tune run runs, beside what it trains.

    ``device``: cpu, cuda[:N] or mps (``None``: the best available).
    ``quiet``: plain lines instead of progress bars; ``progress=False`` prints
    nothing. ``workers``: data-loader processes for image folders.
    ``deterministic``: ``torch.use_deterministic_algorithms`` for the run
    (``None``: on for the CPU), without filling uninitialised memory with NaN
    (see ``splice.training.tune``). ``stop_after_steps`` stops like Ctrl-C after
    that many optimiser steps (tests and debugging);
    ``stop_after_pretrain_steps`` does the same during warp-head pre-training.
    """

    device: str | None = None
    quiet: bool = False
    progress: bool = True
    workers: int = 0
    deterministic: bool | None = None
    stop_after_steps: int | None = None
    stop_after_pretrain_steps: int | None = None

    def __post_init__(self) -> None:
        for name in ("quiet", "progress"):
            if not isinstance(getattr(self, name), bool):
                raise ValueError(f"RunOptions.{name} must be True or False; got {getattr(self, name)!r}")
        if self.deterministic is not None and not isinstance(self.deterministic, bool):
            raise ValueError(f"RunOptions.deterministic must be None, True or False; got {self.deterministic!r}")
        if isinstance(self.workers, bool) or not isinstance(self.workers, int) or self.workers < 0:
            raise ValueError(f"RunOptions.workers must be an integer >= 0; got {self.workers!r} (--workers); "
                             "pass 0 to load the data in the main process")
        _optional_int("RunOptions", "stop_after_steps", self.stop_after_steps, 1)
        _optional_int("RunOptions", "stop_after_pretrain_steps", self.stop_after_pretrain_steps, 1)

