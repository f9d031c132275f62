"""Limits checked before work starts: memory for tensors, and the pixel cap of decoded images.

Memory: sizes are estimated from shapes alone (meta-device shapes, recorded point
shapes, or modules built on the meta device), compared with the memory the
operating system reports as available, and refused with
:class:`~splice.errors.ResourceError` naming the estimate. A raw allocator
failure (or the kernel's out-of-memory killer) is what this avoids.

Images: one over :func:`max_image_pixels` is refused from its header, before
it is decoded. The cap is :data:`MAX_IMAGE_PIXELS` unless
``SPLICE_MAX_IMAGE_PIXELS`` or :func:`image_pixel_cap` (``--max-image-pixels``)
says otherwise.
"""

from __future__ import annotations

import contextlib
import contextvars
import math
import os
from collections.abc import Iterable, Sequence
from pathlib import Path

import torch
from torch import nn

from .errors import DataError, ResourceError

__all__ = ["available_bytes", "format_bytes", "tensor_bytes", "module_bytes", "check_fits",
           "MAX_IMAGE_PIXELS", "PIXELS_ENV", "max_image_pixels", "image_pixel_cap"]

# Pillow's own decompression-bomb threshold (PIL.Image.MAX_IMAGE_PIXELS, about 0.25 GiB of 24-bit RGB), which
# Pillow only warns about; splice refuses larger images before decoding them
MAX_IMAGE_PIXELS = 89_478_485
PIXELS_ENV = "SPLICE_MAX_IMAGE_PIXELS"
_PIXEL_CAP: contextvars.ContextVar[int | None] = contextvars.ContextVar("splice_pixel_cap", default=None)



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


def max_image_pixels() -> int:
    """The pixel cap in force: :func:`image_pixel_cap`, else ``SPLICE_MAX_IMAGE_PIXELS``, else
    :data:`MAX_IMAGE_PIXELS`."""
    cap = _PIXEL_CAP.get()
    if cap is not None:
        return cap
    text = os.environ.get(PIXELS_ENV, "").strip()
    if not text:
        return MAX_IMAGE_PIXELS
    if not text.isdigit() or int(text) < 1:
        raise DataError(f"{PIXELS_ENV}={text!r} is not a positive whole number of pixels; unset it or give e.g. "
                        f"{MAX_IMAGE_PIXELS}.")
    return int(text)


@contextlib.contextmanager
def image_pixel_cap(pixels: int | None):
    """Within the block, images over ``pixels`` pixels are refused before they are decoded (``None``: unchanged).

    >>> with image_pixel_cap(200_000_000):   # doctest: +SKIP
    ...     ds = splice.data.open_data("scans/", "train", input_shape=(1, 48, 48))
    """
    if pixels is not None and (isinstance(pixels, bool) or not isinstance(pixels, int) or pixels < 1):
        raise DataError(f"the image pixel cap must be a positive whole number; got {pixels!r} "
                        "(--max-image-pixels N).")
    token = _PIXEL_CAP.set(pixels) if pixels is not None else None
    try:
        yield
    finally:
        if token is not None:
            _PIXEL_CAP.reset(token)
