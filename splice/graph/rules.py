"""Closed-form output shapes for common torch functions on the meta device.

On the meta device most kernels are Python decompositions: a batch norm, a
layer norm or a linear layer costs ten to a hundred times what its real work
costs at batch size 1. The functions below are the ones that dominate CNN and
small-transformer forwards (with attention and resizing, as hybrid
conv-attention and segmentation nets use them); their output is a fresh contiguous tensor of the
input's dtype whose shape follows from the arguments' shapes alone (or, for
an in-place activation, the input itself).

A rule applies only when it is sure: every tensor on the meta device,
contiguous inputs (layer norm and linear give a contiguous output from any
layout), matching dtypes and the shapes the real kernel accepts.
Otherwise it returns ``None`` and the real meta kernel runs, and reports any
error in its own words. :class:`ShapeRules` applies the rules to every
torch function called inside a ``with`` block (the leaf modules of a traced
graph, the recorded and counted meta forwards of the hooks views).
``tests/test_graph_rules.py`` checks each rule against the real meta kernel
(shape, dtype, strides, identity of in-place results).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import torch
import torch.nn.functional as F
from torch.overrides import TorchFunctionMode

__all__: list[str] = []

_META = torch.device("meta")


def _floating(t: Any) -> bool:
    """A floating-point tensor on the meta device."""
    return isinstance(t, torch.Tensor) and t.is_meta and t.is_floating_point()


def _plain(t: Any) -> bool:
    """A contiguous floating-point tensor on the meta device."""
    return _floating(t) and t.is_contiguous()


def _fresh(shape, dtype: torch.dtype) -> torch.Tensor:
    return torch.empty(tuple(shape), dtype=dtype, device=_META)


def _arg(args: tuple, kwargs: dict, index: int, name: str, default: Any) -> Any:
    return args[index] if len(args) > index else kwargs.get(name, default)


def _activation(inplace_at: int | None, names: tuple[str, ...] = ()) -> Callable[[tuple, dict], Any]:
    """An elementwise activation: the input's shape and dtype; ``inplace_at`` is the position of ``inplace``."""
    allowed = {"input", "inplace", *names}

    def rule(args: tuple, kwargs: dict):
        if not args or not _plain(args[0]) or set(kwargs) - allowed:
            return None
        x = args[0]
        if inplace_at is not None and _arg(args, kwargs, inplace_at, "inplace", False):
            return x  # an in-place op hands back its input
        return _fresh(x.shape, x.dtype)

    return rule


def _batch_norm(args: tuple, kwargs: dict):
    """``F.batch_norm(input, running_mean, running_var, weight, bias, training, momentum, eps)``."""
    if not args or not _plain(args[0]) or args[0].dim() < 2:
        return None
    x = args[0]
    names = ("running_mean", "running_var", "weight", "bias")
    params = [_arg(args, kwargs, i + 1, n, None) for i, n in enumerate(names)]
    if set(kwargs) - {*names, "training", "momentum", "eps"} or len(args) > 8:
        return None
    if not all(p is None or (isinstance(p, torch.Tensor) and p.is_meta and tuple(p.shape) == (x.shape[1],)
                             and p.dtype == x.dtype) for p in params):
        return None
    if _arg(args, kwargs, 5, "training", False):
        if x.numel() // x.shape[1] <= 1:
            return None  # batch statistics of one value per channel: F.batch_norm refuses them in its own words
    elif params[0] is None or params[1] is None:
        return None  # evaluation without running statistics: the kernel refuses it
    return _fresh(x.shape, x.dtype)


def _layer_norm(args: tuple, kwargs: dict):
    """``F.layer_norm(input, normalized_shape, weight, bias, eps)``."""
    # the output is contiguous whatever the input's layout (a channels-last view, as in convnext blocks)
    if len(args) < 2 or not _floating(args[0]) or set(kwargs) - {"weight", "bias", "eps"}:
        return None
    x, shape = args[0], args[1]
    shape = (shape,) if isinstance(shape, int) else tuple(shape) if isinstance(shape, (list, tuple)) else None
    if not shape or not all(isinstance(s, int) for s in shape) or x.dim() < len(shape):
        return None
    if tuple(x.shape[x.dim() - len(shape):]) != shape:
        return None
    for p in (_arg(args, kwargs, 2, "weight", None), _arg(args, kwargs, 3, "bias", None)):
        if p is not None and not (isinstance(p, torch.Tensor) and p.is_meta and tuple(p.shape) == shape
                                  and p.dtype == x.dtype):
            return None
    return _fresh(x.shape, x.dtype)


def _linear(args: tuple, kwargs: dict):
    """``F.linear(input, weight, bias)``: (..., in) @ (out, in)^T -> (..., out)."""
    if len(args) < 2 or not _floating(args[0]) or set(kwargs) - {"bias"}:  # contiguous output, as layer_norm
        return None
    x, w = args[0], args[1]
    b = _arg(args, kwargs, 2, "bias", None)
    if not (isinstance(w, torch.Tensor) and w.is_meta and w.dim() == 2 and w.dtype == x.dtype and x.dim() >= 1
            and x.shape[-1] == w.shape[1]):
        return None
    if b is not None and not (isinstance(b, torch.Tensor) and b.is_meta and tuple(b.shape) == (w.shape[0],)
                              and b.dtype == x.dtype):
        return None
    return _fresh((*x.shape[:-1], w.shape[0]), x.dtype)


def _attention(args: tuple, kwargs: dict):
    """``F.scaled_dot_product_attention(q, k, v, attn_mask, dropout_p, is_causal, scale)``: (..., Lq, Ev)."""
    names = ("attn_mask", "dropout_p", "is_causal", "scale", "enable_gqa")
    if len(args) < 3 or len(args) > 7 or set(kwargs) - set(names) or kwargs.get("enable_gqa", False):
        return None
    q, k, v = args[:3]
    if not all(_floating(t) and t.dim() == 4 and t.dtype == q.dtype for t in (q, k, v)):
        return None
    if not (q.shape[:2] == k.shape[:2] == v.shape[:2] and q.shape[-1] == k.shape[-1] and k.shape[-2] == v.shape[-2]):
        return None  # grouped heads, broadcast batches, mismatched lengths: the kernel decides
    mask = _arg(args, kwargs, 3, "attn_mask", None)
    causal = _arg(args, kwargs, 5, "is_causal", False)
    if mask is not None or causal not in (False, True):
        return None
    if causal and q.shape[-2] != k.shape[-2]:
        return None
    return _fresh((*q.shape[:-1], v.shape[-1]), q.dtype)


_RESIZE_MODES = frozenset({"nearest", "nearest-exact", "bilinear", "bicubic"})


def _interpolate(args: tuple, kwargs: dict):
    """``F.interpolate`` of an (N, C, H, W) tensor by ``size`` or ``scale_factor`` (floor of size * scale)."""
    names = {"size", "scale_factor", "mode", "align_corners", "recompute_scale_factor", "antialias"}
    if not args or len(args) > 7 or set(kwargs) - names or not _plain(args[0]) or args[0].dim() != 4:
        return None
    x = args[0]
    size, scale = _arg(args, kwargs, 1, "size", None), _arg(args, kwargs, 2, "scale_factor", None)
    mode = _arg(args, kwargs, 3, "mode", "nearest")
    corners = _arg(args, kwargs, 4, "align_corners", None)
    recompute = _arg(args, kwargs, 5, "recompute_scale_factor", None)
    antialias = _arg(args, kwargs, 6, "antialias", False)
    smooth = mode in ("bilinear", "bicubic")  # the modes that take align_corners and antialias
    if mode not in _RESIZE_MODES or recompute or (not smooth and (corners is not None or antialias)):
        return None
    if (size is None) == (scale is None):
        return None
    if size is not None:
        out = [size, size] if isinstance(size, int) else list(size) if isinstance(size, (list, tuple)) else None
        if out is None or len(out) != 2 or not all(type(s) is int for s in out):
            return None
    else:
        scales = [scale, scale] if isinstance(scale, (int, float)) else scale
        if not isinstance(scales, (list, tuple)) or len(scales) != 2 or not all(
                type(s) in (int, float) and s > 0 for s in scales):
            return None
        out = [int(float(n) * float(s)) for n, s in zip(x.shape[2:], scales)]  # floor: both are positive
    if not all(s > 0 for s in out):
        return None
    return _fresh((*x.shape[:2], *out), x.dtype)


def _mean(args: tuple, kwargs: dict):
    """``torch.mean(input, dim, keepdim)`` / ``Tensor.mean`` over given dims (a global pool: ``x.mean((2, 3))``)."""
    if not args or len(args) > 3 or set(kwargs) - {"dim", "keepdim"} or not _plain(args[0]):
        return None
    x = args[0]
    dim, keepdim = _arg(args, kwargs, 1, "dim", None), _arg(args, kwargs, 2, "keepdim", False)
    dims = [dim] if type(dim) is int else list(dim) if isinstance(dim, (list, tuple)) and dim else None
    if dims is None or type(keepdim) is not bool or not all(type(d) is int and -x.dim() <= d < x.dim() for d in dims):
        return None
    reduced = {d % x.dim() for d in dims}
    if len(reduced) != len(dims):
        return None  # a dim named twice: the kernel refuses it
    shape = [1 if i in reduced else n for i, n in enumerate(x.shape) if keepdim or i not in reduced]
    return _fresh(shape, x.dtype)


_RULES: dict[Any, Callable[[tuple, dict], Any]] = {
    F.batch_norm: _batch_norm,
    F.layer_norm: _layer_norm,
    F.linear: _linear,
    F.scaled_dot_product_attention: _attention,
    F.interpolate: _interpolate,
    torch.mean: _mean,
    torch.Tensor.mean: _mean,
    F.relu: _activation(1),
    F.relu6: _activation(1),
    F.silu: _activation(1),
    F.hardswish: _activation(1),
    F.hardsigmoid: _activation(1),
    F.hardtanh: _activation(3, ("min_val", "max_val")),
    F.leaky_relu: _activation(2, ("negative_slope",)),
    F.elu: _activation(2, ("alpha",)),
    F.gelu: _activation(None, ("approximate",)),
    F.mish: _activation(1),
    F.sigmoid: _activation(None),
    F.tanh: _activation(None),
    torch.relu: _activation(None),
    torch.sigmoid: _activation(None),
    torch.tanh: _activation(None),
}


def meta_rule(func: Any, args: tuple, kwargs: dict | None) -> Any:
    """The output of ``func(*args, **kwargs)`` from its rule, or ``None`` when no rule applies for sure."""
    rule = _RULES.get(func)
    return None if rule is None else rule(args, kwargs or {})


class ShapeRules(TorchFunctionMode):
    """Inside the block, a torch function with a rule that applies returns the rule's output."""

    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        out = meta_rule(func, args, kwargs)
        return func(*args, **kwargs) if out is None else out
