"""The equivalence certificate: checks that a splice broke nothing (``splice verify``).

:func:`verify` opens a spliced folder with :func:`splice.store.open_folder`
(the weights file is read and hashed once; both the base network and the
spliced model are built empty and adopt its tensors, so they are separate
module trees over the same read-only weights) and runs the checks below;
:func:`verify_models` runs them on models in memory. Each check gives one
:class:`CheckResult` row ``{check, passed, numbers, detail}``.

``integrity``
    ``weights.safetensors`` hashes to the sha256 recorded in ``splice.json``.
    A mismatch is a *failed check* (exit 1), not an input error: the folder is
    well formed but its content is not what was certified. The file is named,
    with both hashes, and no other check runs on weights that cannot be trusted.
``finite``
    No NaN/Inf tensor in the weights file; offenders are listed by name. Also a
    failed check that stops the run (a diverged checkpoint is not usable).
``shapes``
    At every point the warp's output shape equals its input shape (and the
    shape recorded in the manifest), found with forward hooks on the warps; the
    model outputs have the base's shapes.
``outputs``
    Base and spliced model on a seeded N(0,1) probe batch ``(batch, *input_shape)``,
    one sample by default: at the identity a splice is exact sample by sample,
    so more samples cost time without adding evidence (``batch=N`` also
    exercises code that depends on the batch size; ``images=`` adds real
    inputs). Reported: max absolute error, max error relative to the output's scale (max ``|y|``)
    and top-1 agreement for 2-D classifier-like outputs; nested tuple, list and
    dict outputs are flattened. Default relative tolerances
    (:data:`DEFAULT_TOLERANCES`): float32 1e-5, float64 1e-10. A tuned model is
    compared with its warps reset to the identity on a copy, which shows that
    the base graph inside it is intact.
``images``
    The same on the ``images=`` files, resized and normalised as the manifest
    says (only when images are given).
``warps``
    Each warp's parameter distance from the identity
    (:meth:`splice.warps.Warp.identity_distance`) and the deviation it causes:
    at its point (``|warp(x) - x|``, absolute and relative to ``max |x|``) and
    at the model output (stored model against its identity-reset copy). A model
    is *tuned* when its manifest records tuning or any warp has moved. For a
    fresh splice (no tuning recorded) every distance must be exactly 0: a head
    that is not zero-initialised fails here.
``provenance``
    The base part of the weights hashes (:func:`splice.fileio.state_dict_sha256`)
    to the source checkpoint's hash recorded at splice time: bitwise equal. A
    joint recipe (tuning records ``base_changed``) may move them; then the row
    says so, passes, and compares them with the source weights (hashes, and
    per-tensor max abs differences when the source file is still on disk).
    An undeclared change fails.
``gradients``
    One backward pass of a seeded random projection of the outputs, in eval
    mode. Required, for every warp: the head's final layer weight and bias get
    a finite, non-zero gradient, and every head gradient is finite. Reported,
    not required: the gradient reaching the earlier head layers. At the exact
    identity it is exactly 0, because it flows through the zero-initialised
    final weight (see :mod:`splice.warps.head`); the first update moves it. A
    ``nearest`` sampler passes no gradient to its grid, so such a warp fails
    here: it cannot be trained.
``onnx`` (``onnx=True``)
    Export once (TorchScript exporter by default, ``exporter='dynamo'`` for
    opset 18+; opset 17 by default) traced on the first probe sample, and
    compare onnxruntime (CPU) with torch on that sample, as stored and with a
    fixed perturbed warp (:func:`splice.exporting.onnx_parity`), relative
    tolerance 1e-3 (:data:`splice.exporting.EXPORT_TOLERANCES`); reports the
    export and check times. With the TorchScript exporter the checked graph
    takes the weights as inputs (``export_onnx_bytes(weights_as_inputs=True)``):
    the same operators as the file ``splice export`` writes, without
    serialising 100 MB of weights into it and having onnxruntime prepare them,
    and the perturbed run is the same session fed the perturbed head tensors. ``splice export`` checks its own,
    self-contained file the same two ways. The torch side of the as-stored
    comparison is the stored model's output for that sample from the outputs
    check. Constant folding is off (onnxruntime folds when it loads the graph;
    ``splice export`` folds). Runs in float32 even when ``dtype`` is float64.
``buffers``
    Every buffer of both models (BatchNorm running statistics included) is
    bitwise unchanged after all of the above, and every module's train/eval
    mode is restored. The checks run in eval mode; a buffer a model changes
    anyway is reported by name and put back.

Modules: :mod:`.report` (rows, report, output), :mod:`.probe` (inputs and
instruments), :mod:`.rows`, :mod:`.provenance`, :mod:`.gradients` (the
checks), :mod:`.run` (:func:`verify`, :func:`verify_models`).
"""

from __future__ import annotations

from ..compare import DEFAULT_TOLERANCES, compare_outputs, flatten_outputs
from ..data import IMAGE_SUFFIXES
from .probe import DTYPES, probe_batch, probe_inputs
from .report import CheckResult, VerifyReport, check_report_target, render_verify, versions, write_report
from .run import verify, verify_models

__all__ = [
    "flatten_outputs",
    "compare_outputs",
    "DEFAULT_TOLERANCES",
    "DTYPES",
    "IMAGE_SUFFIXES",
    "CheckResult",
    "VerifyReport",
    "verify",
    "verify_models",
    "probe_batch",
    "probe_inputs",
    "render_verify",
    "write_report",
    "check_report_target",
    "versions",
]
