"""Which parameters train: freeze patterns, optimiser groups, train/eval modes, gradient averaging."""

from __future__ import annotations

import fnmatch
from collections.abc import Sequence

import torch
from torch import nn

from ..errors import RecipeError
from ..recipes import Recipe
from ..surgery import WARP_PREFIX

__all__ = ["frozen_names", "frozen_modules", "frozen_by_model", "param_groups", "make_optimizer", "set_requires_grad",
           "set_modes", "warp_lr", "set_warp_lr",
           "grad_reducer", "is_warp_name"]


def is_warp_name(name: str) -> bool:
    """True for a parameter or buffer name that belongs to a warp."""
    return name.startswith(WARP_PREFIX + ".")


def frozen_names(model: nn.Module, patterns: Sequence[str], where: str) -> set[str]:
    """Parameter names frozen by ``freeze`` glob patterns (a pattern matching nothing is an error)."""
    frozen: set[str] = set()
    modules = [name for name, _ in model.named_modules() if name]
    for pat in patterns:
        hit = {m for m in modules if fnmatch.fnmatchcase(m, pat)}
        params = {n for n, _ in model.named_parameters()
                  if fnmatch.fnmatchcase(n, pat) or any(n.startswith(m + ".") for m in hit)}
        if not params:
            shown = ", ".join(modules[:8]) + (", …" if len(modules) > 8 else "")
            raise RecipeError(
                f"{where}: freeze pattern {pat!r} matches no module or parameter of the model; "
                f"module names look like: {shown}"
            )
        frozen |= params
    return frozen


def frozen_modules(model: nn.Module, patterns: Sequence[str]) -> list[nn.Module]:
    return [m for name, m in model.named_modules() if name and any(fnmatch.fnmatchcase(name, p) for p in patterns)]


def frozen_by_model(model: nn.Module) -> tuple[set[str], list[tuple[str, nn.Module]]]:
    """The base parameters that arrive with ``requires_grad=False`` (the model's own code froze them), and the
    largest modules all of whose parameters are among them: frozen as a ``freeze`` pattern naming them would be
    (kept out of the optimiser, the modules in eval mode, BatchNorm statistics included)."""
    names = {n for n, p in model.named_parameters() if not p.requires_grad and not is_warp_name(n)}
    modules: list[tuple[str, nn.Module]] = []
    if not names:
        return names, modules
    for qualname, m in model.named_modules():
        if not qualname or any(qualname.startswith(q + ".") for q, _ in modules):
            continue
        own = [f"{qualname}.{n}" for n, _ in m.named_parameters()]
        if own and all(n in names for n in own):
            modules.append((qualname, m))
    return names, modules


def warp_lr(recipe: Recipe, base_frozen: bool) -> float:
    """The warp heads' learning rate: ``lr`` while the base is frozen (nothing else trains), ``warp_lr_scale * lr``
    while the base trains too (``joint``, the joint phase of ``staged``)."""
    return recipe.lr * (1.0 if base_frozen else recipe.warp_lr_scale)


def set_warp_lr(optimizer: torch.optim.Optimizer, recipe: Recipe, base_frozen: bool) -> None:
    """Set the warp groups' ``base_lr`` (the schedule's peak) for the phase: see :func:`warp_lr`."""
    for g in optimizer.param_groups:
        if g.get("kind") == "warps":
            g["base_lr"] = warp_lr(recipe, base_frozen)


def param_groups(model: nn.Module, recipe: Recipe, frozen: set[str]) -> list[dict]:
    """Base and warp groups, each split into decayed (matrices, kernels) and undecayed (biases, norms); the warp
    groups at the first epoch's :func:`warp_lr`."""
    groups: dict[tuple[str, bool], list] = {}
    for name, p in model.named_parameters():
        if name in frozen:
            continue
        is_warp = is_warp_name(name)
        if recipe.mode == "warp-only" and not is_warp:
            continue
        # weight decay on weight matrices and kernels only (common practice, no source)
        groups.setdefault(("warps" if is_warp else "base", p.dim() > 1), []).append(p)
    out = []
    for (kind, decay), params in sorted(groups.items()):
        base_lr = warp_lr(recipe, recipe.base_frozen(0)) if kind == "warps" else recipe.lr
        out.append({"params": params, "lr": base_lr, "base_lr": base_lr, "kind": kind,
                    "weight_decay": recipe.weight_decay if decay else 0.0})
    return out


def make_optimizer(groups: list[dict], recipe: Recipe) -> torch.optim.Optimizer:
    if recipe.optimizer == "sgd":
        return torch.optim.SGD(groups, lr=recipe.lr, momentum=recipe.momentum)
    return torch.optim.AdamW(groups, lr=recipe.lr)


def set_modes(net: nn.Module, warps, base_frozen: bool, frozen: list[nn.Module]) -> None:
    """Train mode, except a frozen base (BatchNorm included) and frozen modules, which stay in eval mode."""
    net.train()
    if base_frozen:
        net.eval()  # every base module, BatchNorm included, in eval mode
        for w in warps.values():
            w.train()
    for m in frozen:
        m.eval()


def set_requires_grad(net: nn.Module, frozen: set[str], base_frozen: bool) -> None:
    for name, p in net.named_parameters():
        p.requires_grad_(name not in frozen and (is_warp_name(name) or not base_frozen))


def grad_reducer(ctx):
    """A function averaging gradients over every rank (``None`` in a single process)."""
    if not ctx.distributed:
        return None
    import torch.distributed as dist

    def reduce(grads: list[torch.Tensor]) -> None:
        if not grads:
            return
        flat = torch.cat([g.reshape(-1) for g in grads])
        dist.all_reduce(flat)
        flat /= ctx.world_size
        offset = 0
        for g in grads:
            g.copy_(flat[offset:offset + g.numel()].view_as(g))
            offset += g.numel()
    return reduce
