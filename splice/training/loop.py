"""The inner training step and the evaluation pass.

Kept free of files, progress and process groups: :mod:`splice.training.epochs` owns those.
A step is forward, loss (cross-entropy with label smoothing, plus the decaying
identity regulariser on the warps), backward, optional gradient clipping and
one optimiser step, under autocast + a gradient scaler on CUDA. The step
notes whether its loss was finite (:attr:`Stepper.finite`); the step itself
is still taken, so that every process of a distributed run stays in step, and
the loop stops before anything of that state is saved.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Mapping

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from ..compare import logits_or_refuse
from ..copies import modes_kept
from ..errors import SpliceError

__all__ = ["ThetaTap", "identity_penalty", "Stepper", "evaluate"]


class ThetaTap:
    """Forward hooks that keep each warp head's latest output (with its graph) for the regulariser."""

    def __init__(self, warps: Mapping[str, nn.Module]) -> None:
        self.warps = dict(warps)
        self.theta: dict[str, Tensor] = {}
        self._handles = [w.head.register_forward_hook(self._hook(name)) for name, w in self.warps.items()]

    def _hook(self, name: str):
        def hook(_module, _args, output):
            self.theta[name] = output
        return hook

    def close(self) -> None:
        for h in self._handles:
            h.remove()
        self._handles = []
        self.theta = {}


# side of the coarse grid on which the identity regulariser is measured (the
# affine part of a warp is fixed by a few points; 8x8 is plenty and cheap).
_REG_SIDE = 8


def identity_penalty(warps: Mapping[str, nn.Module], theta: Mapping[str, Tensor]) -> Tensor | None:
    """Mean over warps of the mean squared distance between each sampling grid and the identity grid."""
    from ..warps.grids import base_grid

    terms = []
    for name, t in theta.items():
        grid = warps[name].grid(t, _REG_SIDE, _REG_SIDE)
        ident = base_grid(_REG_SIDE, _REG_SIDE, dtype=grid.dtype, device=grid.device)[:, :2]
        terms.append((grid.reshape(grid.shape[0], -1, 2) - ident).pow(2).mean())
    if not terms:
        return None
    return torch.stack(terms).mean()


class Stepper:
    """One optimisation step on a batch; accumulates the epoch's loss and accuracy on the device."""

    def __init__(self, model: nn.Module, optimizer: torch.optim.Optimizer, *, device: torch.device,
                 label_smoothing: float = 0.0, grad_clip: float = 0.0, amp: bool = False,
                 tap: ThetaTap | None = None) -> None:
        self.model = model
        self.optimizer = optimizer
        self.device = device
        self.label_smoothing = label_smoothing
        self.grad_clip = grad_clip
        self.amp = amp
        self.scaler = torch.amp.GradScaler("cuda") if amp else None
        self.tap = tap
        self.reg_weight = 0.0
        self.finite = True  # the last step's loss was finite
        self.last_loss: float | None = None  # the last step's loss when it was not
        self.reset_totals()

    def reset_totals(self) -> None:
        self.loss_sum = torch.zeros((), dtype=torch.float64, device=self.device)
        self.correct = torch.zeros((), dtype=torch.float64, device=self.device)
        self.seen = 0

    def _params(self) -> list[Tensor]:
        return [p for g in self.optimizer.param_groups for p in g["params"] if p.grad is not None]

    def step(self, x: Tensor, y: Tensor) -> None:
        ctx = torch.autocast(device_type="cuda", dtype=torch.float16) if self.amp else contextlib.nullcontext()
        with ctx:
            out = logits_or_refuse(self.model(x), "the model")
            loss = F.cross_entropy(out, y, label_smoothing=self.label_smoothing)
            total = loss
            if self.tap is not None and self.reg_weight > 0:
                penalty = identity_penalty(self.tap.warps, self.tap.theta)
                if penalty is not None:
                    total = loss + self.reg_weight * penalty
        if self.seen == 0 and not loss.requires_grad:  # an epoch's first step: a loss no trained parameter reaches
            raise SpliceError(
                "the loss does not depend on any parameter being trained: the model's outputs do not depend on its "
                "input at all (or only through detached or non-differentiable operations), so there is nothing for "
                "the warps to learn; 'splice verify' shows it, train or load the base first")
        # one host sync per step: a NaN/Inf loss stops the run at this step (the caller decides how)
        self.finite = bool(torch.isfinite(total.detach()))
        self.last_loss = float(total.detach()) if not self.finite else None
        self.optimizer.zero_grad(set_to_none=True)
        if self.scaler is not None:
            self.scaler.scale(total).backward()
            if self.grad_clip > 0:
                self.scaler.unscale_(self.optimizer)
                torch.nn.utils.clip_grad_norm_(self._params(), self.grad_clip)
            self.scaler.step(self.optimizer)
            self.scaler.update()
        else:
            total.backward()
            if self.grad_clip > 0:
                torch.nn.utils.clip_grad_norm_(self._params(), self.grad_clip)
            self.optimizer.step()
        with torch.no_grad():
            n = y.shape[0]
            self.loss_sum += loss.detach().double() * n
            self.correct += (out.detach().argmax(1) == y).double().sum()
            self.seen += n
        if self.tap is not None:
            self.tap.theta = {}

    def totals(self) -> tuple[float, float, int]:
        """``(loss sum, correct, images)`` of this process since :meth:`reset_totals`."""
        return float(self.loss_sum), float(self.correct), self.seen


@torch.no_grad()
def evaluate(model: nn.Module, dataset, indices: Tensor, *, prepare: Callable[[Tensor], Tensor],
             device: torch.device, batch_size: int = 256, amp: bool = False, workers: int = 0
             ) -> tuple[float, float, int]:
    """``(loss sum, correct, images)`` of ``model`` on ``dataset[indices]`` in eval mode (modes restored)."""
    from . import batches as _b

    loss_sum, correct, seen = 0.0, 0.0, 0
    ctx = torch.autocast(device_type="cuda", dtype=torch.float16) if amp else contextlib.nullcontext()
    with modes_kept(model):
        model.eval()
        for x, y in _b.iterate(dataset, _b.index_batches(indices, batch_size), workers=workers):
            x, y = prepare(x), y.to(device)
            with ctx:
                out = logits_or_refuse(model(x), "the model")
            loss_sum += float(F.cross_entropy(out.float(), y, reduction="sum"))
            correct += float((out.argmax(1) == y).sum())
            seen += y.shape[0]
    return loss_sum, correct, seen
