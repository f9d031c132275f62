"""The equivalence certificate: checks that a splice broke nothing.

(Core comparison helpers; the full ``verify`` command builds on them.)
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import torch

__all__ = ["flatten_outputs", "compare_outputs", "DEFAULT_TOLERANCES"]

# max error relative to the output's scale (max |y|), by dtype. float32 rounding
# through a bilinear resample at the identity stays near 1e-7; 1e-5 leaves room
# for deep networks (common practice, no source).
DEFAULT_TOLERANCES = {torch.float32: 1e-5, torch.float64: 1e-10, torch.float16: 1e-2, torch.bfloat16: 1e-2}


def flatten_outputs(out, prefix: str = "out") -> dict[str, torch.Tensor]:
    """Flatten tensors in nested tuple/list/dict outputs into ``{path: tensor}``."""
    if isinstance(out, torch.Tensor):
        return {prefix: out}
    if isinstance(out, Mapping):
        flat: dict[str, torch.Tensor] = {}
        for k in out:
            flat.update(flatten_outputs(out[k], f"{prefix}.{k}"))
        return flat
    if isinstance(out, Sequence) and not isinstance(out, (str, bytes)):
        flat = {}
        for i, v in enumerate(out):
            flat.update(flatten_outputs(v, f"{prefix}[{i}]"))
        return flat
    return {}


def compare_outputs(reference, candidate, *, tol: float | None = None) -> dict:
    """Compare two model outputs (any nesting). Returns numbers and a verdict.

    ``max_rel`` is the max absolute error divided by the reference's max
    absolute value (per output, then the worst). ``top1`` is the fraction of
    rows whose argmax agrees, for 2-D classifier-like outputs (else ``None``).
    """
    ref, cand = flatten_outputs(reference), flatten_outputs(candidate)
    if not ref:
        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                "detail": f"the model returned {type(reference).__name__}, which holds no tensors"}
    if set(ref) != set(cand):
        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                "detail": f"output structure differs: {sorted(ref)} vs {sorted(cand)}"}
    max_abs = 0.0
    max_rel = 0.0
    top1: list[float] = []
    shapes_ok = True
    dtype = next(iter(ref.values())).dtype
    for key, a in ref.items():
        b = cand[key]
        if a.shape != b.shape:
            shapes_ok = False
            continue
        a64, b64 = a.detach().double().cpu(), b.detach().double().cpu()
        if not torch.isfinite(b64).all():
            return {"passed": False, "max_abs": float("inf"), "max_rel": float("inf"), "top1": None,
                    "detail": f"{key} has NaN or Inf values"}
        err = float((a64 - b64).abs().max()) if a64.numel() else 0.0
        scale = float(a64.abs().max()) if a64.numel() else 0.0
        max_abs = max(max_abs, err)
        max_rel = max(max_rel, err / scale if scale > 0 else err)
        if a.ndim == 2 and a.shape[1] > 1 and a.is_floating_point():
            top1.append(float((a64.argmax(1) == b64.argmax(1)).double().mean()))
    limit = DEFAULT_TOLERANCES.get(dtype, 1e-5) if tol is None else tol
    agree = min(top1) if top1 else None
    passed = shapes_ok and max_rel <= limit
    if not shapes_ok:
        detail = "output shapes differ: " + ", ".join(
            f"{k} {tuple(ref[k].shape)} vs {tuple(cand[k].shape)}" for k in ref if ref[k].shape != cand[k].shape)
    else:
        detail = f"max abs error {max_abs:.3g}, max relative error {max_rel:.3g} (tolerance {limit:g})"
    return {"passed": passed, "max_abs": max_abs, "max_rel": max_rel, "top1": agree,
            "tolerance": limit, "shapes_equal": shapes_ok, "detail": detail}
