"""Tensors a check swaps in: the perturbed warp heads, and a model that takes its weights as inputs."""

from __future__ import annotations

import torch
from torch import nn

from ..compare import tensors_out
from ..copies import tree_copy
from ..errors import SpliceError
from ..surgery import WARP_PREFIX, warps_of
from ..warps.perturb import final_layer, perturbation_theta

__all__ = ["perturbed_tensors", "perturbed_copy", "WeightsAsInputs"]


def perturbed_tensors(model: nn.Module) -> dict[str, torch.Tensor]:
    """``{parameter name: value}`` that turns every warp into the fixed perturbation (:func:`perturbation_theta`)."""
    out: dict[str, torch.Tensor] = {}
    for point, warp in warps_of(model).items():
        final = final_layer(warp)
        rel = next(n for n, m in warp.named_modules() if m is final)
        prefix = f"{WARP_PREFIX}.{point}.{rel}"
        cfg = warp.config
        out[f"{prefix}.weight"] = torch.zeros_like(final.weight)
        out[f"{prefix}.bias"] = perturbation_theta(cfg.family, cfg.tps_k, dtype=final.bias.dtype).to(final.bias.device)
    return out

def perturbed_copy(model: nn.Module) -> nn.Module:
    """A copy of ``model`` whose warps all apply :func:`perturbation_theta` (the caller's model is untouched).

    Only the warps are copied; the base modules, parameters and buffers are
    shared with ``model`` (read them, do not train the copy).
    """
    twin = _own_warps(model)
    params = dict(twin.named_parameters())
    with torch.no_grad():
        for name, value in perturbed_tensors(twin).items():
            if not name.startswith(WARP_PREFIX + "."):
                raise SpliceError(f"internal error: {name} is not a warp tensor")
            params[name].copy_(value)
    return twin

def _own_warps(model: nn.Module) -> nn.Module:
    """A shallow copy of ``model`` that owns a deep copy of its warp container."""
    if WARP_PREFIX not in model._modules:
        return tree_copy(model)
    twin = object.__new__(type(model))
    twin.__dict__.update(model.__dict__)
    twin.__dict__["_modules"] = dict(model._modules)  # a new mapping: the original keeps its warps
    twin._modules[WARP_PREFIX] = tree_copy(model._modules[WARP_PREFIX])
    return twin

def _skeleton(module: nn.Module, memo: dict[int, nn.Module]) -> nn.Module:
    """A copy of ``module`` that owns its parameter, buffer and child mappings but shares every tensor.

    Modules that appear more than once stay shared in the copy (``memo``).
    """
    if id(module) in memo:
        return memo[id(module)]
    twin = object.__new__(type(module))
    memo[id(module)] = twin
    twin.__dict__.update(module.__dict__)
    twin.__dict__["_parameters"] = dict(module._parameters)
    twin.__dict__["_buffers"] = dict(module._buffers)
    twin.__dict__["_modules"] = {k: (_skeleton(m, memo) if m is not None else None)
                                 for k, m in module._modules.items()}
    return twin

class WeightsAsInputs(nn.Module):
    """The model with every parameter and persistent buffer taken as an input after its ``n_inputs`` inputs.

    Built on a :func:`_skeleton` of the model: no tensor is copied and the
    caller's modules are never touched. The extra inputs are named after the
    state-dict entries (:attr:`names`); a tensor registered under several
    names (tied weights) is one input, under its first name. Non-persistent
    buffers (a warp's base grid) stay constants of the graph.
    """

    def __init__(self, model: nn.Module, *, keep_output: bool = False, n_inputs: int = 1) -> None:
        super().__init__()
        self.keep_output = keep_output
        self.n_inputs = n_inputs
        self.output = None  # with keep_output: what the last forward pass returned
        state = model.state_dict(keep_vars=True)
        first: dict[int, str] = {}
        for name, t in state.items():
            if isinstance(t, torch.Tensor):
                first.setdefault(id(t), name)
        self.names = list(first.values())
        self.values = [state[n].detach() for n in self.names]
        index = {key: i for i, key in enumerate(first)}
        memo: dict[int, nn.Module] = {}
        self.model = _skeleton(model, memo)
        self._slots: list[tuple[nn.Module, str, int]] = []
        for twin in memo.values():
            persistent_off = getattr(twin, "_non_persistent_buffers_set", set())
            for store in ("_parameters", "_buffers"):
                slots = twin.__dict__[store]
                for attr, t in list(slots.items()):
                    if t is None or id(t) not in index or (store == "_buffers" and attr in persistent_off):
                        continue
                    del slots[attr]
                    self._slots.append((twin, attr, index[id(t)]))

    def forward(self, *args):
        xs, tensors = args[:self.n_inputs], args[self.n_inputs:]
        for module, attr, i in self._slots:
            module.__dict__[attr] = tensors[i]  # a plain attribute: Module.__getattr__ is not consulted
        out = self.model(*xs)
        if self.keep_output:
            self.output = out  # a reference only: the tracer records no operation for it
        return tensors_out(out)
