"""Exports of a spliced model (ONNX, torch.export) with a parity check.

Every export is compared with the eager model twice before anything is kept:

1. *as stored* -- the exported program against torch on a seeded N(0,1) batch;
2. *perturbed* -- every warp set to one fixed, non-identity warp (see
   :func:`perturbation_theta`) on a copy of the model, and the same exported
   graph run with the matching weights. Identity parity alone cannot show a
   sampler bug: at the identity a broken ``grid_sample`` lowering that ignores
   the grid still returns its input.

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

Tolerances (:data:`EXPORT_TOLERANCES`) are the max error relative to the
output's scale (max ``|y|``), as in :func:`splice.verify.compare_outputs`:
float32 1e-4, float64 1e-9. onnxruntime picks other convolution algorithms
and summation orders than torch, which shows as relative errors of 1e-7..1e-5
on deep nets; 1e-4 leaves room for that and still catches any changed weight
or mis-lowered op (common practice, no source).

An export that fails its check raises :class:`~splice.errors.CheckFailed` and
leaves no file: the program is built and checked in memory, then written with
:func:`splice._io.atomic_write_bytes` (a temporary file in the target's folder
renamed into place).
"""

from __future__ import annotations

import contextlib
import copy
import io
import os
import time
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path

import torch
from torch import nn

from .errors import CheckFailed, SpliceError

__all__ = [
    "MIN_OPSET",
    "DYNAMO_MIN_OPSET",
    "EXPORTERS",
    "EXPORT_TOLERANCES",
    "PERTURBATION_SIZE",
    "export",
    "export_onnx_bytes",
    "export_pt2_bytes",
    "onnx_parity",
    "check_onnx_graph",
    "pt2_parity",
    "perturbation_theta",
    "perturbed_copy",
    "final_layer",
]

# GridSample (the op a warp's sampler lowers to) entered the ONNX standard at
# opset 16 (onnx/docs/Operators.md, GridSample "since version 16").
MIN_OPSET = 16
# torch.onnx's dynamo exporter writes opset 18 and down-converts; the down
# conversion fails for resnet-style graphs (measured with torch 2.14), so it is
# only used at 18 and above.
DYNAMO_MIN_OPSET = 18
EXPORTERS = ("torchscript", "dynamo")
EXPORT_TOLERANCES = {torch.float32: 1e-4, torch.float64: 1e-9}
# Size of the fixed perturbation added to the identity parameters.
PERTURBATION_SIZE = 0.1


# ----------------------------------------------------------------------------- perturbation


def perturbation_theta(family: str, tps_k: int = 4, *, dtype=torch.float32) -> torch.Tensor:
    """The fixed non-identity warp used by the parity checks: ``identity + 0.1 * linspace(-1, 1, P)``.

    For affine that is ``[0.9, -0.06, -0.02, 0.02, 1.06, 0.1]``: a slight
    shear, anisotropic scale and a shift of 0.1 half-widths, so sampling falls
    between pixels everywhere. Every family gets a warp that is neither the
    identity nor a whole-pixel shift.
    """
    from .warps import family_param_count, identity_theta

    n = family_param_count(family, tps_k)
    delta = torch.linspace(-1.0, 1.0, n, dtype=torch.float64) if n > 1 else torch.ones(1, dtype=torch.float64)
    return (identity_theta(family, tps_k, dtype=torch.float64) + PERTURBATION_SIZE * delta).to(dtype)


def final_layer(warp: nn.Module) -> nn.Linear:
    """The zero-initialised output layer of a warp's localisation head."""
    head = getattr(warp, "head", None)
    final = getattr(head, "final", None)
    if isinstance(final, nn.Linear):
        return final
    linears = [m for m in (head or warp).modules() if isinstance(m, nn.Linear)]
    if not linears:
        raise SpliceError(f"warp {type(warp).__name__} has no Linear output layer; it is not a splice Warp")
    return linears[-1]


def _perturbed_tensors(model: nn.Module) -> dict[str, torch.Tensor]:
    """``{parameter name: value}`` that turns every warp into the fixed perturbation."""
    from .surgery import WARP_PREFIX, warps_of

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
    from .surgery import WARP_PREFIX

    twin = _own_warps(model)
    params = dict(twin.named_parameters())
    with torch.no_grad():
        for name, value in _perturbed_tensors(twin).items():
            if not name.startswith(WARP_PREFIX + "."):
                raise SpliceError(f"internal error: {name} is not a warp tensor")
            params[name].copy_(value)
    return twin


def _own_warps(model: nn.Module) -> nn.Module:
    """A shallow copy of ``model`` that owns a deep copy of its warp container."""
    from .surgery import WARP_PREFIX

    if WARP_PREFIX not in model._modules:
        return copy.deepcopy(model)
    twin = object.__new__(type(model))
    twin.__dict__.update(model.__dict__)
    twin.__dict__["_modules"] = dict(model._modules)  # a new mapping: the original keeps its warps
    twin._modules[WARP_PREFIX] = copy.deepcopy(model._modules[WARP_PREFIX])
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


class _WeightsAsInputs(nn.Module):
    """The model with every parameter and persistent buffer taken as an input after the image.

    Built on a :func:`_skeleton` of the model: no tensor is copied and the
    caller's modules are never touched. The extra inputs are named after the
    state-dict entries (:attr:`names`); a tensor registered under several
    names (tied weights) is one input, under its first name. Non-persistent
    buffers (a warp's base grid) stay constants of the graph.
    """

    def __init__(self, model: nn.Module, *, keep_output: bool = False) -> None:
        super().__init__()
        self.keep_output = keep_output
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

    def forward(self, x, *tensors):
        for module, attr, i in self._slots:
            module.__dict__[attr] = tensors[i]  # a plain attribute: Module.__getattr__ is not consulted
        out = self.model(x)
        if self.keep_output:
            self.output = out  # a reference only: the tracer records no operation for it
        return out


# ----------------------------------------------------------------------------- exporting


def _check_opset(opset: int, exporter: str) -> None:
    if exporter not in EXPORTERS:
        raise SpliceError(f"unknown exporter {exporter!r}; choose one of: {', '.join(EXPORTERS)}")
    if isinstance(opset, bool) or not isinstance(opset, int) or opset < MIN_OPSET:
        raise SpliceError(
            f"ONNX opset {opset!r} is too old for a spliced model: warps need GridSample, "
            f"added in opset {MIN_OPSET}; pass --opset {MIN_OPSET} or newer (default 17)"
        )


def _downgrade(data: bytes, opset: int) -> bytes:
    """Convert an opset-18 graph from the dynamo exporter down to ``opset`` (16 or 17).

    The dynamo exporter writes opset 18 or newer and its own down-conversion
    fails on reductions whose axes are inputs; onnx's version converter does
    the job, but leaves ``noop_with_empty_axes`` (an opset-18 attribute of
    ``ReduceMean`` and friends) behind, which is dropped when it has its
    default value 0.
    """
    import onnx
    from onnx import version_converter

    try:
        converted = version_converter.convert_version(onnx.load_from_string(data), opset)
        for node in converted.graph.node:
            if node.op_type.startswith("Reduce"):
                keep = [a for a in node.attribute if not (a.name == "noop_with_empty_axes" and a.i == 0)]
                if len(keep) != len(node.attribute):
                    del node.attribute[:]
                    node.attribute.extend(keep)
        onnx.checker.check_model(converted)
    except Exception as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise SpliceError(
            f"the dynamo exporter writes opset {DYNAMO_MIN_OPSET}+ and converting to opset {opset} failed "
            f"({first}); pass --opset {DYNAMO_MIN_OPSET} or use the TorchScript exporter"
        ) from None
    return converted.SerializeToString()


def _output_names(model: nn.Module, example: torch.Tensor, n_outputs: int | None) -> list[str]:
    from .verify import flatten_outputs

    if n_outputs is None:
        with torch.no_grad():
            n_outputs = len(flatten_outputs(model(example)))
    return [f"output_{i}" for i in range(n_outputs)]


@contextlib.contextmanager
def _exporting(model: nn.Module, exporter: str, opset: int):
    """Eval mode, the exporters' own chatter silenced, and failures as :class:`SpliceError`."""
    was_training = model.training
    model.eval()
    try:
        with warnings.catch_warnings():
            # the TorchScript exporter announces its own deprecation; the tracer
            # warns about shape-dependent Python branches, which are static here
            warnings.filterwarnings("ignore", message=".*legacy TorchScript-based ONNX export.*")
            warnings.filterwarnings("ignore", category=torch.jit.TracerWarning)
            yield
    except SpliceError:
        raise
    except Exception as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise SpliceError(
            f"ONNX export ({exporter}, opset {opset}) failed: {type(exc).__name__}: {first}; "
            "try another --opset, or exporter='dynamo'/'torchscript'"
        ) from exc
    finally:
        model.train(was_training)


@contextlib.contextmanager
def _stdout_to_nowhere():
    """File descriptor 1 sent to /dev/null for the duration (C++ code writes there directly).

    When the TorchScript exporter fails it dumps the whole graph to stdout
    from C++, which would bury the error and break ``--json`` output; the
    error itself still arrives as the exception.
    """
    import sys

    try:
        sys.stdout.flush()
    except (OSError, ValueError):
        pass
    fd = 1  # std::cout, whatever Python's sys.stdout is at the moment
    try:
        saved = os.dup(fd)
    except OSError:  # no usable descriptor: leave everything as it is
        yield
        return
    try:
        with open(os.devnull, "wb") as sink:
            os.dup2(sink.fileno(), fd)
            yield
    finally:
        os.dup2(saved, fd)
        os.close(saved)


def _torchscript(target: nn.Module, args: tuple, inputs: list[str], names: list[str], *, opset: int,
                 dynamic_batch: bool, fold_constants: bool) -> bytes:
    buf = io.BytesIO()
    axes = {n: {0: "batch"} for n in [inputs[0], *names]} if dynamic_batch else None
    with _stdout_to_nowhere():
        torch.onnx.export(target, args, buf, opset_version=opset, dynamo=False, input_names=inputs,
                          output_names=names, dynamic_axes=axes, do_constant_folding=fold_constants)
    return buf.getvalue()


def export_onnx_bytes(model: nn.Module, example: torch.Tensor, *, opset: int = 17, dynamic_batch: bool = False,
                      exporter: str = "torchscript", fold_constants: bool = True,
                      n_outputs: int | None = None, weights_as_inputs: bool = False) -> bytes:
    """Serialised ONNX model of ``model`` traced on ``example`` (the model is not changed).

    ``exporter='torchscript'`` uses ``torch.onnx.export(dynamo=False)``;
    ``'dynamo'`` uses the torch.export based exporter (which writes opset 18+;
    16 and 17 are reached with onnx's version converter). Outputs are
    named ``output_0 ...`` in the order of :func:`splice.verify.flatten_outputs`;
    pass ``n_outputs`` when it is known to save the forward pass that counts them.
    With ``weights_as_inputs`` (TorchScript only) every parameter and
    persistent buffer is an input after the image, named after its state-dict
    entry, instead of a stored initializer: the same operators, without the
    cost of serialising the weights and of onnxruntime preparing them, and one
    graph runs at any warp. Such a graph is for checking (see
    :func:`onnx_parity`), not for shipping.
    """
    _check_opset(opset, exporter)
    if weights_as_inputs and exporter != "torchscript":
        raise SpliceError("weights_as_inputs needs exporter='torchscript'")
    with _exporting(model, exporter, opset):
        names = _output_names(model, example, n_outputs)
        if weights_as_inputs:
            target = _WeightsAsInputs(model)
            return _torchscript(target, (example, *target.values), ["input", *target.names], names, opset=opset,
                                dynamic_batch=dynamic_batch, fold_constants=fold_constants)
        if exporter == "torchscript":
            return _torchscript(model, (example,), ["input"], names, opset=opset, dynamic_batch=dynamic_batch,
                                fold_constants=fold_constants)
        dims = ({0: torch.export.Dim("batch", min=1, max=4096)},) if dynamic_batch else None
        program = torch.onnx.export(model, (example,), dynamo=True, opset_version=max(opset, DYNAMO_MIN_OPSET),
                                    input_names=["input"], output_names=names, dynamic_shapes=dims,
                                    optimize=fold_constants, verbose=False)
        data = program.model_proto.SerializeToString()
        return _downgrade(data, opset) if opset < DYNAMO_MIN_OPSET else data


def check_onnx_graph(model: nn.Module, example: torch.Tensor, *, opset: int = 17, reference=None,
                     tol: float | None = None, perturb: bool = True) -> dict:
    """Export a checking graph of ``model`` and compare it in onnxruntime, as stored and perturbed.

    The graph takes the weights as inputs (``export_onnx_bytes(weights_as_inputs=True)``,
    TorchScript exporter, no constant folding) and is traced with the warp
    heads' final tensors set to the perturbation, so the tracer's own forward
    pass is the torch side of the perturbed comparison; one session is then
    run fed the model's own tensors (compared with ``reference``, the
    model's output for ``example``, computed when not given) and fed the
    perturbed ones. ``example`` is one batch. Returns the
    :func:`onnx_parity` summary plus ``export_seconds``, ``check_seconds``
    and ``bytes``; raises :class:`SpliceError` when the export fails. Used by
    ``splice verify --onnx``; ``splice export`` checks the file it ships.
    """
    from .verify import _detached, flatten_outputs

    _check_opset(opset, "torchscript")
    tol = _tolerance(model, tol)
    swapped = _perturbed_tensors(model) if perturb else {}
    start = time.perf_counter()
    with _exporting(model, "torchscript", opset):
        target = _WeightsAsInputs(model, keep_output=True)
        missing = sorted(set(swapped) - set(target.names))
        if missing:
            raise SpliceError(f"the warp head tensor(s) {', '.join(missing)} are not state-dict entries of their "
                              "own; check the graph with onnx_parity on a self-contained export instead")
        values = [swapped.get(name, v) for name, v in zip(target.names, target.values)]
        names = (_output_names(model, example, None) if reference is None
                 else [f"output_{i}" for i in range(len(flatten_outputs(reference)))])
        data = _torchscript(target, (example, *values), ["input", *target.names], names, opset=opset,
                            dynamic_batch=False, fold_constants=False)
        traced = _detached(target.output)
    seconds = time.perf_counter() - start
    start = time.perf_counter()
    if not swapped and reference is None:
        reference = traced  # traced as stored: the tracer's pass is the stored model's output
    # op for op: with the weights fed there is nothing for onnxruntime to fold
    # or fuse ahead of time, and the file that ships is checked by export()
    result = _parity_with_weight_inputs(model, data, [example], perturb=bool(swapped), tol=tol,
                                        references=None if reference is None else [reference],
                                        perturbed_references=[traced], optimise=False)
    return {**result, "export_seconds": seconds, "check_seconds": time.perf_counter() - start, "bytes": len(data)}


def export_pt2_bytes(model: nn.Module, example: torch.Tensor, *, dynamic_batch: bool = False) -> bytes:
    """``torch.export.export`` + ``torch.export.save`` into bytes (the model is not changed)."""
    was_training = model.training
    model.eval()
    try:
        dims = ({0: torch.export.Dim("batch", min=1, max=4096)},) if dynamic_batch else None
        program = torch.export.export(model, (example,), dynamic_shapes=dims)
        buf = io.BytesIO()
        torch.export.save(program, buf)
        return buf.getvalue()
    except Exception as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise SpliceError(f"torch.export failed: {type(exc).__name__}: {first}") from exc
    finally:
        model.train(was_training)


# ----------------------------------------------------------------------------- parity


def _as_batches(inputs) -> list[torch.Tensor]:
    if isinstance(inputs, torch.Tensor):
        return [inputs]
    return list(inputs)


def _load_onnx(onnx_model):
    import onnx

    if isinstance(onnx_model, onnx.ModelProto):
        return onnx_model
    if isinstance(onnx_model, (bytes, bytearray)):
        return onnx.load_from_string(bytes(onnx_model))
    path = Path(onnx_model)
    if not path.is_file():
        raise SpliceError(f"ONNX file '{path}' does not exist; check the path")
    try:
        return onnx.load(str(path))
    except Exception as exc:  # protobuf DecodeError and friends
        raise SpliceError(f"'{path}' is not a readable ONNX file ({type(exc).__name__}); it may be damaged") from None


def _ort_session(model, *, optimise: bool = True):
    """A quiet onnxruntime CPU session for a ``ModelProto`` or serialised bytes.

    ``optimise=False`` runs the graph's operators as exported, without
    onnxruntime's graph rewrites (which need stored weights to fold anything).
    """
    import onnxruntime as ort

    data = bytes(model) if isinstance(model, (bytes, bytearray)) else model.SerializeToString()
    opts = ort.SessionOptions()
    opts.log_severity_level = 3
    if not optimise:
        opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    try:
        return ort.InferenceSession(data, opts, providers=["CPUExecutionProvider"])
    except Exception as exc:  # onnxruntime raises its own exception types
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise CheckFailed(f"onnxruntime cannot load the exported graph ({first}); try another --opset, "
                          "or report the model") from None


def _run_batches(torch_model, session, feed_name: str, batches, extra: dict, tol, known=None) -> dict:
    """Compare ``session`` with ``torch_model`` on every batch (``known``: torch outputs already at hand)."""
    results = []
    for i, x in enumerate(batches):
        if known is not None:
            ref = known[i]
        else:
            with torch.no_grad():
                ref = torch_model(x)
        try:
            outs = session.run(None, {feed_name: x.detach().cpu().numpy(), **extra})
        except Exception as exc:  # onnxruntime raises its own exception types
            first = str(exc).strip().splitlines()[0]
            return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                    "detail": f"onnxruntime failed on a batch of {x.shape[0]}: {first}"}
        results.append(_compare_flat(ref, outs, tol))
    return _merge(results)


def _overridable(proto, names: Sequence[str]):
    """Declare the named initializers overridable graph inputs (values unchanged), in place.

    Feeding such an input replaces the tensor for one run, so the perturbed
    check needs no second export and no second session. The TorchScript
    exporter merges equal initializers (two zero-initialised heads of one
    shape share one tensor; the other names become Identity outputs): each
    merged name gets its own copy back first, so overriding one head's tensor
    changes nothing else. Returns ``None`` (leaving ``proto`` unusable) when a
    name is missing or is shared by several consumers.
    """
    from onnx import helper

    graph = proto.graph
    inits = {init.name: init for init in graph.initializer}
    aliases = {n.output[0]: n for n in graph.node
               if n.op_type == "Identity" and len(n.input) == 1 and n.input[0] in inits}
    wanted = set(names)
    if any(n not in inits and n not in aliases for n in wanted):
        return None
    roots = {name if name in inits else aliases[name].input[0] for name in wanted}
    # every alias of a root being touched becomes a standalone copy of the root
    for out, node in list(aliases.items()):
        if node.input[0] in roots and (out in wanted or node.input[0] in wanted):
            copy_ = graph.initializer.add()
            copy_.CopyFrom(inits[node.input[0]])
            copy_.name = out
            graph.node.remove(node)
            inits[out] = copy_
    direct = {}
    for node in graph.node:
        for name in node.input:
            direct[name] = direct.get(name, 0) + 1
    if any(direct.get(name, 0) != 1 for name in wanted):
        return None
    declared = {i.name for i in graph.input}
    for name in sorted(wanted - declared):
        graph.input.append(helper.make_tensor_value_info(name, inits[name].data_type, list(inits[name].dims)))
    return proto


def _merge(results: list[dict]) -> dict:
    ok = all(r["passed"] for r in results)
    nums = [r for r in results if r.get("max_abs") is not None]
    worst = max(nums, key=lambda r: r["max_rel"]) if nums else results[0]
    top1 = [r["top1"] for r in results if r.get("top1") is not None]
    return {"passed": ok, "max_abs": max((r["max_abs"] for r in nums), default=None),
            "max_rel": max((r["max_rel"] for r in nums), default=None), "top1": min(top1) if top1 else None,
            "detail": next((r["detail"] for r in results if not r["passed"]), worst["detail"])}


def _compare_flat(reference, outputs: list, tol: float) -> dict:
    from .verify import compare_outputs, flatten_outputs

    ref = flatten_outputs(reference)
    if len(outputs) != len(ref):
        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                "detail": f"the export returns {len(outputs)} outputs, the model {len(ref)} ({', '.join(ref)})"}
    cand = {k: torch.as_tensor(v) for k, v in zip(ref, outputs)}
    ref = {k: v.to(cand[k].dtype) if v.dtype != cand[k].dtype else v for k, v in ref.items()}
    return compare_outputs(ref, cand, tol=tol)


def _tolerance(model: nn.Module, tol: float | None) -> float:
    if tol is not None:
        return tol
    p = next(iter(model.parameters()), None)
    return EXPORT_TOLERANCES.get(p.dtype if p is not None else torch.float32, 1e-4)


def _model_dtype(model: nn.Module) -> torch.dtype:
    p = next(iter(model.parameters()), None)
    return p.dtype if p is not None else torch.float32


def _summary(stored: dict, perturbed: dict | None, tol: float, sizes: list[int], how: str | None) -> dict:
    passed = stored["passed"] and (perturbed is None or perturbed["passed"])
    if not stored["passed"]:
        detail = f"as stored: {stored['detail']}"
    elif perturbed is not None and not perturbed["passed"]:
        detail = f"with the perturbed warp: {perturbed['detail']}"
    else:
        detail = (f"max abs error {stored['max_abs']:.3g} as stored"
                  + (f", {perturbed['max_abs']:.3g} with a perturbed warp" if perturbed else ", no warps to perturb")
                  + f" (relative tolerance {tol:g})")
    return {
        "passed": passed,
        "max_abs": stored["max_abs"], "max_rel": stored["max_rel"], "top1": stored["top1"],
        "max_abs_perturbed": perturbed["max_abs"] if perturbed else None,
        "max_rel_perturbed": perturbed["max_rel"] if perturbed else None,
        "tolerance": tol, "batch_sizes": sizes, "perturbed_by": how, "detail": detail,
    }


def onnx_parity(model: nn.Module, onnx_model, inputs, *, perturb: bool = True, tol: float | None = None,
                references: Sequence | None = None) -> dict:
    """Run an ONNX model in onnxruntime (CPU) and compare it with ``model`` in torch.

    ``onnx_model`` is a path, serialised bytes or an ``onnx.ModelProto``;
    ``inputs`` is one batch or a list of batches (e.g. two batch sizes for a
    dynamic-batch export). With ``perturb`` (and warps present) the check runs
    again with every warp set to :func:`perturbation_theta`. Returns
    ``{passed, max_abs, max_rel, top1, max_abs_perturbed, max_rel_perturbed,
    tolerance, batch_sizes, perturbed_by, detail}``; never changes ``model``.
    ``references`` may hold ``model``'s outputs for ``inputs`` when the caller
    has them already (one per batch); they are used for the as-stored check.
    A graph from ``export_onnx_bytes(weights_as_inputs=True)`` is recognised by
    its inputs and fed ``model``'s own tensors, then the perturbed head tensors.
    """
    import onnx

    proto = _load_onnx(onnx_model)
    tol = _tolerance(model, tol)
    batches = _as_batches(inputs)
    if references is not None and len(references) != len(batches):
        raise SpliceError(f"onnx_parity got {len(references)} references for {len(batches)} input batches")
    if _weight_inputs(proto, model):
        return _parity_with_weight_inputs(model, proto, batches, perturb=perturb, tol=tol, references=references)
    if isinstance(onnx_model, onnx.ModelProto):  # the caller's proto stays as it was
        proto = onnx.ModelProto()
        proto.CopyFrom(onnx_model)
    values = _perturbed_tensors(model) if perturb else {}
    n_outputs = len(proto.graph.output)
    opset = next((o.version for o in proto.opset_import if o.domain in ("", "ai.onnx")), 17)
    checked = _overridable(proto, list(values)) if values else proto
    how = "feeds" if values and checked is not None else ("re-export" if values else None)
    if checked is None:  # the exporter merged the head tensors beyond repair: the original graph is used
        proto = _load_onnx(onnx_model)
        checked = proto
    was_training = model.training
    model.eval()
    try:
        session = _ort_session(checked)

        def run(torch_model, sess, extra: dict, known=None) -> dict:
            return _run_batches(torch_model, sess, sess.get_inputs()[0].name, batches, extra, tol, known)

        stored = run(model, session, {}, references)
        perturbed = None
        if values:
            twin = perturbed_copy(model)
            if how == "feeds":
                perturbed = run(twin, session, {k: v.detach().cpu().numpy() for k, v in values.items()})
            else:
                again = export_onnx_bytes(twin, batches[0], opset=max(opset, MIN_OPSET),
                                          dynamic_batch=len({b.shape[0] for b in batches}) > 1,
                                          fold_constants=False, n_outputs=n_outputs)
                perturbed = run(twin, _ort_session(_load_onnx(again)), {})
    finally:
        model.train(was_training)
    return _summary(stored, perturbed, tol, [int(b.shape[0]) for b in batches], how)


def _perturbed_feeds(own: dict, values: Mapping[str, torch.Tensor]) -> dict:
    """``own`` (graph input -> array) with the warp heads' tensors replaced by the perturbed ``values``."""
    missing = sorted(set(values) - set(own))
    if missing:
        raise SpliceError(f"the ONNX graph does not take the warp head tensor(s) {', '.join(missing)} as inputs; "
                          "export it with export_onnx_bytes(weights_as_inputs=True), or check a self-contained "
                          "export with onnx_parity")
    return {**own, **{k: v.detach().cpu().numpy() for k, v in values.items()}}


def _weight_inputs(proto, model: nn.Module) -> list[str]:
    """The graph inputs after the image that are ``model``'s state entries, if all of them are; else ``[]``."""
    inits = {init.name for init in proto.graph.initializer}
    extra = [i.name for i in proto.graph.input[1:] if i.name not in inits]
    if not extra:
        return []
    state = model.state_dict(keep_vars=True)
    return extra if all(n in state for n in extra) else []


def _parity_with_weight_inputs(model, graph, batches, *, perturb: bool, tol, references,
                               perturbed_references=None, optimise: bool = True) -> dict:
    """One session of a weights-as-inputs graph, fed ``model``'s tensors, then the perturbed head tensors.

    ``perturbed_references`` may hold the perturbed model's outputs when the
    caller has them (the tracer's pass in :func:`check_onnx_graph`).
    """
    session = _ort_session(graph, optimise=optimise)
    image = session.get_inputs()[0].name
    state = model.state_dict(keep_vars=True)
    own = {i.name: state[i.name].detach().cpu().numpy() for i in session.get_inputs()[1:] if i.name in state}
    was_training = model.training
    model.eval()
    try:
        stored = _run_batches(model, session, image, batches, own, tol, references)
        perturbed = None
        values = _perturbed_tensors(model) if perturb else {}
        if values:
            twin = perturbed_copy(model) if perturbed_references is None else None
            perturbed = _run_batches(twin, session, image, batches, _perturbed_feeds(own, values), tol,
                                     perturbed_references)
    finally:
        model.train(was_training)
    return _summary(stored, perturbed, tol, [int(b.shape[0]) for b in batches], "feeds" if perturbed else None)


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
    tol = _tolerance(model, tol)
    batches = _as_batches(inputs)
    was_training = model.training
    model.eval()
    try:
        def run(torch_model, exported) -> dict:
            results = []
            for x in batches:
                with torch.no_grad():
                    ref = torch_model(x)
                    try:
                        out = exported(x)
                    except Exception as exc:
                        first = str(exc).strip().splitlines()[0]
                        return {"passed": False, "max_abs": None, "max_rel": None, "top1": None,
                                "detail": f"the exported program failed on a batch of {x.shape[0]}: {first}"}
                from .verify import flatten_outputs

                results.append(_compare_flat(ref, list(flatten_outputs(out).values()), tol))
            return _merge(results)

        exported = ep.module()
        stored = run(model, exported)
        perturbed, how = None, None
        values = _perturbed_tensors(model)
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
                module = torch.export.export(twin, (batches[0],)).module()
                how = "re-export"
            perturbed = run(twin, module)
    finally:
        model.train(was_training)
    return _summary(stored, perturbed, tol, [int(b.shape[0]) for b in batches], how)


# ----------------------------------------------------------------------------- the command


def _probe_inputs(shape, dtype, *, dynamic_batch: bool, seed: int) -> tuple[torch.Tensor, list[torch.Tensor]]:
    """(trace example, check batches): batch 1 static; dynamic traces at 2 and checks at 1 and 3."""
    gen = torch.Generator().manual_seed(seed)
    if dynamic_batch:
        example = torch.randn((2, *shape), generator=gen).to(dtype)
        checks = [torch.randn((n, *shape), generator=gen).to(dtype) for n in (1, 3)]
        return example, checks
    x = torch.randn((1, *shape), generator=gen).to(dtype)
    return x, [x]


def _keep(path: str | os.PathLike, data: bytes) -> tuple[Path, str]:
    import hashlib

    from ._io import atomic_write_bytes, file_sha256

    target = atomic_write_bytes(path, data)
    digest = hashlib.sha256(data).hexdigest()
    if file_sha256(target) != digest:  # the disk gave back other bytes than were written
        target.unlink(missing_ok=True)
        raise SpliceError(f"'{target}' reads back different bytes than were written; check the disk and retry")
    return target, digest


def export(folder: str | os.PathLike, onnx: str | os.PathLike | None = None, pt2: str | os.PathLike | None = None,
           *, opset: int = 17, dynamic_batch: bool = False, trust_pickle: bool = False,
           exporter: str = "torchscript", seed: int = 0, tol: float | None = None) -> dict:
    """Export a spliced folder to ONNX and/or torch.export, keeping only copies that pass parity.

    Each export is checked with :func:`onnx_parity` / :func:`pt2_parity` (as
    stored and with a perturbed warp) on seeded N(0,1) inputs: one batch of 1,
    or with ``dynamic_batch`` batches of 1 and 3 (the trace uses 2). A failed
    check raises :class:`~splice.errors.CheckFailed` and writes nothing. An
    existing file at the target is replaced atomically.

    Returns ``{"exports": [{"path", "format", "sha256", "seconds", "max_abs",
    "max_rel", "max_abs_perturbed", "max_rel_perturbed", "tolerance",
    "batch_sizes", "dynamic_batch", ...}]}``.

    >>> splice.export("out/r18-affine", onnx="r18.onnx")   # doctest: +SKIP
    """
    from .store import load, read_manifest

    if onnx is None and pt2 is None:
        raise SpliceError("export needs a target: onnx=FILE (--onnx FILE) and/or pt2=FILE (--pt2 FILE)")
    if onnx is not None:
        _check_opset(opset, exporter)
    for target in (onnx, pt2):
        if target is not None and Path(target).is_dir():
            raise SpliceError(f"export target '{target}' is a folder; give a file name such as model.onnx")
    manifest = read_manifest(folder)
    model = load(folder, trust_pickle=trust_pickle)
    shape = tuple(manifest["input_shape"])
    example, batches = _probe_inputs(shape, _model_dtype(model), dynamic_batch=dynamic_batch, seed=seed)
    jobs: list[tuple[str, str | os.PathLike]] = []
    if onnx is not None:
        jobs.append(("onnx", onnx))
    if pt2 is not None:
        jobs.append(("pt2", pt2))
    done = []
    for fmt, target in jobs:
        start = time.perf_counter()
        if fmt == "onnx":
            data = export_onnx_bytes(model, example, opset=opset, dynamic_batch=dynamic_batch, exporter=exporter)
            seconds = time.perf_counter() - start
            result = onnx_parity(model, data, batches, tol=tol)
        else:
            data = export_pt2_bytes(model, example, dynamic_batch=dynamic_batch)
            seconds = time.perf_counter() - start
            result = pt2_parity(model, data, batches, tol=tol)
        if not result["passed"]:
            raise CheckFailed(
                f"the {fmt} export of '{folder}' does not match the model ({result['detail']}); "
                f"nothing was written to '{target}'. Try another --opset or report the model"
            )
        path, digest = _keep(target, data)
        done.append({"path": str(path), "format": fmt, "sha256": digest, "seconds": seconds,
                     "dynamic_batch": dynamic_batch,
                     **({"opset": opset, "exporter": exporter} if fmt == "onnx" else {}),
                     **{k: v for k, v in result.items() if k != "passed"}})
    return {"exports": done}
