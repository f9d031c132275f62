"""The entry point: a spec, a folder, a pickled module or a module in, a :class:`Source` out."""

from __future__ import annotations

import os
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import torch
from torch import nn

from ..caches import caches_kept
from ..errors import NormalisationWarning, RandomWeightsWarning, SourceError, SpliceWarning
from ..fileio import state_dict_sha256
from .builders import absolute_spec, build_model, code_sha256, uncompiled
from .empty import initialisers_skipped
from .huggingface import hf_class_names, image_channels, is_hf_folder, read_hf_folder, read_hf_weights
from .lazy import materialise_lazy_, refuse_lazy
from .specs import four_numbers_first, parse_input_shapes, parse_kwargs, volumes_not_images
from .trust import check_spec
from .weights import check_file, check_finite, load_weights_, read_weights, torch_load

__all__ = ["Source", "load_source"]

_WEIGHT_SUFFIXES = (".pt", ".pth", ".bin", ".ckpt", ".safetensors", ".pkl")


@dataclass
class Source:
    """A resolved model: the module plus everything needed to rebuild it.

    ``weights_sha256`` is the canonical hash of the model's state dict after the
    weights were loaded (see :func:`splice.fileio.state_dict_sha256`): two sources
    hash equal exactly when every tensor is bitwise equal.
    ``declares_normalisation`` is False when nothing (factory attribute,
    torchvision, timm, a folder's record) says how inputs are normalised.
    ``code_sha256`` is the sha256 of the Python file a ``path/file.py:factory``
    spec builds from (``None`` for any other spec). ``not_loaded`` names the
    model's tensors that no weights file gave (a partial load: missing there,
    or of another shape), which keep the builder's initialisation.
    """

    model: nn.Module
    spec: str
    kwargs: dict = field(default_factory=dict)
    input_shape: tuple[int, int, int] | None = None
    weights_path: str | None = None
    weights_sha256: str | None = None
    normalisation: dict | None = None
    class_names: list[str] | None = None
    manifest: dict | None = None
    random_init: bool = False
    leaves: tuple[str, ...] = ()
    declares_normalisation: bool = True
    extra_inputs: tuple[tuple[int, ...], ...] = ()
    code_sha256: str | None = None
    not_loaded: tuple[str, ...] = ()

    @property
    def input_shapes(self) -> tuple[tuple[int, ...], ...]:
        """One shape per model input: :attr:`input_shape` (C, H, W), then :attr:`extra_inputs` (any per-sample
        shape)."""
        return () if self.input_shape is None else (tuple(self.input_shape), *self.extra_inputs)

    @property
    def is_spliced(self) -> bool:
        return bool(self.manifest and self.manifest.get("points"))


MODULE_SPEC = "<module>"  # the spec of a Source made from a module object: no spec can rebuild it


def _looks_like_pickled_module(spec: str) -> bool:
    return ":" not in spec and spec.endswith(_WEIGHT_SUFFIXES) and not spec.endswith(".safetensors")



def _weights_path(weights, origin) -> str | None:
    """The weights file as a folder records it: the absolute path of the file read (a path relative to where a
    command ran means nothing to a verify run from elsewhere). A relative path read from a file was resolved
    against that file's folder by whoever read it (``splice.json``, ``run.json``)."""
    if weights is None:
        return None
    return os.path.abspath(os.fspath(weights))

def load_source(
    spec: str | Source | nn.Module,
    *,
    weights: str | os.PathLike | None = None,
    kwargs: Mapping | str | None = None,
    input_shape: str | Sequence | None = None,
    allow_partial: bool = False,
    trust_pickle: bool = False,
    leaves: Sequence[str] = (),
    warn_random: bool = True,
    origin: str | os.PathLike | None = None,
    trust_code: bool = False,
    default_input_shape: Sequence[int] | None = None,
) -> Source:
    """Resolve a model spec (or a Hugging Face ``save_pretrained`` folder) into a :class:`Source`.

    ``input_shape`` is ``(C, H, W)``, or one such shape per input of a model
    with several (:func:`~splice.sources.parse_input_shapes`). ``origin`` is
    the file ``spec`` (and ``kwargs``) were read from, ``None`` when the user
    typed them; a spec from a file is built only when a registry lists it or
    with ``trust_code`` (see :mod:`splice.sources.trust`). ``trust_code`` also
    allows a Hugging Face config that runs code shipped with the model
    (``auto_map``). ``default_input_shape`` is used when neither
    ``input_shape`` nor the builder gives one. Folders written by splice are
    opened by :func:`splice.store.open_source`.

    >>> src = load_source("torchvision:resnet18", kwargs={"num_classes": 10})  # doctest: +SKIP
    >>> src.input_shape
    (3, 224, 224)
    """
    if isinstance(spec, Source):
        return spec
    # four numbers: a clip (C, T, H, W) or images with their batch; the model, once built, says which line fits
    clip = input_shape if four_numbers_first(input_shape) else None
    shapes = () if clip is not None else parse_input_shapes(input_shape) or ()
    if isinstance(spec, nn.Module):
        _refuse_clip(spec, clip)
        spec = uncompiled(spec)
        _refuse_unspliceable(spec, "the model given")
        refuse_lazy(spec, "the model given")
        if not shapes and getattr(spec, "input_shape", None):
            shapes = parse_input_shapes(spec.input_shape) or ()
        return Source(model=spec, spec=MODULE_SPEC, input_shape=shapes[0] if shapes else None,
                      weights_sha256=state_dict_sha256(spec.state_dict()), extra_inputs=tuple(shapes[1:]))
    options = {"weights": weights, "allow_partial": allow_partial, "trust_pickle": trust_pickle, "leaves": leaves,
               "origin": origin, "trust_code": trust_code, "default_input_shape": default_input_shape, "clip": clip}
    path = Path(spec)
    kw = parse_kwargs(kwargs)
    if is_hf_folder(path):  # JSON and weights only: its transformers:Class spec passes the gate below
        return _load_hf_folder(path, shapes, **options)
    return _built(spec, path, kw, shapes, options, warn_random=warn_random)


def _built(spec: str, path: Path, kw: dict, shapes: tuple, options: dict, *, warn_random: bool,
           hashed: bool = True, empty: bool = False) -> Source:
    """:func:`load_source` for a spec that passed no folder test; without ``hashed`` the weights are left
    unhashed (``weights_sha256=None``), for a caller about to load others. With ``empty`` the model is built on
    the meta device when it can be (no memory, no random init), for a caller that replaces it."""
    weights, allow_partial, trust_pickle = options["weights"], options["allow_partial"], options["trust_pickle"]
    origin, trust_code, leaves = options["origin"], options["trust_code"], options["leaves"]
    default_input_shape = options["default_input_shape"]
    not_loaded: tuple[str, ...] = ()
    check_spec(spec, kw, origin=origin, trust_code=trust_code)
    if ":" not in spec or path.is_dir():
        return _load_path(spec, path, shapes, options)
    model, meta = _build(spec, kw, origin=origin, trust_code=trust_code, empty=empty)
    _refuse_clip(model, options.get("clip"))
    _refuse_unspliceable(model, spec)
    shapes = shapes or parse_input_shapes(meta["input_shape"]) or parse_input_shapes(default_input_shape) or ()
    materialise_lazy_(model, shapes, spec)  # splice's own model: lazy modules get their weights before any load
    if weights is not None:
        state = read_weights(weights, trust_pickle=trust_pickle)
        check_finite(state, f"weights '{weights}'")
        told = load_weights_(model, state, allow_partial=allow_partial, where=f"weights '{weights}'", spec=spec)
        not_loaded = tuple(sorted(told["missing"] + told["mismatched"]))
    elif warn_random:
        warnings.warn(
            f"{spec} has random weights (no --weights given): its outputs mean nothing for accuracy",
            RandomWeightsWarning,
            stacklevel=3,
        )
    if weights is not None and not meta["declares_normalisation"] and meta.get("factory"):
        warnings.warn(f"{spec} declares no normalisation, so images reach it as [0, 1] pixels; if it was trained on "
                      "normalised images, set factory.normalisation = {'mean': [...], 'std': [...]} (None says it "
                      "takes [0, 1])", NormalisationWarning, stacklevel=3)
    model.eval()
    first = shapes[0] if shapes else None
    if first is None and volumes_not_images(model) is not None:  # say that first, not "give a shape"
        raise SourceError(volumes_not_images(model))
    if first is None:
        where = ("neither preprocessor_config.json nor the config gives an image size"
                 if spec.startswith("transformers:") else "or set factory.input_shape = (C, H, W)")
        raise SourceError(f"cannot tell the input shape of {spec}; pass --input-shape CxHxW (input_shape=...); {where}")
    return Source(model=model, spec=spec if origin is not None else absolute_spec(spec), kwargs=kw,
                  input_shape=first, weights_path=_weights_path(weights, origin),
                  weights_sha256=state_dict_sha256(model.state_dict()) if hashed else None,
                  normalisation=meta["normalisation"],
                  declares_normalisation=meta["declares_normalisation"], random_init=weights is None,
                  leaves=tuple(leaves), extra_inputs=tuple(shapes[1:]), code_sha256=code_sha256(spec),
                  not_loaded=not_loaded,
                  # a transformers config's id2label: the order of the outputs, which data and reports must follow
                  class_names=hf_class_names(kw) if spec.startswith("transformers:") else None)


def _state_dtype(state: Mapping[str, torch.Tensor]) -> str:
    """The floating dtype of a state dict's first floating tensor, without ``torch.`` (``float32`` if none)."""
    t = next((v for v in state.values() if isinstance(v, torch.Tensor) and v.is_floating_point()), None)
    return str(t.dtype if t is not None else torch.float32).replace("torch.", "")


def _build(spec: str, kw: dict, *, origin, trust_code: bool, empty: bool):
    if not empty:
        return build_model(spec, kw, origin=origin, trust_code=trust_code)
    try:
        # what library code caches while the model is built on meta holds no data: cleared afterwards
        with caches_kept() as kept, torch.device("meta"), initialisers_skipped():
            built = build_model(spec, kw, origin=origin, trust_code=trust_code)  # (model, its record)
            kept["model"] = built[0]
    except Exception:  # noqa: BLE001 - a model that computes with its tensors while it is built: for real
        return build_model(spec, kw, origin=origin, trust_code=trust_code)
    return built


def _refuse_clip(model: nn.Module, clip) -> None:
    """For four numbers given as the first input shape (``clip``): the line for a model of volumes or clips,
    else the one that says to drop the batch size."""
    if clip is None:
        return
    why = volumes_not_images(model)
    if why is not None:
        raise SourceError(why)
    parse_input_shapes(clip)  # raises: the first shape is four numbers, and the model takes images


def _refuse_unspliceable(model: nn.Module, what: str) -> None:
    """One line for a model splice cannot copy, trace or train a warp in (TorchScript, converted int8 layers)."""
    _refuse_scripted(model, what)
    _refuse_quantized(model, what)


def _refuse_scripted(model: nn.Module, what: str) -> None:
    """One line, not a TypeError from deep inside, for a model that is or holds a TorchScript module."""
    for name, m in model.named_modules():
        if isinstance(m, torch.jit.ScriptModule):
            where = f"its module '{name}' ({type(m).__name__})" if name else "it"
            raise SourceError(f"{what}: {where} is TorchScript (torch.jit.script or trace), which splice can neither "
                              "copy nor trace; use the Python module it was scripted from, with its weights")


def _converted_quantized_classes() -> frozenset:
    """The module classes torch.ao.quantization converts float layers into (int8 kernels), by its own tables."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # torch.ao.quantization is deprecated in favour of torchao
        from torch.ao.quantization import quantization_mappings as tables
    return frozenset({*tables.get_default_static_quant_module_mappings().values(),
                      *tables.get_default_dynamic_quant_module_mappings().values()})


def _refuse_quantized(model: nn.Module, what: str) -> None:
    """One line for a converted quantized model (torch.ao.quantization's int8 layers): a warp is trained by
    gradients those layers do not pass, and their kernels have no meta-device version to list points with.
    Float models that are ready to quantize (FloatFunctional, quantization-aware training) pass."""
    converted = None
    for name, m in model.named_modules():
        quantized = any(t.is_quantized for t in (*m._parameters.values(), *m._buffers.values()) if t is not None)
        if not quantized and type(m).__module__.startswith(("torch.ao.nn", "torch.nn.quantized")):
            converted = _converted_quantized_classes() if converted is None else converted
            quantized = type(m) in converted
        if quantized:
            where = f"its module '{name}' ({type(m).__name__})" if name else "it"
            raise SourceError(f"{what}: {where} is quantized (int8 kernels pass no gradient to train a warp "
                              "with); splice and tune the float model, then quantize the result")


def _load_path(spec: str, path: Path, shapes: tuple, options: dict) -> Source:
    """A spec without ``factory``: a pickled module (folders of splice are refused)."""
    if path.is_dir():
        # folders written by splice are opened one floor up, by splice.store.open_source
        raise SourceError(f"'{spec}' is a folder, which load_source does not open; pass it to a splice command "
                          "or open it with splice.store.open_source")
    if _looks_like_pickled_module(spec):
        return _load_pickled_module(path, shapes, trust_pickle=options["trust_pickle"],
                                    default=parse_input_shapes(options["default_input_shape"]) or (),
                                    clip=options.get("clip"))
    if not path.exists() and ("/" in spec or spec.endswith(_WEIGHT_SUFFIXES)):
        raise SourceError(f"model path '{spec}' does not exist; check the path")
    raise SourceError(
        f"cannot read model spec {spec!r}; use torchvision:NAME (e.g. torchvision:resnet18), timm:NAME, "
        "package.module:factory, path/to/file.py:factory, a save_pretrained folder, or a folder written by "
        "'splice insert'"
    )


def _load_hf_folder(path: Path, shapes: tuple, *, weights, allow_partial: bool, trust_pickle: bool, leaves,
                    origin, trust_code: bool, default_input_shape, clip=None) -> Source:
    """A ``save_pretrained`` folder: built from its config, its own weights read by transformers (which knows
    how the checkpoint's names map to the model's), or ``weights`` loaded as any weights file is."""
    hf = read_hf_folder(path)
    own = weights is None
    weights = weights if weights is not None else hf.weights
    if weights is None:
        raise SourceError(f"'{path}' holds a config.json but no weights (model.safetensors, pytorch_model.bin or "
                          "a shard index); re-save the model with save_pretrained, or pass --weights FILE")
    channels = image_channels(hf.kwargs.get("config") or {})
    given = parse_input_shapes(shapes) or ()
    if given and channels is not None and given[0][0] != channels:
        c, h, w = given[0]
        raise SourceError(f"--input-shape {c}x{h}x{w} gives {c} channel(s), but '{path / 'config.json'}' says the "
                          f"model takes {channels} (num_channels); pass --input-shape {channels}x{h}x{w}")
    options = {"weights": None if own else weights, "allow_partial": allow_partial, "trust_pickle": trust_pickle,
               "leaves": leaves, "origin": origin, "trust_code": trust_code,
               "default_input_shape": default_input_shape, "clip": clip}
    # with the folder's own weights the model is built empty (no random init, no memory) and not hashed:
    # transformers builds the model that holds them
    src = _built(hf.spec, Path(hf.spec), parse_kwargs(hf.kwargs), parse_input_shapes(shapes or hf.input_shape) or (),
                 options, warn_random=False, hashed=not own, empty=own)
    if own:
        loaded, state = read_hf_weights(path, src.model, allow_partial=allow_partial, trust_pickle=trust_pickle)
        check_finite(state, f"weights '{weights}'")
        config = hf.kwargs.get("config") or {}
        saved, now = str(config.get("dtype") or config.get("torch_dtype") or ""), str(_state_dtype(state))
        if isinstance(getattr(torch, saved, None), torch.dtype) and saved != now:  # as a weights file does
            warnings.warn(f"weights '{weights}' were saved in {saved}; they are cast to the model's {now} on load",
                          SpliceWarning, stacklevel=3)
        # names and shapes checked as for any weights file (a tensor the folder lacks is refused by name)
        told = load_weights_(loaded, state, allow_partial=allow_partial, where=f"weights '{weights}'", spec=hf.spec)
        src.not_loaded = tuple(sorted(told["missing"] + told["mismatched"]))
        src.model = loaded.eval()
        src.weights_path, src.random_init = _weights_path(weights, None), False
        src.weights_sha256 = state_dict_sha256(src.model.state_dict())
    if hf.declares:
        src.normalisation, src.declares_normalisation = hf.normalisation, True
    else:
        warnings.warn(f"'{path}': no preprocessor_config.json names the image mean and std, so images reach the model "
                      "as [0, 1] pixels without normalisation; if it was trained on normalised images, save its image "
                      "processor in the folder (processor.save_pretrained(folder))", NormalisationWarning, stacklevel=3)
    return src


def _load_pickled_module(path: Path, shapes: tuple, *, trust_pickle: bool, default: tuple = (),
                         clip=None) -> Source:
    """A whole pickled module; its input shapes are the given ones, else its own ``input_shape``, else
    ``default`` (the first model's, for a second model compared with it)."""
    check_file(path, "model file")
    obj = torch_load(path, trust_pickle=trust_pickle)
    if not isinstance(obj, nn.Module):
        raise SourceError(
            f"'{path}' holds a {type(obj).__name__}, not a whole model; a state dict needs an "
            "architecture: use a spec such as torchvision:NAME or file.py:factory with --weights"
        )
    _refuse_clip(obj, clip)
    _refuse_unspliceable(obj, str(path))
    if not shapes and getattr(obj, "input_shape", None):
        shapes = parse_input_shapes(obj.input_shape) or ()
    shapes = shapes or default
    if not shapes:
        raise SourceError(f"cannot tell the input shape of '{path}'; pass --input-shape CxHxW")
    materialise_lazy_(obj, shapes, str(path))  # unpickled here: splice's own object
    obj.eval()
    return Source(model=obj, spec=os.path.abspath(path), input_shape=shapes[0], weights_path=os.path.abspath(path),
                  weights_sha256=state_dict_sha256(obj.state_dict()), extra_inputs=tuple(shapes[1:]))
