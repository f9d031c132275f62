"""Spec strings and their parts: input shapes, builder kwargs, ``head:attr`` splitting.

:func:`parse_input_shape` is the one input-shape rule of splice: three
positive integers (C, H, W), given as text (``"3x224x224"``, ``"3,224,224"``)
or as a sequence of ints. Bools and non-integral numbers are refused, never
rounded. :mod:`splice.graph` checks its ``input_shape`` argument with it.
A model with several inputs takes one shape per input
(:func:`parse_input_shapes`: a list of shapes, repeated ``--input-shape``, or
a JSON list such as ``[[3, 128, 128], [3, 128, 128]]``). The first input is
the images the warps move, (C, H, W); an input after it may have any
per-sample shape of one or more positive integers (``4`` for a vector of
metadata, ``10x4``), since no warp touches it (:func:`parse_extra_shape`). Four numbers for
the first input are a video clip or a volume (C, T, H, W), or images with
their batch: :func:`four_numbers_first` tells a caller to build the model
first, whose :func:`volumes_not_images` says which line fits.
"""

from __future__ import annotations

import json
import operator
import os
import re
from collections.abc import Mapping, Sequence
from typing import Any

from ..errors import SourceError

__all__ = ["FILE_MODULE_PREFIX", "parse_input_shape", "parse_input_shapes", "format_shape", "parse_kwargs",
           "per_channel", "positive_int", "volumes_not_images", "four_numbers_first",
           "parse_extra_shape", "is_file_head", "spec_identity"]

#: the start of the module name a model file (spec ``path/to/file.py:factory``) is imported under; its classes
#: are named to the user by their bare class name, which ``--leaf`` matches
FILE_MODULE_PREFIX = "_splice_user_"

_LATER = ("splice works on images (C, H, W) for now; volumes and video (5-D inputs) come in a later release")


def _dims(value: Any) -> tuple[int, int, int] | None:
    """``value`` as three positive ints, or None when it is not a (C, H, W) shape."""
    if isinstance(value, str):
        parts = [p for p in re.split(r"[x×,\s]+", value.strip().lower()) if p != ""]
        try:
            dims = tuple(int(p) for p in parts)
        except ValueError:
            return None
    else:
        try:
            items = list(value)
            dims = tuple(operator.index(v) for v in items)
        except TypeError:
            return None
        if any(isinstance(v, bool) for v in items):
            return None
    if len(dims) != 3 or any(d <= 0 for d in dims):
        return None
    return dims  # type: ignore[return-value]


def parse_input_shape(text: str | Sequence[int] | None) -> tuple[int, int, int] | None:
    """Parse ``"3x224x224"`` (also ``3,224,224``, or a sequence of ints) into ``(3, 224, 224)``.

    ``None`` gives ``None``; anything but three positive integers raises
    :class:`~splice.errors.SourceError`.

    >>> parse_input_shape("1x48x48")
    (1, 48, 48)
    """
    if text is None:
        return None
    dims = _dims(text)
    if dims is None:
        if _four_dims(text):
            parts = ([p for p in re.split(r"[x×,\s]+", text.strip().lower()) if p] if isinstance(text, str)
                     else list(text))
            raise SourceError(f"input shape {text!r} has four dimensions; {_LATER}; if the first is the batch size, "
                              f"drop it: --input-shape {'x'.join(str(p) for p in parts[1:])}")
        raise SourceError(
            f"malformed input shape {text!r}; expected CxHxW with three positive integers, "
            "e.g. --input-shape 3x224x224"
        )
    return dims


def parse_extra_shape(value: Any, index: int = 2) -> tuple[int, ...]:
    """The per-sample shape of input ``index`` (counted from 1) after the first: one or more positive integers,
    as text (``"4"``, ``"10x4"``), an int or a sequence of ints.

    >>> parse_extra_shape("10x4")
    (10, 4)
    """
    if isinstance(value, str):
        parts = [p for p in re.split(r"[x×,\s]+", value.strip().lower()) if p]
        dims = tuple(int(p) for p in parts) if all(p.isdigit() for p in parts) else ()
    elif positive_int(value) is not None:
        dims = (value,)
    else:
        try:
            items = list(value)
        except TypeError:
            items = []
        dims = tuple(items) if all(positive_int(v) is not None for v in items) else ()
    if not dims or any(d <= 0 for d in dims):
        raise SourceError(f"malformed input shape {value!r} for input {index}; an input after the first takes its "
                          "per-sample shape, one or more positive integers, e.g. --input-shape 4 or 10x4")
    return dims


def _four_dims(value: Any) -> bool:
    if isinstance(value, str):
        parts = [p for p in re.split(r"[x×,\s]+", value.strip().lower()) if p]
        return len(parts) == 4 and all(p.isdigit() and int(p) > 0 for p in parts)
    try:
        items = list(value)
    except TypeError:
        return False
    return len(items) == 4 and all(positive_int(v) is not None for v in items)


def four_numbers_first(value: Any) -> bool:
    """Whether the first input shape in ``value`` (as :func:`parse_input_shapes` takes it) is four positive
    integers: a clip or a volume (C, T, H, W) for a model of 3-D convolutions, a slip that kept the batch for
    one of images. Only the built model can tell which, so a caller builds it before saying either."""
    if isinstance(value, str) and value.strip().startswith("["):
        try:
            value = json.loads(value)
        except (json.JSONDecodeError, RecursionError):
            return False
    if isinstance(value, str) or _four_dims(value):
        return _four_dims(value)
    try:
        items = list(value)
    except TypeError:
        return False
    if len(items) == 1 and isinstance(items[0], str) and items[0].strip().startswith("["):
        return four_numbers_first(items[0])
    return bool(items) and _four_dims(items[0])


def parse_input_shapes(value: Any) -> tuple[tuple[int, ...], ...] | None:
    """One shape per model input, from one shape, a list of shapes, or a JSON list of shapes: ``(C, H, W)``
    for the first, any per-sample shape (:func:`parse_extra_shape`) for each one after it.

    ``None`` (or an empty list) gives ``None``.

    >>> parse_input_shapes("3x64x64")
    ((3, 64, 64),)
    >>> parse_input_shapes(["3x64x64", "3x64x64"])
    ((3, 64, 64), (3, 64, 64))
    >>> parse_input_shapes("[[1, 8, 8], [2, 8, 8]]")
    ((1, 8, 8), (2, 8, 8))
    >>> parse_input_shapes(["3x32x32", "4"])
    ((3, 32, 32), (4,))
    """
    if value is None:
        return None
    if isinstance(value, str) and value.strip().startswith("["):
        try:
            value = json.loads(value)
        except (json.JSONDecodeError, RecursionError):
            raise SourceError(f"--input-shape {value!r} is not valid JSON; give CxHxW, repeat --input-shape "
                              "for each input, or a JSON list such as [[3, 128, 128], [3, 128, 128]]") from None
        if not isinstance(value, list):
            raise SourceError(f"--input-shape JSON must be a list of shapes, [C, H, W] first, got "
                              f"{type(value).__name__}")
    if isinstance(value, str) or _dims(value) is not None or _four_dims(value):
        return (parse_input_shape(value),)
    try:
        items = list(value)
    except TypeError:
        raise SourceError(f"input shape {value!r} is neither CxHxW nor a list of such shapes; "
                          "e.g. --input-shape 3x224x224") from None
    if not items:
        return None
    if len(items) == 1 and isinstance(items[0], str) and items[0].strip().startswith("["):
        return parse_input_shapes(items[0])
    return (parse_input_shape(items[0]), *(parse_extra_shape(v, i) for i, v in enumerate(items[1:], 2)))


def format_shape(shape: Sequence[int]) -> str:
    return "x".join(str(int(s)) for s in shape)


def parse_kwargs(text: str | Mapping | None) -> dict:
    """Parse ``--kwargs '{"num_classes": 10}'`` (a JSON object)."""
    if text is None:
        return {}
    if isinstance(text, Mapping):
        return dict(text)
    try:
        value = json.loads(text)
    except json.JSONDecodeError as exc:
        raise SourceError(
            f"--kwargs is not valid JSON ({exc.msg} at column {exc.colno}): {text!r}; "
            """pass a JSON object such as '{"num_classes": 10}'"""
        ) from None
    if not isinstance(value, dict):
        raise SourceError(f"--kwargs must be a JSON object, got {type(value).__name__}: {text!r}")
    return value


def split_spec(spec: str) -> tuple[str, str]:
    head, sep, tail = spec.rpartition(":")
    if not sep or not head or not tail:
        raise SourceError(
            f"cannot read model spec {spec!r}; use torchvision:NAME, package.module:factory, "
            "path/to/file.py:factory, or a folder written by 'splice insert'"
        )
    return head, tail


def is_file_head(head: str) -> bool:
    """Whether the part of a spec before its last ``:`` names a Python file (``path/to/file.py``)."""
    return head.endswith(".py") or os.sep in head or "/" in head


def spec_identity(spec: Any) -> Any:
    """What of a spec names the architecture, for the hashes a folder's weights keep: the spec itself, or for a
    ``path/to/file.py:factory`` spec the file's name and the factory (the folder may move, and what the file
    holds is ``code_sha256``'s to check). Anything that is not a spec string comes back as it is."""
    if not isinstance(spec, str):
        return spec
    head, sep, tail = spec.rpartition(":")
    if sep and head and is_file_head(head):
        return f"{os.path.basename(head.replace(os.sep, '/').rstrip('/'))}:{tail}"
    return spec


def positive_int(value: Any) -> int | None:
    """``value`` when it is a whole number above 0 (not a bool), else ``None``."""
    return value if isinstance(value, int) and not isinstance(value, bool) and value > 0 else None


def per_channel(values, chans: int | None) -> list[float]:
    """RGB normalisation ``values`` (a ``mean`` or ``std``) for a model that takes ``chans`` channels.

    timm keeps a pretrained_cfg's RGB values when ``in_chans`` changes, and a
    Hugging Face preprocessor may keep them for a grey model. One channel takes
    their average (a grey image is about the average of its RGB channels;
    common practice, no source); more channels repeat them in turn, as timm's
    ``adapt_input_conv`` repeats the RGB filters of a first convolution.
    """
    values = [float(v) for v in values]
    if chans is None or chans == len(values):
        return values
    if chans == 1:
        return [sum(values) / len(values)]
    return [values[i % len(values)] for i in range(chans)]


def volumes_not_images(model) -> str | None:
    """The one line for a model of volumes or clips (3-D convolutions and no 2-D ones), else ``None``."""
    from torch import nn

    kinds = {type(m) for m in model.modules()}
    if nn.Conv3d in kinds and nn.Conv2d not in kinds:
        return (f"{type(model).__name__} convolves volumes or video (Conv3d, 5-D inputs); splice works on images "
                "(C, H, W) for now, and volumes and video come in a later release")
    return None
