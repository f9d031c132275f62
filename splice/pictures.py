"""Shared helpers for the PNG pictures of ``splice inspect`` and ``splice eval``.

matplotlib is imported inside the functions (``import splice`` stays cheap)
and only its object-oriented API is used: a :class:`matplotlib.figure.Figure`
rendered by the Agg canvas, never ``pyplot``, so no global backend or figure
state is touched. Figures are sized in pixels at :data:`DPI` and saved without
``bbox_inches="tight"``, so every PNG has exactly the size it was laid out with.
"""

from __future__ import annotations

import io
import os
from pathlib import Path

import torch
from torch import Tensor

from .fileio import atomic_write_bytes, printable
from .folders import check_file_target

__all__ = ["DPI", "OKABE_ITO", "FONT_SIZE", "new_figure", "save_png", "check_png_target", "image_array",
           "image_cmap"]

DPI = 100
FONT_SIZE = 10
# The Okabe-Ito palette (Okabe & Ito, "Color Universal Design", 2002/2008; from
# memory): eight colours that stay distinct under the common colour-vision
# deficiencies.
OKABE_ITO = {
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
    "black": "#000000",
}


def new_figure(width_px: int, height_px: int):
    """A matplotlib ``Figure`` of exactly ``width_px x height_px`` pixels (Agg canvas)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_px / DPI, height_px / DPI), dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def check_png_target(path: str | os.PathLike, label: str = "picture target") -> None:
    """Raise unless a PNG may be written at ``path``: a folder, or an existing file that is not a ``.png``, is
    refused (:func:`splice.folders.check_file_target`); an earlier PNG is replaced."""
    check_file_target(path, label, "plot.png", suffix=".png")


def save_png(fig, path: str | os.PathLike, label: str = "picture target") -> Path:
    """Render ``fig`` to PNG and write it atomically (:func:`check_png_target` first); returns the path."""
    from matplotlib.text import Text

    check_png_target(path, label)
    for text in fig.findobj(Text):  # a class or file name that is not UTF-8 drawn as printable() shows it
        text.set_text(printable(text.get_text()))
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return atomic_write_bytes(path, buf.getvalue())


def image_array(image: Tensor):
    """A ``(C, H, W)`` tensor in [0, 1] as a numpy array for ``imshow`` (``H x W`` or ``H x W x 3``)."""
    x = image.detach().to("cpu", torch.float32).clamp(0.0, 1.0)
    if x.shape[0] == 1:
        return x[0].numpy()
    if x.shape[0] == 3:
        return x.permute(1, 2, 0).numpy()
    return x.mean(dim=0).numpy()  # other channel counts: show the mean


def image_cmap(image: Tensor) -> str | None:
    """``"gray"`` for single-channel images (anything but RGB), ``None`` for RGB."""
    return None if image.shape[0] == 3 else "gray"
