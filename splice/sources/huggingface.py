"""Hugging Face models: ``transformers:ClassName`` built from a config, and local ``save_pretrained`` folders.

A folder written by ``save_pretrained`` (``config.json`` plus
``model.safetensors``, ``pytorch_model.bin`` or a sharded index) is a model
source. Only JSON is read to build it: ``config.json``'s ``model_type`` picks
the configuration class of the installed transformers
(``CONFIG_MAPPING``), and ``architectures[0]`` names the model class, which
must be a ``PreTrainedModel`` exported by transformers that takes that
configuration. The weights are read safely (safetensors, or
``torch.load(weights_only=True)``).

The splice records ``transformers:ClassName`` with ``{"config": {...}}`` as its
kwargs, so a spliced folder rebuilds without the source folder.

Built only with ``trust_code=True`` (``--trust-code``): a config with ``auto_map`` (code shipped in the folder,
loaded by transformers' own loader; the spliced folder then needs it and the opt-in to rebuild), or naming an
attention or experts implementation other than torch's own (``flash_attention_2``, ``org/repo``: code transformers
may fetch from the Hub). Refused: ``auto_map`` in a sub-config, a quantized config (``quantization_config``).

Nothing is downloaded: ``use_pretrained_backbone`` is forced off, and hub
kernels stay off when the weights are read.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ..caches import caches_kept
from ..errors import NormalisationWarning, SourceError, SpliceWarning, WeightsError, first_line
from ..fileio import read_json
from .specs import per_channel, positive_int
from .timm import REFUSED_TIMM_KWARGS
from .weights import unsafe_checkpoint

__all__ = ["build_transformers", "transformers_lists", "code_request", "is_hf_folder", "read_hf_folder",
           "read_hf_weights", "image_channels", "hf_class_names", "HF_WEIGHT_FILES", "HFFolder"]

HF_WEIGHT_FILES = ("model.safetensors", "model.safetensors.index.json", "pytorch_model.bin",
                   "pytorch_model.bin.index.json")
_CONFIG = "config.json"
_PREPROCESSOR = "preprocessor_config.json"
_MAX_JSON_BYTES = 16 * 1024 * 1024


def _transformers():
    try:
        import transformers
    except ImportError:
        raise SourceError("a Hugging Face model needs the transformers package, which is not installed; "
                          "run: pip install transformers") from None
    return transformers


def is_hf_folder(path) -> bool:
    """True for a folder holding a ``config.json`` (and no splice manifest)."""
    path = Path(path)
    return path.is_dir() and (path / _CONFIG).is_file() and not (path / "splice.json").is_file()


def _read_json(path: Path) -> dict:
    data = read_json(path, SourceError, "re-save the model with save_pretrained", max_bytes=_MAX_JSON_BYTES)
    if not isinstance(data, dict):
        raise SourceError(f"'{path}' must hold a JSON object, found {type(data).__name__}")
    return data


# Implementations transformers runs with torch alone. Any other a config names (flash_attention_*, "paged|...", a
# Hub reference "org/repo", an external experts kernel) may be fetched from the Hugging Face Hub as code by the
# kernels package (transformers 5.25 falls back to it when flash_attn is missing).
_TORCH_IMPLEMENTATIONS = {"attn": frozenset({"eager", "sdpa", "flex_attention"}),
                          "experts": frozenset({"eager", "batched_mm", "grouped_mm"})}
_IMPLEMENTATION_KEYS = {f"{prefix}{kind}_implementation{suffix}": kind for kind in _TORCH_IMPLEMENTATIONS
                        for prefix in ("", "_") for suffix in ("", "_internal")}


def _entries(config: Any, where: str = ""):
    """``(place, key, value, parent)`` for every key of a config and of every config inside it, at any depth
    (``place`` is where ``parent`` sits, as ``"vision_config."``)."""
    if isinstance(config, Mapping):
        for key, value in config.items():
            yield where, key, value, config
            yield from _entries(value, f"{where}{key}.")
    elif isinstance(config, list):
        for i, value in enumerate(config):
            yield from _entries(value, f"{where}{i}.")


def _leaves(value: Any):
    """The innermost values of an implementation setting (a name, or a mapping of sub-config to setting)."""
    if isinstance(value, Mapping):
        for v in value.values():
            yield from _leaves(v)
    elif isinstance(value, list):
        for v in value:
            yield from _leaves(v)
    else:
        yield value


def code_request(config: Mapping) -> str | None:
    """What in a config (the contents of ``config.json``) asks transformers to run code the file chose, in words
    (custom code in ``auto_map``, or an attention or experts implementation other than torch's own, at any depth,
    which the kernels package may fetch from the Hugging Face Hub); ``None`` when nothing does."""
    for place, key, value, _ in _entries(config):
        if key == "auto_map" and isinstance(value, (Mapping, list)):  # not a class named so in label2id
            return f"custom code ({place}auto_map), which runs Python shipped with the model"
        kind = _IMPLEMENTATION_KEYS.get(key) if isinstance(key, str) else None
        if kind is None:
            continue
        torchs = _TORCH_IMPLEMENTATIONS[kind]
        for v in _leaves(value):
            if v is not None and not (isinstance(v, str) and v in torchs):
                return (f"{place}{key} {v!r}, which transformers may fetch from the Hugging Face Hub as code "
                        f"(torch's own: {', '.join(sorted(torchs))})")
    return None


# keys whose value names a model that timm (TimmWrapper, TimmBackbone, a backbone timm builds) or transformers
# builds, and the keys holding the keyword arguments transformers hands to timm.create_model
_MODEL_NAME_KEYS = ("architecture", "backbone")
_TIMM_ARGUMENT_KEYS = ("model_args", "backbone_kwargs")


def _check_buildable(config: Mapping, where: str) -> None:
    """Refuse, in one line, a config splice cannot build without transformers reaching the Hub, reading files
    outside the folder or quantizing: a ``quantization_config`` anywhere (a warp goes into a floating-point model),
    a model named with a source (``hf-hub:org/repo``, ``local-dir:/path``, which timm fetches or reads), timm
    arguments that load weights, or a ``backbone`` named without its ``backbone_config`` (transformers then looks
    the name up on the Hub)."""
    for place, key, value, parent in _entries(config):
        if key == "auto_map" and place and isinstance(value, (Mapping, list)):
            raise SourceError(f"{where}: the config's {place}auto_map asks for custom code in a sub-config, which "
                              "transformers asks about on the terminal while building, whatever --trust-code says; "
                              "build the model in a file of your own and splice path/to/file.py:factory")
        if key in _MODEL_NAME_KEYS and isinstance(value, str) and ":" in value:
            raise SourceError(f"{where}: the config names {place}{key} {value!r}, a model timm would fetch from the "
                              "Hugging Face Hub or read from another folder; name a timm architecture "
                              "(timm.list_models()) and give the weights with the folder")
        if key in _TIMM_ARGUMENT_KEYS and isinstance(value, Mapping):
            loads = [k for k in REFUSED_TIMM_KWARGS if k in value]
            if loads:
                raise SourceError(f"{where}: the config's {place}{key} sets {loads[0]!r}, which makes timm download "
                                  "or read weights; drop it (the folder's own weights are loaded)")
        if key == "quantization_config" and value is not None:
            method = value.get("quant_method", "?") if isinstance(value, Mapping) else "?"
            raise SourceError(f"{where}: the config holds a {place}quantization_config (quant_method {method!r}); "
                              "splice inserts warps into floating-point models, so give the unquantized checkpoint")
        # a timm backbone's own config names the timm architecture, which timm builds; a parent config's name is
        # looked up on the Hub unless the config says timm builds it (use_timm_backbone, DETR's, without
        # backbone_kwargs; measured on transformers 5.25: with them, or without the key, as UperNet's, it is)
        if key == "backbone" and isinstance(value, str) and value and parent.get("model_type") != "timm_backbone":
            by_timm = parent.get("use_timm_backbone") is True and not parent.get("backbone_kwargs")
            if parent.get("backbone_config") is None and not by_timm:
                raise SourceError(f"{where}: the config names {place}backbone {value!r} without a backbone_config, "
                                  "so transformers would look it up on the Hugging Face Hub; re-save the model with "
                                  "save_pretrained from transformers 5, which writes the backbone's config")


def _config_object(transformers, config: Mapping, where: str):
    from transformers import CONFIG_MAPPING

    model_type = config.get("model_type")
    if not isinstance(model_type, str) or model_type not in CONFIG_MAPPING:
        raise SourceError(f"{where}: model_type {model_type!r} is not known to the installed transformers "
                          f"{transformers.__version__}; upgrade transformers")
    return CONFIG_MAPPING[model_type].from_dict(_no_pretrained_backbone(config))


def _no_pretrained_backbone(config: Any) -> Any:
    """A copy of ``config`` with ``use_pretrained_backbone`` off wherever it is set, sub-configs included: never
    download a backbone."""
    if isinstance(config, Mapping):
        return {k: False if k == "use_pretrained_backbone" else _no_pretrained_backbone(v) for k, v in config.items()}
    if isinstance(config, list):
        return [_no_pretrained_backbone(v) for v in config]
    return config


def _model_class(transformers, name: str, config_obj, where: str):
    cls = getattr(transformers, name, None) if name.isidentifier() and not name.startswith("_") else None
    if not (isinstance(cls, type) and issubclass(cls, transformers.PreTrainedModel)):
        raise SourceError(f"{where}: {name!r} is not a model class of the installed transformers "
                          f"{transformers.__version__}; use the class named in config.json's 'architectures'")
    if getattr(cls, "config_class", None) is not type(config_obj):
        raise SourceError(f"{where}: {name} takes a {getattr(cls.config_class, '__name__', '?')}, the config is a "
                          f"{type(config_obj).__name__}; use the class named in config.json's 'architectures'")
    return cls


def _custom_classes(name: str, config: Mapping, code_folder: str, where: str):
    """The config and model classes an ``auto_map`` names, imported from ``code_folder`` by transformers."""
    from transformers.dynamic_module_utils import get_class_from_dynamic_module

    auto_map = config.get("auto_map")
    if not isinstance(auto_map, Mapping) or not isinstance(auto_map.get("AutoConfig"), str):
        raise SourceError(f"{where}: auto_map must name an AutoConfig class; re-save the model with save_pretrained")
    refs = [v for k, v in auto_map.items() if k != "AutoConfig" and isinstance(v, str)]
    ref = next((r for r in refs if r.rsplit(".", 1)[-1] == name), refs[0] if refs else None)
    if ref is None:
        raise SourceError(f"{where}: auto_map names no model class; re-save the model with save_pretrained")
    folder = Path(code_folder)
    if not folder.is_dir():
        raise SourceError(f"{where}: the model's code folder '{folder}' does not exist; the model was built from "
                          "code shipped in that folder, which must stay on disk")
    try:
        config_cls = get_class_from_dynamic_module(auto_map["AutoConfig"], str(folder))
        model_cls = get_class_from_dynamic_module(ref, str(folder))
    except Exception as exc:  # the folder's own code failed to import
        raise SourceError(f"{where}: importing the model's code from '{folder}' failed "
                          f"({type(exc).__name__}: {exc})") from None
    return config_cls, model_cls


def transformers_lists(head: str, name: str, kwargs: Mapping) -> bool:
    """True when ``head:name`` is ``transformers:Class`` for a model class the installed transformers exports,
    with a config that asks for no code (:func:`code_request`: no ``auto_map``, no attention or experts
    implementation but torch's own) and no code folder.

    The registry lookup of :mod:`splice.sources.trust`; code a config asks
    for is code the file chose, so it needs the opt-in.
    """
    if head != "transformers" or not name.isidentifier() or name.startswith("_"):
        return False
    config = kwargs.get("config")
    if not isinstance(config, Mapping) or code_request(config) or "code_folder" in kwargs:
        return False
    try:
        import transformers
    except ImportError:
        return False
    cls = getattr(transformers, name, None)
    return isinstance(cls, type) and issubclass(cls, transformers.PreTrainedModel)


def build_transformers(name: str, kwargs: Mapping[str, Any], *, trust_code: bool = False):
    """``(model, meta)`` for ``transformers:ClassName`` with ``kwargs={"config": {...}}`` (random weights).

    A config that asks for code (:func:`code_request`) needs ``trust_code``; one with ``auto_map`` also
    ``kwargs["code_folder"]``. A quantized config is refused: a warp goes into a floating-point model.
    """
    where = f"transformers:{name}"
    config = kwargs.get("config")
    if not isinstance(config, Mapping) or set(kwargs) - {"config", "code_folder"}:
        raise SourceError(f"{where} needs --kwargs '{{\"config\": {{...the contents of config.json...}}}}' and "
                          "nothing else; or give the save_pretrained folder itself as the model")
    _check_buildable(config, where)
    transformers = _transformers()
    asked = code_request(config)
    if asked and not trust_code:
        raise SourceError(f"{where}: the config asks for {asked}; pass --trust-code (trust_code=True) if you trust "
                          "its origin")
    if "auto_map" in config:
        config_cls, model_cls = _custom_classes(name, config, str(kwargs.get("code_folder", "")), where)
        model = model_cls(config_cls.from_dict(dict(config)))
        cfg = model.config
    else:
        cfg = _config_object(transformers, config, where)
        model = _model_class(transformers, name, cfg, where)(cfg)
    return model, {"input_shape": _config_shape(cfg), "normalisation": None}


def _config_shape(cfg) -> tuple[int, int, int] | None:
    size = getattr(cfg, "image_size", None)
    if isinstance(size, int) and size > 0:
        size = (size, size)
    elif not (isinstance(size, (list, tuple)) and len(size) == 2 and all(isinstance(s, int) and s > 0 for s in size)):
        return None
    channels = getattr(cfg, "num_channels", 3)
    return (int(channels), int(size[0]), int(size[1])) if isinstance(channels, int) and channels > 0 else None


def image_channels(config: Mapping) -> int | None:
    """The channels of the images a config's model takes: its ``backbone_config``'s ``num_channels`` when it has
    one (DETR and DPT read their backbone's, whatever their own says), else its own (3 when it says none); ``None``
    when that is not a positive whole number."""
    backbone = config.get("backbone_config")
    channels = (backbone.get("num_channels") if isinstance(backbone, Mapping) and "num_channels" in backbone
                else config.get("num_channels", 3))
    return positive_int(channels)


class HFFolder:
    """What a ``save_pretrained`` folder holds: its spec and kwargs, weights file, shape and normalisation
    (``declares`` is False when no ``preprocessor_config.json`` says how images are prepared)."""

    def __init__(self, folder: Path, spec: str, kwargs: dict, weights: Path | None,
                 input_shape: tuple[int, int, int] | None, normalisation: dict | None, declares: bool = True):
        self.folder, self.spec, self.kwargs, self.weights = folder, spec, kwargs, weights
        self.input_shape, self.normalisation, self.declares = input_shape, normalisation, declares


def _numbers(value: Any) -> list[float] | None:
    """A processor's ``image_mean`` or ``image_std`` as a list: its list of numbers, or one number that stands for
    every channel (transformers takes ``image_mean=0.5`` and saves it so); ``None`` for anything else."""
    def number(x: Any) -> bool:
        return isinstance(x, (int, float)) and not isinstance(x, bool)

    if number(value):
        return [float(value)]
    if isinstance(value, list) and value and all(number(x) for x in value):
        return [float(x) for x in value]
    return None


def _normalisation(pre: Mapping, path: Path) -> tuple[dict | None, bool]:
    """The normalisation of [0, 1] pixels that gives what an image processor feeds the model.

    An image processor takes 0-255 pixels ``v``: ``r = v * rescale_factor`` (when ``do_rescale``; ``v`` otherwise),
    less 1 with ``rescale_offset`` (EfficientNet's, for [-1, 1]); then ``(r - image_mean) / image_std`` (when
    ``do_normalize``), divided by ``image_std`` once more with ``include_top`` (EfficientNet's). Each step is
    affine per channel, so with ``s = 255 * rescale_factor`` the whole is ``(p - mean') / std'`` for ``p`` in
    [0, 1]: ``mean' = (m + offset) / s`` and ``std' = d / s``, where ``(m, d)`` are the processor's mean and std
    (``(0, 1)`` without ``do_normalize``) and ``d`` takes the extra ``image_std`` factor. ``None`` for [0, 1]
    pixels as they are; ``(None, False)`` for a processor that names no mean and std (its class's defaults apply,
    unknown here)."""
    factor = pre.get("rescale_factor", 1 / 255) if pre.get("do_rescale", True) is not False else 1.0
    if isinstance(factor, bool) or not isinstance(factor, (int, float)) or not 0 < factor < float("inf"):
        raise SourceError(f"'{path}': rescale_factor {factor!r} is not a positive number; re-save the image "
                          "processor with save_pretrained")
    mean, std = _numbers(pre.get("image_mean")), _numbers(pre.get("image_std"))
    top_std = std
    top = bool(pre.get("include_top"))
    if pre.get("do_normalize", True) is False and not top:
        mean, std = [0.0], [1.0]
    elif mean is None or std is None:
        return None, False
    elif pre.get("do_normalize", True) is False:  # only include_top's division by the std, below
        mean, std = [0.0] * len(std), [1.0] * len(std)
    if top:
        std = [d * t for d, t in zip(std, top_std)]
    offset = 1.0 if pre.get("rescale_offset") and pre.get("do_rescale", True) is not False else 0.0
    scale = 255.0 * float(factor)
    if abs(scale - 1.0) < 1e-6 and not offset and mean == [0.0] and std == [1.0]:
        return None, True
    return {"mean": [(float(x) + offset) / scale for x in mean], "std": [float(x) / scale for x in std]}, True


def _preprocessing(folder: Path) -> tuple[tuple[int, int] | None, dict | None, bool]:
    """(H, W), normalisation (:func:`_normalisation`) and whether ``preprocessor_config.json`` says how images
    are prepared."""
    path = folder / _PREPROCESSOR
    if not path.is_file():
        return None, None, False
    pre = _read_json(path)
    norm, declares = _normalisation(pre, path)
    if pre.get("do_flip_channel_order"):
        warnings.warn(f"'{path}' flips images to BGR channel order before the model sees them; splice feeds RGB "
                      "images, so eval, tune and verify --images show the model its channels swapped: save the "
                      "model's images as BGR files, or fine-tune it on RGB", NormalisationWarning, stacklevel=4)
    hw = (_size(pre.get("crop_size")) if pre.get("do_center_crop") else None) or _size(pre.get("size"))
    return hw, norm, declares


def _size(value: Any) -> tuple[int, int] | None:
    """(H, W) of a processor's ``size`` or ``crop_size``: ``{"height", "width"}``; ``{"shortest_edge": N}`` or a
    bare ``N`` as (N, N), the square a processor makes of a square image (ConvNeXt's resize and ``crop_pct`` crop
    make N x N of any image); ``None`` for anything else (``longest_edge`` alone)."""
    if isinstance(value, Mapping):
        if positive_int(value.get("height")) and positive_int(value.get("width")):
            return int(value["height"]), int(value["width"])
        value = value.get("shortest_edge")
    n = positive_int(value)
    return (n, n) if n else None


def hf_class_names(kwargs: Mapping | None) -> list[str] | None:
    """The class names of a transformers model's ``config`` (in ``kwargs``): its ``id2label`` in output order, or
    ``None`` when it has none, misses an index, or holds transformers' own placeholders (``LABEL_0``, ...)."""
    config = (kwargs or {}).get("config")
    labels = config.get("id2label") if isinstance(config, Mapping) else None
    if not isinstance(labels, Mapping) or not labels:
        return None
    by_index = {str(k): v for k, v in labels.items()}
    names = [by_index.get(str(i)) for i in range(len(by_index))]
    if not all(isinstance(n, str) for n in names) or names == [f"LABEL_{i}" for i in range(len(names))]:
        return None
    return names


def read_hf_folder(path) -> HFFolder:
    """Read a ``save_pretrained`` folder (JSON only; nothing is imported or built)."""
    folder = Path(path)
    config = _read_json(folder / _CONFIG)
    archs = config.get("architectures")
    if not (isinstance(archs, list) and archs and isinstance(archs[0], str)):
        raise SourceError(f"'{folder / _CONFIG}' names no model class ('architectures' is missing or empty); "
                          "re-save the model with save_pretrained")
    weights = next((folder / f for f in HF_WEIGHT_FILES if (folder / f).is_file()), None)
    kwargs: dict[str, Any] = {"config": config}
    if "auto_map" in config:
        kwargs["code_folder"] = str(folder.resolve())
    hw, norm, declares = _preprocessing(folder)
    channels = image_channels(config)
    shape = (channels, *hw) if hw and channels else None
    if norm is not None and channels:
        norm = {k: per_channel(v, channels) for k, v in norm.items()}
    return HFFolder(folder, f"transformers:{archs[0]}", kwargs, weights, shape, norm, declares)


def _device_contexts_primed() -> None:
    """Make torch list the functions a device context redirects before transformers loads anything.

    ``from_pretrained`` builds the model under ``torch.device("meta")`` with
    ``torch.linspace`` swapped for a wrapper that defaults to the CPU. torch
    lists the factory functions a device context redirects once per process,
    the first time a context meets one; if that first time falls inside the
    load, the list holds the wrapper, and ``torch.linspace`` ignores every
    device context for the rest of the process (a meta-device build then
    computes on the CPU). One factory call under a device context first
    fixes the list with torch's own functions (transformers 5.24, torch 2.14).
    """
    import torch

    with torch.device("meta"):
        torch.empty(0)


def read_hf_weights(folder: Path, model, *, allow_partial: bool = False,
                    trust_pickle: bool = False) -> tuple[Any, dict]:
    """The model transformers builds from a ``save_pretrained`` folder for ``model``'s class and config (in the
    dtype of ``model``'s parameters, which may be on the meta device), and the state it loaded, in the model's
    own names.

    A folder holds its checkpoint's names, which are not always the model's: transformers 5 renames a ViT's
    ``attention.attention.key`` to ``attention.k_proj`` (and many more) when it loads, and back when it saves.
    So ``type(model).from_pretrained`` reads the folder (the class already built, ``local_files_only``, no code
    from the folder: safetensors, or ``torch.load(weights_only=True)`` unless ``trust_pickle``) and the state it
    loaded is returned, without the tensors it reports missing (left at their initial values). Tensors the folder
    has that the model does not, or of another shape, are refused by name unless ``allow_partial``. Hub kernels
    stay off (``use_kernels=False``; transformers 5.25 turns them on by default): they are code fetched from the
    Hub, and a model that has them re-kernelizes on every ``train()``/``eval()`` switch, which fails on the meta
    device splice lists points on.
    """
    import pickle

    import torch

    dtype = next((p.dtype for p in model.parameters() if p.is_floating_point()), torch.get_default_dtype())
    transformers = _transformers()
    _device_contexts_primed()
    verbosity, bars = transformers.logging.get_verbosity(), transformers.logging.is_progress_bar_enabled()
    transformers.logging.set_verbosity_error()  # its own report of missing keys is ours to make
    transformers.logging.disable_progress_bar()  # and no bar on the terminal for a folder read in a second
    try:
        # wrong shapes are read from the loading info and refused below by name (transformers' own refusal
        # points at a report it prints, which is silenced)
        # transformers builds the model on the meta device before it reads the weights
        with caches_kept() as kept:
            loaded, info = type(model).from_pretrained(
                str(folder), config=model.config, local_files_only=True, trust_remote_code=False,
                output_loading_info=True, ignore_mismatched_sizes=True, weights_only=not trust_pickle, dtype=dtype,
                use_kernels=False)
            kept["model"] = loaded
    except pickle.UnpicklingError as exc:
        raise unsafe_checkpoint(folder, exc, "model.save_pretrained(folder), which writes safetensors") from None
    except Exception as exc:
        raise WeightsError(f"transformers could not read the weights in '{folder}' into {type(model).__name__} "
                           f"({type(exc).__name__}: {first_line(exc)[:300]}); re-save the model with save_pretrained"
                           ) from exc
    finally:
        transformers.logging.set_verbosity(verbosity)
        if bars:
            transformers.logging.enable_progress_bar()
    mismatched = sorted((m[0], tuple(m[1]), tuple(m[2])) for m in info.get("mismatched_keys") or ()
                        if isinstance(m, (tuple, list)) and len(m) == 3)
    _refuse_unfitting(folder, model, sorted(info.get("unexpected_keys") or ()), mismatched, allow_partial)
    left_out = set(info.get("missing_keys") or ()) | {m[0] for m in mismatched}
    return loaded, {k: v for k, v in loaded.state_dict().items() if k not in left_out}


def _refuse_unfitting(folder: Path, model, unexpected: list[str], mismatched: list[tuple], allow_partial: bool):
    """Refuse by name, unless ``allow_partial`` (then warn), the tensors of a folder the model has no place for and
    those of another shape (``(name, shape in the folder, shape in the model)``), with a ``num_labels`` hint when
    only the label count differs."""
    cls = type(model).__name__
    extra = ", ".join(unexpected[:6]) + (f" and {len(unexpected) - 6} more" if len(unexpected) > 6 else "")
    shapes = "; ".join(f"{k} {saved} vs {own}" for k, saved, own in mismatched[:4]) + (
        f" and {len(mismatched) - 4} more" if len(mismatched) > 4 else "")
    if allow_partial:
        told = ([f"{len(unexpected)} tensor(s) of '{folder}' not used ({extra})"] if unexpected else []) + (
            [f"{len(mismatched)} of another shape left as built ({shapes})"] if mismatched else [])
        if told:
            warnings.warn(f"partial load: {'; '.join(told)}", SpliceWarning, stacklevel=4)
        return
    parts = ([f"{len(unexpected)} tensor(s) {cls} does not have ({extra})"] if unexpected else []) + (
        [f"{len(mismatched)} tensor(s) of another shape than {cls}'s ({shapes})"] if mismatched else [])
    if not parts:
        return
    labels, counts = getattr(model.config, "num_labels", None), {saved[:1] for _, saved, _ in mismatched}
    hint = ""
    if not unexpected and len(counts) == 1 and all(own[:1] == (labels,) and saved[1:] == own[1:]
                                                   for _, saved, own in mismatched):
        n = counts.pop()[0]
        hint = f"if it was trained for {n} labels, set num_labels (and id2label) to {n} in '{folder / _CONFIG}'; "
    raise WeightsError(f"'{folder}' holds {' and '.join(parts)}; {hint}"
                       "pass --allow-partial (allow_partial=True) to load only the tensors that fit")
