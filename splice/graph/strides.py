"""A point's stride: the cumulative stride of the data flow from the input, one op at a time.

The stride of a tensor is how many input pixels one of its pixels steps over,
per axis (H, W). The input has stride 1. An op multiplies the stride of the
tensor it reads by its own stride; at a join (an add, a cat, a broadcast
gate) the largest product over the inputs holds. The ratio input size / point
size is not the stride: a 3x3 conv of stride 2 and padding 1 maps 37 pixels
to 19, and six of them map 37 to 1, while the stride is 2**6 = 64.

An op's own stride comes from its arguments where splice knows the op
(:func:`module_stride` for modules, :func:`call_stride` for torch functions
and methods by name, which the fx, recorded and exported views share): the
``stride`` of a convolution or pooling (a transposed convolution or an
unpooling divides by it), the step of a slice, the scale factor of an
upsampling (a fraction), 1 for padding. For any other op (a leaf module, an
adaptive pool, a resize to a given size), :func:`size_stride` reads it from
the op's own input and output sizes: ``s`` when the output size is what
ceil or floor division by the integer ``s`` gives (the usual paddings keep a
strided conv's or pool's output within one pixel of ``in / s``), else the
exact ratio.

Where there is no data flow to follow (the module outputs of the last-resort hooks view), the input and point
sizes count as one op (:func:`input_relative`).

Strides are ints, or :class:`fractions.Fraction` when truly fractional (after
an upsampling by 1.5); :func:`stride_value` gives the listing's form.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from fractions import Fraction
from typing import Any

import torch
from torch import nn

__all__: list[str] = []

Number = int | Fraction
Stride = tuple[Number, Number]
ONE: Stride = (1, 1)
# the own "stride" of a join that puts its inputs side by side (cat): each keeps its own, the largest holds
JOINED: Stride = (0, 0)


def _int_if_whole(x: Number) -> Number:
    return int(x) if isinstance(x, Fraction) and x.denominator == 1 else x


def size_stride(a: int, b: int) -> Number:
    """The stride of an op splice has no rule for, that maps ``a`` pixels to ``b`` along one axis.

    Downsampling: the integer ``s`` for which ``b`` is ``floor(a / s)`` or ``ceil(a / s)``. A conv or pool of
    kernel k, stride s and padding p gives ``floor((a + 2p - k + s) / s)``, which is one of the two when
    ``-s <= 2p - k <= -1``: a 3x3 kernel with padding 1, a 7x7 with padding 3, a 2x2 pool of stride 2; a 3x3
    kernel without padding at odd sizes only (299 -> 149, but 38 -> 18). When several integers
    fit (small maps: 5 -> 2 is ``floor(5 / 2)`` and ``ceil(5 / 3)``), the one nearest the ratio ``a / b``,
    ties to the smaller (stride 2 is the most common downsampling: common practice, no source). When none fits,
    the exact ratio. Upsampling by a whole factor ``t`` (``b == a * t``) gives ``1 / t``, else the exact ratio.
    """
    if a == b or a <= 0 or b <= 0:
        return 1
    if b > a:
        return Fraction(1, b // a) if b % a == 0 else Fraction(a, b)
    if b == 1:
        return a  # every s >= a gives 1; the smallest is the map's own size
    # b in {floor(a/s), ceil(a/s)} means b - 1 < a / s < b + 1, i.e. a / (b + 1) < s < a / (b - 1)
    ratio = Fraction(a, b)
    fits = [s for s in range(max(2, a // (b + 1)), a // (b - 1) + 2) if b in (a // s, -(-a // s))]
    if not fits:
        return ratio
    return min(fits, key=lambda s: (abs(ratio - s), s))


def _pair(v: Any) -> tuple[Any, Any] | None:
    if isinstance(v, int) and not isinstance(v, bool):
        return (v, v)
    if isinstance(v, (tuple, list)) and len(v) == 2 and all(isinstance(x, int) and not isinstance(x, bool) for x in v):
        return (v[0], v[1])
    return None


def _strides(v: Any, kernel: Any = None) -> Stride | None:
    """A conv's or pool's stride argument as a pair; ``None`` or ``[]`` for a pool means its kernel size."""
    if (v is None or (isinstance(v, (tuple, list)) and not v)) and kernel is not None:
        v = kernel
    pair = _pair(v)
    return pair if pair is not None and all(s > 0 for s in pair) else None


def _inverse(pair: Stride | None) -> Stride | None:
    return None if pair is None else (Fraction(1, pair[0]) if pair[0] != 1 else 1,
                                      Fraction(1, pair[1]) if pair[1] != 1 else 1)


def _scale(v: Any) -> Stride | None:
    """An upsampling's ``scale_factor`` (a number or a pair) as the stride it gives: ``1 / scale``."""
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        v = (v, v)
    if not (isinstance(v, (tuple, list)) and len(v) == 2
            and all(isinstance(x, (int, float)) and not isinstance(x, bool) and x > 0 for x in v)):
        return None
    # a float scale (1.5, 1 / 3) as the fraction it stands for
    return tuple(_int_if_whole(1 / Fraction(x).limit_denominator(1000)) for x in v)  # type: ignore[return-value]


def _arg(args: tuple, kwargs: Mapping, index: int, name: str, default: Any = None) -> Any:
    return args[index] if len(args) > index else kwargs.get(name, default)


def _slice_steps(index: Any) -> Stride | None:
    """The steps on H and W of ``x[index]`` for a 4-D ``x`` indexed by slices (and one ``...``) only."""
    index = index if isinstance(index, tuple) else (index,)
    if not all(isinstance(i, slice) or i is Ellipsis for i in index) or sum(i is Ellipsis for i in index) > 1:
        return None
    if Ellipsis in index:
        k = index.index(Ellipsis)
        index = index[:k] + (slice(None),) * (4 - len(index) + 1) + index[k + 1:]
    index = index + (slice(None),) * (4 - len(index))
    if len(index) != 4:
        return None
    steps = tuple(1 if i.step is None else i.step for i in index[2:])
    return steps if all(isinstance(s, int) and s > 0 for s in steps) else None  # type: ignore[return-value]


def _aten_slice(args: tuple, kwargs: Mapping) -> Stride | None:
    dim, step = _arg(args, kwargs, 1, "dim", 0), _arg(args, kwargs, 4, "step", 1)
    if not (isinstance(dim, int) and isinstance(step, int) and step > 0 and -4 <= dim < 4):
        return None
    dim %= 4
    return (step, 1) if dim == 2 else (1, step) if dim == 3 else ONE


def _conv(args: tuple, kwargs: Mapping) -> Stride | None:
    return _strides(_arg(args, kwargs, 3, "stride", 1))


def _convolution(args: tuple, kwargs: Mapping) -> Stride | None:
    # aten.convolution(input, weight, bias, stride, padding, dilation, transposed, output_padding, groups)
    pair = _strides(_arg(args, kwargs, 3, "stride", 1))
    return _inverse(pair) if _arg(args, kwargs, 6, "transposed", False) is True else pair


def _pool(kernel_at: int) -> Callable[[tuple, Mapping], Stride | None]:
    def rule(args: tuple, kwargs: Mapping) -> Stride | None:
        kernel = _arg(args, kwargs, kernel_at, "kernel_size")
        return _strides(_arg(args, kwargs, kernel_at + 1, "stride"), kernel)
    return rule


def _interpolate(args: tuple, kwargs: Mapping) -> Stride | None:
    if _arg(args, kwargs, 1, "size") is not None:
        return None  # a resize to a given size: its sizes tell
    return _scale(_arg(args, kwargs, 2, "scale_factor"))


def _upsample_aten(args: tuple, kwargs: Mapping) -> Stride | None:
    # aten.upsample_*2d.vec(input, output_size, [align_corners,] scale_factors): the sizes tell when no scales
    return _scale(kwargs.get("scale_factors", args[-1] if len(args) > 2 else None))


def _shuffle(args: tuple, kwargs: Mapping) -> Stride | None:
    r = _arg(args, kwargs, 1, "upscale_factor")
    return _inverse((r, r)) if isinstance(r, int) and r > 0 else None


def _unshuffle(args: tuple, kwargs: Mapping) -> Stride | None:
    r = _arg(args, kwargs, 1, "downscale_factor")
    return (r, r) if isinstance(r, int) and r > 0 else None


def _getitem(args: tuple, kwargs: Mapping) -> Stride | None:
    if len(args) == 2 and isinstance(args[1], int) and not isinstance(args[1], bool):
        return ONE  # a piece of a split (or an image of a batch, which is no point): the same sampling
    return _slice_steps(args[1]) if len(args) == 2 else None


def _same(args: tuple, kwargs: Mapping) -> Stride:
    return ONE


# torch functions and Tensor methods by name, as fx (``torch.nn.functional.max_pool2d``), a TorchFunctionMode
# (``max_pool2d``, dunders stripped) and torch.export (``aten.max_pool2d_with_indices``) name them; every rule
# reads the tensor as the first argument
_CALLS: dict[str, Callable[[tuple, Mapping], Stride | None]] = {
    "conv2d": _conv,
    "convolution": _convolution,
    "_convolution": _convolution,
    "conv_transpose2d": lambda args, kwargs: _inverse(_conv(args, kwargs)),
    **dict.fromkeys(("max_pool2d", "max_pool2d_with_indices", "avg_pool2d"), _pool(1)),
    "lp_pool2d": _pool(2),
    "max_unpool2d": lambda args, kwargs: _inverse(_pool(2)(args, kwargs)),
    **dict.fromkeys(("interpolate", "upsample", "upsample_nearest", "upsample_bilinear"), _interpolate),
    **dict.fromkeys(("upsample_nearest2d", "upsample_bilinear2d", "upsample_bicubic2d"), _upsample_aten),
    "pixel_shuffle": _shuffle,
    "pixel_unshuffle": _unshuffle,
    "getitem": _getitem,
    "slice": _aten_slice,
    **dict.fromkeys(("pad", "constant_pad_nd", "reflection_pad2d", "replication_pad2d"), _same),
    # crops: a part of the map at the same sampling (split's pieces come out through getitem)
    **dict.fromkeys(("narrow", "chunk", "split", "split_with_sizes", "tensor_split", "unsafe_split", "unbind"),
                    _same),
    **dict.fromkeys(("cat", "concat", "concatenate"), lambda args, kwargs: JOINED),
}


def call_stride(name: str, args: tuple, kwargs: Mapping) -> Stride | None:
    """The own stride of a call of the torch function or Tensor method ``name``, or ``None`` (no rule)."""
    rule = _CALLS.get(name)
    if rule is None:
        return None
    try:
        return rule(args, kwargs)
    except (TypeError, ValueError, IndexError, ZeroDivisionError):  # arguments of another form: the sizes tell
        return None


def _conv_module(mod: nn.Module) -> Stride | None:
    pair = _strides(mod.stride)
    return _inverse(pair) if isinstance(mod, nn.ConvTranspose2d) else pair


# module classes splice knows, by class; a subclass (timm's Conv2dSame, MaxPool2dSame) takes its base's rule
_MODULES: dict[type, Callable[[Any], Stride | None]] = {
    nn.Conv2d: _conv_module,
    nn.ConvTranspose2d: _conv_module,
    **dict.fromkeys((nn.MaxPool2d, nn.AvgPool2d, nn.LPPool2d), lambda m: _strides(m.stride, m.kernel_size)),
    nn.MaxUnpool2d: lambda m: _inverse(_strides(m.stride, m.kernel_size)),
    nn.Upsample: lambda m: _scale(m.scale_factor) if m.size is None else None,
    nn.PixelShuffle: lambda m: _inverse((m.upscale_factor, m.upscale_factor)),
    nn.PixelUnshuffle: lambda m: (m.downscale_factor, m.downscale_factor),
    **{c: (lambda m: ONE) for c in (getattr(nn, n, None) for n in (
        "ZeroPad2d", "ConstantPad2d", "ReflectionPad2d", "ReplicationPad2d", "CircularPad2d")) if c is not None},
}
_BY_CLASS: dict[type, Callable[[Any], Stride | None] | None] = {}  # every class met, with its rule or None


def module_stride(mod: nn.Module) -> Stride | None:
    """The own stride of a module splice knows (convs, pools, unpools, upsampling, pixel shuffles, pads), else
    ``None``: the module's input and output sizes then tell (:func:`size_stride`)."""
    cls = type(mod)
    if cls not in _BY_CLASS:
        _BY_CLASS[cls] = next((_MODULES[c] for c in cls.__mro__ if c in _MODULES), None)
    rule = _BY_CLASS[cls]
    return None if rule is None else rule(mod)


def cumulative(steps: Iterable[tuple[Any, list, tuple[int, int] | None, Stride | None, Any]],
               sources: Iterable[tuple[Any, tuple[int, int] | None]]) -> dict[Any, tuple[Stride, tuple[int, int]]]:
    """Every key's (stride, (h, w)) from the sources (the model inputs, stride 1), in one pass.

    ``steps`` are, in topological order, ``(key, inputs, hw, own, first)``: the keys it reads, its own (H, W)
    when it holds an (N, C, H, W) tensor, its own stride when splice knows the op, and the key of the tensor
    that op reads (its first argument). A known op multiplies that input's stride by its own; any other multiplies
    each input's stride by :func:`size_stride` of that input's size to its own, and the largest product per
    axis holds. A step without (H, W) (a flatten, a tuple) carries the stride and size of its largest input,
    so that a reshape back to (N, C, H, W) continues from there. A step that reads no source has none.
    """
    out: dict[Any, tuple[Stride, tuple[int, int]]] = {}
    for key, hw in sources:
        if hw is not None:
            out[key] = (ONE, hw)
    for key, inputs, hw, own, first in steps:
        if key in out:
            continue
        if own == JOINED and hw is not None:  # maps side by side: each keeps its sampling, the largest holds
            found = [out[i][0] for i in inputs if i in out]
            if found:
                out[key] = ((max(f[0] for f in found), max(f[1] for f in found)), hw)
            continue
        if own is not None and hw is not None and first in out:
            (sh, sw), _ = out[first]
            out[key] = ((_int_if_whole(sh * own[0]), _int_if_whole(sw * own[1])), hw)
            continue
        sh = sw = carried = None
        for i in inputs:
            found = out.get(i)
            if found is None:
                continue
            (ih, iw), size = found
            if hw is not None and size != hw:
                ih = _int_if_whole(ih * size_stride(size[0], hw[0]))
                iw = _int_if_whole(iw * size_stride(size[1], hw[1]))
            if sh is None or (ih, iw) > (sh, sw):
                carried = size  # the size of the largest input, for a step without one
            sh, sw = (ih, iw) if sh is None else (max(sh, ih), max(sw, iw))
        if sh is not None:
            out[key] = ((sh, sw), hw or carried)
    return out


def holds_tensor(value: Any) -> bool:
    """A tensor, or a tuple or list with one: what carries a stride (a size read off a tensor does not, so a
    positional code built from ``x.shape`` is no resampling of the input)."""
    if isinstance(value, (tuple, list)):
        return any(isinstance(v, torch.Tensor) for v in value)
    return isinstance(value, torch.Tensor)


def spatial(value: Any, layout: tuple[int, ...] | None = None) -> tuple[int, int] | None:
    """(H, W) of an (N, C, H, W) tensor (``layout``: which input axis each of its axes holds, for a permuted one),
    or of the first such tensor of a tuple or list (a max pool with its indices); else ``None``."""
    if isinstance(value, (tuple, list)):
        value = next((v for v in value if getattr(v, "ndim", None) == 4), None)
    if getattr(value, "ndim", None) != 4:
        return None
    shape = value.shape
    if layout is None or layout == (0, 1, 2, 3):
        return int(shape[2]), int(shape[3])
    return int(shape[layout.index(2)]), int(shape[layout.index(3)])


def stride_value(stride: Stride) -> int | float | tuple:
    """The listing's form: an int when both axes agree, else an ``(sh, sw)`` tuple; a part that is not whole is
    a float rounded to 4 decimals."""
    parts = [int(s) if s == int(s) else round(float(s), 4) for s in stride]
    return parts[0] if parts[0] == parts[1] else tuple(parts)


def at_least(stride: Stride, n: int) -> bool:
    return all(s >= n for s in stride)


def input_relative(in_hw: tuple[int, int], hw: tuple[int, int]) -> Stride:
    """The stride of a point without a data flow to follow (module outputs alone): the sizes, as one op."""
    return (size_stride(in_hw[0], hw[0]), size_stride(in_hw[1], hw[1]))

