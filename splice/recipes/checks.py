"""Value checks for recipe keys, with one wording: ``OWNERkey must be ...; got VALUE``.

Each check returns the value converted to its canonical type or raises
``ValueError``; :class:`~splice.recipes.Recipe` turns that into a
:class:`~splice.errors.RecipeError` naming the file.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from typing import Any

from ..errors import suggest

__all__ = ["is_number", "number", "integer", "choice", "boolean", "scale_pair"]


def is_number(v: Any) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(float(v))


def number(owner: str, name: str, v: Any, *, low: float | None = None, high: float | None = None,
            low_open: bool = False, hint: str = "") -> float:
    span = []
    if low is not None:
        span.append(f"{'>' if low_open else '>='} {low:g}")
    if high is not None:
        span.append(f"<= {high:g}")
    want = f"a number {' and '.join(span)}" if span else "a number"
    if not is_number(v):
        raise ValueError(f"{owner}{name} must be {want}; got {v!r}{hint}")
    f = float(v)
    if low is not None and (f <= low if low_open else f < low):
        raise ValueError(f"{owner}{name} must be {want}; got {v!r}{hint}")
    if high is not None and f > high:
        raise ValueError(f"{owner}{name} must be {want}; got {v!r}{hint}")
    return f


def integer(owner: str, name: str, v: Any, *, low: int = 0, hint: str = "") -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < low:
        raise ValueError(f"{owner}{name} must be an integer >= {low}; got {v!r}{hint}")
    return int(v)


def choice(owner: str, name: str, v: Any, allowed: Sequence[str]) -> str:
    if not isinstance(v, str) or v not in allowed:
        hint = suggest(v, allowed) if isinstance(v, str) else ""
        raise ValueError(
            f"{owner}{name} = {v!r} is not allowed{hint or ';'} use one of "
            + ", ".join(repr(a) for a in allowed)
        )
    return v


def boolean(owner: str, name: str, v: Any) -> bool:
    if not isinstance(v, bool):
        raise ValueError(f"{owner}{name} must be true or false; got {v!r}")
    return v


def scale_pair(owner: str, name: str, v: Any) -> tuple[float, float]:
    ok = (isinstance(v, Sequence) and not isinstance(v, str) and len(v) == 2
          and all(is_number(x) for x in v) and 0 < float(v[0]) <= float(v[1]))
    if not ok:
        raise ValueError(
            f"{owner}{name} must be a pair [low, high] with 0 < low <= high, e.g. [0.8, 1.2] "
            f"([1.0, 1.0] for none); got {v!r}"
        )
    return (float(v[0]), float(v[1]))

