"""Contact sheets: the input, the sampled region drawn on it, and what the network sees."""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path

import torch
from torch import Tensor

from .decompose import describe_theta
from .geometry import outline_and_lattice

__all__ = ["PANEL", "TITLE", "HEADER", "GAP", "INNER", "MARGIN", "SHEET_PER_ROW", "OUTLINE_PER_ROW", "SHEET_IMAGES",
           "draw_contact_sheet", "draw_outline_sheet", "header"]

# ----------------------------------------------------------------------------- pictures
#
# Layout, in pixels (figures are saved at exactly this size, see splice.pictures):
#
#   contact sheet (input-level warp): groups of 3 panels (input | sampling grid on
#   the input | warped output), SHEET_PER_ROW groups per row;
#   outline sheet (feature-level warp): 1 panel per image, OUTLINE_PER_ROW per row.
#       width  = 2 MARGIN + cols * (panels * PANEL + (panels - 1) * INNER) + (cols - 1) * GAP
#       height = HEADER + rows * (TITLE + PANEL) + MARGIN
#   histograms: see splice.inspection.plots.

PANEL = 160
TITLE = 36
HEADER = 78
GAP = 24
INNER = 6
MARGIN = 12
SHEET_PER_ROW = 3
OUTLINE_PER_ROW = 6
SHEET_IMAGES = 12

_OUTSIDE = "#d9d9d9"  # light grey: the area around the input, so a dark input's edge stays visible


def _sheet_size(n: int, panels: int, per_row: int) -> tuple[int, int]:
    cols = min(n, per_row)
    rows = -(-n // per_row)
    group = panels * PANEL + (panels - 1) * INNER
    return (2 * MARGIN + cols * group + (cols - 1) * GAP, HEADER + rows * (TITLE + PANEL) + MARGIN)


def _panel(fig, size: tuple[int, int], left: int, top: int):
    """An axes of PANEL x PANEL pixels with its top-left corner at ``(left, top)``; no ticks."""
    w, h = size
    ax = fig.add_axes((left / w, 1.0 - (top + PANEL) / h, PANEL / w, PANEL / h))
    ax.set_xticks([])
    ax.set_yticks([])
    return ax


def _show(ax, image: Tensor) -> None:
    from ..pictures import image_array, image_cmap

    _, h, w = image.shape
    ax.imshow(image_array(image), cmap=image_cmap(image), vmin=0.0, vmax=1.0, extent=(0, w, h, 0),
              interpolation="nearest")
    ax.set_xlim(0, w)
    ax.set_ylim(h, 0)


def _draw_grid(ax, image: Tensor, outline: Tensor, lattice: list[Tensor]) -> None:
    """The input with the sampled region drawn on it (pixel-edge coordinates)."""
    from ..pictures import OKABE_ITO

    _show(ax, image)
    ax.set_facecolor(_OUTSIDE)
    _, h, w = image.shape
    for line in lattice:
        ax.plot(line[:, 0], line[:, 1], color=OKABE_ITO["sky_blue"], lw=0.9, alpha=0.95)
    ax.plot(outline[:, 0], outline[:, 1], color=OKABE_ITO["orange"], lw=2.0)
    ax.plot([float(outline[0, 0])], [float(outline[0, 1])], "o", color=OKABE_ITO["yellow"], ms=5,
            mec=OKABE_ITO["black"], mew=0.6)
    # show the whole sampled region, but never shrink the input below a third of the panel
    finite = outline[torch.isfinite(outline).all(dim=1)]
    lo_x = max(min(0.0, float(finite[:, 0].min())), -w) if len(finite) else 0.0
    hi_x = min(max(float(w), float(finite[:, 0].max())), 2.0 * w) if len(finite) else float(w)
    lo_y = max(min(0.0, float(finite[:, 1].min())), -h) if len(finite) else 0.0
    hi_y = min(max(float(h), float(finite[:, 1].max())), 2.0 * h) if len(finite) else float(h)
    pad = 0.04 * max(hi_x - lo_x, hi_y - lo_y)
    side = max(hi_x - lo_x, hi_y - lo_y) + 2 * pad
    cx, cy = (lo_x + hi_x) / 2, (lo_y + hi_y) / 2
    ax.set_xlim(cx - side / 2, cx + side / 2)
    ax.set_ylim(cy + side / 2, cy - side / 2)
    ax.set_aspect("equal")


def header(fig, size: tuple[int, int], title: str, note: str) -> None:
    from ..pictures import FONT_SIZE

    w, h = size
    fig.text(MARGIN / w, 1.0 - 12 / h, title, ha="left", va="top", fontsize=FONT_SIZE + 3, weight="bold")
    fig.text(MARGIN / w, 1.0 - 40 / h, note, ha="left", va="top", fontsize=FONT_SIZE, wrap=True)


def _count(n: int, of: int | None, labelled: bool = True) -> str:
    how = "seeded, across classes" if labelled else "seeded"
    return f"{n} of {of} images ({how})" if of is not None and of > n else f"{n} images"


def _class_text(classes: list[str] | None, k: int | None) -> str:
    if k is None:
        return "?"
    return classes[k] if classes and 0 <= k < len(classes) else str(k)


def _view_text(desc: dict[str, Tensor], i: int) -> str:
    rot = float(desc["view_rotation_deg"][i])
    zoom = math.sqrt(float(desc["view_zoom_1"][i]) * float(desc["view_zoom_2"][i]))
    flip = " flipped" if float(desc["reflection"][i]) else ""
    return f"view {rot:+.0f}° ×{zoom:.2f}{flip}"


def _warp_output(warp, theta: Tensor, images: Tensor, normalisation: Mapping | None) -> Tensor:
    """What the network sees after the warp, shown in [0, 1]: the normalised images resampled, then un-normalised."""
    from torch.nn import functional as F

    from ..data import normalise

    x = normalise(images.to(torch.float64), normalisation)
    grid = warp.grid(theta.to(torch.float64), images.shape[-2], images.shape[-1])
    y = F.grid_sample(x, grid, mode=warp.config.sampler, padding_mode=warp.config.padding, align_corners=False)
    if normalisation is not None:
        c = images.shape[1]
        mean = torch.as_tensor(normalisation["mean"], dtype=torch.float64).reshape(-1).expand(c).view(1, c, 1, 1)
        std = torch.as_tensor(normalisation["std"], dtype=torch.float64).reshape(-1).expand(c).view(1, c, 1, 1)
        y = y * std + mean
    return y.clamp(0.0, 1.0)



def draw_contact_sheet(path, warp, point: str, theta: Tensor, images: Tensor, *, labels=None, predicted=None,
                       classes=None, indices=None, normalisation=None, of: int | None = None) -> Path:
    """Contact sheet of an input-level warp: input | sampling grid on the input | warped output, per image."""
    from ..pictures import FONT_SIZE, new_figure, save_png

    n = images.shape[0]
    size = _sheet_size(n, 3, SHEET_PER_ROW)
    fig = new_figure(*size)
    desc = describe_theta(warp, theta)
    outline, lattice = outline_and_lattice(warp, theta, images.shape[-2:], (1.0, 1.0))
    warped = _warp_output(warp, theta, images, normalisation)
    c, h, w = images.shape[1:]
    header(fig, size, f"Warp at '{point}' ({warp.family}, {c}x{h}x{w}): {_count(n, of, labels is not None)}",
            "Each image: the input  |  the input with the region the output samples (orange: the output's "
            "border, blue: lattice, yellow dot: the output's top-left corner; grey: outside the input)  |  "
            "the warped image the network sees.  'view' = visible rotation (+ = clockwise) and zoom.")
    for i in range(n):
        row, col = divmod(i, SHEET_PER_ROW)
        left = MARGIN + col * (3 * PANEL + 2 * INNER + GAP)
        top = HEADER + row * (TITLE + PANEL) + TITLE
        index = int(indices[i]) if indices is not None else i
        truth = _class_text(classes, None if labels is None else int(labels[i]))
        titles = (f"#{index}" + ("" if labels is None else f"  true {truth}"), _view_text(desc, i),
                  "output" + ("" if predicted is None else f", predicted {_class_text(classes, int(predicted[i]))}"))
        axes = [_panel(fig, size, left + k * (PANEL + INNER), top) for k in range(3)]
        _show(axes[0], images[i])
        _draw_grid(axes[1], images[i], outline[i], [line[i] for line in lattice])
        _show(axes[2], warped[i])
        for ax, text in zip(axes, titles):
            ax.set_title(text, fontsize=FONT_SIZE - 1, pad=4)
    return save_png(fig, path)


def draw_outline_sheet(path, warp, point: str, theta: Tensor, images: Tensor, stride, *, labels=None,
                       classes=None, indices=None, of: int | None = None) -> Path:
    """Feature-level warp: its sampling outline and lattice projected onto each input image through the stride."""
    from ..pictures import FONT_SIZE, new_figure, save_png

    n = images.shape[0]
    size = _sheet_size(n, 1, OUTLINE_PER_ROW)
    fig = new_figure(*size)
    c, h, w = warp.shape
    outline, lattice = outline_and_lattice(warp, theta, (h, w), stride)
    desc = describe_theta(warp, theta)
    sy, sx = stride
    stride_text = f"{sx:g}" if sx == sy else f"{sy:g}x{sx:g}"
    header(fig, size, f"Warp at feature point '{point}' ({warp.family}, {c}x{h}x{w}, stride {stride_text}): "
            f"{_count(n, of, labels is not None)}",
            "The region the warp samples from its feature map, projected back onto the input image "
            "through the stride (orange: border, blue: lattice, yellow dot: top-left corner).")
    for i in range(n):
        row, col = divmod(i, OUTLINE_PER_ROW)
        left = MARGIN + col * (PANEL + GAP)
        top = HEADER + row * (TITLE + PANEL) + TITLE
        ax = _panel(fig, size, left, top)
        _draw_grid(ax, images[i], outline[i], [line[i] for line in lattice])
        index = int(indices[i]) if indices is not None else i
        truth = _class_text(classes, None if labels is None else int(labels[i]))
        shown = f"#{index}" + ("" if labels is None else f" true {truth}")
        ax.set_title(f"{shown}\n{_view_text(desc, i)}", fontsize=FONT_SIZE - 2, pad=3)
    return save_png(fig, path)

