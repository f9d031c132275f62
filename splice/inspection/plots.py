"""Histograms of a warp's angle, scales and shifts over the inspected images.

Layout, in pixels: one cell per quantity group, HIST_CELL_W x HIST_CELL_H,
under the sheets' HEADER; width = cells * HIST_CELL_W, height = HEADER + HIST_CELL_H.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import torch
from torch import Tensor

from .sheets import HEADER, header
from .summary import around_circular_mean, period_of

__all__ = ["HIST_CELL_W", "HIST_CELL_H", "draw_histograms"]

HIST_CELL_W = 420
HIST_CELL_H = 340


def _bins(*series):
    import numpy as np

    values = np.concatenate([s[np.isfinite(s)] for s in series]) if series else np.zeros(0)
    if values.size == 0:
        return np.linspace(-1.0, 1.0, 11)
    lo, hi = float(values.min()), float(values.max())
    if hi - lo < 1e-6 * (1.0 + abs(lo)):  # one value, up to float32 rounding: in the middle of the middle bin
        mid = 0.5 * (lo + hi)
        pad = max(1e-3, 0.05 * abs(mid))
        return np.linspace(mid - pad, mid + pad, 10)
    # Rice rule, 2 n^(1/3) bins (from memory), kept between 8 and 30
    return np.linspace(lo, hi, int(min(30, max(8, round(2.0 * values.size ** (1.0 / 3.0))))) + 1)


def _hist_groups(family: str) -> list[tuple[str, list[tuple[str, str]]]]:
    """(axis label, [(quantity, legend)]) for each histogram cell of a family."""
    groups = [
        ("sampling angle_deg (°, + = clockwise)", [("angle_deg", "angle_deg")]),
        ("principal sampling scales (zoom = 1/scale)",
         [("scale_1", "scale_1 (larger)"), ("scale_2", "scale_2 (smaller)")]),
        ("shift of the sampled centre (px)", [("shift_x_px", "x (+ = right)"), ("shift_y_px", "y (+ = down)")]),
    ]
    if family == "projective":
        groups.append(("perspective terms (normalised units)", [("persp_x", "g (x)"), ("persp_y", "h (y)")]))
    if family == "tps":
        groups.append(("control-point displacement (px)",
                       [("tps_mean_px", "mean per image"), ("tps_max_px", "max per image")]))
    return groups


def draw_histograms(path, point: str, family: str, desc: Mapping[str, Tensor]) -> Path:
    """Histograms of a warp's angle, principal scales and shifts (and perspective / tps terms) over the images."""
    import numpy as np
    from matplotlib.ticker import MaxNLocator

    from ..pictures import FONT_SIZE, OKABE_ITO, new_figure, save_png

    groups = _hist_groups(family)
    size = (len(groups) * HIST_CELL_W, HEADER + HIST_CELL_H)
    fig = new_figure(*size)
    w, h = size
    n = int(next(iter(desc.values())).shape[0])
    flipped = bool((desc["reflection"] > 0).any()) if "reflection" in desc else False
    note = ("Sampling side (output to input), pixels of the warped tensor; angles and axes centred on their "
            "circular mean. ")
    if flipped:
        note += ("Some images are flipped, and a flipped image's content turns by +angle (see view_rotation_deg), "
                 "so no axis of visible rotation is drawn.")
    else:
        note += "Top axis: the content's visible rotation (= -angle)."
    if family in ("tps", "projective"):
        note += (f" For {family}, angle and scales are the map's Jacobian at the output centre; shift, the point "
                 "it reads.")
    header(fig, size, f"Warp at '{point}' ({family}): distributions over {n} images", note)
    colours = [OKABE_ITO["blue"], OKABE_ITO["orange"]]
    for k, (label, series) in enumerate(groups):
        left, bottom, aw, ah = k * HIST_CELL_W + 62, 52, HIST_CELL_W - 84, HIST_CELL_H - 120
        ax = fig.add_axes((left / w, bottom / h, aw / w, ah / h))
        arrays = [desc[q].detach().to("cpu", torch.float64).numpy() for q, _ in series]
        arrays = [around_circular_mean(a, period_of(q)) if period_of(q) else a for (q, _), a in zip(series, arrays)]
        bins = _bins(*arrays)
        for j, ((q, legend), values, colour) in enumerate(zip(series, arrays, colours)):
            finite = values[np.isfinite(values)]
            # two outlines that coincide (equal principal scales) stay both visible: the second is drawn dashed
            # and thinner over the first, whose colour shows between the dashes
            ax.hist(finite, bins=bins, histtype="stepfilled" if len(series) == 1 else "step",
                    lw=2.0 if len(series) == 1 else (3.2 if j == 0 else 1.6), ls="-" if j == 0 else (0, (4, 3)),
                    color=colour, alpha=0.85 if len(series) == 1 else 1.0, label=legend)
        ax.set_xlabel(label, fontsize=FONT_SIZE)
        ax.set_ylabel("images", fontsize=FONT_SIZE)
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        ax.tick_params(labelsize=FONT_SIZE - 1)
        if len(series) > 1:
            ax.legend(fontsize=FONT_SIZE - 1, frameon=False)
        if series[0][0] == "angle_deg" and not flipped:
            top = ax.secondary_xaxis("top", functions=(lambda x: -x, lambda x: -x))
            top.set_xlabel("visible rotation of the content (°)", fontsize=FONT_SIZE)
            top.tick_params(labelsize=FONT_SIZE - 1)
    return save_png(fig, path)

