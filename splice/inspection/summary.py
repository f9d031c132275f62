"""Statistics over images, the ``warps.csv`` text, and the table on screen."""

from __future__ import annotations

import io
import math
from collections.abc import Mapping

import torch
from torch import Tensor

from .decompose import MATRIX_QUANTITIES, PROJECTIVE_QUANTITIES, TPS_QUANTITIES

__all__ = ["SCHEMA_VERSION", "CSV_QUANTITIES", "ANGLE_QUANTITIES", "AXIS_QUANTITIES", "period_of", "circular_mean",
           "around_circular_mean",
           "summarise", "csv_text", "render_inspect"]

# one-line versions for the table on screen (summary.json carries QUANTITY_HELP)
_SHORT_HELP = {
    "angle_deg": "sampling rotation (°, + clockwise)",
    "reflection": "fraction of images flipped",
    "scale_1": "larger sampling scale",
    "scale_2": "smaller sampling scale",
    "scale_axis_deg": "axis of scale_1 (°)",
    "anisotropy": "scale_1 / scale_2",
    "shift_x_px": "sampled centre, px right",
    "shift_y_px": "sampled centre, px down",
    "shift_x_frac": "… as a fraction of the width",
    "shift_y_frac": "… as a fraction of the height",
    "view_rotation_deg": "VIEWER: rotation (°, + clockwise)",
    "view_zoom_1": "VIEWER: larger zoom (1/scale_2)",
    "view_zoom_2": "VIEWER: smaller zoom (1/scale_1)",
    "view_zoom_axis_deg": "VIEWER: axis of the larger zoom (°)",
    "view_shift_x_px": "VIEWER: input centre, px right",
    "view_shift_y_px": "VIEWER: input centre, px down",
    "persp_x": "perspective term g",
    "persp_y": "perspective term h",
    "tps_mean_px": "mean control-point move (px)",
    "tps_max_px": "largest control-point move (px)",
}

SCHEMA_VERSION = 1
_CSV_FIXED = ("image", "label", "predicted", "point", "family", "file")
CSV_QUANTITIES = MATRIX_QUANTITIES + PROJECTIVE_QUANTITIES + TPS_QUANTITIES


#: quantities that are angles on a circle: summarised around their circular mean (see :func:`summarise`)
ANGLE_QUANTITIES = ("angle_deg", "view_rotation_deg")
#: quantities that are undirected axes, in (-90, 90]: an axis at 89 degrees and one at -89 are 2 degrees apart
AXIS_QUANTITIES = ("scale_axis_deg", "view_zoom_axis_deg")


def period_of(quantity: str) -> float | None:
    """The period in degrees of a quantity that repeats (360 for an angle, 180 for an axis), else ``None``."""
    return 360.0 if quantity in ANGLE_QUANTITIES else 180.0 if quantity in AXIS_QUANTITIES else None


def circular_mean(v, period: float = 360.0) -> float | None:
    """The circular mean in degrees of the finite values of ``v`` (a numpy array, degrees) that repeat every
    ``period`` degrees: the direction of their mean unit vector once each is scaled to a full turn
    (``scipy.stats.circmean``'s with ``high - low = period``), in (-period/2, period/2]; ``None`` when they
    have no direction."""
    import numpy as np

    rad = np.deg2rad(v[np.isfinite(v)] * (360.0 / period))
    if rad.size == 0:
        return None
    sin, cos = float(np.sin(rad).mean()), float(np.cos(rad).mean())
    if math.hypot(sin, cos) < 1e-12:  # the angles balance out: no direction to centre on
        return None
    centre = math.degrees(math.atan2(sin, cos)) * (period / 360.0)
    return centre + period if centre <= -period / 2 else centre


def around_circular_mean(v, period: float = 360.0):
    """Values in degrees (a numpy array) that repeat every ``period`` moved by whole periods to within half a
    period of their circular mean (:func:`circular_mean`); unchanged when that mean is undefined."""
    import numpy as np

    centre = circular_mean(v, period)
    if centre is None:
        return v
    finite = np.isfinite(v)
    out = v.copy()
    out[finite] = v[finite] - period * np.round((v[finite] - centre) / period)
    return out


def summarise(values: Tensor, circular: bool = False, period: float | None = None) -> dict[str, float | int | None]:
    """Mean, population std (ddof 0), 5th/95th percentiles (linear), min and max of the finite values.

    ``n`` counts the finite values; every statistic is ``None`` when there are none. With ``circular`` (or a
    ``period``: 360 for angles, 180 for undirected axes) the values repeat every period degrees: the mean is
    their circular mean (:func:`circular_mean`), and the other statistics are taken after moving each value
    by whole periods to within half a period of it, so that values on both sides of the seam make one spread,
    not two (the percentiles, min and max may then lie beyond it).
    """
    import numpy as np

    period = period if period is not None else 360.0 if circular else None
    v = values.detach().to("cpu", torch.float64).numpy()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"n": 0, "mean": None, "std": None, "p5": None, "p95": None, "min": None, "max": None}
    centre = circular_mean(v, period) if period is not None else None
    if centre is not None:
        v = around_circular_mean(v, period)
    mean = float(v.mean()) if centre is None else centre
    p5, p95 = np.percentile(v, [5.0, 95.0])
    return {"n": int(v.size), "mean": mean, "std": float(v.std()), "p5": float(p5),
            "p95": float(p95), "min": float(v.min()), "max": float(v.max())}


def _format_value(v: float) -> str:
    return f"{v:.10g}"


def csv_text(rows: list[dict]) -> str:
    import csv

    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(_CSV_FIXED + CSV_QUANTITIES), restval="", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: (_format_value(v) if isinstance(v, float) else v) for k, v in row.items()})
    return buf.getvalue()



def _fmt(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, str):  # a non-finite number as json_safe writes it
        return v
    return f"{v:.4g}" if abs(v) < 1e4 else f"{v:.3e}"


def render_inspect(result: Mapping, console) -> None:
    """Print one table per warp (mean, std, p5, p95 of every quantity) and the files written."""
    from rich.table import Table

    acc = result.get("accuracy")
    data = str(result["data"]).rstrip("/") or "/"  # 'my_images/' given: not 'my_images//test'
    where = data if result["split"] is None else f"{data}/{result['split']}"
    console.print(f"inspected {result['model']} on {result['n_images']} images of {where}"
                  + (f"; accuracy on them {acc:.4f}" if acc is not None else ""))
    if result.get("accuracy_note"):
        console.print(result["accuracy_note"])
    for point, w in result["warps"].items():
        shape = "x".join(str(d) for d in w["shape"])
        table = Table(title=f"warp at '{point}': {w['family']}, {shape}, {w['level']} level", title_justify="left")
        table.add_column("quantity", no_wrap=True)
        for col in ("mean", "std", "p5", "p95"):
            table.add_column(col, justify="right", no_wrap=True)
        table.add_column("meaning")
        for q, stats in w["quantities"].items():
            table.add_row(q, _fmt(stats["mean"]), _fmt(stats["std"]), _fmt(stats["p5"]), _fmt(stats["p95"]),
                          _SHORT_HELP.get(q, result["help"].get(q, "")))
        console.print(table)
        if w["family"] == "tps":
            console.print("  tps: the rotation and scale rows describe the spline at the output centre (its Jacobian), "
                          "the shift rows the point the centre reads; tps_mean_px / tps_max_px measure the control "
                          "points' displacement.")
    files = result["files"]
    written = [files["csv"], files["summary"], *files["pictures"]]
    console.print(f"wrote {result.get('out', '.')}/: {', '.join(written)}")
    console.print("sampling side: the map from output to input pixels; VIEWER rows: what the content visibly does "
                  "(rotation = -angle, or +angle where flipped; zoom = 1/scale). Angles: + = clockwise on screen, "
                  "summarised around their circular mean.")
