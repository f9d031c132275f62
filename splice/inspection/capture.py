"""Run a spliced model on images and record every warp's raw parameters per image."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import torch
from torch import Tensor, nn

from ..compare import class_logits
from ..copies import modes_kept
from ..errors import DataError, SpliceError

__all__ = ["Capture", "capture", "check_positive_int"]


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
    from ..data import normalise
    from ..surgery import warps_of

    warps = warps_of(model)
    if not warps:
        raise SpliceError("capture needs a spliced model with at least one warp; this model has none. "
                          "Splice one first with splice.insert(...) or 'splice insert'.")
    if not isinstance(images, Tensor) or images.dim() != 4:
        raise DataError(f"capture needs images (N, C, H, W) in [0, 1]; got {getattr(images, 'shape', images)!r}.")
    check_positive_int("batch_size", batch_size)
    param = next(iter(model.parameters()), None)
    device = param.device if param is not None else torch.device("cpu")
    dtype = param.dtype if param is not None else torch.float32
    was_recording = {name: (w.record, w.last_theta) for name, w in warps.items()}
    thetas: dict[str, list[Tensor]] = {name: [] for name in warps}
    outputs: list[Tensor] = []
    single_tensor = True
    runs = {name: 0 for name in warps}
    handles = [w.register_forward_hook(lambda m, a, o, name=name: runs.__setitem__(name, runs[name] + 1))
               for name, w in warps.items()]
    try:
        with modes_kept(model):
            model.eval()
            for w in warps.values():
                w.record = True
            with torch.no_grad():
                for start in range(0, images.shape[0], batch_size):
                    x = normalise(images[start:start + batch_size], normalisation).to(device=device, dtype=dtype)
                    runs.update(dict.fromkeys(runs, 0))
                    out = class_logits(model(x))
                    _check_one_call(runs)
                    for name, w in warps.items():
                        thetas[name].append(w.last_theta.to("cpu", torch.float64))
                    if isinstance(out, Tensor) and out.dim() == 2:
                        outputs.append(out.to("cpu", torch.float32))
                    else:
                        single_tensor = False
    finally:
        for h in handles:
            h.remove()
        for name, w in warps.items():
            w.record, w.last_theta = was_recording[name]
    return Capture(
        thetas={name: torch.cat(parts) for name, parts in thetas.items()},
        logits=torch.cat(outputs) if single_tensor and outputs else None,
    )


def _check_one_call(runs: Mapping[str, int]) -> None:
    """Refuse a warp that ran other than once in a forward: the capture keeps one ``theta`` per image."""
    odd = {name: n for name, n in runs.items() if n != 1}
    if odd:
        name, n = next(iter(odd.items()))
        if n == 0:
            raise DataError(f"warp {name!r} did not run in a forward on these images (its point is not reached at "
                            "this input size); inspect the model on images of the size it was spliced at")
        raise DataError(f"warp {name!r} ran {n} times in one forward (its module is called {n} times, as a module "
                        "spliced --within and called on several inputs is); inspection describes one warp per image, "
                        "so it cannot tell which call it would draw: inspect a splice whose warps run once")


def check_positive_int(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise DataError(f"{name} must be a positive integer; got {value!r}.")
    return value

