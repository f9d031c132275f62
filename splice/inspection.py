"""What the warps learned: the decomposition maths, per-image capture, tables and pictures.

The module has three layers, top to bottom:

1. **Pure maths** (:func:`polar_decompose`, :func:`describe_linear`,
   :func:`describe_matrix`, :func:`describe_tps`, :func:`describe_theta`):
   tensors in, tensors out, derivations in the comments.
2. **Capture** (:func:`capture`): run a spliced model on images and record
   every warp's raw parameters ``theta`` for each image.
3. **Report** (:func:`inspect`, :func:`render_inspect`): ``warps.csv``,
   ``summary.json``, the pictures, and the table on screen.

Sign conventions (one place, used everywhere below)
---------------------------------------------------
A warp's matrix maps OUTPUT normalised coordinates to INPUT normalised
coordinates (``grid_sample``'s direction): output pixel ``p`` reads the input
at ``f(p)``. The numbers are computed in *pixel units of the warped tensor*
(``x`` to the right, ``y`` **down**, origin at the centre), so a rotation is
rigid in pixels even when the tensor is not square. An angle is positive when
it turns the ``+x`` axis towards ``+y``, which on screen is **clockwise** (the
convention of ``torchvision.transforms.v2.functional.affine`` and of
:mod:`splice.distort`).

*Sampling side* (columns without a prefix) describes ``f`` itself:
``angle_deg``, ``scale_1 >= scale_2``, ``scale_axis_deg``, ``anisotropy``,
``shift_*``. *Viewer side* (columns starting with ``view_``) describes what a
person looking at the warped output sees happen to the content, i.e. the
inverse map ``f^-1``: the content turns by ``view_rotation_deg = -angle_deg``
(for a reflection the angle is its own inverse, see :func:`describe_linear`),
is magnified by ``view_zoom = 1 / scale`` and the input's centre lands at
``view_shift_*``. A warp that has learned to undo a distortion of
``splice.distort.apply_affine(angle_deg=a, scale=s)`` shows ``angle_deg = a``
and ``scale = s``: the sampling side equals the distortion it undoes.
"""

from __future__ import annotations

import io
import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import Tensor, nn

from .errors import DataError, SpliceError

__all__ = [
    "SCHEMA_VERSION",
    "MATRIX_QUANTITIES",
    "PROJECTIVE_QUANTITIES",
    "TPS_QUANTITIES",
    "QUANTITY_HELP",
    "polar_decompose",
    "describe_linear",
    "describe_matrix",
    "describe_tps",
    "describe_theta",
    "quantities_for",
    "Capture",
    "capture",
    "summarise",
    "map_points",
    "draw_contact_sheet",
    "draw_outline_sheet",
    "draw_histograms",
    "inspect",
    "render_inspect",
]

# ----------------------------------------------------------------------------- the maths


def polar_decompose(a: Tensor) -> tuple[Tensor, Tensor]:
    """Right polar decomposition ``A = U P`` of ``(..., 2, 2)`` matrices (float64).

    ``U`` is orthogonal (a rotation, or a reflection when ``det A < 0``) and
    ``P`` is symmetric positive semi-definite.

    Derivation: with the singular value decomposition ``A = W S V^T`` (``W``,
    ``V`` orthogonal, ``S = diag(s1, s2)``, ``s1 >= s2 >= 0``) insert
    ``V^T V = I``: ``A = (W V^T)(V S V^T)``. ``U = W V^T`` is a product of
    orthogonal matrices, so orthogonal; ``P = V S V^T`` is symmetric with
    eigenvalues ``s1, s2 >= 0``. ``P = sqrt(A^T A)`` is unique for every ``A``;
    ``U`` is unique whenever ``A`` is invertible. The SVD route never forms
    ``A^T A`` or an inverse, so it stays accurate for near-singular ``A``
    (where ``s2`` is tiny) and handles ``det A < 0`` with no special case: the
    sign lands in ``det U = det W det V = sign(det A)``.
    """
    a = torch.as_tensor(a, dtype=torch.float64)
    if a.shape[-2:] != (2, 2):
        raise SpliceError(
            f"polar_decompose needs (..., 2, 2) matrices, got shape {tuple(a.shape)}; "
            "pass the linear part M[..., :2, :2] of a warp matrix."
        )
    w, s, vh = torch.linalg.svd(a)
    u = w @ vh
    p = vh.transpose(-1, -2) @ (s.unsqueeze(-1) * vh)
    return u, p


def _fold_axis(x: Tensor, y: Tensor) -> Tensor:
    """Angle (degrees) of the undirected axis through ``(x, y)``, folded into ``(-90, 90]``."""
    deg = torch.rad2deg(torch.atan2(y, x))
    deg = torch.where(deg > 90.0, deg - 180.0, deg)
    return torch.where(deg <= -90.0, deg + 180.0, deg)


# Two principal scales closer than this (relative) make every axis principal:
# the axis is then reported as 0. Common practice, no source.
_ISOTROPIC_RTOL = 1e-9


def describe_linear(a: Tensor) -> dict[str, Tensor]:
    """Decompose ``(N, 2, 2)`` linear maps into rotation, reflection and principal scales.

    Returns float64 ``(N,)`` tensors:

    - ``angle_deg``: the rotation of ``U`` in ``(-180, 180]``. A proper
      rotation is ``U = R(a) = [[cos a, -sin a], [sin a, cos a]]``. A
      reflection (``det U = -1``) is written ``U = R(a) F`` with the flip
      ``F = diag(1, -1)``, i.e. ``[[cos a, sin a], [sin a, -cos a]]``. Either
      way the first column of ``U`` is ``(cos a, sin a)``, so
      ``a = atan2(U[1, 0], U[0, 0])``.
    - ``reflection``: 1.0 where ``det U < 0`` else 0.0.
    - ``scale_1 >= scale_2``: the eigenvalues of ``P`` (the singular values of ``A``).
    - ``scale_axis_deg``: the direction of ``scale_1``'s eigenvector of ``P``
      (the first right-singular vector), an undirected axis in ``(-90, 90]``;
      0 when the two scales are equal (every direction is then principal).
    - ``anisotropy``: ``scale_1 / scale_2`` (``inf`` for a singular map).
    - ``view_rotation_deg``, ``view_zoom_1 >= view_zoom_2``,
      ``view_zoom_axis_deg``: the same description of the inverse map
      ``A^-1``. From the SVD, ``A^-1 = V S^-1 W^T``, so its polar factors are
      ``U' = V W^T = U^T`` and ``P' = W S^-1 W^T``. ``U^T`` of ``R(a)`` is
      ``R(-a)``: the visible rotation is ``-angle_deg``. A reflection
      ``R(a) F`` is symmetric, hence its own inverse: the angle stays ``a``.
      The zooms are ``1 / scale_2 >= 1 / scale_1`` (``inf`` for a zero scale).
      ``A^-1`` sends ``W``'s second column to ``V``'s second column divided by
      ``scale_2``, so the content looks most magnified along ``v_2``, the
      second right-singular vector: ``view_zoom_axis_deg`` is its direction in
      the warped output (perpendicular to ``scale_axis_deg``; 0 when isotropic).
    """
    a = torch.as_tensor(a, dtype=torch.float64)
    w, s, vh = torch.linalg.svd(a)
    u = w @ vh
    angle = torch.rad2deg(torch.atan2(u[..., 1, 0], u[..., 0, 0]))
    reflection = (torch.linalg.det(u) < 0).to(torch.float64)
    # the inverse's rotation: U^T has first column (U[0, 0], U[0, 1])
    view_angle = torch.rad2deg(torch.atan2(u[..., 0, 1], u[..., 0, 0]))
    s1, s2 = s[..., 0], s[..., 1]
    isotropic = (s1 - s2) <= _ISOTROPIC_RTOL * s1
    zero = torch.zeros_like(s1)
    axis = torch.where(isotropic, zero, _fold_axis(vh[..., 0, 0], vh[..., 0, 1]))
    view_axis = torch.where(isotropic, zero, _fold_axis(vh[..., 1, 0], vh[..., 1, 1]))
    inf = torch.full_like(s1, math.inf)
    anisotropy = torch.where(s2 > 0, s1 / torch.where(s2 > 0, s2, 1.0), inf)
    zoom_1 = torch.where(s2 > 0, 1.0 / torch.where(s2 > 0, s2, 1.0), inf)
    zoom_2 = torch.where(s1 > 0, 1.0 / torch.where(s1 > 0, s1, 1.0), inf)
    # angles of exactly +-180 come out as either sign; report (-180, 180]
    angle = torch.where(angle <= -180.0, angle + 360.0, angle)
    view_angle = torch.where(view_angle <= -180.0, view_angle + 360.0, view_angle)
    return {
        "angle_deg": angle,
        "reflection": reflection,
        "scale_1": s1,
        "scale_2": s2,
        "scale_axis_deg": axis,
        "anisotropy": anisotropy,
        "view_rotation_deg": view_angle,
        "view_zoom_1": zoom_1,
        "view_zoom_2": zoom_2,
        "view_zoom_axis_deg": view_axis,
    }


def _pixel_scale(size: tuple[int, int]) -> Tensor:
    """``D = diag(W/2, H/2)``: normalised offsets times ``D`` are pixel offsets."""
    h, w = size
    return torch.tensor([w / 2.0, h / 2.0], dtype=torch.float64)


def _check_size(size) -> tuple[int, int]:
    ok = (isinstance(size, (tuple, list)) and len(size) == 2
          and all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in size))
    if not ok:
        raise SpliceError(f"size must be (H, W) of the warped tensor, two positive integers; got {size!r}.")
    return int(size[0]), int(size[1])


def describe_matrix(m: Tensor, size: tuple[int, int]) -> dict[str, Tensor]:
    """Everything :mod:`splice.inspection` reports about ``(N, 3, 3)`` sampling matrices.

    ``m`` maps output normalised coordinates to input normalised coordinates
    of a warped tensor of ``size=(H, W)``. Returns float64 ``(N,)`` tensors:
    the keys of :func:`describe_linear` plus

    - ``shift_x_px, shift_y_px``: ``f(0)``, the input point the output centre
      reads, in pixels from the centre (normalised ``t`` times ``W/2``, ``H/2``);
    - ``shift_x_frac, shift_y_frac``: the same as a fraction of the width and
      height (``t / 2``);
    - ``view_shift_x_px, view_shift_y_px``: where the input's centre shows up
      in the output, in pixels from the centre (``f^-1(0)``; NaN when ``f``
      sends it to infinity);
    - ``persp_x, persp_y``: the perspective terms ``g, h`` of the last row
      ``[g, h, 1]`` in normalised units (0 for every non-projective family).

    Derivation. Normalise ``m`` so that ``m[2, 2] = 1`` and write
    ``m = [[A, t], [g^T, 1]]``; then ``f(p) = (A p + t) / (g^T p + 1)``.

    - Linear part: the Jacobian of ``f`` at the centre ``p = 0`` is
      ``A / 1 - (A 0 + t) g^T / 1^2 = A - t g^T``; it equals ``A`` for every
      affine family (``g = 0``). It is converted to pixel units with
      ``D = diag(W/2, H/2)``: ``p_px = D p`` so ``J_px = D J D^-1``, which keeps
      the rotation rigid in pixels for non-square tensors.
    - Shift: ``f(0) = t``; in pixels ``D t``; as a fraction of the size
      ``D t / (W, H) = t / 2``.
    - Viewer shift: ``f^-1(0)`` is the dehomogenised solution ``q`` of
      ``m q = (0, 0, 1)^T``; for an affine map that is ``-A^-1 t``.
    """
    m = torch.as_tensor(m, dtype=torch.float64)
    if m.dim() != 3 or m.shape[-2:] != (3, 3):
        raise SpliceError(
            f"describe_matrix needs (N, 3, 3) sampling matrices, got shape {tuple(m.shape)}; "
            "pass Warp.matrix(theta)."
        )
    h, w = _check_size(size)
    corner = m[:, 2:3, 2:3]
    m = m / torch.where(corner != 0, corner, torch.ones_like(corner))
    a, t, g = m[:, :2, :2], m[:, :2, 2], m[:, 2, :2]
    jac = a - t.unsqueeze(-1) * g.unsqueeze(-2)
    d = _pixel_scale((h, w))
    jac_px = d.view(1, 2, 1) * jac / d.view(1, 1, 2)
    out = describe_linear(jac_px)
    shift_px = t * d
    e3 = torch.zeros(m.shape[0], 3, dtype=torch.float64)
    e3[:, 2] = 1.0
    q, info = torch.linalg.solve_ex(m, e3)
    finite = (info == 0) & (q[:, 2].abs() > 1e-12) & torch.isfinite(q).all(dim=-1)
    safe_w = torch.where(finite, q[:, 2], torch.ones_like(q[:, 2]))
    view = torch.where(finite.unsqueeze(-1), q[:, :2] / safe_w.unsqueeze(-1), torch.full_like(q[:, :2], math.nan))
    view_px = view * d
    out.update({
        "shift_x_px": shift_px[:, 0],
        "shift_y_px": shift_px[:, 1],
        "shift_x_frac": t[:, 0] / 2.0,
        "shift_y_frac": t[:, 1] / 2.0,
        "view_shift_x_px": view_px[:, 0],
        "view_shift_y_px": view_px[:, 1],
        "persp_x": g[:, 0],
        "persp_y": g[:, 1],
    })
    return out


def describe_tps(theta: Tensor, size: tuple[int, int], k: int) -> dict[str, Tensor]:
    """Describe thin-plate-spline warps: control-point displacement and the spline's affine part.

    ``theta`` is ``(N, 2 K^2)``: the offsets ``d_j`` (normalised, row-major
    ``(dx, dy)`` per control point) that move control point ``c_j`` of the
    output to ``c_j + d_j`` in the input (see :mod:`splice.warps.grids`).

    - ``tps_mean_px``, ``tps_max_px``: mean and maximum over the control
      points of ``|D d_j|``, the displacement length in pixels of the warped
      tensor (``D = diag(W/2, H/2)``).
    - the keys of :func:`describe_matrix` for the spline's own affine part.
      The spline is ``f(p) = p + a_0 + a_1 x + a_2 y + sum_j w_j U(|p - c_j|)``
      with ``[w; a] = L^-1[:, :K^2] d``; the radial sum has zero affine
      content (the side conditions ``sum w_j = 0``, ``sum w_j c_j = 0``), so the
      best affine description of ``f`` is ``A = I + [a_1 a_2]`` (columns),
      ``t = a_0``.
    """
    from .warps import grids

    theta = torch.as_tensor(theta, dtype=torch.float64)
    h, w = _check_size(size)
    n_ctrl = k * k
    if theta.dim() != 2 or theta.shape[1] != 2 * n_ctrl:
        raise SpliceError(
            f"a tps warp with a {k}x{k} control grid takes theta of shape (N, {2 * n_ctrl}), "
            f"got {tuple(theta.shape)}."
        )
    offsets = theta.reshape(theta.shape[0], n_ctrl, 2)
    d = _pixel_scale((h, w))
    length = (offsets * d).norm(dim=-1)
    inverse = grids.tps_system_inverse(grids.tps_control_points(k))
    coeffs = torch.matmul(inverse, offsets)  # (N, K^2 + 3, 2): w, then a_0, a_1, a_2
    a0, a1, a2 = coeffs[:, n_ctrl], coeffs[:, n_ctrl + 1], coeffs[:, n_ctrl + 2]
    m = torch.zeros(theta.shape[0], 3, 3, dtype=torch.float64)
    m[:, :2, 0] = a1
    m[:, :2, 1] = a2
    m[:, 0, 0] += 1.0
    m[:, 1, 1] += 1.0
    m[:, :2, 2] = a0
    m[:, 2, 2] = 1.0
    out = describe_matrix(m, (h, w))
    del out["persp_x"], out["persp_y"]
    out["tps_mean_px"] = length.mean(dim=1)
    out["tps_max_px"] = length.amax(dim=1)
    return out


def describe_theta(warp, theta: Tensor, size: tuple[int, int] | None = None) -> dict[str, Tensor]:
    """Describe a :class:`~splice.warps.Warp`'s raw parameters ``(N, P)`` (float64 ``(N,)`` tensors).

    ``size`` defaults to the warp's own ``(H, W)``. Only the quantities of the
    warp's family are returned (:func:`quantities_for`).
    """
    size = tuple(warp.shape[1:]) if size is None else size
    theta = torch.as_tensor(theta).detach().to("cpu", torch.float64)
    if warp.family == "tps":
        return describe_tps(theta, size, warp.config.tps_k)
    out = describe_matrix(warp.matrix(theta), size)
    if warp.family != "projective":
        del out["persp_x"], out["persp_y"]
    return out


MATRIX_QUANTITIES = (
    "angle_deg", "reflection", "scale_1", "scale_2", "scale_axis_deg", "anisotropy",
    "shift_x_px", "shift_y_px", "shift_x_frac", "shift_y_frac",
    "view_rotation_deg", "view_zoom_1", "view_zoom_2", "view_zoom_axis_deg",
    "view_shift_x_px", "view_shift_y_px",
)
PROJECTIVE_QUANTITIES = ("persp_x", "persp_y")
TPS_QUANTITIES = ("tps_mean_px", "tps_max_px")

QUANTITY_HELP = {
    "angle_deg": "sampling rotation, degrees (clockwise on screen); the content turns by -angle",
    "reflection": "1 if the sampling map flips the image (det < 0), else 0",
    "scale_1": "larger principal sampling scale (input pixels read per output pixel)",
    "scale_2": "smaller principal sampling scale",
    "scale_axis_deg": "direction of scale_1 in the output, degrees in (-90, 90]",
    "anisotropy": "scale_1 / scale_2 (1 = no stretch)",
    "shift_x_px": "input point read by the output centre, pixels right of centre",
    "shift_y_px": "input point read by the output centre, pixels below centre",
    "shift_x_frac": "shift_x_px as a fraction of the width",
    "shift_y_frac": "shift_y_px as a fraction of the height",
    "view_rotation_deg": "VIEWER: visible rotation of the content, degrees (clockwise on screen)",
    "view_zoom_1": "VIEWER: larger apparent zoom of the content (1 / scale_2)",
    "view_zoom_2": "VIEWER: smaller apparent zoom of the content (1 / scale_1)",
    "view_zoom_axis_deg": "VIEWER: direction of view_zoom_1 in the output, degrees in (-90, 90]",
    "view_shift_x_px": "VIEWER: where the input centre appears, pixels right of the output centre",
    "view_shift_y_px": "VIEWER: where the input centre appears, pixels below the output centre",
    "persp_x": "perspective term g of the last row [g, h, 1] (normalised units)",
    "persp_y": "perspective term h of the last row [g, h, 1] (normalised units)",
    "tps_mean_px": "mean control-point displacement, pixels",
    "tps_max_px": "largest control-point displacement, pixels",
}


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


def quantities_for(family: str) -> tuple[str, ...]:
    """The quantity names reported for a warp family, in table order."""
    if family == "tps":
        return MATRIX_QUANTITIES + TPS_QUANTITIES
    if family == "projective":
        return MATRIX_QUANTITIES + PROJECTIVE_QUANTITIES
    return MATRIX_QUANTITIES


# ----------------------------------------------------------------------------- capture


@dataclass
class Capture:
    """What :func:`capture` recorded: each warp's ``theta`` per image and the model outputs.

    ``thetas`` maps point name to a float64 CPU tensor ``(N, P)``; ``logits`` is
    the model's ``(N, K)`` output on the CPU (``None`` when the model does not
    return one tensor).
    """

    thetas: dict[str, Tensor]
    logits: Tensor | None


def capture(model: nn.Module, images: Tensor, *, normalisation: Mapping | None = None,
            batch_size: int = 64) -> Capture:
    """Run ``model`` on ``images`` (``(N, C, H, W)`` in [0, 1]) and record every warp's ``theta``.

    Images are normalised with ``normalisation`` first (as the model was
    trained), moved to the model's device in batches of ``batch_size``, and
    run in eval mode without gradients. The warps' ``record`` flags and
    ``last_theta`` and the model's train/eval mode are restored afterwards.
    """
    from .data import normalise
    from .surgery import warps_of

    warps = warps_of(model)
    if not warps:
        raise SpliceError("capture needs a spliced model with at least one warp; this model has none. "
                          "Splice one first with splice.insert(...) or 'splice insert'.")
    if not isinstance(images, Tensor) or images.dim() != 4:
        raise DataError(f"capture needs images (N, C, H, W) in [0, 1]; got {getattr(images, 'shape', images)!r}.")
    _check_positive_int("batch_size", batch_size)
    param = next(iter(model.parameters()), None)
    device = param.device if param is not None else torch.device("cpu")
    dtype = param.dtype if param is not None else torch.float32
    was_training = model.training
    was_recording = {name: (w.record, w.last_theta) for name, w in warps.items()}
    thetas: dict[str, list[Tensor]] = {name: [] for name in warps}
    outputs: list[Tensor] = []
    single_tensor = True
    try:
        model.eval()
        for w in warps.values():
            w.record = True
        with torch.no_grad():
            for start in range(0, images.shape[0], batch_size):
                x = normalise(images[start:start + batch_size], normalisation).to(device=device, dtype=dtype)
                out = model(x)
                for name, w in warps.items():
                    thetas[name].append(w.last_theta.to("cpu", torch.float64))
                if isinstance(out, Tensor) and out.dim() == 2:
                    outputs.append(out.to("cpu", torch.float32))
                else:
                    single_tensor = False
    finally:
        model.train(was_training)
        for name, w in warps.items():
            w.record, w.last_theta = was_recording[name]
    return Capture(
        thetas={name: torch.cat(parts) for name, parts in thetas.items()},
        logits=torch.cat(outputs) if single_tensor and outputs else None,
    )


def _check_positive_int(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise DataError(f"{name} must be a positive integer; got {value!r}.")
    return value


# ----------------------------------------------------------------------------- statistics and files

SCHEMA_VERSION = 1
_CSV_FIXED = ("image", "label", "predicted", "point", "family")
_CSV_QUANTITIES = MATRIX_QUANTITIES + PROJECTIVE_QUANTITIES + TPS_QUANTITIES


def summarise(values: Tensor) -> dict[str, float | int | None]:
    """Mean, population std (ddof 0), 5th/95th percentiles (linear), min and max of the finite values.

    ``n`` counts the finite values; every statistic is ``None`` when there are none.
    """
    import numpy as np

    v = values.detach().to("cpu", torch.float64).numpy()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"n": 0, "mean": None, "std": None, "p5": None, "p95": None, "min": None, "max": None}
    p5, p95 = np.percentile(v, [5.0, 95.0])
    return {"n": int(v.size), "mean": float(v.mean()), "std": float(v.std()), "p5": float(p5),
            "p95": float(p95), "min": float(v.min()), "max": float(v.max())}


def _format_value(v: float) -> str:
    return f"{v:.10g}"


def _csv_text(rows: list[dict]) -> str:
    import csv

    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(_CSV_FIXED + _CSV_QUANTITIES), restval="", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: (_format_value(v) if isinstance(v, float) else v) for k, v in row.items()})
    return buf.getvalue()


def _json_safe(obj):
    """Non-finite floats become ``None`` (JSON has no inf/NaN)."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    return obj


# ----------------------------------------------------------------------------- sampling-grid geometry
#
# A picture of a warp draws, on the image the warp reads, where its output
# samples: the output's border (the "outline") and a lattice of lines through
# it. Points are taken on the output in normalised coordinates, sent through
# the warp's own map f (the same maths as Warp.grid, evaluated at exact border
# points rather than pixel centres) and converted to input pixel-edge
# coordinates: X = (x + 1) W / 2, so X = 0 is the left edge of the left-most
# pixel (matplotlib's imshow extent (0, W, H, 0) uses the same frame).
#
# Feature-level warps read a feature map of h x w pixels with stride
# (sy, sx) = input size / point size (the definition of splice.graph.Point.stride).
# A feature pixel edge X_f covers input pixels up to X = sx X_f, so the
# feature map's normalised coordinates map onto the input by
# X = (x + 1) w sx / 2. This is the feature map's footprint on the input; it
# ignores the half-receptive-field offsets of padded convolutions.

_OUTLINE_STEPS = 48  # points per edge: enough for a smooth curve under tps or projective maps
_LATTICE_LINES = 5  # interior lattice lines per axis (at -2/3 ... 2/3 for 5)


def _outline() -> Tensor:
    """The output's border, ``(4 * steps + 1, 2)`` normalised points: top, right, bottom, left edges, closed."""
    s = torch.linspace(-1.0, 1.0, _OUTLINE_STEPS + 1, dtype=torch.float64)[:-1]
    one = torch.ones_like(s)
    top = torch.stack([s, -one], 1)
    right = torch.stack([one, s], 1)
    bottom = torch.stack([-s, one], 1)
    left = torch.stack([-one, -s], 1)
    pts = torch.cat([top, right, bottom, left])
    return torch.cat([pts, pts[:1]])


def _lattice() -> list[Tensor]:
    """Interior lattice lines of the output, each ``(steps + 1, 2)`` normalised points."""
    s = torch.linspace(-1.0, 1.0, _OUTLINE_STEPS + 1, dtype=torch.float64)
    levels = torch.linspace(-1.0, 1.0, _LATTICE_LINES + 2, dtype=torch.float64)[1:-1]
    lines = []
    for level in levels.tolist():
        lines.append(torch.stack([torch.full_like(s, level), s], 1))  # vertical line x = level
        lines.append(torch.stack([s, torch.full_like(s, level)], 1))  # horizontal line y = level
    return lines


def map_points(warp, theta: Tensor, points: Tensor) -> Tensor:
    """Send output points ``(M, 2)`` (normalised) through each warp ``theta (N, P)``: ``(N, M, 2)``.

    Matrix families: ``q = M (x, y, 1)^T`` dehomogenised with the same guarded
    denominator as the warp's grid; tps: the spline evaluated at the points
    with the grid code itself (:func:`splice.warps.grids.tps_grid`).
    """
    from .warps import grids

    theta = torch.as_tensor(theta).to("cpu", torch.float64)
    pts = torch.as_tensor(points, dtype=torch.float64)
    base = torch.cat([pts, torch.ones(pts.shape[0], 1, dtype=torch.float64)], dim=1)  # (M, 3)
    if warp.family == "tps":
        control = grids.tps_control_points(warp.config.tps_k)
        kernel = grids.tps_kernel(base, control)
        inverse = grids.tps_system_inverse(control)
        offsets = theta.reshape(theta.shape[0], -1, 2)
        return grids.tps_grid(base, kernel, inverse, offsets, 1, pts.shape[0]).reshape(theta.shape[0], -1, 2)
    m = warp.matrix(theta)
    q = torch.matmul(base, m.transpose(1, 2))
    return q[..., :2] / grids.safe_denominator(q[..., 2:3])


def _to_input_pixels(xy: Tensor, feature_hw: tuple[int, int], stride: tuple[float, float]) -> Tensor:
    """Normalised coordinates of a (feature) map -> pixel-edge coordinates on the model input."""
    h, w = feature_hw
    sy, sx = stride
    scale = torch.tensor([w * sx / 2.0, h * sy / 2.0], dtype=torch.float64)
    return (xy + 1.0) * scale


# ----------------------------------------------------------------------------- pictures
#
# Layout, in pixels (figures are saved at exactly this size, see splice.pictures):
#
#   contact sheet (input-level warp): groups of 3 panels (input | sampling grid on
#   the input | warped output), SHEET_PER_ROW groups per row;
#   outline sheet (feature-level warp): 1 panel per image, OUTLINE_PER_ROW per row.
#       width  = 2 MARGIN + cols * (panels * PANEL + (panels - 1) * INNER) + (cols - 1) * GAP
#       height = HEADER + rows * (TITLE + PANEL) + MARGIN
#   histograms: one cell per quantity group, HIST_CELL_W x HIST_CELL_H, under HEADER.
#       width = cells * HIST_CELL_W, height = HEADER + HIST_CELL_H

PANEL = 160
TITLE = 36
HEADER = 78
GAP = 24
INNER = 6
MARGIN = 12
SHEET_PER_ROW = 3
OUTLINE_PER_ROW = 6
SHEET_IMAGES = 12
HIST_CELL_W = 420
HIST_CELL_H = 340

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
    from .pictures import image_array, image_cmap

    _, h, w = image.shape
    ax.imshow(image_array(image), cmap=image_cmap(image), vmin=0.0, vmax=1.0, extent=(0, w, h, 0),
              interpolation="nearest")
    ax.set_xlim(0, w)
    ax.set_ylim(h, 0)


def _draw_grid(ax, image: Tensor, outline: Tensor, lattice: list[Tensor]) -> None:
    """The input with the sampled region drawn on it (pixel-edge coordinates)."""
    from .pictures import OKABE_ITO

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


def _header(fig, size: tuple[int, int], title: str, note: str) -> None:
    from .pictures import FONT_SIZE

    w, h = size
    fig.text(MARGIN / w, 1.0 - 12 / h, title, ha="left", va="top", fontsize=FONT_SIZE + 3, weight="bold")
    fig.text(MARGIN / w, 1.0 - 40 / h, note, ha="left", va="top", fontsize=FONT_SIZE, wrap=True)


def _count(n: int, of: int | None) -> str:
    return f"the first {n} of {of} images" if of is not None and of > n else f"{n} images"


def _class_text(classes: list[str] | None, k: int | None) -> str:
    if k is None:
        return "?"
    return classes[k] if classes and 0 <= k < len(classes) else str(k)


def _view_text(desc: dict[str, Tensor], i: int) -> str:
    rot = float(desc["view_rotation_deg"][i])
    zoom = math.sqrt(float(desc["view_zoom_1"][i]) * float(desc["view_zoom_2"][i]))
    flip = ", flipped" if float(desc["reflection"][i]) else ""
    return f"view: {rot:+.0f}°, zoom ×{zoom:.2f}{flip}"


def _warp_output(warp, theta: Tensor, images: Tensor, normalisation: Mapping | None) -> Tensor:
    """What the network sees after the warp, shown in [0, 1]: the normalised images resampled, then un-normalised."""
    from torch.nn import functional as F

    from .data import normalise

    x = normalise(images.to(torch.float64), normalisation)
    grid = warp.grid(theta.to(torch.float64), images.shape[-2], images.shape[-1])
    y = F.grid_sample(x, grid, mode=warp.config.sampler, padding_mode=warp.config.padding, align_corners=False)
    if normalisation is not None:
        c = images.shape[1]
        mean = torch.as_tensor(normalisation["mean"], dtype=torch.float64).reshape(-1).expand(c).view(1, c, 1, 1)
        std = torch.as_tensor(normalisation["std"], dtype=torch.float64).reshape(-1).expand(c).view(1, c, 1, 1)
        y = y * std + mean
    return y.clamp(0.0, 1.0)


def _geometry(warp, theta: Tensor, feature_hw, stride) -> tuple[Tensor, list[Tensor]]:
    """Outline ``(N, M, 2)`` and lattice lines (each ``(N, L, 2)``) in input pixel coordinates."""
    outline = _to_input_pixels(map_points(warp, theta, _outline()), feature_hw, stride)
    lattice = [_to_input_pixels(map_points(warp, theta, line), feature_hw, stride) for line in _lattice()]
    return outline, lattice


def draw_contact_sheet(path, warp, point: str, theta: Tensor, images: Tensor, *, labels=None, predicted=None,
                       classes=None, indices=None, normalisation=None, of: int | None = None) -> Path:
    """Contact sheet of an input-level warp: input | sampling grid on the input | warped output, per image."""
    from .pictures import FONT_SIZE, new_figure, save_png

    n = images.shape[0]
    size = _sheet_size(n, 3, SHEET_PER_ROW)
    fig = new_figure(*size)
    desc = describe_theta(warp, theta)
    outline, lattice = _geometry(warp, theta, images.shape[-2:], (1.0, 1.0))
    warped = _warp_output(warp, theta, images, normalisation)
    c, h, w = images.shape[1:]
    _header(fig, size, f"Warp at '{point}' ({warp.family}, {c}x{h}x{w}): {_count(n, of)}",
            "Each image: the input  |  the input with the region the output samples (orange: the output's "
            "border, blue: lattice, yellow dot: the output's top-left corner; grey: outside the input)  |  "
            "the warped image the network sees.  'view' = visible rotation (+ = clockwise) and zoom.")
    for i in range(n):
        row, col = divmod(i, SHEET_PER_ROW)
        left = MARGIN + col * (3 * PANEL + 2 * INNER + GAP)
        top = HEADER + row * (TITLE + PANEL) + TITLE
        index = int(indices[i]) if indices is not None else i
        truth = _class_text(classes, None if labels is None else int(labels[i]))
        titles = (f"#{index}  true {truth}", _view_text(desc, i),
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
    from .pictures import FONT_SIZE, new_figure, save_png

    n = images.shape[0]
    size = _sheet_size(n, 1, OUTLINE_PER_ROW)
    fig = new_figure(*size)
    c, h, w = warp.shape
    outline, lattice = _geometry(warp, theta, (h, w), stride)
    desc = describe_theta(warp, theta)
    sy, sx = stride
    stride_text = f"{sx:g}" if sx == sy else f"{sy:g}x{sx:g}"
    _header(fig, size, f"Warp at feature point '{point}' ({warp.family}, {c}x{h}x{w}, stride {stride_text}): "
            f"{_count(n, of)}",
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
        ax.set_title(f"#{index} true {truth}\n{_view_text(desc, i)}", fontsize=FONT_SIZE - 2, pad=3)
    return save_png(fig, path)


def _bins(*series):
    import numpy as np

    values = np.concatenate([s[np.isfinite(s)] for s in series]) if series else np.zeros(0)
    if values.size == 0:
        return np.linspace(-1.0, 1.0, 11)
    lo, hi = float(values.min()), float(values.max())
    if hi - lo < 1e-9 * (1.0 + abs(lo)):
        pad = max(1e-3, 0.05 * abs(lo))
        lo, hi = lo - pad, hi + pad
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

    from .pictures import FONT_SIZE, OKABE_ITO, new_figure, save_png

    groups = _hist_groups(family)
    size = (len(groups) * HIST_CELL_W, HEADER + HIST_CELL_H)
    fig = new_figure(*size)
    w, h = size
    n = int(next(iter(desc.values())).shape[0])
    _header(fig, size, f"Warp at '{point}' ({family}): distributions over {n} images",
            "Sampling side (the map from output to input), in pixels of the warped tensor. The top axis of the "
            "angle shows the content's visible rotation (= -angle); a warp that undoes a clockwise turn by a "
            "has angle_deg = a." + (" For tps, angle, scales and shift describe the spline's affine part."
                                    if family == "tps" else ""))
    colours = [OKABE_ITO["blue"], OKABE_ITO["orange"]]
    for k, (label, series) in enumerate(groups):
        left, bottom, aw, ah = k * HIST_CELL_W + 62, 52, HIST_CELL_W - 84, HIST_CELL_H - 120
        ax = fig.add_axes((left / w, bottom / h, aw / w, ah / h))
        arrays = [desc[q].detach().to("cpu", torch.float64).numpy() for q, _ in series]
        bins = _bins(*arrays)
        for (q, legend), values, colour in zip(series, arrays, colours):
            finite = values[np.isfinite(values)]
            ax.hist(finite, bins=bins, histtype="stepfilled" if len(series) == 1 else "step", lw=2.0,
                    color=colour, alpha=0.85 if len(series) == 1 else 1.0, label=legend)
        ax.set_xlabel(label, fontsize=FONT_SIZE)
        ax.set_ylabel("images", fontsize=FONT_SIZE)
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        ax.tick_params(labelsize=FONT_SIZE - 1)
        if len(series) > 1:
            ax.legend(fontsize=FONT_SIZE - 1, frameon=False)
        if series[0][0] == "angle_deg":
            top = ax.secondary_xaxis("top", functions=(lambda x: -x, lambda x: -x))
            top.set_xlabel("visible rotation of the content (°)", fontsize=FONT_SIZE)
            top.tick_params(labelsize=FONT_SIZE - 1)
    return save_png(fig, path)


# ----------------------------------------------------------------------------- the report


def _first_images(ds, n: int) -> tuple[Tensor, Tensor, Tensor | None]:
    """The first ``n`` images of a split (all of them if it is smaller), labels and dataset indices."""
    k = min(n, len(ds))
    if k == 0:
        raise DataError(f"the {getattr(ds, 'split', '')} split of {getattr(ds, 'name', 'the data')} holds no images; "
                        "choose another split or add images.")
    if isinstance(getattr(ds, "images", None), Tensor):
        images, labels = ds.images[:k], ds.labels[:k]
    else:
        items = [ds[i] for i in range(k)]
        images = torch.stack([x for x, _ in items])
        labels = torch.tensor([int(y) for _, y in items], dtype=torch.long)
    return images.to(torch.float32), labels, torch.arange(k)


def _stride(input_shape, warp_shape) -> tuple[float, float]:
    """``(sy, sx)`` = input size / point size, as :class:`splice.graph.Point` defines the stride."""
    return (input_shape[1] / warp_shape[1], input_shape[2] / warp_shape[2])


def _safe_name(point: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in point)


def inspect(folder, *, data: str, n: int = 64, split: str = "test", out, trust_pickle: bool = False,
            batch_size: int = 64, sheet_images: int = SHEET_IMAGES, pictures: bool = True) -> dict:
    """Show what the warps of a spliced folder learned, on ``n`` images of a data split.

    Writes to ``out``: ``warps.csv`` (one row per image per warp, the
    quantities of :data:`QUANTITY_HELP`), ``summary.json`` (the returned dict)
    and, with ``pictures=True``, for each warp ``hist_<point>.png`` plus
    ``sheet_<point>.png`` (input-level warps: input | sampling grid | output for
    the first ``sheet_images`` images) or ``outline_<point>.png``
    (feature-level warps: the sampling outline projected onto the input).

    Returns ``{"schema_version", "model", "data", "split", "n_images",
    "accuracy", "warps": {point: {"family", "level", "shape", "stride",
    "quantities": {name: {"n", "mean", "std", "p5", "p95", "min", "max"}}}},
    "help", "files", "out"}``; non-finite statistics are ``None``.

    >>> report = splice.inspect("out/tray-affine", data="digits-moved", out="out/report")  # doctest: +SKIP
    >>> report["warps"]["input"]["quantities"]["angle_deg"]["mean"]                           # doctest: +SKIP
    """
    from ._io import atomic_write_json, atomic_write_text
    from .data import open_data
    from .store import load
    from .surgery import warps_of

    _check_positive_int("n", n)
    _check_positive_int("sheet_images", sheet_images)
    if out is None:
        raise SpliceError("inspect needs an output folder for its report; pass out=DIR (--out DIR).")
    model = load(folder, trust_pickle=trust_pickle)
    warps = warps_of(model)
    if not warps:
        raise SpliceError(
            f"'{folder}' holds no warps, so there is nothing to inspect; give a folder written by "
            "'splice insert' or 'splice tune' with a warp recipe."
        )
    info = model.splice_info
    input_shape = tuple(info["input_shape"])
    normalisation = info.get("normalisation")
    ds = open_data(data, split, input_shape=input_shape)
    classes = list(getattr(ds, "classes", []) or []) or info.get("class_names")
    images, labels, indices = _first_images(ds, n)
    cap = capture(model, images, normalisation=normalisation, batch_size=batch_size)
    predicted = None
    accuracy = None
    if cap.logits is not None and classes and cap.logits.shape[1] == len(classes):
        predicted = cap.logits.argmax(dim=1)
        accuracy = float((predicted == labels).to(torch.float64).mean())
    outdir = Path(out)
    outdir.mkdir(parents=True, exist_ok=True)

    rows: list[dict] = []
    summary_warps: dict[str, dict] = {}
    files = {"csv": "warps.csv", "summary": "summary.json", "pictures": []}
    descriptions = {}
    for point, warp in warps.items():
        theta = cap.thetas[point]
        desc = describe_theta(warp, theta)
        descriptions[point] = desc
        level = "input" if point == "input" else "feature"
        stride = _stride(input_shape, warp.shape)
        summary_warps[point] = {
            "family": warp.family,
            "level": level,
            "shape": list(warp.shape),
            "stride": [stride[0], stride[1]],
            "quantities": {q: summarise(desc[q]) for q in quantities_for(warp.family)},
        }
        for i in range(images.shape[0]):
            row = {"image": int(indices[i]), "label": int(labels[i]),
                   "predicted": "" if predicted is None else int(predicted[i]),
                   "point": point, "family": warp.family}
            row.update({q: float(desc[q][i]) for q in quantities_for(warp.family)})
            rows.append(row)
        if pictures:
            k = min(sheet_images, images.shape[0])
            name = _safe_name(point)
            common = {"labels": labels[:k], "classes": classes, "indices": indices[:k], "of": int(images.shape[0])}
            if level == "input":
                path = draw_contact_sheet(outdir / f"sheet_{name}.png", warp, point, theta[:k], images[:k],
                                          predicted=None if predicted is None else predicted[:k],
                                          normalisation=normalisation, **common)
            else:
                path = draw_outline_sheet(outdir / f"outline_{name}.png", warp, point, theta[:k], images[:k],
                                          stride, **common)
            files["pictures"].append(path.name)
            hist = draw_histograms(outdir / f"hist_{name}.png", point, warp.family, desc)
            files["pictures"].append(hist.name)

    atomic_write_text(outdir / "warps.csv", _csv_text(rows))
    used = sorted({q for w in summary_warps.values() for q in w["quantities"]}, key=_CSV_QUANTITIES.index)
    result = _json_safe({
        "schema_version": SCHEMA_VERSION,
        "model": str(folder),
        "data": str(data),
        "split": split,
        "n_images": int(images.shape[0]),
        "accuracy": accuracy,
        "warps": summary_warps,
        "help": {q: QUANTITY_HELP[q] for q in used},
        "files": files,
    })
    atomic_write_json(outdir / "summary.json", result)
    result["out"] = str(outdir)
    return result


def _fmt(v) -> str:
    if v is None:
        return "-"
    return f"{v:.4g}" if abs(v) < 1e4 else f"{v:.3e}"


def render_inspect(result: Mapping, console) -> None:
    """Print one table per warp (mean, std, p5, p95 of every quantity) and the files written."""
    from rich.table import Table

    acc = result.get("accuracy")
    console.print(f"inspected {result['model']} on {result['n_images']} images of {result['data']}/{result['split']}"
                  + (f"; accuracy on them {acc:.4f}" if acc is not None else ""))
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
            console.print("  tps: the rotation, scale and shift rows describe the spline's affine part; "
                          "tps_mean_px / tps_max_px measure the control points' displacement.")
    files = result["files"]
    written = [files["csv"], files["summary"], *files["pictures"]]
    console.print(f"wrote {result.get('out', '.')}/: {', '.join(written)}")
    console.print("sampling side: the map from output to input pixels; VIEWER rows: what the content visibly does "
                  "(rotation = -angle, zoom = 1/scale). Angles: + = clockwise on screen.")
