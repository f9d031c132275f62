"""The front doors: one function per CLI verb, each taking whatever the user has at hand.

A model may be given as a spec string (``"torchvision:resnet18"``,
``"splice.models:tray_net"``), a folder written by :func:`save` or ``splice
tune``, an ``nn.Module`` or a :class:`~splice.sources.Source`. Each door
resolves it once and calls the module that does the work; commands that work
on folders (verify, export, inspect) save an in-memory model to a temporary
folder first, so the same checks run on exactly what would be written.

A folder's manifest names the architecture to rebuild; that name came from a
file, so it is built only when a registry lists it (``torchvision:NAME``,
``splice.models:NAME``, a registered ``splice.models`` entry point) unless the
call passes ``trust_code=True`` (see :mod:`splice.sources.trust`). A spec
passed as an argument is the caller's own choice and is built as given.

The examples use splice's own small demo network, so they run anywhere in
seconds and download nothing.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

__all__ = ["points", "insert", "save", "load", "verify", "export", "tune", "evaluate", "inspect"]


def _source(model, **options):
    from .store import open_source

    return open_source(model, **options)


def _module(model):
    """``model``, or the module ``torch.compile`` wrapped when it is such a wrapper (splice works on that one)."""
    from torch import nn

    from .sources import uncompiled

    return uncompiled(model) if isinstance(model, nn.Module) else model


def _in_memory_base(model):
    """The base to verify ``model`` against in memory (a splice of a module object), else ``None``."""
    from .objects import base_to_check_against

    return None if isinstance(model, (str, os.PathLike)) else base_to_check_against(model)


@contextlib.contextmanager
def _as_folder(model, trust_pickle: bool = False, trust_code: bool = False) -> Iterator[Path]:
    """``model`` as a splice folder: itself when it is one, else saved to a temporary folder."""
    from .errors import UntrustedCodeError
    from .sources import TRUST_ENV
    from .store import is_splice_folder, save

    if isinstance(model, (str, os.PathLike)) and is_splice_folder(model):
        yield Path(model)
        return
    src = _source(model, trust_pickle=trust_pickle, warn_random=False, trust_code=trust_code)
    from .errors import SpliceError
    from .manifest import info_of
    from .sources import MODULE_SPEC

    if info_of(src.model) is None and getattr(src, "spec", MODULE_SPEC) == MODULE_SPEC:
        raise SpliceError("this module holds no warps: give a spliced model (a folder splice wrote, or the module "
                          "splice.insert returned), or splice it first (splice.insert(model, at=..., "
                          "input_shape=...))")
    with tempfile.TemporaryDirectory(prefix="splice-") as tmp:
        folder = Path(tmp) / "model"
        save(src.model, folder, source=None if info_of(src.model) is not None else src)
        _warn_unsaved(src.model, folder, trust_pickle, trust_code)
        try:
            yield folder
        except UntrustedCodeError as exc:  # the refusal named splice's own temporary manifest, not the user's spec
            raise UntrustedCodeError(
                f"checking this model rebuilds its base from spec {src.spec!r}, which runs code from that file; "
                f"if you trust it, pass trust_code=True (--trust-code, or {TRUST_ENV}=1)") from exc


def _unsaved_tensors(model) -> dict:
    """The base's tensors a folder does not carry: non-persistent buffers and plain tensor attributes."""
    import torch

    from .surgery import WARP_PREFIX

    found = {}
    for qualname, m in model.named_modules():
        if qualname == WARP_PREFIX or qualname.startswith(WARP_PREFIX + "."):
            continue
        names = [*(k for k in m._non_persistent_buffers_set if m._buffers.get(k) is not None),
                 *(k for k, v in m.__dict__.items() if type(v) is torch.Tensor)]
        for k in names:
            found[f"{qualname}.{k}" if qualname else k] = getattr(m, k)
    return found


def _warn_unsaved(model, folder: Path, trust_pickle: bool, trust_code: bool) -> None:
    """Warn when the model in hand holds tensors a folder does not carry (a non-persistent buffer the caller set
    after building it) that differ from those its spec builds: the checks and the export see the rebuilt ones."""
    import warnings

    from .copies import bitwise_equal
    from .errors import SpliceError, SpliceWarning
    from .store import load as load_folder

    mine = _unsaved_tensors(model)
    if not mine:
        return
    try:
        rebuilt = _unsaved_tensors(load_folder(folder, trust_pickle=trust_pickle, trust_code=trust_code))
    except SpliceError:  # the checks that follow say why the folder does not load
        return
    differ = [k for k, t in mine.items() if k not in rebuilt or not bitwise_equal(t, rebuilt[k])]
    if differ:
        warnings.warn(f"the model holds tensors a folder does not carry (non-persistent buffers or tensor attributes: "
                      f"{', '.join(differ[:4])}{' ...' if len(differ) > 4 else ''}) that differ from those its spec "
                      "builds; what is checked, exported and loaded has the rebuilt ones: set them in the factory, or "
                      "register them as persistent buffers", SpliceWarning, stacklevel=4)


def points(model, input_shape=None, *, all: bool = False, leaves: Sequence[str] = (), warp: str = "affine",
           weights=None, kwargs=None, trust_code: bool = False, within: str = "") -> list:
    """List where a warp can go in ``model`` (a list of :class:`splice.graph.Point`).

    By default only the model input and the points between conv layers are
    listed; ``all=True`` lists every 4-D activation. ``input_shape`` may give
    one ``(C, H, W)`` per input of a model with several; ``within="backbone"``
    lists the points inside that submodule. Each point says its ``mechanism``
    (``"fx"`` or ``"hooks"``).

    >>> import splice
    >>> pts = splice.points("splice.models:tray_net")
    >>> [p.name for p in pts if p.recommended]
    ['input']
    >>> pts[0].shape, pts[0].cut
    ((1, 48, 48), True)
    """
    from . import graph
    from .errors import SourceError

    src = _source(model, input_shape=input_shape, weights=weights, kwargs=kwargs, leaves=leaves, warn_random=False,
                  trust_code=trust_code)
    if src.input_shape is None:
        raise SourceError("points() needs the model's input shape; pass input_shape=(C, H, W)")
    return graph.points(src.model, src.input_shapes, all=all, leaves=tuple(leaves) or tuple(src.leaves), warp=warp,
                        within=within)


def insert(model, at: str | Sequence[str] = ("recommended",), warp: Any = "affine", *, input_shape=None,
           leaves: Sequence[str] = (), check: bool = True, force: bool = False, tol: float = 1e-5,
           trust_code: bool = False, within: str = ""):
    """A copy of ``model`` with identity-initialised warps at ``at`` (your model is not changed).

    ``warp`` is a family name, a :class:`~splice.warps.WarpConfig` or a mapping
    from point name to either; ``within`` splices inside a submodule. The result
    is a ``torch.fx.GraphModule`` (mechanism ``fx``) or a copy of the model with
    forward hooks at the points (mechanism ``hooks``) that carries its
    :class:`~splice.manifest.SpliceInfo`.

    >>> import splice, torch
    >>> spliced = splice.insert("splice.models:tray_net", at="input", warp=splice.WarpConfig(head_width=8))
    >>> list(spliced.splice_warps)
    ['input']
    >>> base = splice.load_source("splice.models:tray_net").model
    >>> x = torch.randn(2, 1, 48, 48)
    >>> spliced.load_state_dict(base.state_dict(), strict=False).unexpected_keys
    []
    >>> bool(torch.equal(base.eval()(x), spliced.eval()(x)))
    True
    """
    from .surgery import insert as insert_warps

    src = _source(model, input_shape=input_shape, leaves=leaves, warn_random=False, trust_code=trust_code)
    return insert_warps(src, at=at, warp=warp, leaves=leaves, check=check, force=force, tol=tol, within=within)


def save(model, folder: str | os.PathLike, *, overwrite: bool = False, source=None, tuning: Mapping | None = None,
         class_names=None, normalisation=None) -> Path:
    """Write ``model`` as a splice folder (``weights.safetensors`` + ``splice.json``), atomically.

    A splice of a module object records how to build its base only when
    ``source`` names a spec; without one it is saved with a warning, since
    ``load`` and ``verify`` cannot rebuild that folder.

    >>> import splice, tempfile
    >>> spliced = splice.insert("splice.models:tray_net", at="input")
    >>> folder = splice.save(spliced, tempfile.mkdtemp() + "/tray-affine")
    >>> sorted(p.name for p in folder.iterdir())
    ['splice.json', 'weights.safetensors']
    """
    import warnings

    from .errors import SpliceWarning
    from .objects import made_from_object
    from .store import save as save_folder

    if source is None and made_from_object(model):
        warnings.warn(f"'{folder}' will record its base as a module object, which load and verify cannot rebuild; "
                      "pass source='pkg.module:factory' (a spec that builds the base) to save a folder they can",
                      SpliceWarning, stacklevel=2)
    return save_folder(model, folder, overwrite=overwrite, source=source, tuning=tuning, class_names=class_names,
                       normalisation=normalisation)


def load(folder: str | os.PathLike, *, trust_pickle: bool = False, trust_code: bool = False):
    """Rebuild a saved model (base from its recorded spec, warps re-applied, weights checked by hash).

    >>> import splice, tempfile
    >>> folder = splice.save(splice.insert("splice.models:tray_net", at="input"), tempfile.mkdtemp() + "/t")
    >>> model = splice.load(folder)
    >>> [p.name for p in model.splice_info.points], model.training
    (['input'], False)
    """
    from .store import load as load_folder

    return load_folder(folder, trust_pickle=trust_pickle, trust_code=trust_code)


def verify(model, *, images=None, batch: int = 1, dtype="float32", onnx: bool = False, opset: int = 17,
           seed: int = 0, trust_pickle: bool = False, exporter: str = "torchscript", trust_code: bool = False):
    """Certify a spliced model against its base: a :class:`~splice.verification.VerifyReport`.

    ``model`` is a folder, or a spliced model in memory (saved to a temporary
    folder and checked as written). A splice of a module object (not a spec)
    cannot be rebuilt from a folder: it is checked in memory against the
    module it was made from, while that is alive and holds the weights it was
    spliced with (else :func:`splice.verification.verify_models` takes a base).

    >>> import splice
    >>> report = splice.verify(splice.insert("splice.models:tray_net", at="input"))
    >>> report.passed, report.failed
    (True, [])
    """
    from .verification import verify as verify_folder
    from .verification import verify_models

    model = _module(model)
    reference = _in_memory_base(model)
    if reference is not None:
        return verify_models(reference, model, images=images, batch=batch, dtype=dtype, onnx=onnx, opset=opset,
                             seed=seed, exporter=exporter, trust_code=trust_code)
    with _as_folder(model, trust_pickle, trust_code) as folder:
        return verify_folder(folder, images=images, batch=batch, dtype=dtype, onnx=onnx, opset=opset, seed=seed,
                             trust_pickle=trust_pickle, exporter=exporter, trust_code=trust_code)


def export(model, onnx: str | os.PathLike | None = None, pt2: str | os.PathLike | None = None, *,
           opset: int = 17, dynamic_batch: bool = True, trust_pickle: bool = False,
           exporter: str = "torchscript", trust_code: bool = False) -> dict:
    """Export to ONNX and/or torch.export; a copy is kept only after its parity check passed.

    >>> import splice, tempfile
    >>> out = tempfile.mkdtemp() + "/tray.onnx"
    >>> result = splice.export(splice.insert("splice.models:tray_net", at="input"), onnx=out)
    >>> [item["format"] for item in result["exports"]]
    ['onnx']
    """
    from .exporting import export as export_folder
    from .exporting import export_model
    from .objects import made_from_object

    model = _module(model)
    if made_from_object(model):  # a splice of a module object: exported as it is, in memory
        return export_model(model, onnx=onnx, pt2=pt2, opset=opset, dynamic_batch=dynamic_batch, exporter=exporter)
    with _as_folder(model, trust_pickle, trust_code) as folder:
        return export_folder(folder, onnx=onnx, pt2=pt2, opset=opset, dynamic_batch=dynamic_batch,
                             trust_pickle=trust_pickle, exporter=exporter, trust_code=trust_code)


def tune(model=None, *, recipe=None, data=None, out=None, resume=None, overrides=None, model_options=None,
         run_options=None, site=None) -> dict:
    """Fine-tune with a recipe and write a run folder (see :func:`splice.training.tune`).

    A folder (or ``resume``'s run.json) that names a model no registry lists is
    built only with ``model_options=ModelOptions(trust_code=True)``.

    The ``label-free`` and ``batchnorm-stats`` recipes read unlabelled ``site``
    images instead of ``data`` (``--site`` on the command line).

    >>> import splice, tempfile
    >>> from splice.training import RecipeOverrides, RunOptions
    >>> run = tempfile.mkdtemp() + "/run"
    >>> summary = splice.tune("splice.models:tray_net", recipe="baseline", data="digits", out=run,
    ...                       overrides=RecipeOverrides(epochs=1), run_options=RunOptions(progress=False))
    >>> 0.0 <= summary["best_accuracy"] <= 1.0
    True
    """
    from .training import tune as tune_run

    return tune_run(model, recipe=recipe, data=data, out=out, resume=resume, overrides=overrides,
                    model_options=model_options, run_options=run_options, site=site)


def evaluate(model, *, data: str, split: str = "test", against=None, distort=None, plot=None,
             model_options=None, options=None, against_options=None) -> dict:
    """Accuracy and loss on a split, clean and under distortion sweeps, optionally beside a second model.

    ``against_options`` holds the opt-ins for ``against`` (``ModelOptions(trust_code=True)``); those of
    ``model_options`` are for ``model`` alone.

    >>> import splice
    >>> result = splice.evaluate("splice.models:tray_net", data="digits", distort="rotate=0,30")
    >>> sorted(result["sweeps"]), result["n_images"]
    (['rotate'], 360)
    """
    from .evaluation import evaluate as evaluate_model

    return evaluate_model(model, data=data, split=split, against=against, distort=distort, plot=plot,
                          model_options=model_options, options=options, against_options=against_options)


def inspect(model, *, data: str, out, n: int = 64, split: str = "test", trust_pickle: bool = False,
            pictures: bool = True, trust_code: bool = False, overwrite: bool = False) -> dict:
    """What the warps learned: per-image polar decomposition, a summary, and pictures, written to ``out``.

    ``out`` is new, empty, or an earlier report of inspect's (replaced); a folder holding anything else is
    refused unless ``overwrite=True``, which writes the report beside its files.

    >>> import splice, tempfile
    >>> result = splice.inspect(splice.insert("splice.models:tray_net", at="input"), data="digits", n=8,
    ...                         out=tempfile.mkdtemp(), pictures=False)
    >>> result["warps"]["input"]["quantities"]["angle_deg"]["mean"]   # a fresh splice is the identity
    0.0
    """
    from .folders import check_report_folder
    from .inspection import inspect as inspect_folder
    from .objects import made_from_object

    check_report_folder(out, overwrite=overwrite)  # before a model is saved to a temporary folder
    model = _module(model)
    if made_from_object(model):  # a splice of a module object: inspected as it is, in memory
        return inspect_folder(model, data=data, n=n, split=split, out=out, pictures=pictures, overwrite=overwrite)
    with _as_folder(model, trust_pickle, trust_code) as folder:
        return inspect_folder(folder, data=data, n=n, split=split, out=out, trust_pickle=trust_pickle,
                              pictures=pictures, trust_code=trust_code, overwrite=overwrite)
