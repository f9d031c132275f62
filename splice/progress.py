"""Progress display: rich bars on a terminal, plain lines everywhere else.

:class:`Progress` shows one bar per phase (pre-training, each epoch) with the
running loss, accuracy, images/s and the time left. When stdout is not a
terminal, when ``quiet`` is set, or when rich is unavailable, it prints one
plain line per :meth:`Progress.line` call instead (and nothing per step).
``NO_COLOR`` turns colours off (rich also honours it by itself).
"""

from __future__ import annotations

import os
import sys
import time
from typing import Any, TextIO

__all__ = ["Progress", "format_fields"]


def format_fields(fields: dict[str, Any]) -> str:
    """``loss 0.1234  acc 0.9812  1,234 img/s`` from a dict of numbers."""
    parts = []
    for key, value in fields.items():
        if value is None:
            continue
        if key == "img/s":
            parts.append(f"{value:,.0f} img/s")
        elif isinstance(value, float):
            parts.append(f"{key} {value:.4f}")
        else:
            parts.append(f"{key} {value}")
    return "  ".join(parts)


class Progress:
    """Bars or lines. Use as a context manager; ``enabled=False`` prints nothing at all."""

    def __init__(self, *, enabled: bool = True, quiet: bool = False, stream: TextIO | None = None,
                 refresh_s: float = 0.25) -> None:
        self.enabled = enabled
        self.stream = stream or sys.stdout
        is_tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.rich = enabled and not quiet and is_tty and os.environ.get("TERM") != "dumb"
        self.refresh_s = refresh_s
        self._bar = None
        self._task = None
        self._last = 0.0
        self._console = None

    # -- lifecycle ---------------------------------------------------------------

    def __enter__(self) -> Progress:
        if self.rich:
            from rich.console import Console
            from rich.progress import BarColumn, MofNCompleteColumn, TextColumn, TimeRemainingColumn
            from rich.progress import Progress as _Bar

            self._console = Console(file=self.stream, no_color=bool(os.environ.get("NO_COLOR")) or None,
                                    highlight=False)
            self._bar = _Bar(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                             TextColumn("{task.fields[info]}"), TextColumn("eta"), TimeRemainingColumn(),
                             console=self._console, transient=False)
            self._bar.__enter__()
        return self

    def __exit__(self, *exc) -> None:
        if self._bar is not None:
            self._bar.__exit__(*exc)
            self._bar = None

    # -- API ---------------------------------------------------------------------

    def start(self, description: str, total: int) -> None:
        """Begin a phase of ``total`` steps."""
        if self._bar is not None:
            if self._task is not None:
                self._bar.stop_task(self._task)
            self._task = self._bar.add_task(description, total=total, info="")

    def update(self, completed: int, **fields: Any) -> None:
        """Move the current bar to ``completed`` steps (throttled)."""
        if self._bar is None or self._task is None:
            return
        now = time.monotonic()
        if now - self._last < self.refresh_s:
            return
        self._last = now
        self._bar.update(self._task, completed=completed, info=format_fields(fields))

    def finish(self, completed: int, **fields: Any) -> None:
        if self._bar is not None and self._task is not None:
            self._bar.update(self._task, completed=completed, info=format_fields(fields))

    def line(self, text: str) -> None:
        """One line of output (above the bars on a terminal)."""
        if not self.enabled:
            return
        if self._bar is not None:
            self._bar.console.print(text, markup=False, highlight=False)
        else:
            print(text, file=self.stream, flush=True)
