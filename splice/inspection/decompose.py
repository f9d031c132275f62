"""The decomposition maths: what a warp's parameters mean (sign conventions: :mod:`splice.inspection`)."""

from __future__ import annotations

import math

import torch
from torch import Tensor

from ..errors import SpliceError

__all__ = ["polar_decompose", "describe_linear", "describe_matrix", "describe_tps", "describe_theta",
           "MATRIX_QUANTITIES", "PROJECTIVE_QUANTITIES", "TPS_QUANTITIES", "QUANTITY_HELP", "quantities_for"]


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


# An axis this close to -90 degrees is the vertical, reported as 90 (a vertical stretch's singular vector comes out
# at either sign of a rounding-sized x). Common practice, no source.
_AXIS_TOL_DEG = 1e-5


def _fold_axis(x: Tensor, y: Tensor) -> Tensor:
    """Angle (degrees) of the undirected axis through ``(x, y)``, folded into ``(-90, 90]``; within
    :data:`_AXIS_TOL_DEG` of -90 it is 90."""
    deg = torch.rad2deg(torch.atan2(y, x))
    deg = torch.where(deg > 90.0, deg - 180.0, deg)
    return torch.where(deg <= -90.0 + _AXIS_TOL_DEG, torch.clamp(deg + 180.0, max=90.0), deg)


# Two principal scales closer than this (relative) make every axis principal:
# the axis is then reported as 0. A few steps of float32 (whose relative step
# is 2**-23, about 1.2e-7, IEEE 754), in which warp heads compute: an isotropic
# map set in float32 reads scales 2.5e-9 apart in float64. Common practice, no source.
_ISOTROPIC_RTOL = 1e-6


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


def pixel_linear(a: Tensor, size: tuple[int, int]) -> Tensor:
    """``(N, 2, 2)`` linear maps in normalised coordinates of a tensor of ``size=(H, W)``, in pixel units:
    ``D a D^-1`` with ``D = diag(W/2, H/2)`` (``p_px = D p``), so a rotation rigid in pixels is a rotation again
    when ``H != W``. Every polar reading of a warp goes through this (inspect's, the label-free range
    statistics')."""
    d = _pixel_scale(_check_size(size))
    return d.view(1, 2, 1) * torch.as_tensor(a, dtype=torch.float64) / d.view(1, 1, 2)


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
    out = describe_linear(pixel_linear(jac, (h, w)))
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


# Newton's method for the input centre's place in the output of a tps warp: steps, and the residual (normalised
# units) below which it has converged. Common practice, no source.
_NEWTON_STEPS = 30
_NEWTON_TOL = 1e-10


def _tps_at(coeffs: Tensor, control: Tensor, p: Tensor) -> tuple[Tensor, Tensor]:
    """The splines ``f`` of ``coeffs`` ``(N, K^2 + 3, 2)`` and their Jacobians at one point ``p`` ``(N, 2)`` each.

    ``f(p) = p + a_0 + a_1 x + a_2 y + sum_j w_j U(|p - c_j|)`` with
    ``U = r^2 log r^2``; ``grad U = 2 (p - c_j)(log r^2 + 1)``, which tends to 0
    at ``r = 0`` (``r log r -> 0``).
    """
    n_ctrl = control.shape[0]
    w, a0, a1, a2 = coeffs[:, :n_ctrl], coeffs[:, n_ctrl], coeffs[:, n_ctrl + 1], coeffs[:, n_ctrl + 2]
    diff = p[:, None, :] - control[None]  # (N, K^2, 2)
    r2 = diff.pow(2).sum(-1)
    positive = r2 > 0
    log_r2 = torch.log(torch.where(positive, r2, torch.ones_like(r2)))
    u = torch.where(positive, r2 * log_r2, torch.zeros_like(r2))
    grad = torch.where(positive.unsqueeze(-1), 2.0 * diff * (log_r2 + 1.0).unsqueeze(-1), torch.zeros_like(diff))
    f = p + a0 + a1 * p[:, :1] + a2 * p[:, 1:] + torch.einsum("nj,nja->na", u, w)
    jac = torch.eye(2, dtype=p.dtype).expand(p.shape[0], 2, 2) + torch.stack([a1, a2], dim=-1)
    jac = jac + torch.einsum("nja,njb->nab", w, grad)
    return f, jac


def _tps_preimage_of_centre(coeffs: Tensor, control: Tensor, start: Tensor) -> Tensor:
    """The output point ``q`` with ``f(q) = 0`` found by Newton's method from ``start``; NaN where it does not
    converge (a fold, or no such point near the output)."""
    q = start.clone()
    for _ in range(_NEWTON_STEPS):
        f, jac = _tps_at(coeffs, control, q)
        step, info = torch.linalg.solve_ex(jac, f)
        q = torch.where((info == 0).unsqueeze(-1), q - step, q)
    f, _ = _tps_at(coeffs, control, q)
    ok = torch.isfinite(q).all(-1) & (f.norm(dim=-1) < _NEWTON_TOL)
    return torch.where(ok.unsqueeze(-1), q, torch.full_like(q, math.nan))


def describe_tps(theta: Tensor, size: tuple[int, int], k: int) -> dict[str, Tensor]:
    """Describe thin-plate-spline warps: control-point displacement, and the spline at the output centre.

    ``theta`` is ``(N, 2 K^2)``: the offsets ``d_j`` (normalised, row-major
    ``(dx, dy)`` per control point) that move control point ``c_j`` of the
    output to ``c_j + d_j`` in the input (see :mod:`splice.warps.grids`).

    - ``tps_mean_px``, ``tps_max_px``: mean and maximum over the control
      points of ``|D d_j|``, the displacement length in pixels of the warped
      tensor (``D = diag(W/2, H/2)``).
    - the keys of :func:`describe_matrix`, with the meaning they have for a
      projective warp: the rotation and scales are those of the Jacobian of
      the spline at the output centre, the shift is ``f(0)`` (the input point
      the output centre reads) and the viewer shift is ``f^-1(0)``, found by
      Newton's method from the Jacobian's estimate (NaN where it does not
      converge). The spline is ``f(p) = p + a_0 + a_1 x + a_2 y + sum_j w_j
      U(|p - c_j|)`` with ``[w; a] = L^-1[:, :K^2] d``. Its polynomial term
      alone is not the spline's affine description: the radial sum bends and
      shifts the map everywhere but at the control points.
    """
    from ..warps import grids

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
    control = grids.tps_control_points(k)
    coeffs = torch.matmul(grids.tps_system_inverse(control), offsets)  # (N, K^2 + 3, 2): w, then a_0, a_1, a_2
    centre, jac = _tps_at(coeffs, control, torch.zeros(theta.shape[0], 2, dtype=torch.float64))
    m = torch.zeros(theta.shape[0], 3, 3, dtype=torch.float64)
    m[:, :2, :2] = jac
    m[:, :2, 2] = centre
    m[:, 2, 2] = 1.0
    out = describe_matrix(m, (h, w))
    del out["persp_x"], out["persp_y"]
    start = torch.stack([out["view_shift_x_px"], out["view_shift_y_px"]], dim=-1) / d
    start = torch.where(torch.isfinite(start), start, torch.zeros_like(start))
    view = _tps_preimage_of_centre(coeffs, control, start) * d
    out["view_shift_x_px"], out["view_shift_y_px"] = view[:, 0], view[:, 1]
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
    "angle_deg": "sampling rotation, degrees (clockwise on screen); the content turns by -angle, or by +angle "
                 "where the map flips the image (view_rotation_deg)",
    "reflection": "1 if the sampling map flips the image (det < 0), else 0; a flip is written as an up-down flip "
                  "followed by a rotation by angle_deg, so a left-right mirror reads angle 180",
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



def quantities_for(family: str) -> tuple[str, ...]:
    """The quantity names reported for a warp family, in table order."""
    if family == "tps":
        return MATRIX_QUANTITIES + TPS_QUANTITIES
    if family == "projective":
        return MATRIX_QUANTITIES + PROJECTIVE_QUANTITIES
    return MATRIX_QUANTITIES

