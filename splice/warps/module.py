"""The :class:`Warp` module (a spatial transformer) and its cost model.

``Warp`` = localisation head -> raw parameters ``theta`` -> sampling grid ->
``grid_sample``. The maths lives in :mod:`splice.warps.families` and
:mod:`splice.warps.grids`; this module only holds state (the head and the
non-persistent grid buffers) and wires the pieces together.
"""

from __future__ import annotations

import contextlib
from typing import Any

import torch
from torch import Tensor, nn
from torch.nn import functional as F

from splice.warps import grids
from splice.warps.families import (
    THETA_LIMIT,
    WarpConfig,
    WarpError,
    identity_theta,
    theta_to_matrix,
)
from splice.warps.head import LocalisationHead, head_macs, head_param_count

__all__ = ["SAMPLER_TAPS", "Warp", "needs_rounding_correction", "warp_cost", "warp_bytes"]

# Input pixels read per output element and channel by grid_sample: one
# multiply-accumulate per tap. Bilinear reads a 2x2 neighbourhood, bicubic 4x4.
SAMPLER_TAPS = {"nearest": 1, "bilinear": 4, "bicubic": 16}


def _is_pow2(n: int) -> bool:
    return n > 0 and n & (n - 1) == 0


def needs_rounding_correction(sampler: str, height: int, width: int) -> bool:
    """Whether :class:`Warp` adds the identity rounding correction (see below).

    ``grid_sample`` turns a normalised ``x`` into a pixel position with
    ``u = (x + 1) W / 2 - 0.5`` (CPU; CUDA uses ``((x + 1) W - 1) / 2``). The
    pixel centre ``x_i = (2i + 1) / W - 1`` is a dyadic rational -- exactly
    representable, with every step of that formula exact -- only when ``W``
    is a power of two. Otherwise ``u`` misses ``i`` by up to one ulp of ``u``
    (about ``W * 2^-24`` in float32, measured up to 6e-5 relative at
    ``W = 1000``), and bilinear/bicubic weights leak that much of the
    neighbours into an identity warp. Nearest rounds ``u`` to ``i`` regardless.

    The fix is a residual form of the same warp::

        y = x + (S(x, G) - S(x, B))        S = grid_sample, B = base grid

    Mathematically ``S(x, B) = x`` so ``y = S(x, G)``; numerically, at the
    identity ``G == B`` bit for bit, the bracket is exactly 0 and ``y == x``
    exactly. Away from the identity ``y`` differs from ``S(x, G)`` by the
    sampler's own rounding error at the base grid. It costs one extra sampling
    pass, so it is skipped when it cannot matter (nearest, or both sides
    powers of two).
    """
    return sampler != "nearest" and not (_is_pow2(height) and _is_pow2(width))


def _autocast_off(t: Tensor):
    """A block with autocast off on ``t``'s device when it is on there (else nothing, so tracers see no context)."""
    kind = t.device.type
    if kind in ("cpu", "cuda", "xpu", "mps") and torch.is_autocast_enabled(kind):
        return torch.autocast(kind, enabled=False)
    return contextlib.nullcontext()


def _check_shape(name: str, shape: Any) -> tuple[int, int, int]:
    ok = (
        isinstance(shape, (tuple, list))
        and len(shape) == 3
        and all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in shape)
    )
    if not ok:
        raise WarpError(
            f"{name}={shape!r} is not a (C, H, W) shape; give three positive integers "
            "without the batch dimension, e.g. (3, 32, 32)."
        )
    return (int(shape[0]), int(shape[1]), int(shape[2]))


def warp_bytes(config: WarpConfig, shape: tuple[int, int, int], loc_shape: tuple[int, int, int] | None = None,
               dtype: torch.dtype | None = None) -> int:
    """Peak bytes of building ``Warp(config, shape, loc_shape, dtype=dtype)``, from the shapes alone.

    The head's parameters (:func:`warp_cost`) plus the grid buffers, which are
    computed in float64 and then rounded once to at least float32: ``3 H W``
    values for the base grid and, for tps, ``H W K^2`` weights, each held in
    float64 and in the grid's dtype while it is built, with the tps kernel
    (``H W (K^2 + 3)`` values in float64) beside them.
    """
    dtype = dtype or torch.get_default_dtype()
    size = torch.empty((), dtype=dtype).element_size()
    grid_size = torch.empty((), dtype=grids.grid_dtype(dtype)).element_size()
    params, _ = warp_cost(config, shape, loc_shape)
    _, h, w = shape
    per_pixel = (3 + (config.tps_k ** 2 if config.family == "tps" else 0)) * (8 + grid_size)
    if config.family == "tps":
        per_pixel += (config.tps_k ** 2 + 3) * 8
    return params * size + h * w * per_pixel


def warp_cost(
    config: WarpConfig,
    shape: tuple[int, int, int],
    loc_shape: tuple[int, int, int] | None = None,
) -> tuple[int, int]:
    """``(params, macs)`` of the :class:`Warp` that ``Warp(config, shape, loc_shape)`` builds.

    ``params`` is exact (only the head has parameters; grid buffers are not
    parameters). ``macs`` are multiply-accumulates for one sample::

        head      see splice.warps.head.head_macs (pool, two 3x3 convs, 4x4 pool, two Linear)
        grid      matrix families: 6 HW  (B M[:2]^T, 3 MACs per coordinate)
                  projective:     11 HW  (B M^T, 9 MACs per point, plus 2 divisions)
                  tps:             2 HW K^2  (the displacement, A d; A is formed once, in float64)
        sampler   taps * C * H * W  with taps = 1 nearest, 4 bilinear, 16 bicubic,
                  twice that plus C H W when the identity rounding correction runs
                  (see needs_rounding_correction)

    Building the 3x3 matrix from theta is a handful of scalar ops and is not counted.
    """
    if not isinstance(config, WarpConfig):
        raise WarpError(
            f"warp_cost needs a WarpConfig, got {type(config).__name__}; "
            "build one with WarpConfig(family=...)."
        )
    c, h, w = _check_shape("shape", shape)
    loc = _check_shape("loc_shape", loc_shape) if loc_shape is not None else (c, h, w)
    p = config.n_params
    params = head_param_count(loc[0], config.head_width, p)
    macs = head_macs(loc, config.head_width, p)
    hw = h * w
    if config.family == "tps":
        macs += 2 * hw * config.tps_k * config.tps_k
    elif config.family == "projective":
        macs += 11 * hw
    else:
        macs += 6 * hw
    macs += SAMPLER_TAPS[config.sampler] * c * hw
    if needs_rounding_correction(config.sampler, h, w):
        macs += SAMPLER_TAPS[config.sampler] * c * hw + c * hw
    return params, macs


class Warp(nn.Module):
    """A learned warp of a ``(N, C, H, W)`` tensor that starts as the exact identity.

    Args:
        config: family, sampler, padding and head width.
        shape: ``(C, H, W)`` of the tensor to warp; the base grid buffer is
            built for this ``H x W`` (other sizes work, their grid is built on
            the fly).
        loc_shape: ``(C, H, W)`` of the tensor the head reads, when it is not
            the warped tensor itself.

    Attributes:
        family, n_params: the family name and its number of raw parameters.
        record: when True, ``forward`` stores the detached ``theta`` in ``last_theta``.

    Training notes: at the exact identity only the head's final layer gets a
    gradient (the earlier layers sit behind its zero weight); the rest follow
    after the first update. The ``nearest`` sampler is piecewise constant in the
    grid, so it gives the head no gradient at all; train with bilinear or bicubic.
    ONNX: exports with both torch exporters at opsets 16-20 (GridSample); the
    grid is specialised to the traced ``H x W``, the batch size stays dynamic.
    """

    def __init__(
        self,
        config: WarpConfig,
        shape: tuple[int, int, int],
        loc_shape: tuple[int, int, int] | None = None,
        *,
        device=None,
        dtype=None,
    ) -> None:
        super().__init__()
        if not isinstance(config, WarpConfig):
            raise WarpError(
                f"Warp needs a WarpConfig, got {type(config).__name__}; "
                "build one with WarpConfig(family=...)."
            )
        self.config = config
        self.shape = _check_shape("shape", shape)
        self.loc_shape = _check_shape("loc_shape", loc_shape) if loc_shape is not None else None
        self.family = config.family
        self.n_params = config.n_params
        self.record = False
        self.last_theta: Tensor | None = None
        dtype = dtype or torch.get_default_dtype()
        self.head = LocalisationHead(
            self.loc_shape or self.shape,
            config.head_width,
            identity_theta(config.family, config.tps_k, dtype=torch.float64),
            device=device,
            dtype=dtype,
        )
        for name, value in self._grid_buffers(self.shape[1], self.shape[2], dtype, device).items():
            self.register_buffer(name, value, persistent=False)

    # -- buffers -----------------------------------------------------------------

    def _grid_buffers(self, height: int, width: int, dtype, device) -> dict[str, Tensor]:
        """Base grid (and the TPS weights), computed in float64 and rounded once to at least float32."""
        gdt = grids.grid_dtype(dtype)
        base = grids.base_grid(height, width)
        out = {"base_grid": base.to(dtype=gdt, device=device)}
        if self.family == "tps":
            control = grids.tps_control_points(self.config.tps_k)
            out["tps_weights"] = grids.tps_weights(base, control).to(dtype=gdt, device=device)
        return out

    def _apply(self, fn, recurse=True):  # torch hook behind .to(), .double(), .half(), .cuda() ...
        super()._apply(fn, recurse)
        # Casting the float32 buffers to float64 would keep float32 rounding and
        # break the exact identity, so rebuild them from float64 instead; a
        # float16 or bfloat16 warp keeps float32 grids (see grids.grid_dtype).
        p = next(self.head.parameters(), None)
        dtype = p.dtype if p is not None and p.is_floating_point() else self.base_grid.dtype
        for name, value in self._grid_buffers(self.shape[1], self.shape[2], dtype, self.base_grid.device).items():
            setattr(self, name, value)
        return self

    # -- the pieces --------------------------------------------------------------

    def predict(self, loc: Tensor) -> Tensor:
        """Raw head output ``theta``, shape ``(N, n_params)``."""
        return self.head(loc)

    def matrix(self, theta: Tensor) -> Tensor | None:
        """``(N, 3, 3)`` homogeneous sampling matrix (output -> input); ``None`` for tps."""
        if self.family == "tps":
            return None
        return theta_to_matrix(self.family, theta, self._aspect(self.shape[1], self.shape[2]))

    def _aspect(self, height: int, width: int) -> float:
        """``W / H`` for a similarity warp in the pixel frame (its rotation turns pixel offsets), else 1."""
        return width / height if self.config.pixel_frame else 1.0

    def grid(self, theta: Tensor, height: int, width: int) -> Tensor:
        """``(N, H, W, 2)`` normalised sampling grid for ``theta`` (``align_corners=False``)."""
        if theta.dim() != 2 or grids.static_shape(theta, (1,))[0] != self.n_params:
            raise WarpError(
                f"this {self.family!r} warp takes theta of shape (N, {self.n_params}), "
                f"got {tuple(theta.shape)}; pass the output of predict()."
            )
        gdt = grids.grid_dtype(theta.dtype)
        with _autocast_off(theta):  # autocast would run the products in float16
            theta = theta.to(gdt)
            if (height, width) == self.shape[1:] and self.base_grid.dtype == gdt:
                bufs = dict(self.named_buffers(recurse=False))
            else:  # another size (dynamic shapes) or dtype: build the grid on the fly
                bufs = self._grid_buffers(height, width, gdt, theta.device)
            if self.family == "tps":
                offsets = theta.clamp(-THETA_LIMIT, THETA_LIMIT).reshape(-1, self.n_params // 2, 2)
                return grids.tps_grid(bufs["base_grid"], bufs["tps_weights"], offsets, height, width)
            m = theta_to_matrix(self.family, theta, self._aspect(height, width))
            return grids.matrix_grid(bufs["base_grid"], m, height, width, projective=self.family == "projective")

    def forward(self, x: Tensor, loc: Tensor | None = None) -> Tensor:
        if x.dim() != 4:
            raise WarpError(
                f"Warp expects a (N, C, H, W) tensor, got shape {tuple(x.shape)}; "
                "warps go on 4-d feature maps."
            )
        theta = self.predict(x if loc is None else loc)
        if self.record:
            self.last_theta = theta.detach()
        h, w = grids.spatial_size(x)
        grid = self.grid(theta, h, w)
        # sampled in at least the grid's precision (CPU grid_sample in float16 is unreliable, and a float16 grid is
        # off by a fraction of a pixel), the result in x's dtype
        sdt = torch.promote_types(x.dtype, grid.dtype)
        xs = x if x.dtype == sdt else x.to(sdt)
        out = self._sample(xs, grid if grid.dtype == sdt else grid.to(sdt))
        if needs_rounding_correction(self.config.sampler, h, w):
            # xs + (out - identity resample), in place: the sampler's backward needs
            # its inputs, not its output, and two full-size temporaries are saved
            ident = self._identity_grid(xs, grid.dtype)
            out = out.sub_(self._sample(xs, ident if ident.dtype == sdt else ident.to(sdt))).add_(xs)
        out = out if out.dtype == x.dtype else out.to(x.dtype)
        # grid_sample returns a contiguous tensor: a channels_last input gets its layout back, so that the layers
        # after the warp compute as they do without it (a channels_last GroupNorm or conv sums in another order)
        if x.is_contiguous(memory_format=torch.channels_last) and not x.is_contiguous():
            out = out.contiguous(memory_format=torch.channels_last)
        return out

    def _sample(self, x: Tensor, grid: Tensor) -> Tensor:
        return F.grid_sample(
            x, grid, mode=self.config.sampler, padding_mode=self.config.padding, align_corners=False
        )

    def _identity_grid(self, x: Tensor, dtype: torch.dtype) -> Tensor:
        """The base grid in ``dtype`` as ``(N, H, W, 2)`` for ``x``: bit for bit the identity warp's grid, which
        is built from the same base grid in the same dtype."""
        h, w = grids.spatial_size(x)
        if (h, w) == self.shape[1:] and self.base_grid.dtype == dtype:
            base = self.base_grid
        else:
            base = grids.base_grid(h, w, dtype=dtype, device=x.device)
        return base[:, :2].reshape(1, h, w, 2).expand(x.shape[0], h, w, 2)

    # -- identity ----------------------------------------------------------------

    def reset_parameters(self) -> None:
        """Re-initialise the head; the warp is the exact identity again."""
        self.head.reset_parameters()

    def identity_distance(self) -> float:
        """L2 distance of the head's final layer (weight, bias) from the identity init."""
        return self.head.identity_distance()

    def extra_repr(self) -> str:
        c = self.config
        loc = f", loc_shape={self.loc_shape}" if self.loc_shape else ""
        return (
            f"family={c.family!r}, sampler={c.sampler!r}, padding={c.padding!r}, "
            f"shape={self.shape}{loc}, n_params={self.n_params}"
        )
