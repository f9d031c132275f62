"""ONNX export: the TorchScript exporter (the default) and the dynamo exporter, quiet and failing in one line."""

from __future__ import annotations

import contextlib
import copy
import io
import os
import re
import warnings
from pathlib import Path

import torch
from torch import nn

from ..compare import flatten_outputs, tensors_out
from ..copies import private_buffers
from ..errors import SpliceError, first_line
from ..graph.exported import export_quietly, quiet_export
from .weights import WeightsAsInputs

__all__ = ["MIN_OPSET", "DYNAMO_MIN_OPSET", "EXPORTERS", "check_opset", "export_onnx_bytes", "as_inputs",
           "input_names"]

# GridSample (the op a warp's sampler lowers to) entered the ONNX standard at
# opset 16 (onnx/docs/Operators.md, GridSample "since version 16").
MIN_OPSET = 16

# torch.onnx's dynamo exporter writes opset 18 and down-converts; the down
# conversion fails for resnet-style graphs (measured with torch 2.14), so it is
# only used at 18 and above.
DYNAMO_MIN_OPSET = 18

EXPORTERS = ("torchscript", "dynamo")


def as_inputs(example) -> tuple[torch.Tensor, ...]:
    """One batch as a tuple with one tensor per model input (a tensor alone is a model with one input)."""
    return (example,) if isinstance(example, torch.Tensor) else tuple(example)


def input_names(n: int) -> list[str]:
    """The ONNX names of a model's ``n`` inputs: ``input``, then ``input_1``, ``input_2``, ..."""
    return ["input", *(f"input_{i}" for i in range(1, n))]


def check_opset(opset: int, exporter: str) -> None:
    """Refuse an unknown exporter or an opset without GridSample (one-line :class:`SpliceError`)."""
    if exporter not in EXPORTERS:
        raise SpliceError(f"unknown exporter {exporter!r}; choose one of: {', '.join(EXPORTERS)}")
    if isinstance(opset, bool) or not isinstance(opset, int) or opset < MIN_OPSET:
        raise SpliceError(
            f"ONNX opset {opset!r} is too old for a spliced model: warps need GridSample, "
            f"added in opset {MIN_OPSET}; pass --opset {MIN_OPSET} or newer (default 17)"
        )
    newest = newest_opset()
    if newest is not None and opset > newest:
        raise SpliceError(f"ONNX opset {opset} is newer than the installed torch exports (at most {newest}); pass "
                          f"--opset {MIN_OPSET} to {newest} (default 17)")


def newest_opset() -> int | None:
    """The newest opset the installed torch.onnx writes (``None`` when it does not say). torch keeps the number in a
    module of its own (``torch.onnx._constants.ONNX_MAX_OPSET``, 23 in torch 2.14), read defensively."""
    import importlib

    try:
        value = importlib.import_module("torch.onnx._constants").ONNX_MAX_OPSET
    except (ImportError, AttributeError):
        return None
    return value if isinstance(value, int) and not isinstance(value, bool) else None

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
        first = first_line(exc)
        raise SpliceError(
            f"the dynamo exporter writes opset {DYNAMO_MIN_OPSET}+ and converting to opset {opset} failed "
            f"({first}); pass --opset {DYNAMO_MIN_OPSET} or use the TorchScript exporter"
        ) from None
    return converted.SerializeToString()

def onnx_output_names(model: nn.Module, example, n_outputs: int | None) -> list[str]:
    if n_outputs is None:
        with torch.no_grad():
            n_outputs = len(flatten_outputs(model(*as_inputs(example))))
    return [f"output_{i}" for i in range(n_outputs)]

#: how the TorchScript tracer's warning starts when traced code turns a tensor into a Python value (a branch, a
#: count, a number) or a NumPy array: the graph keeps the value it had on the example, whether it came from a
#: shape or from pixels
CONVERSION_WARNING = "Converting a tensor to a"


def _conversion_sites(caught: list) -> list[str]:
    """``path:line`` of each place the tracer turned a tensor into a Python value; other warnings shown again."""
    sites = []
    for w in caught:
        if issubclass(w.category, torch.jit.TracerWarning):
            if str(w.message).startswith(CONVERSION_WARNING):
                site = f"{w.filename}:{w.lineno}"
                sites += [] if site in sites else [site]
        else:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return sites


def site_names(sites) -> str:
    """``file:line, ...`` (file names without their folders; three at most) for a message."""
    short = [f"{os.path.basename(s.rpartition(':')[0])}:{s.rpartition(':')[2]}" for s in sites]
    return ", ".join(short[:3]) + (", ..." if len(short) > 3 else "")


def input_checks(sites) -> list[str]:
    """The ``path:line`` sites that are input checks: an ``assert``, or an ``if`` whose branch only raises. The
    model refuses such inputs; the traced graph does not carry the check, and is right for every input the model
    takes. Read from the source file (a site whose file cannot be read or parsed is not a check)."""
    import ast

    checks = []
    for site in sites:
        path, _, line = site.rpartition(":")
        try:
            tree = ast.parse(Path(path).read_text(encoding="utf-8"))
        except (OSError, SyntaxError, ValueError):
            continue
        guarded = {id(n) for t in ast.walk(tree) if isinstance(t, ast.Try) for s in t.body for n in ast.walk(s)}
        for node in ast.walk(tree):
            test = getattr(node, "test", None)
            if not isinstance(node, (ast.If, ast.Assert)) or not node.lineno <= int(line) <= test.end_lineno:
                continue
            raises = isinstance(node, ast.Assert) or any(
                branch and all(isinstance(s, ast.Raise) for s in branch) for branch in (node.body, node.orelse))
            # a raise caught nearby is control flow, and a value named in the test may be used after it
            if raises and id(node) not in guarded and not any(isinstance(n, ast.NamedExpr) for n in ast.walk(test)):
                checks.append(site)
                break
    return checks


# torch.export's errors for a Python branch or number taken from a tensor's values (fake tensors have none)
_DATA_DEPENDENT = ("GuardOnDataDependentSymNode", "DataDependentOutputException", "DataDependentOutputError")


def value_branch(model: nn.Module, example) -> tuple[str, str]:
    """Does ``model`` take a Python branch or number from tensor values? ``("values", why)``, ``("shapes", "")``
    (torch.export traced it on ``example`` with no such branch: what the TorchScript tracer fixed came from
    shapes) or ``("unknown", why)`` (torch.export failed for another reason).

    torch.export runs the forward on fake tensors, which have shapes but no values, so a branch on values stops
    it with a data-dependent error; a number read from values (``.item()``, ``.tolist()``) traces through as
    a value of the graph's own (an ``item`` node, an unbacked symbol), which the TorchScript tracer would fix
    instead. Runs on a twin in eval mode; the caller's model is not changed.
    """
    twin = private_buffers(model).eval()
    try:
        with torch.no_grad():
            program = export_quietly(twin, as_inputs(example))
    except Exception as exc:
        if type(exc).__name__ in _DATA_DEPENDENT or "data-dependent" in str(exc):
            return "values", "torch.export stops there: the branch needs the values"
        return "unknown", f"{type(exc).__name__}: {first_line(exc)}"
    read = [n for n in program.graph.nodes if n.op == "call_function" and _reads_a_value(n)]
    if read:
        return "values", "a number read from tensor values (.item(), .tolist(), float(tensor))"
    return "shapes", ""


def batch_bound(model: nn.Module, inputs: tuple) -> bool:
    """May the forward tie itself to the batch size (``if x.shape[0] > 4``)? torch.export with the batch as a
    symbol (a batch of two: sizes 0 and 1 are specialised) refuses such code with a violated constraint on it; a
    graph exported for any batch would keep the branch the probe's batch took (the dynamo exporter's too: it
    specialises where it must, silently). Its solver also refuses some guards that hold for every batch
    (``torch.cat([a, b]).chunk(2)``), so ``True`` asks for more batch sizes to be checked, not for a verdict.
    Runs on a twin in eval mode."""
    twin = private_buffers(model).eval()
    twos = tuple(t.expand(2, *t.shape[1:]).clone() if t.shape[0] == 1 else t for t in inputs)
    batch = torch.export.Dim("batch", min=1, max=4096)
    try:
        with torch.no_grad():
            export_quietly(twin, twos, dynamic_shapes=tuple({0: batch} for _ in twos))
    except Exception as exc:  # noqa: BLE001 - only a violated constraint on the batch answers the question
        return "Constraints violated (batch)" in str(exc)
    return False


def _reads_a_value(node) -> bool:
    """An exported node that turns a tensor's value into a number: ``item`` (and its ``_local_scalar_dense``)."""
    name = getattr(node.target, "__name__", str(node.target))
    return name.split(".")[0] in ("item", "_local_scalar_dense")


@contextlib.contextmanager
def exporting(model: nn.Module, exporter: str, opset: int, conversions: list[str] | None = None):
    """Eval mode (for a twin: the caller's model is never passed here), the exporters' own chatter silenced, and
    failures as :class:`SpliceError`. ``conversions`` gets the ``file:line`` of each place where the tracer turned
    a tensor into a Python value (see :data:`CONVERSION_WARNING`)."""
    model.eval()
    caught: list = []
    try:
        try:
            with warnings.catch_warnings(record=True) as caught:
                # the TorchScript exporter announces its own deprecation; the tracer's warnings are read below
                warnings.filterwarnings("ignore", message=".*legacy TorchScript-based ONNX export.*")
                warnings.filterwarnings("ignore", message="Constant folding - Only steps=1")  # a note, not a fault
                warnings.filterwarnings("always", category=torch.jit.TracerWarning)
                yield
        finally:
            sites = _conversion_sites(caught)
        if conversions is not None:
            conversions.extend(sites)
    except SpliceError:
        raise
    except Exception as exc:
        first = first_line(exc)
        other = (f"--exporter dynamo --opset {max(opset, DYNAMO_MIN_OPSET)} (Python: exporter='dynamo', "
                 f"opset={max(opset, DYNAMO_MIN_OPSET)})" if exporter == "torchscript"
                 else "--exporter torchscript (Python: exporter='torchscript')")
        guard = data_dependent_site(exc)
        if guard is not None:
            raise SpliceError(
                f"ONNX export ({exporter}, opset {opset}) failed: torch.export cannot follow a Python branch or "
                f"number taken from tensor values{guard}; compute it with tensors (torch.where, or torch.cond for a "
                f"branch) so that the graph carries it, or try {other}") from exc
        raise SpliceError(
            f"ONNX export ({exporter}, opset {opset}) failed: {type(exc).__name__}: {first}; "
            f"try {other}, or another --opset"
        ) from exc


# where torch.export's error shows the user's line that raised it
_RAISED_AT = re.compile(r'The following call raised this error:\s*\n\s*File "([^"]+)", line (\d+), in [^\n]*\n'
                        r'[ \t]*([^\n]*)')


def data_dependent_site(exc: BaseException) -> str | None:
    """``None`` unless ``exc`` (or what caused it) is torch.export stopping at a guard on tensor values; then
    " at FILE:LINE (`code`)" when the error names the user's line, else ""."""
    seen, found, text = exc, False, ""
    while seen is not None:
        found = found or type(seen).__name__ in _DATA_DEPENDENT or "data-dependent" in str(seen)
        text += str(seen) + "\n"
        seen = seen.__cause__ or seen.__context__
    if not found:
        return None
    match = _RAISED_AT.search(text)
    if match is None:
        return ""
    path, line, code = match.groups()
    return f" at {os.path.basename(path)}:{line} (`{code.strip()[:80]}`)"

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

class TensorsOnly(nn.Module):
    """``model`` whose outputs are :func:`~splice.compare.tensors_out` (a module of its own: torch.export reads a
    GraphModule's graph, not a ``forward`` set on a copy of it)."""

    def __init__(self, model: nn.Module):
        super().__init__()
        self.model = model
        self.training = model.training

    def forward(self, *args, **kwargs):
        return tensors_out(self.model(*args, **kwargs))


def inputs_only(model: nn.Module) -> nn.Module:
    """A shallow copy of ``model`` (the same modules, parameters and names) whose forward takes its inputs only.

    The TorchScript exporter passes the default of every forward parameter it was not given as one more
    graph input, and traced as an input a default such as ``is_causal=False`` arrives as a tensor, which
    the function that needs a bool refuses (timm's vision transformers take ``attn_mask`` and
    ``is_causal``; a Hugging Face model takes a dozen such options). The copy's forward takes ``*inputs``,
    so the model runs with its own defaults, as it does when called.
    """
    view = copy.copy(model)
    forward = type(model).forward

    def inputs_only_forward(*inputs):
        return tensors_out(forward(view, *inputs))

    view.__dict__["forward"] = inputs_only_forward
    return view


def torchscript(target: nn.Module, args: tuple, inputs: list[str], names: list[str], *, opset: int,
                 dynamic_batch: bool, fold_constants: bool, n_images: int = 1) -> bytes:
    buf = io.BytesIO()
    axes = {n: {0: "batch"} for n in [*inputs[:n_images], *names]} if dynamic_batch else None
    with _stdout_to_nowhere():
        torch.onnx.export(target, args, buf, opset_version=opset, dynamo=False, input_names=inputs,
                          output_names=names, dynamic_axes=axes, do_constant_folding=fold_constants)
    return buf.getvalue()

def parametrizations_baked(twin: nn.Module) -> nn.Module:
    """``twin`` (a :func:`~splice.copies.private_buffers` twin, which owns its module mappings) with every
    parametrized tensor (torch's ``spectral_norm``, ``weight_norm``, ``orthogonal``, a user's own) replaced by the
    value it computes now, in eval mode: the exporters then see a plain weight, not the steps that make it (spectral
    norm's ``vdot`` has no ONNX form at opset 17). The originals, which the twin shares with the caller, are only
    read. An export holds the weights as they are anyway; this holds the same values."""
    from torch.nn.utils import parametrize

    twin.eval()
    for module in list(twin.modules()):
        if not parametrize.is_parametrized(module):
            continue
        with torch.no_grad():
            values = {name: getattr(module, name).detach() for name in module.parametrizations.keys()}
        module.__class__ = parametrize.type_before_parametrizations(module)
        del module._modules["parametrizations"]
        for name, value in values.items():
            module._parameters[name] = nn.Parameter(value, requires_grad=False)
    return twin


def export_onnx_bytes(model: nn.Module, example, *, opset: int = 17, dynamic_batch: bool = False,
                      exporter: str = "torchscript", fold_constants: bool = True,
                      n_outputs: int | None = None, weights_as_inputs: bool = False,
                      conversions: list[str] | None = None) -> bytes:
    """Serialised ONNX model of ``model`` traced on ``example`` (the model is not changed).

    ``example`` is a tensor, or a tuple with one tensor per input of a model
    with several (named ``input``, ``input_1``, ...; see :func:`input_names`).

    ``exporter='torchscript'`` uses ``torch.onnx.export(dynamo=False)``;
    ``'dynamo'`` uses the torch.export based exporter (which writes opset 18+;
    16 and 17 are reached with onnx's version converter, on a graph whose
    constants are folded whatever ``fold_constants`` says). Outputs are
    named ``output_0 ...`` in the order of :func:`splice.compare.flatten_outputs`;
    pass ``n_outputs`` when it is known to save the forward pass that counts them.
    With ``weights_as_inputs`` (TorchScript only) every parameter and
    persistent buffer is an input after the image, named after its state-dict
    entry, instead of a stored initializer: the same operators, without the
    cost of serialising the weights and of onnxruntime preparing them, and one
    graph runs at any warp. Such a graph is for checking (see
    :func:`onnx_parity`), not for shipping. ``conversions`` gets the places
    where the TorchScript tracer turned a tensor into a Python value (see
    :func:`exporting`).
    """
    check_opset(opset, exporter)
    if weights_as_inputs and exporter != "torchscript":
        raise SpliceError("weights_as_inputs needs exporter='torchscript'")
    model = parametrizations_baked(private_buffers(model))  # the caller's modes, buffers and state stay as they are
    xs = as_inputs(example)
    inputs = input_names(len(xs))
    with exporting(model, exporter, opset, conversions):
        names = onnx_output_names(model, xs, n_outputs)
        if weights_as_inputs:
            target = WeightsAsInputs(model, n_inputs=len(xs))
            return torchscript(target, (*xs, *target.values), [*inputs, *target.names], names, opset=opset,
                                dynamic_batch=dynamic_batch, fold_constants=fold_constants, n_images=len(xs))
        if exporter == "torchscript":
            return torchscript(inputs_only(model), xs, inputs, names, opset=opset, dynamic_batch=dynamic_batch,
                                fold_constants=fold_constants, n_images=len(xs))
        batch = torch.export.Dim("batch", min=1, max=4096)
        dims = tuple({0: batch} for _ in xs) if dynamic_batch else None
        with torch.no_grad():
            out = model(*xs)
        target = model if tensors_out(out) is out else TensorsOnly(model)
        if dims is not None and target is not model:
            dims = (dims,)  # TensorsOnly's forward takes *args: torch.export sees one tuple of inputs
        # onnx's down-converter needs a reduction's axes as constants, which only the optimiser's folding makes
        # of the axes torch.export computes: a graph to be converted below opset 18 is always optimised
        with quiet_export():  # torch's guards, graphs and steps are not the user's to read (shown with --debug)
            program = torch.onnx.export(target, xs, dynamo=True, opset_version=max(opset, DYNAMO_MIN_OPSET),
                                        input_names=inputs, output_names=names, dynamic_shapes=dims,
                                        optimize=fold_constants or opset < DYNAMO_MIN_OPSET, verbose=False)
        data = program.model_proto.SerializeToString()
        return _downgrade(data, opset) if opset < DYNAMO_MIN_OPSET else data


def with_metadata(data: bytes, props: dict[str, str]) -> bytes:
    """``data`` (a serialised ONNX model) with ``props`` as its ``metadata_props``: what a deployment needs to feed
    the graph and read its outputs, carried in the file. The graph itself is not touched."""
    import onnx

    proto = onnx.load_from_string(data)
    kept = [p for p in proto.metadata_props if p.key not in props]
    del proto.metadata_props[:]
    proto.metadata_props.extend(kept)
    for key, value in props.items():
        entry = proto.metadata_props.add()
        entry.key, entry.value = key, value
    return proto.SerializeToString()
