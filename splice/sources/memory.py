"""Refusing work that cannot fit in memory, before a byte of it is allocated.

Sizes are estimated from shapes alone (meta-device shapes, recorded point
shapes, or modules built on the meta device), compared with the memory the
operating system reports as available, and refused with
:class:`~splice.errors.ResourceError` naming the estimate. A raw allocator
failure (or the kernel's out-of-memory killer) is what this avoids.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable, Sequence
from pathlib import Path

import torch
from torch import nn

from ..errors import ResourceError

__all__ = ["available_bytes", "format_bytes", "tensor_bytes", "module_bytes", "check_fits"]


def _meminfo_available() -> int | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        return None
    return None


def _cgroup_room() -> int | None:
    try:
        limit = Path("/sys/fs/cgroup/memory.max").read_text().strip()
        used = int(Path("/sys/fs/cgroup/memory.current").read_text().strip())
    except (OSError, ValueError):
        return None
    return None if limit == "max" else max(0, int(limit) - used)


def available_bytes() -> int | None:
    """Bytes of memory this process can still use, or ``None`` when the system does not say."""
    known = [v for v in (_meminfo_available(), _cgroup_room()) if v is not None]
    if not known and hasattr(os, "sysconf"):
        try:
            known.append(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
        except (ValueError, OSError):
            pass
    return min(known) if known else None


def format_bytes(n: float) -> str:
    """``1536`` -> ``'1.5 KiB'``."""
    for unit in ("B", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if abs(n) < 1024 or unit == "PiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} PiB"  # pragma: no cover


def tensor_bytes(shapes: Iterable[Sequence[int]], dtype: torch.dtype = torch.float32, batch: int = 1) -> int:
    """Bytes of tensors of ``shapes`` (each without the batch) at ``batch`` and ``dtype``."""
    size = torch.empty((), dtype=dtype).element_size()
    return int(batch) * size * sum(math.prod(int(d) for d in s) for s in shapes)


def module_bytes(module: nn.Module) -> int:
    """Bytes of a module's parameters and buffers (works on the meta device: shapes only)."""
    return sum(t.numel() * t.element_size() for t in (*module.parameters(), *module.buffers()))


def check_fits(nbytes: int, what: str, fix: str) -> None:
    """Refuse ``what`` (estimated at ``nbytes``) when it exceeds the available memory; ``fix`` says what to do.

    Nothing is refused when the system does not report its memory.
    """
    room = available_bytes()
    if room is None or nbytes <= room:
        return
    raise ResourceError(
        f"{what} needs about {format_bytes(nbytes)} (estimated from the tensor shapes), more than the "
        f"{format_bytes(room)} of memory available; {fix}"
    )
