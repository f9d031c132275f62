"""Label-free diagnostics: how a model does on site images, told without a single label.

On a sample of the site images (:data:`SAMPLE` at most, a fixed random
choice), :func:`site_diagnostics` reports

- ``confidence``: the mean of the top softmax probability;
- ``entropy``: the mean prediction entropy, in nats;
- ``class_balance``: the entropy of the mean prediction divided by ``log K``
  (1 when the classes are predicted evenly, 0 when everything lands in one:
  the collapse an entropy objective can fall into);
- ``agreement``: the share of predictions that stay the same when the image
  is first moved by a small random warp (:data:`splice.adapt.objective.EXTRA`),
  over ``rewarps`` draws. A model that reads moved images well is unmoved by
  small extra motion; a base that only knows upright images is not;
- ``warp_spread`` per warp with a matrix: the spread of the warps its head
  applies to the site images (standard deviation of the rotation angle, mean
  and standard deviation of the isotropic scale, standard deviation of the
  shift; see :mod:`splice.adapt.ranges`).

Which of these tracked the accuracy on the digits is in the README, section
"Label-free adaptation".
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping

import torch
from torch import Tensor, nn

from ..compare import logits_or_refuse
from ..copies import private_buffers
from ..distort import random_distort
from ..surgery import base_view
from ..training import batches as _b
from ..training.pretrain import warp_inputs
from .images import Images
from .objective import EXTRA, prediction_entropy
from .ranges import site_statistics

__all__ = ["SAMPLE", "sample_indices", "base_view", "site_diagnostics"]

# Images the diagnostics look at: enough for a standard error under 1.5 points on
# an agreement of 0.9 (common practice, no source).
SAMPLE = 512


def sample_indices(n: int, seed: int, size: int = SAMPLE) -> Tensor:
    """A fixed random choice of at most ``size`` of ``n`` images, sorted."""
    if n <= size:
        return torch.arange(n)
    return torch.randperm(n, generator=_b.generator(seed, "diagnostics-sample"))[:size].sort().values


def _logits(model: nn.Module, images: Tensor, prepare: Callable[[Tensor], Tensor], batch_size: int) -> Tensor:
    return torch.cat([logits_or_refuse(model(prepare(chunk)), "the model").float()
                      for chunk in images.split(batch_size)])


def _spread(model: nn.Module, warps: Mapping[str, nn.Module], images: Tensor, prepare, batch_size: int) -> dict:
    out: dict[str, dict] = {}
    mats: dict[str, list[Tensor]] = {name: [] for name, w in warps.items() if w.family != "tps"}
    for chunk in images.split(batch_size):
        captured, _ = warp_inputs(model, warps, prepare(chunk))
        for name in mats:
            args = captured[name]
            w = warps[name]
            mats[name].append(w.matrix(w.predict(args[1] if len(args) > 1 else args[0])).double())
    for name, parts in mats.items():
        s = site_statistics(torch.cat(parts), size=tuple(warps[name].shape[1:]))
        out[name] = {"rotation_mean": round(s["angle_mean"], 4), "rotation_std": round(s["angle_std"], 4),
                     "scale_mean": round(s["scale_mean"], 4), "scale_std": round(s["scale_std"], 4),
                     "shift_mean": [round(s["shift_mean_x"], 4), round(s["shift_mean_y"], 4)],
                     "shift_std": round(s["shift_std"], 4)}
    return out


@torch.no_grad()
def site_diagnostics(model: nn.Module, warps: Mapping[str, nn.Module], site: Images, *,
                     prepare: Callable[[Tensor], Tensor], seed: int, rewarps: int = 2,
                     batch_size: int = 256) -> dict:
    """The label-free diagnostics of ``model`` on ``site`` (see the module docstring).

    They run on a :func:`~splice.copies.private_buffers` twin in eval mode (``warps``, modules of ``model``,
    are read through the twin's own): ``model`` keeps its modes, buffers and Python state.
    """
    names = {id(m): name for name, m in model.named_modules()}
    model = private_buffers(model).eval()
    warps = {k: model.get_submodule(names[id(w)]) if id(w) in names else w for k, w in warps.items()}
    images = site.batch(sample_indices(len(site), seed))
    logits = _logits(model, images, prepare, batch_size)
    p = logits.softmax(1)
    pred = p.argmax(1)
    mean = p.mean(0)
    agree = []
    for k in range(rewarps):
        moved, _ = random_distort(images, EXTRA, _b.generator(seed, "diagnostics-rewarp", k), fill=0.0)
        agree.append((_logits(model, moved, prepare, batch_size).argmax(1) == pred).double().mean())
    out = {
        "images": int(images.shape[0]),
        "confidence": round(float(p.max(1).values.mean()), 6),
        "entropy": round(float(prediction_entropy(logits).mean()), 6),
        "class_balance": round(float(-(mean * mean.clamp_min(1e-12).log()).sum()) / math.log(p.shape[1]), 6)
        if p.shape[1] > 1 else 1.0,
        "agreement": round(float(torch.stack(agree).mean()), 6) if agree else None,
    }
    if warps:
        out["warp_spread"] = _spread(model, warps, images, prepare, batch_size)
    return out
