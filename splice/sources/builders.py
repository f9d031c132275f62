"""Building an architecture from a spec: torchvision, timm and transformers registries, user factories.

Nothing is downloaded: torchvision models are built with ``weights=None`` (and
``weights_backbone=None`` where the builder takes one), timm models with
``pretrained=False``, Hugging Face models from their config; every model
starts from random init and weights come separately
(:mod:`splice.sources.weights`).
"""

from __future__ import annotations

import contextlib
import hashlib
import importlib
import importlib.util
import os
import re
import sys
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from torch import nn

from ..errors import SourceError, SpliceWarning, first_line, suggest
from .huggingface import build_transformers
from .specs import FILE_MODULE_PREFIX, is_file_head, split_spec
from .timm import build_timm
from .trust import check_spec

__all__ = ["build_model", "absolute_spec", "code_sha256", "spec_file", "uncompiled", "IMAGENET_NORMALISATION"]

IMAGENET_NORMALISATION = {"mean": [0.485, 0.456, 0.406], "std": [0.229, 0.224, 0.225]}
_TORCHVISION_SIZE = 224  # torchvision's usual classification crop, for a builder that names no size of its own


def _torchvision_builder(name: str):
    import torchvision.models as tvm

    available = sorted(tvm.list_models())
    if name not in available:
        raise SourceError(
            f"unknown torchvision model {name!r}{suggest(name, available)} "
            "Run python -c 'import torchvision; print(torchvision.models.list_models())' for the full list"
        )
    return tvm.get_model_builder(name)


def spec_file(spec: str) -> Path | None:
    """The Python file of a ``path/file.py:factory`` spec, when it is there; ``None`` for any other spec (a
    registry name such as ``torchvision:NAME`` names no file)."""
    head, sep, _ = spec.rpartition(":")
    return Path(head) if sep and is_file_head(head) and Path(head).is_file() else None


def absolute_spec(spec: str) -> str:
    """``path/file.py:factory`` with the file's absolute path (a folder records it, and is read from anywhere);
    any other spec as it is."""
    file = spec_file(spec)
    return spec if file is None else f"{file.resolve()}:{spec.rpartition(':')[2]}"


@contextlib.contextmanager
def _folder_importable(path: Path | None):
    """``path``'s folder at the end of ``sys.path`` for the block (unless it is there already), as ``python
    file.py`` would make it: a model file may import the modules beside it. Appended, so nothing installed is
    shadowed; taken out again after, with the modules imported from it, so that another model file's
    ``layers.py`` is its own and not this one's."""
    folder = None if path is None else str(path.resolve().parent)
    added = folder is not None and folder not in sys.path
    before = set(sys.modules)
    if added:
        sys.path.append(folder)
    try:
        yield
    finally:
        if added and folder in sys.path:
            sys.path.remove(folder)
        if added:
            for name in set(sys.modules) - before:
                file = getattr(sys.modules[name], "__file__", None)
                if file and os.path.dirname(os.path.abspath(file)) == folder:
                    del sys.modules[name]


def code_sha256(spec: str) -> str | None:
    """The sha256 of the Python file a ``path/file.py:factory`` spec builds from (what a folder records, to tell
    when that code changed), ``None`` for any other spec or a file that is not there."""
    file = spec_file(spec)
    return None if file is None else hashlib.sha256(file.read_bytes()).hexdigest()


def code_change(spec: str, recorded: str | None) -> str | None:
    """What to tell when the model file of ``spec`` is no longer the one whose sha256 was ``recorded`` at the splice
    (a folder rebuilt from it is not the model that was spliced), else ``None``."""
    now = code_sha256(spec)
    if recorded is None or now is None or now == recorded:
        return None
    return (f"the model file '{spec.rpartition(':')[0]}' changed since the splice (sha256 {recorded[:12]}… then, "
            f"{now[:12]}… now): the base is built from other code than was spliced; restore the file, or splice "
            "the new code again")


def _import_factory(head: str, attr: str, spec: str):
    if is_file_head(head):
        path = Path(head)
        if not path.is_file():
            raise SourceError(f"model file '{path}' does not exist (from spec {spec!r}); check the path")
        # the same name in every process (str hashes are salted per process)
        mod_name = FILE_MODULE_PREFIX + hashlib.sha256(str(path.resolve()).encode()).hexdigest()[:16]
        module = sys.modules.get(mod_name)
        digest = code_sha256(spec)
        if module is not None and getattr(module, "__splice_code_sha256__", None) != digest:
            del sys.modules[mod_name]  # the file changed since it was run here: run what it holds now
            module = None
        if module is None:
            loader_spec = importlib.util.spec_from_file_location(mod_name, path)
            if loader_spec is None or loader_spec.loader is None:
                raise SourceError(f"cannot import model file '{path}'; is it a Python file?")
            module = importlib.util.module_from_spec(loader_spec)
            sys.modules[mod_name] = module
            module.__splice_code_sha256__ = digest  # what code_sha256 records, of the code run
            try:
                with _folder_importable(path):
                    loader_spec.loader.exec_module(module)
            except Exception as exc:
                del sys.modules[mod_name]
                raise SourceError(f"importing '{path}' failed: {type(exc).__name__}: {exc}") from exc
    else:
        try:
            module = importlib.import_module(head)
        except ImportError as exc:
            raise SourceError(
                f"cannot import module {head!r} from spec {spec!r} ({exc}); "
                "is the package installed (or its folder on PYTHONPATH), or did you mean a path like "
                "path/to/file.py:factory?"
            ) from None
    factory = getattr(module, attr, None)
    if factory is None or not callable(factory):
        names = [n for n in dir(module) if not n.startswith("_") and callable(getattr(module, n))]
        raise SourceError(f"{head!r} has no callable {attr!r}{suggest(attr, names)}")
    return factory


def uncompiled(model: nn.Module) -> nn.Module:
    """The module a ``torch.compile`` or ``DataParallel`` wrapper holds, with a warning, when ``model`` is one (at
    any depth of such wrappers); else ``model``.

    A compiled forward is code neither torch.fx nor a meta-device run can follow, a data-parallel one splits the
    batch, and the warps need the module's own Python forward; its checkpoints also lack the wrapper's
    ``_orig_mod.`` / ``module.`` prefix. The wrapped module holds the same parameters.
    """
    from torch.nn.parallel import DataParallel, DistributedDataParallel

    inner = model
    while True:
        wrapped = (inner._modules.get("_orig_mod") if type(inner).__name__ == "OptimizedModule" else
                   inner._modules.get("module") if isinstance(inner, (DataParallel, DistributedDataParallel)) else
                   None)
        if not isinstance(wrapped, nn.Module):
            break
        inner = wrapped
    if inner is model:
        return model
    if type(model).__name__ == "OptimizedModule":
        warnings.warn(f"a torch.compile'd {type(inner).__name__}: splice works on the module it compiled (the same "
                      "weights); compile the spliced model again to run it compiled", SpliceWarning, stacklevel=3)
    else:
        warnings.warn(f"a {type(model).__name__}-wrapped {type(inner).__name__}: splice works on the module it "
                      "wraps (the same weights); wrap the spliced model again to run it so", SpliceWarning,
                      stacklevel=3)
    return inner


def _torchvision_kwargs(builder, kwargs: dict) -> dict:
    """``kwargs`` with ``weights=None``, and ``weights_backbone=None`` when the builder takes a backbone."""
    import inspect

    for key in ("weights", "weights_backbone"):
        if kwargs.get(key) is not None:
            raise SourceError(
                f"torchvision weights are never downloaded; drop {key!r} from --kwargs and "
                "pass a local file with --weights FILE"
            )
    out = {**kwargs, "weights": None}
    if "weights_backbone" in inspect.signature(builder).parameters:
        out["weights_backbone"] = None
    return out


def _build_torchvision(attr: str, kwargs: dict):
    builder = _torchvision_builder(attr)
    call = _torchvision_kwargs(builder, kwargs)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            model = builder(**call)
    except TypeError as exc:
        shown = {k: v for k, v in kwargs.items() if k not in ("weights", "weights_backbone")}
        raise SourceError(f"torchvision:{attr} does not accept --kwargs {shown}: {exc}") from None
    return model, {"input_shape": (3, *[_torchvision_size(attr, model)] * 2), "normalisation": IMAGENET_NORMALISATION}


def _torchvision_size(name: str, model) -> int:
    """The side a torchvision model is built for, as it names it (nothing downloaded, nothing run).

    In order: the model's own ``image_size`` (a transformer built for one size, whichever weights exist); the size
    a detector's transform resizes every image to (``min_size``, 320 for a ``_320_`` one); the crop of the
    classification transform its first weights name (299 for inception_v3); else 224.
    """
    import torchvision.models as tvm

    own = getattr(model, "image_size", None)
    if isinstance(own, int) and own > 0:
        return own
    sizes = getattr(getattr(model, "transform", None), "min_size", None)
    if isinstance(sizes, (tuple, list)) and sizes and all(isinstance(v, int) and v > 0 for v in sizes):
        return max(sizes)
    try:
        first = next(iter(tvm.get_model_weights(name)), None)
    except (ValueError, KeyError):  # a builder without registered weights
        first = None
    crop = getattr(getattr(first, "transforms", None), "keywords", {}).get("crop_size")
    return crop if isinstance(crop, int) and crop > 0 else _TORCHVISION_SIZE


def build_model(spec: str, kwargs: Mapping | None = None, *, origin: str | os.PathLike | None = None,
                trust_code: bool = False):
    """Build an architecture from a spec string (random init, nothing downloaded).

    Returns ``(model, meta)`` where ``meta`` holds the declared ``input_shape``
    and ``normalisation`` (either may be ``None``), and ``declares_normalisation``:
    whether the builder says anything about it (``factory.normalisation = None``
    declares "none"; no attribute declares nothing). ``origin`` is the file the
    spec was read from (``None``: the user typed it); such a spec passes the
    gate of :func:`splice.sources.trust.check_spec` first. ``trust_code`` is
    that gate's opt-in, and also allows a Hugging Face config that ships its
    own code (``auto_map``).
    """
    try:
        return _build(spec, kwargs, origin=origin, trust_code=trust_code)
    except Exception as exc:  # an allocation that failed, even inside a factory's own code, is told as such
        cause = exc.__cause__ if isinstance(exc, SourceError) and exc.__cause__ is not None else exc
        if not (isinstance(cause, MemoryError) or isinstance(cause, RuntimeError) and _NO_MEMORY.search(str(cause))):
            raise
        raise SourceError(f"building {spec} ran out of memory ({first_line(cause, 160)}); its builder arguments "
                          "(--kwargs, or a folder's splice.json) ask for a larger model than this machine holds: "
                          "check them") from None


_NO_MEMORY = re.compile(r"can't allocate memory|out of memory|not enough memory", re.IGNORECASE)


def _build(spec: str, kwargs: Mapping | None, *, origin, trust_code: bool):
    kwargs = dict(kwargs or {})
    check_spec(spec, kwargs, origin=origin, trust_code=trust_code)
    head, attr = split_spec(spec)
    if head == "torchvision":
        model, meta = _build_torchvision(attr, kwargs)
        return model, {**meta, "declares_normalisation": True}
    if head in ("timm", "transformers"):
        if head == "timm":
            model, meta = build_timm(attr, kwargs)
        else:
            model, meta = build_transformers(attr, kwargs, trust_code=trust_code)
        return model, {**meta, "declares_normalisation": meta["normalisation"] is not None}
    meta: dict[str, Any] = {"input_shape": None, "normalisation": None, "declares_normalisation": False,
                            "factory": True}
    factory = _import_factory(head, attr, spec)
    try:
        with _folder_importable(Path(head) if is_file_head(head) else None):
            model = factory(**kwargs)
    except TypeError as exc:
        if kwargs:
            raise SourceError(f"{spec} does not accept --kwargs {kwargs}: {exc}") from None
        raise SourceError(f"building {spec} raised TypeError: {first_line(exc)}; fix the factory (run it in Python "
                          "to see where)") from exc
    except Exception as exc:  # the user's own code: say where it came from, not "internal error"
        raise SourceError(f"building {spec} raised {type(exc).__name__}: {first_line(exc)}; fix the factory (run "
                          "it in Python to see where)") from exc
    if not isinstance(model, nn.Module):
        raise SourceError(f"{spec} returned {type(model).__name__}, not a torch.nn.Module")
    model = uncompiled(model)  # here, so that a folder's rebuild unwraps it too
    declared = getattr(factory, "input_shape", None) or getattr(model, "input_shape", None)
    if declared is not None:
        meta["input_shape"] = declared  # one shape or one per input: parsed by load_source, only when none is given
    meta["normalisation"] = getattr(factory, "normalisation", None)
    meta["declares_normalisation"] = hasattr(factory, "normalisation")
    return model, meta
