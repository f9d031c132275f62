"""torch.export: the program as bytes, and its parity with the eager model."""

from __future__ import annotations

import copy
import io
import os
import warnings
from pathlib import Path

import torch
from torch import nn

from ..compare import flatten_outputs
from ..copies import private_buffers
from ..errors import SpliceError, SpliceWarning, first_line
from ..graph.exported import quiet_export
from .onnx import as_inputs, data_dependent_site
from .parity import (
    as_batches,
    compare_flat,
    merge_parities,
    parity_summary,
    parity_tolerance,
)
from .weights import perturbed_copy, perturbed_tensors

__all__ = ["export_pt2_bytes", "pt2_parity"]


class _FlatOutputs(nn.Module):
    """``model`` returning its output's tensors as one flat tuple, in :func:`~splice.compare.flatten_outputs`'s
    order (a module of its own: torch.export reads a GraphModule's graph, not a ``forward`` set on a copy)."""

    def __init__(self, model: nn.Module):
        super().__init__()
        self.model = model
        self.training = model.training

    def forward(self, *args):
        return tuple(flatten_outputs(self.model(*args)).values())


def _program_bytes(model: nn.Module, xs: tuple, dims) -> bytes:
    with quiet_export():  # torch's guards and graphs are not the user's to read (shown with --debug)
        program = torch.export.export(model, xs, dynamic_shapes=dims)
    buf = io.BytesIO()
    torch.export.save(program, buf)
    return buf.getvalue()


def export_pt2_bytes(model: nn.Module, example, *, dynamic_batch: bool = False) -> bytes:
    """``torch.export.export`` + ``torch.export.save`` into bytes (the model is not changed).

    ``example`` is a tensor, or a tuple of one tensor per model input. An output whose structure torch.export
    cannot export or store (a dataclass, a named tuple: pytree classes it was not told of) is exported as the flat
    tuple of its tensors, in the order splice names them (``out.logits, out.features``), with a warning.
    """
    xs = as_inputs(example)
    model = private_buffers(model).eval()  # exported on a twin: the caller's modes and buffers stay
    batch = torch.export.Dim("batch", min=1, max=4096)
    dims = tuple({0: batch} for _ in xs) if dynamic_batch else None
    try:
        return _program_bytes(model, xs, dims)
    except Exception as exc:
        first = f"{type(exc).__name__}: {first_line(exc)}"
        try:
            # the wrapper takes ``*args``, whose dynamic shapes torch.export reads as one tuple
            data = _program_bytes(_FlatOutputs(model), xs, None if dims is None else (dims,))
        except Exception:
            guard = data_dependent_site(exc)
            if guard is not None:
                raise SpliceError(f"torch.export cannot follow a Python branch or number taken from tensor values"
                                  f"{guard}; compute it with tensors (torch.where, or torch.cond for a branch) so "
                                  "that the program carries it, or export ONNX with --exporter torchscript") from exc
            raise SpliceError(f"torch.export failed: {first}") from exc
    warnings.warn(f"torch.export could not keep the model's output structure ({first}); "
                  "the program returns its tensors as a flat tuple, in the order 'splice verify' names them",
                  SpliceWarning, stacklevel=2)
    return data


def pt2_parity(model: nn.Module, program, inputs, *, perturb: bool = True, tol: float | None = None) -> dict:
    """Reload a torch.export program (path, bytes or ``ExportedProgram``) and compare it with ``model``.

    Same contract as :func:`onnx_parity`; the perturbed check swaps the warp
    heads' final tensors in the reloaded program's module.
    """
    if isinstance(program, (bytes, bytearray)):
        ep = torch.export.load(io.BytesIO(bytes(program)))
    elif isinstance(program, (str, os.PathLike)):
        if not Path(program).is_file():
            raise SpliceError(f"torch.export file '{program}' does not exist; check the path")
        ep = torch.export.load(str(program))
    else:
        ep = program
    model = private_buffers(model).eval()  # run on a twin: the caller's modes and buffers stay
    tol = parity_tolerance(model, tol)
    batches = as_batches(inputs)
    def run(torch_model, exported) -> dict:
        results = []
        for xs in batches:
            with torch.no_grad():
                ref = torch_model(*xs)
                try:
                    out = exported(*xs)
                except Exception as exc:
                    first = first_line(exc)
                    return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                            "detail": f"the exported program failed on a batch of {xs[0].shape[0]}: {first}"}
            results.append(compare_flat(ref, list(flatten_outputs(out).values()), tol))
        return merge_parities(results)

    exported = ep.module()
    stored = run(model, exported)
    perturbed, how = None, None
    values = perturbed_tensors(model)
    if perturb and values:
        twin = perturbed_copy(model)
        swapped = torch.export.load(io.BytesIO(program)) if isinstance(program, (bytes, bytearray)) else None
        module = (swapped or copy.deepcopy(ep)).module()
        params = dict(module.named_parameters())
        if all(n in params for n in values):
            with torch.no_grad():
                for n, v in values.items():
                    params[n].copy_(v)
            how = "parameters"
        else:
            module = torch.export.export(twin, batches[0]).module()
            how = "re-export"
        perturbed = run(twin, module)
    return parity_summary(stored, perturbed, tol, [int(b[0].shape[0]) for b in batches], how)
