"""Learning-rate schedules as pure functions of the step.

The factor multiplies each parameter group's base learning rate. Because it is
a function of the global step alone, resuming at step ``s`` restores the
schedule exactly; nothing but ``s`` needs saving.

- warm-up: linear from ``1 / (warmup_steps + 1)`` to 1 over ``warmup_steps``;
- ``cosine``: ``0.5 (1 + cos(pi t))`` with ``t`` the fraction of the post-warm-up
  steps done (it reaches 0 after the last step);
- ``step``: ``gamma ** floor(epoch / step_epochs)``;
- ``constant``: 1.
"""

from __future__ import annotations

import math

__all__ = ["lr_factor"]


def lr_factor(schedule: str, step: int, *, steps_per_epoch: int, total_steps: int, warmup_steps: int = 0,
              step_epochs: int = 1, step_gamma: float = 0.1) -> float:
    """Multiplier of the base learning rate at global ``step`` (0-based)."""
    if warmup_steps > 0 and step < warmup_steps:
        return (step + 1) / (warmup_steps + 1)
    if schedule == "constant":
        return 1.0
    if schedule == "step":
        epoch = step // max(1, steps_per_epoch)
        return step_gamma ** (epoch // max(1, step_epochs))
    if schedule == "cosine":
        span = max(1, total_steps - warmup_steps)
        t = min(1.0, (step - warmup_steps) / span)
        return 0.5 * (1.0 + math.cos(math.pi * t))
    raise ValueError(f"unknown schedule {schedule!r}; use cosine, step or constant")
