"""Reading weights safely and loading them into a model.

``.pt``/``.pth``/``.bin`` state dicts go through ``torch.load(weights_only=True)``
(unpickling objects needs ``trust_pickle=True``), ``.safetensors`` through
:func:`read_safetensors`. A state may be wrapped in ``{"state_dict": ...}`` /
``{"model": ...}`` and carry ``module.`` / ``model.`` / ``_orig_mod.``
prefixes; both are detected and stripped. Missing, unexpected and
shape-mismatched names are refused unless ``allow_partial``.
"""

from __future__ import annotations

import os
import pickle
import re
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path

import torch
from torch import nn

from ..errors import SpliceWarning, UnsafeCheckpointError, WeightsError, first_line

__all__ = [
    "read_weights",
    "read_safetensors",
    "with_metadata",
    "check_finite",
    "check_dtypes",
    "check_state_fits",
    "load_weights_",
    "strip_prefixes",
    "WRAPPER_PREFIXES",
    "NESTING_KEYS",
]

WRAPPER_PREFIXES = ("module.", "model.", "_orig_mod.")
NESTING_KEYS = ("state_dict", "model", "model_state_dict", "model_state", "net", "module", "weights")
_EMA = re.compile(r"(^|_)ema($|_)")


def check_file(path: Path, what: str = "weights file") -> None:
    if not path.exists():
        raise WeightsError(f"{what} '{path}' does not exist; check the path")
    if path.is_dir():
        raise WeightsError(f"{what} '{path}' is a folder, not a file")
    if path.stat().st_size == 0:
        raise WeightsError(f"{what} '{path}' is empty (0 bytes); it was probably not written completely")


def _looks_serialised(path: Path) -> bool:
    """True for a torch.save zip archive or a binary pickle (protocol >= 2)."""
    import zipfile

    with open(path, "rb") as fh:
        head = fh.read(2)
    return zipfile.is_zipfile(path) or head[:1] == b"\x80"


def _plain_objects_allowed():
    """torch's safe loader with ``argparse.Namespace`` allowed too: training scripts (timm's train.py, torchvision's
    references) save their arguments as one beside the weights. It is rebuilt as an empty Namespace given the
    saved attributes, which the safe loader checks like any others; nothing of the file's choosing runs."""
    import argparse
    import contextlib

    allow = getattr(torch.serialization, "safe_globals", None)  # torch >= 2.5
    return allow([argparse.Namespace]) if allow is not None else contextlib.nullcontext()


def unsafe_checkpoint(path, exc: BaseException, resave: str = "torch.save(model.state_dict(), ...)"):
    """The one refusal of a checkpoint torch's safe loader would not read (``exc``, its UnpicklingError), naming
    what it blocked."""
    blocked = re.search(r"GLOBAL ([\w.]+)", str(exc))
    what = blocked.group(1) if blocked else "objects or pickle opcodes the safe loader does not accept"
    return UnsafeCheckpointError(f"'{path}' contains pickled Python objects ({what}), not just tensors; unpickling can "
                                 "run arbitrary code, so splice refused to load it. If you trust the file's origin, "
                                 f"pass --trust-pickle (trust_pickle=True), or re-save it with {resave}")


def torch_load(path: Path, *, trust_pickle: bool):
    try:
        with warnings.catch_warnings(), _plain_objects_allowed():
            warnings.simplefilter("ignore")
            return torch.load(path, map_location="cpu", weights_only=not trust_pickle)
    except pickle.UnpicklingError as exc:
        text = str(exc).lower()
        blocked = re.search(r"GLOBAL ([\w.]+)", str(exc))
        if not blocked and not _looks_serialised(path):
            raise WeightsError(
                f"'{path}' is not a PyTorch checkpoint (neither a torch.save archive nor a pickle); "
                "check that you passed the weights file"
            ) from None
        if not trust_pickle and ("weights_only" in text or "weights only" in text):
            raise unsafe_checkpoint(path, exc) from None
        raise WeightsError(f"'{path}' is not a readable checkpoint ({exc}); it may be truncated or corrupt") from None
    except Exception as exc:  # any failure to parse the file means it is not a usable checkpoint
        if trust_pickle and isinstance(exc, AttributeError) and "__main__" in str(exc):
            found = re.search(r"attribute '(\w+)'", str(exc))
            name = found.group(1) if found else "its class"
            raise WeightsError(f"'{path}' holds a model pickled from a script run as __main__ (class {name!r}), which "
                               "only that script can unpickle; save its state_dict there (torch.save(model."
                               "state_dict(), FILE)) and splice path/to/file.py:FACTORY --weights FILE, with a file "
                               f"that defines {name} without training at import") from None
        if trust_pickle and isinstance(exc, (ModuleNotFoundError, AttributeError)):
            # a whole pickled module names its class's module, which must import here as where it was saved
            raise WeightsError(f"'{path}' holds a pickled object whose class cannot be found ({first_line(exc)}); "
                               "put the folder that holds its code on PYTHONPATH (or run 'python -m splice' from that "
                               "folder; the 'splice' command does not search the current folder)") from None
        if _is_torchscript(path):
            raise WeightsError(
                f"'{path}' is a TorchScript archive (torch.jit.save), not a state dict: splice splices Python "
                "modules; give the model's builder (path/file.py:factory or a library name) and its weights "
                "saved with torch.save(model.state_dict(), ...)"
            ) from None
        msg = (str(exc).splitlines()[0] if str(exc) else type(exc).__name__).split(". ")[0]
        raise WeightsError(
            f"'{path}' is not a readable PyTorch checkpoint ({msg}); it may be truncated, "
            "corrupt, or not a checkpoint at all"
        ) from None


def _is_torchscript(path: Path) -> bool:
    """A zip archive with a ``code/`` folder: what torch.jit.save writes (a torch.save archive has none)."""
    import zipfile

    try:
        with zipfile.ZipFile(path) as archive:
            return any("/code/" in f"/{name}" for name in archive.namelist())
    except (OSError, zipfile.BadZipFile):
        return False


def read_safetensors(path: str | os.PathLike) -> dict[str, torch.Tensor]:
    """Read a ``.safetensors`` file into CPU tensors (nothing is unpickled).

    Raises :class:`~splice.errors.WeightsError` when the file cannot be read as
    safetensors (truncated, corrupt, another format).
    """
    from safetensors import SafetensorError
    from safetensors.torch import load_file

    try:
        return load_file(str(path), device="cpu")
    except (SafetensorError, OSError, ValueError, RuntimeError) as exc:
        raise WeightsError(
            f"'{path}' is not a readable safetensors file ({exc}); it may be truncated or corrupt"
        ) from None


def with_metadata(model: nn.Module, state: Mapping[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    """``state`` with the per-module version metadata that ``load_state_dict`` hands to each module.

    Version-aware loaders read ``state_dict._metadata`` (torchvision's MNASNet
    refuses a state without it; BatchNorm upgrades old states by it). A
    safetensors file, or any filtered dict, carries none, so the state gets
    its own metadata back if it had some, else ``model``'s current versions:
    the weights were written by this architecture.
    """
    from collections import OrderedDict

    out = OrderedDict(state)
    meta = getattr(state, "_metadata", None)
    if meta is None:
        meta = getattr(model.state_dict(), "_metadata", None)
    if meta is not None:
        out._metadata = meta  # type: ignore[attr-defined]
    return out


def _is_tensor_dict(obj: object) -> bool:
    return isinstance(obj, Mapping) and len(obj) > 0 and all(
        isinstance(k, str) and isinstance(v, torch.Tensor) for k, v in obj.items()
    )


def _note_other_weights(obj: Mapping, key: str, path: Path) -> None:
    """Say which weights were taken when a checkpoint holds more than one set (a training script's EMA copy)."""
    others = [k for k in obj if isinstance(k, str) and k != key and _EMA.search(k.lower())
              and (isinstance(obj[k], nn.Module) or (isinstance(obj[k], Mapping) and len(obj[k]) > 0))]
    if others:
        warnings.warn(f"'{path}' holds {key!r} and {', '.join(repr(k) for k in others)}; splice loads {key!r}. To load "
                      f"another, save it alone: torch.save(checkpoint[{others[0]!r}], 'weights.pt')", SpliceWarning,
                      stacklevel=2)


def _unnest(obj: object, path: Path) -> dict[str, torch.Tensor]:
    if isinstance(obj, nn.Module):
        return dict(obj.state_dict())
    if _is_tensor_dict(obj):
        return dict(obj)  # type: ignore[arg-type]
    if isinstance(obj, Mapping):
        for key in NESTING_KEYS:
            if key in obj:
                try:
                    found = _unnest(obj[key], path)
                except WeightsError:
                    continue
                _note_other_weights(obj, key, path)
                return found
        tensors = {k: v for k, v in obj.items() if isinstance(k, str) and isinstance(v, torch.Tensor)}
        if tensors:
            return tensors
        emas = [k for k in obj if isinstance(k, str) and _EMA.search(k.lower()) and isinstance(obj[k], Mapping)]
        if len(emas) == 1:  # a training script that kept only its moving average of the weights
            found = _unnest(obj[emas[0]], path)
            warnings.warn(f"'{path}' holds only {emas[0]!r}, a moving average of the weights; splice loads it",
                          SpliceWarning, stacklevel=2)
            return found
        keys = ", ".join(repr(k) for k in list(obj)[:8])
        raise WeightsError(
            f"'{path}' holds a dict without tensors (keys: {keys}); expected a state dict, "
            f"possibly nested under one of {', '.join(NESTING_KEYS)}"
        )
    raise WeightsError(f"'{path}' holds a {type(obj).__name__}, not a state dict of tensors")


def read_weights(path: str | os.PathLike, *, trust_pickle: bool = False) -> dict[str, torch.Tensor]:
    """Read a state dict from ``.pt``/``.pth``/``.bin``/``.safetensors``, unnested.

    Raises :class:`~splice.errors.WeightsError` for missing, empty, truncated or
    foreign files and :class:`~splice.errors.UnsafeCheckpointError` for pickles
    that need ``trust_pickle``.
    """
    path = Path(path)
    check_file(path)
    if path.name.endswith(".index.json"):
        return _read_shards(path, trust_pickle=trust_pickle)
    if path.suffix == ".safetensors":
        return read_safetensors(path)
    return _unnest(torch_load(path, trust_pickle=trust_pickle), path)


def _read_shards(index: Path, *, trust_pickle: bool) -> dict[str, torch.Tensor]:
    """The state dict of a sharded checkpoint: the files its ``*.index.json`` names, beside it."""
    import json

    try:
        weight_map = json.loads(index.read_text(encoding="utf-8")).get("weight_map")
    except (json.JSONDecodeError, UnicodeDecodeError, AttributeError, RecursionError):
        weight_map = None
    files = sorted(set(weight_map.values())) if isinstance(weight_map, dict) else []
    if not files or not all(isinstance(f, str) and Path(f).name == f and not f.startswith(".") for f in files):
        raise WeightsError(f"'{index}' is not a shard index (a 'weight_map' of key -> file name beside it); "
                           "re-save the model or pass one weights file")
    state: dict[str, torch.Tensor] = {}
    for name in files:
        state.update(read_weights(index.parent / name, trust_pickle=trust_pickle))
    return state


def strip_prefixes(state: dict[str, torch.Tensor], wanted: set[str],
                   where: str = "the weights") -> dict[str, torch.Tensor]:
    """``state`` without the prefixes its names carry but the model's (``wanted``) do not, as a load reads it.

    A wrapper prefix (``module.``, ...) every key shares is stripped silently. With a warning: any other dotted
    prefix every key shares (a training module's ``net.``), when stripping it makes the keys fit the model; and a
    prefix shared by all keys but a few bookkeeping entries with no place in the model (an averaged model's
    ``n_averaged``), which are dropped, when the stripped keys all are the model's.
    """
    while True:
        for prefix in _candidates(state):
            step = _stripped(state, wanted, prefix, where)
            if step is not None:
                state = step
                break
        else:
            return state


def _candidates(state: Mapping[str, torch.Tensor]) -> list[str]:
    """The wrapper prefixes, then the first name part of the dotted keys when they all share one."""
    firsts = {k.split(".", 1)[0] + "." for k in state if "." in k}
    return [*WRAPPER_PREFIXES, *(p for p in firsts if len(firsts) == 1 and p not in WRAPPER_PREFIXES)]


def _stripped(state: dict[str, torch.Tensor], wanted: set[str], prefix: str, where: str) -> dict | None:
    """``state`` with ``prefix`` stripped (see :func:`strip_prefixes`), or ``None`` when it should stay."""
    stripped = {k[len(prefix):]: v for k, v in state.items() if k.startswith(prefix)}
    rest = [k for k in state if not k.startswith(prefix)]
    before, after = len(wanted & set(state)), len(wanted & set(stripped))
    if not stripped or after < before or (after == before and (rest or prefix not in WRAPPER_PREFIXES)):
        return None
    if rest:
        if any(k in wanted for k in rest) or not set(stripped) <= wanted:
            return None
        warnings.warn(f"{where}: every name but {_names(rest, 3)} starts with {prefix!r}; the model has no place "
                      f"for {'it' if len(rest) == 1 else 'them'}: dropped, and {prefix!r} stripped",
                      SpliceWarning, stacklevel=4)
    elif prefix not in WRAPPER_PREFIXES:
        warnings.warn(f"{where}: every name starts with {prefix!r}, which the model's names do not; it was stripped",
                      SpliceWarning, stacklevel=4)
    return stripped


def _names(keys: Sequence[str], limit: int = 6) -> str:
    keys = sorted(keys)
    shown = ", ".join(keys[:limit])
    return shown + (f", … ({len(keys) - limit} more)" if len(keys) > limit else "")


def check_finite(state: Mapping[str, torch.Tensor], where: str) -> None:
    """Refuse NaN/Inf tensors, naming them."""
    bad = [k for k, v in state.items() if v.is_floating_point() and not bool(torch.isfinite(v).all())]
    if bad:
        raise WeightsError(
            f"{where} has NaN or Inf values in {len(bad)} tensor(s): {_names(bad)}; "
            "the checkpoint is damaged or diverged — use an earlier one"
        )


def check_dtypes(own: Mapping[str, torch.Tensor], state: Mapping[str, torch.Tensor], where: str) -> list[str]:
    """Refuse integer or quantised tensors where the model holds floating point; name the float tensors whose
    dtype differs from the model's (they are cast on load)."""
    common = [k for k in own if k in state and own[k].is_floating_point()]
    bad = [k for k in common if not state[k].is_floating_point()]
    if bad:
        raise WeightsError(
            f"{where} holds {bad[0]} as {str(state[bad[0]].dtype).replace('torch.', '')} where the model has "
            f"{str(own[bad[0]].dtype).replace('torch.', '')} ({len(bad)} such tensor(s)); integer or quantised "
            "weights would be truncated or misread — give floating-point weights (float32, float16 or bfloat16)"
        )
    return [k for k in common if state[k].dtype != own[k].dtype]


def _differences(own: Mapping[str, torch.Tensor], state: Mapping[str, torch.Tensor], missing, unexpected,
                 mismatched) -> str:
    parts = []
    if missing:
        parts.append(f"missing {len(missing)}: {_names(missing)}")
    if unexpected:
        parts.append(f"unexpected {len(unexpected)}: {_names(unexpected)}")
    if mismatched:
        shapes = [f"{k} {tuple(state[k].shape)} vs {tuple(own[k].shape)}" for k in mismatched[:4]]
        parts.append(f"wrong shape {len(mismatched)}: {'; '.join(shapes)}")
    return "; ".join(parts)


def _classes_hint(own: Mapping[str, torch.Tensor], state: Mapping[str, torch.Tensor], mismatched) -> str:
    """Advice when only the last layer's output size differs: the checkpoint has another number of classes."""
    last = [k for k in own if own[k].dim() >= 1][-2:]
    head = [k for k in mismatched if k in last and tuple(state[k].shape[1:]) == tuple(own[k].shape[1:])]
    if not head or len(head) != len(mismatched):
        return ""
    n = int(state[head[0]].shape[0])
    return f"if it was trained for {n} classes, build the model for them (e.g. --kwargs '{{\"num_classes\": {n}}}'); "


def check_state_fits(own: Mapping[str, torch.Tensor], state: Mapping[str, torch.Tensor], where: str,
                     advice: str) -> None:
    """Refuse, in one line ending in ``advice``, a ``state`` whose names or shapes are not exactly ``own``'s, and
    integer tensors where ``own`` holds floating point (:func:`check_dtypes`)."""
    missing = [k for k in own if k not in state]
    unexpected = [k for k in state if k not in own]
    mismatched = [k for k in own if k in state and tuple(state[k].shape) != tuple(own[k].shape)]
    if missing or unexpected or mismatched:
        raise WeightsError(f"{where} do not fit the network its spec builds now "
                           f"({_differences(own, state, missing, unexpected, mismatched)}); {advice}")
    check_dtypes(own, state, where)


def load_weights_(model: nn.Module, state: dict[str, torch.Tensor], *, allow_partial: bool = False,
                  where: str = "weights", spec: str = "the model") -> dict[str, list[str]]:
    """Load ``state`` into ``model`` in place after checking names and shapes.

    Returns ``{"missing": [...], "unexpected": [...], "mismatched": [...]}``.
    """
    own = model.state_dict()
    state = strip_prefixes(state, set(own), where)
    cast = check_dtypes(own, state, where)
    if cast:
        kinds = sorted({str(state[k].dtype).replace("torch.", "") for k in cast})
        warnings.warn(f"{where} holds {len(cast)} tensor(s) in {', '.join(kinds)}; they are cast to the model's "
                      f"{str(own[cast[0]].dtype).replace('torch.', '')} on load", SpliceWarning, stacklevel=2)
    # a batch norm's batch counter is left out of older and hand-built checkpoints (torch's strict load accepts a
    # state dict without version metadata that lacks it); the model keeps its own, and the load below is not strict
    missing = [k for k in own if k not in state and k.rsplit(".", 1)[-1] != "num_batches_tracked"]
    unexpected = [k for k in state if k not in own]
    mismatched = [k for k in own if k in state and tuple(state[k].shape) != tuple(own[k].shape)]
    matched = sum(1 for k in own if k in state and tuple(state[k].shape) == tuple(own[k].shape))
    if own and matched < 0.5 * len(own) and not allow_partial:
        raise WeightsError(
            f"{where} does not fit {spec}: only {matched} of {len(own)} tensors match by name and shape "
            f"(e.g. missing {_names(missing, 3) or 'none'}; unexpected {_names(unexpected, 3) or 'none'}); "
            "these look like weights for another architecture — check the model spec and --kwargs"
        )
    if (missing or unexpected or mismatched) and not allow_partial:
        raise WeightsError(
            f"{where} does not match {spec} ({_differences(own, state, missing, unexpected, mismatched)}); "
            + _classes_hint(own, state, mismatched) +
            "pass --allow-partial (allow_partial=True) to load only the tensors that fit"
        )
    usable = with_metadata(model, state)
    for k in [k for k in usable if k not in own or k in mismatched]:
        del usable[k]
    model.load_state_dict(usable, strict=False)
    if allow_partial and (missing or unexpected or mismatched):
        warnings.warn(
            f"partial load from {where}: {len(usable)} tensors loaded, {len(missing)} missing, "
            f"{len(unexpected)} unexpected, {len(mismatched)} with the wrong shape",
            SpliceWarning,
            stacklevel=2,
        )
    return {"missing": missing, "unexpected": unexpected, "mismatched": mismatched}
