"""The classifier's final layer, and zeroing it before a fine-tune on data it is confidently wrong about.

Why (measured on the digit folders of ``benchmarks/bench_efficacy.py``): a
network trained on upright digits is confidently wrong on moved ones (its
validation loss there is 6.8, against ln 10 = 2.3 for a uniform guess). When
``baseline`` fine-tunes it, that head sends large, coherent error gradients
into the trunk, and AdamW at the recipe's learning rate takes full-size steps
on them: in the first epoch 75-90 % of the second conv layer's channels stop
firing on any image (dead ReLUs), and the run learns with what is left. A lower
learning rate keeps the channels alive but spends its steps shrinking the
logits (accuracy flat), and gradient clipping cannot help, since AdamW's step
does not scale with the gradient norm. Zeroing the final layer first (every
logit 0, so the trunk gets no gradient until the head has re-learnt) lifted
the 8-epoch result from 40 % to 60 % and from 55 % to 79 % validation accuracy
on the two plain networks of that benchmark.

:func:`final_layer` finds the layer without names or graph tracing: the last
module with parameters to run in a forward pass, provided its output *is* the
model's output.
"""

from __future__ import annotations

import math

import torch
from torch import Tensor, nn

from ..compare import class_logits
from ..copies import modes_kept

__all__ = ["final_layer", "zero_final_layer_", "confidently_wrong"]


@torch.no_grad()
def final_layer(model: nn.Module, example: Tensor) -> str | None:
    """Name of the module whose output is ``model(example)`` itself, if it is a leaf with parameters."""
    calls: list[tuple[str, object]] = []
    handles = []
    for name, module in model.named_modules():
        if name and not any(True for _ in module.children()) and any(True for _ in module.parameters(recurse=False)):
            handles.append(module.register_forward_hook(
                lambda _m, _a, out, name=name: calls.append((name, out))))
    try:
        with modes_kept(model):
            out = class_logits(model.eval()(example))
    finally:
        for h in handles:
            h.remove()
    if calls and calls[-1][1] is out:
        return calls[-1][0]
    return None


@torch.no_grad()
def zero_final_layer_(model: nn.Module, name: str) -> None:
    """Set every parameter of ``model``'s module ``name`` to zero, in place (the trailing ``_``)."""
    for p in model.get_submodule(name).parameters(recurse=False):
        p.zero_()


def confidently_wrong(val_loss: float, num_classes: int) -> bool:
    """True when the mean validation loss is above that of a uniform guess, ln(classes)."""
    return num_classes > 1 and val_loss > math.log(num_classes)
