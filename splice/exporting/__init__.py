"""Exports of a spliced model (ONNX, torch.export) with a parity check.

Every export is compared with the eager model twice before anything is kept:

1. *as stored* -- the exported program against torch on a seeded N(0,1) batch;
2. *perturbed* -- every warp set to one fixed, non-identity warp (see
   :func:`~splice.warps.perturb.perturbation_theta`) on a copy of the model,
   and the same exported graph run with the matching weights. Identity parity
   alone cannot show a sampler bug: at the identity a broken ``grid_sample``
   lowering that ignores the grid still returns its input.

For the perturbed check the exported graph is reused: the warp heads' final
layer tensors are declared overridable inputs of the ONNX graph (their values
unchanged) and fed the perturbed values in a second run of the same
onnxruntime session; for torch.export they are swapped in the reloaded
program. So the graph that ships is the graph that was checked, and the export
and the session are built once. When an exporter renamed or shared those
tensors beyond repair, the perturbed copy is exported again instead.

``splice verify --onnx`` ships nothing, so it checks a lighter graph
(:func:`check_onnx_graph`): the same export with every weight an input
instead of a stored initializer (``export_onnx_bytes(weights_as_inputs=True)``).
Writing 100 MB of weights into the file and having onnxruntime prepare them
costs more than the rest of the check on a resnet50; fed at run time, the
same operators run on the same values. It is traced with the perturbed head
tensors, so the tracer's own forward pass is the torch side of the perturbed
comparison.

An export that fails its check raises :class:`~splice.errors.CheckFailed` and
leaves no file: the program is built and checked in memory, then written with
:func:`splice.fileio.atomic_write_bytes` (a temporary file in the target's folder
renamed into place).

Modules: :mod:`.onnx` (exporters, opsets), :mod:`.weights` (perturbed heads,
weights as graph inputs), :mod:`.parity` (onnxruntime parity), :mod:`.branches` (places the tracer fixed
a Python value), :mod:`.pt2`
(torch.export), :mod:`.run` (:func:`export`, the command; :func:`export_model` for a spliced model in memory).
"""

from __future__ import annotations

from ..warps.perturb import PERTURBATION_SIZE, final_layer, perturbation_theta
from .onnx import DYNAMO_MIN_OPSET, EXPORTERS, MIN_OPSET, check_opset, export_onnx_bytes
from .parity import EXPORT_TOLERANCES, check_onnx_graph, onnx_parity
from .pt2 import export_pt2_bytes, pt2_parity
from .run import export, export_model
from .weights import WeightsAsInputs, perturbed_copy, perturbed_tensors

__all__ = [
    "MIN_OPSET",
    "DYNAMO_MIN_OPSET",
    "EXPORTERS",
    "EXPORT_TOLERANCES",
    "PERTURBATION_SIZE",
    "export",
    "export_model",
    "export_onnx_bytes",
    "export_pt2_bytes",
    "onnx_parity",
    "check_onnx_graph",
    "check_opset",
    "pt2_parity",
    "perturbation_theta",
    "perturbed_copy",
    "perturbed_tensors",
    "final_layer",
    "WeightsAsInputs",
]
