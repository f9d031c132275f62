"""Comparing model outputs: the bottom layer shared by insert, verify and export.

Model outputs may be a tensor or any nesting of tuples, lists, dicts and
dataclass instances of tensors; :func:`flatten_outputs` names each tensor by
its path (``out``, ``out[0]``, ``out.logits``; a dataclass's fields in their
declared order), and :func:`compare_outputs` compares two outputs
path by path. Imports only torch and :mod:`splice.errors`.
"""

from __future__ import annotations

import collections
import copy
import dataclasses
from collections.abc import Mapping, Sequence

import torch

from .errors import DataError

__all__ = ["DEFAULT_TOLERANCES", "flatten_outputs", "compare_outputs", "detached", "tensors_out", "class_logits",
           "logits_or_refuse", "map_tensors", "SUPPORTED_OUTPUTS"]

# what the outputs may be, as the refusals of other types say it
SUPPORTED_OUTPUTS = "a tensor, or tuples, lists, dicts and dataclass instances holding tensors"


def is_dataclass_instance(value) -> bool:
    """True for an instance of a dataclass (not the class itself)."""
    return dataclasses.is_dataclass(value) and not isinstance(value, type)

# max error relative to the output's scale (max |y|), by dtype. float32 rounding
# through a bilinear resample at the identity stays near 1e-7; 1e-5 leaves room
# for deep networks (common practice, no source).
DEFAULT_TOLERANCES = {torch.float32: 1e-5, torch.float64: 1e-10, torch.float16: 1e-2, torch.bfloat16: 1e-2}


def flatten_outputs(out, prefix: str = "out") -> dict[str, torch.Tensor]:
    """Flatten tensors in nested tuple/list/dict/dataclass outputs into ``{path: tensor}``."""
    if isinstance(out, torch.Tensor):
        return {prefix: out}
    if isinstance(out, Mapping):
        flat: dict[str, torch.Tensor] = {}
        for k in out:
            flat.update(flatten_outputs(out[k], f"{prefix}.{k}"))
        return flat
    if is_dataclass_instance(out):  # a Hugging Face ModelOutput is a Mapping, met above
        flat = {}
        for f in dataclasses.fields(out):
            flat.update(flatten_outputs(getattr(out, f.name), f"{prefix}.{f.name}"))
        return flat
    if isinstance(out, Sequence) and not isinstance(out, (str, bytes)):
        flat = {}
        for i, v in enumerate(out):
            flat.update(flatten_outputs(v, f"{prefix}[{i}]"))
        return flat
    return {}


def tensors_out(out):
    """``out`` as the exporters take it: itself when every leaf is a tensor (or ``None``), else the tuple of its
    tensors in the order of :func:`flatten_outputs` (the graph's ``output_0 ...``): a number or a
    string among the outputs (``{"logits": t, "classes": 3}``) has no place in a graph, and both exporters refuse it."""
    def plain(v) -> bool:
        if v is None or isinstance(v, torch.Tensor):
            return True
        if isinstance(v, Mapping):
            return all(plain(x) for x in v.values())
        if isinstance(v, Sequence) and not isinstance(v, (str, bytes)):
            return all(plain(x) for x in v)
        return False

    return out if plain(out) else tuple(flatten_outputs(out).values())


def class_logits(out):
    """A classifier's logits in its output, or ``None`` when the output does not say which tensor they are.

    The output itself when it is a tensor; else its ``logits`` (a Hugging Face
    ``ModelOutput``, torchvision's Inception and GoogLeNet outputs); else the
    one tensor a tuple, list or dict holds. A container of several tensors
    and no ``logits`` (an embedding beside the scores, a segmentation map
    beside an auxiliary one) is ``None``: guessing would train on the wrong one.
    """
    if isinstance(out, torch.Tensor):
        return out
    named = out.get("logits") if isinstance(out, Mapping) else getattr(out, "logits", None)
    if isinstance(named, torch.Tensor):
        return named
    flat = flatten_outputs(out)
    return next(iter(flat.values())) if len(flat) == 1 else None


def logits_or_refuse(out, who: str, classes: int | None = None):
    """:func:`class_logits` of ``out`` as ``(N, K)``, with ``K == classes`` when given; else a one-line
    :class:`~splice.errors.DataError` naming what the model returns and what splice needs."""
    logits = class_logits(out)
    if isinstance(logits, torch.Tensor) and logits.dim() == 2 and (classes is None or logits.shape[1] == classes):
        return logits
    flat = flatten_outputs(out)
    shown = ", ".join(f"{k} {tuple(v.shape)}" for k, v in list(flat.items())[:6]) or type(out).__name__
    want = f"(N, {classes}) logits, one per class" if classes is not None else "(N, classes) logits"
    raise DataError(f"{who} returns {shown}; this needs {want}: return them alone, or as the output's .logits "
                    "(or key 'logits')")


def _failed(detail: str, *, inf: bool = False) -> dict:
    worst = float("inf") if inf else None
    return {"passed": False, "max_abs": worst, "max_rel": worst, "top1": None, "detail": detail}


def compare_outputs(reference, candidate, *, tol: float | None = None) -> dict:
    """Compare two model outputs (any nesting). Returns numbers and a verdict.

    ``max_rel`` is the max absolute error divided by the reference's max
    absolute value (per output, then the worst). ``top1`` is the fraction of
    rows whose argmax agrees, for 2-D classifier-like outputs (else ``None``).
    NaN and Inf values agree only at the same places, with the same values;
    the errors are those of the finite values (``nonfinite`` counts them).
    """
    ref, cand = flatten_outputs(reference), flatten_outputs(candidate)
    if not ref:
        return _failed(f"the model returned {type(reference).__name__}, which holds no tensors; splice compares "
                       f"outputs that are {SUPPORTED_OUTPUTS}")
    if set(ref) != set(cand):
        return _failed(f"output structure differs: {sorted(ref)} vs {sorted(cand)}")
    max_abs = 0.0
    max_rel = 0.0
    nonfinite = compared = 0
    top1: list[float] = []
    shapes_ok = True
    dtype = next(iter(ref.values())).dtype
    for key, a in ref.items():
        b = cand[key]
        if a.shape != b.shape:
            shapes_ok = False
            continue
        a64, b64 = a.detach().double().cpu(), b.detach().double().cpu()
        odd_a, odd_b = ~torch.isfinite(a64), ~torch.isfinite(b64)
        if bool(odd_a.any()) or bool(odd_b.any()):
            # NaN and Inf compare by place (a NaN in the reference made every error NaN, which max() then dropped):
            # the same non-finite values at the same places agree, anything else is a failure
            if not (torch.equal(odd_a, odd_b) and torch.equal(torch.isnan(a64), torch.isnan(b64))
                    and torch.equal(a64[odd_a & ~torch.isnan(a64)], b64[odd_b & ~torch.isnan(b64)])):
                return _failed(f"{key} has NaN or Inf values at other places than the reference", inf=True)
            nonfinite += int(odd_a.sum())
            a64, b64 = a64[~odd_a], b64[~odd_b]
        elif a.ndim == 2 and a.shape[0] > 0 and a.shape[1] > 1 and a.is_floating_point():
            top1.append(float((a64.argmax(1) == b64.argmax(1)).double().mean()))
        compared += a64.numel()
        err = float((a64 - b64).abs().max()) if a64.numel() else 0.0
        scale = float(a64.abs().max()) if a64.numel() else 0.0
        max_abs = max(max_abs, err)
        max_rel = max(max_rel, err / scale if scale > 0 else err)
    limit = DEFAULT_TOLERANCES.get(dtype, 1e-5) if tol is None else tol
    agree = min(top1) if top1 else None
    passed = shapes_ok and max_rel <= limit
    if not shapes_ok:
        detail = "output shapes differ: " + ", ".join(
            f"{k} {tuple(ref[k].shape)} vs {tuple(cand[k].shape)}" for k in ref if ref[k].shape != cand[k].shape)
    else:
        detail = f"max abs error {max_abs:.3g}, max relative error {max_rel:.3g} (tolerance {limit:g})"
        if nonfinite:
            detail += f"; {nonfinite} NaN or Inf value{'s' if nonfinite > 1 else ''}, at the same places in both"
        if not compared:
            detail += "; but every output is empty (no detection, say): no value was compared"
    return {"passed": passed, "max_abs": max_abs, "max_rel": max_rel, "top1": agree,
            "tolerance": limit, "shapes_equal": shapes_ok, "detail": detail, "compared": compared,
            "nonfinite": nonfinite}


def map_tensors(out, fn):
    """``out`` with ``fn`` applied to every tensor, containers (named tuples and dataclasses included) kept.

    Lists, tuples and dicts come back as new containers a module run on the result may update in place: fx's
    ``immutable_list`` and ``immutable_dict`` as plain ``list`` and ``dict``, any other subclass as its own class
    (``torch.max``'s result keeps ``.values``), else plain. An ``OrderedDict`` stays one, a named tuple keeps its
    class, a ``torch.Size`` is returned as it is. A mapping that is also a dataclass (a Hugging Face
    ``ModelOutput``) comes back as its own class built from the mapped values, so its attributes and keys agree,
    or as a plain dict when its class cannot be built so.
    """
    if isinstance(out, torch.Tensor):
        return fn(out)
    if isinstance(out, Mapping):
        mapped = {k: map_tensors(v, fn) for k, v in out.items()}
        if is_dataclass_instance(out):
            return _rebuilt(out, mapped)
        return collections.OrderedDict(mapped) if type(out) is collections.OrderedDict else mapped
    if isinstance(out, torch.Size):
        return out
    if isinstance(out, tuple) and hasattr(out, "_fields"):  # a named tuple
        return type(out)(*(map_tensors(v, fn) for v in out))
    if isinstance(out, (tuple, list)):
        items = [map_tensors(v, fn) for v in out]
        plain = tuple if isinstance(out, tuple) else list
        if type(out) in (tuple, list) or type(out).__module__.startswith("torch.fx"):  # fx's immutable_list too
            return plain(items)
        try:  # a result type that reads .values / .indices (torch.return_types), a user's list subclass
            new = type(out)(items)
        except Exception:  # a class built otherwise: the plain container still holds every value
            return plain(items)
        # kept only when the class took the items as they are (a tuple built from *items would wrap the list)
        same = type(new) is type(out) and len(new) == len(items) and all(a is b for a, b in zip(new, items))
        return new if same else plain(items)
    if is_dataclass_instance(out):  # a shallow copy with each field mapped (no __init__ or __post_init__ run again)
        new = copy.copy(out)
        for f in dataclasses.fields(out):
            object.__setattr__(new, f.name, map_tensors(getattr(out, f.name), fn))
        return new
    return out


def _rebuilt(out: Mapping, mapped: dict):
    """``type(out)(**mapped)`` (a ``ModelOutput`` sets each field as attribute and key), when that gives back the
    same keys; else ``mapped``, the plain dict."""
    try:
        new = type(out)(**mapped)
    except Exception:  # a class whose __init__ takes other arguments: the plain dict still holds every value
        return mapped
    return new if isinstance(new, Mapping) and list(new.keys()) == list(mapped) else mapped


def detached(out):
    """``out`` (a tensor or nested tuple/list/dict/dataclass of them) with every tensor detached, containers kept."""
    return map_tensors(out, lambda t: t.detach())

