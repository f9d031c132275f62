"""The spliced-folder format: ``weights.safetensors`` + ``splice.json``.

A folder is rebuilt from splice's own classes only: the base architecture from
the recorded spec, the warps from recorded :class:`~splice.warps.WarpConfig`
dicts, the tensors from safetensors. Nothing is unpickled (unless the base
itself was a pickled module, which again needs ``trust_pickle``).

``splice.json`` (schema version 1)::

    {
      "schema_version": 1,
      "format": "splice-folder",
      "source": {"spec": str, "kwargs": {...}, "weights_file": str | null,
                 "weights_sha256": str | null, "random_init": bool},
      "input_shape": [C, H, W],
      "normalisation": {"mean": [...], "std": [...]} | null,
      "class_names": [str, ...] | null,
      "leaves": [str, ...],
      "points": [{"name": str, "shape": [C, H, W], "cut": bool, "warp": {WarpConfig}}],
      "weights": {"file": "weights.safetensors", "sha256": str, "base_sha256": str},
      "tuning": null | {"recipe": str, "base_changed": bool, ...},
      "versions": {"splice": str, "torch": str, "torchvision": str},
      "created": ISO-8601 UTC
    }

``source.weights_sha256`` is the canonical hash of the base state dict the
splice started from (provenance); ``weights.sha256`` is the hash of the
``weights.safetensors`` bytes as written (integrity); ``weights.base_sha256``
is the canonical hash of the base part of the saved state dict.
"""

from __future__ import annotations

import copy
import datetime as _dt
import json
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import torch
from torch import nn

from ._io import atomic_dir, file_sha256, state_dict_sha256
from .sources import with_metadata
from .errors import IntegrityError, ManifestError, SpliceError, WeightsError

__all__ = [
    "SCHEMA_VERSION",
    "MANIFEST_NAME",
    "WEIGHTS_NAME",
    "save",
    "load",
    "load_base",
    "assemble",
    "read_manifest",
    "validate_manifest",
    "load_folder_source",
    "is_splice_folder",
]

SCHEMA_VERSION = 1
MANIFEST_NAME = "splice.json"
WEIGHTS_NAME = "weights.safetensors"
_FORMAT = "splice-folder"


def _versions() -> dict[str, str]:
    import torchvision

    from . import __version__

    return {"splice": __version__, "torch": torch.__version__, "torchvision": torchvision.__version__}


def is_splice_folder(path: str | os.PathLike) -> bool:
    return (Path(path) / MANIFEST_NAME).is_file()


# ----------------------------------------------------------------------------- manifest schema


def _shape_ok(v: Any) -> bool:
    return isinstance(v, list) and len(v) == 3 and all(isinstance(d, int) and not isinstance(d, bool) and d > 0 for d in v)


def validate_manifest(data: Any, where: str = MANIFEST_NAME) -> dict:
    """Check a parsed ``splice.json``; raise :class:`ManifestError` naming every violation."""
    from .warps import WarpConfig

    problems: list[str] = []
    if not isinstance(data, dict):
        raise ManifestError(f"{where} must hold a JSON object, found {type(data).__name__}; re-create the folder with 'splice insert'")
    version = data.get("schema_version")
    if version != SCHEMA_VERSION:
        problems.append(f"schema_version is {version!r}, this splice reads {SCHEMA_VERSION}")
    if data.get("format") != _FORMAT:
        problems.append(f"format is {data.get('format')!r}, expected {_FORMAT!r}")
    src = data.get("source")
    if not isinstance(src, dict):
        problems.append("source must be an object")
    else:
        if not isinstance(src.get("spec"), str) or not src.get("spec"):
            problems.append("source.spec must be a non-empty string")
        if not isinstance(src.get("kwargs", {}), dict):
            problems.append("source.kwargs must be an object")
        for key in ("weights_sha256", "weights_file"):
            if src.get(key) is not None and not isinstance(src.get(key), str):
                problems.append(f"source.{key} must be a string or null")
    if not _shape_ok(data.get("input_shape")):
        problems.append(f"input_shape must be [C, H, W] positive integers, found {data.get('input_shape')!r}")
    norm = data.get("normalisation")
    if norm is not None:
        if not (isinstance(norm, dict) and set(norm) == {"mean", "std"}
                and all(isinstance(norm[k], list) and all(isinstance(x, (int, float)) for x in norm[k]) for k in norm)):
            problems.append("normalisation must be null or {\"mean\": [...], \"std\": [...]}")
        elif any(s <= 0 for s in norm["std"]):
            problems.append("normalisation.std values must be positive")
    names = data.get("class_names")
    if names is not None and not (isinstance(names, list) and all(isinstance(n, str) for n in names)):
        problems.append("class_names must be null or a list of strings")
    if not isinstance(data.get("leaves", []), list):
        problems.append("leaves must be a list of strings")
    pts = data.get("points")
    if not isinstance(pts, list):
        problems.append("points must be a list")
        pts = []
    seen: set[str] = set()
    for i, p in enumerate(pts):
        if not isinstance(p, dict) or not isinstance(p.get("name"), str):
            problems.append(f"points[{i}] must be an object with a string name")
            continue
        if p["name"] in seen:
            problems.append(f"points[{i}] repeats point {p['name']!r}")
        seen.add(p["name"])
        try:
            WarpConfig.from_dict(p.get("warp") if isinstance(p.get("warp"), dict) else {"family": None})
        except (ValueError, TypeError) as exc:
            problems.append(f"points[{i}].warp: {exc}")
    w = data.get("weights")
    if not (isinstance(w, dict) and isinstance(w.get("file"), str) and isinstance(w.get("sha256"), str)):
        problems.append("weights must be {\"file\": str, \"sha256\": str, ...}")
    elif "/" in w["file"] or "\\" in w["file"] or w["file"].startswith("."):
        problems.append(f"weights.file must be a plain file name inside the folder, found {w['file']!r}")
    tuning = data.get("tuning")
    if tuning is not None and not isinstance(tuning, dict):
        problems.append("tuning must be null or an object")
    if problems:
        raise ManifestError(
            f"{where} violates the splice folder schema: " + "; ".join(problems)
            + ". Re-create the folder with 'splice insert' rather than editing it by hand"
        )
    return data


def read_manifest(folder: str | os.PathLike) -> dict:
    """Read and validate ``folder/splice.json``."""
    folder = Path(folder)
    path = folder / MANIFEST_NAME
    if not folder.exists():
        raise ManifestError(f"folder '{folder}' does not exist; check the path")
    if not path.is_file():
        raise ManifestError(
            f"'{folder}' is not a splice folder (no {MANIFEST_NAME}); give a folder written by "
            "'splice insert' or 'splice tune', or a model spec such as torchvision:resnet18"
        )
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ManifestError(f"'{path}' is not valid JSON ({exc}); the file is damaged — re-create the folder") from None
    return validate_manifest(data, str(path))


# ----------------------------------------------------------------------------- save


def _plain_info(model: nn.Module, source) -> dict:
    from .sources import load_source

    src = load_source(source, warn_random=False) if isinstance(source, str) else source
    if src is None or getattr(src, "spec", "<module>") == "<module>":
        raise SpliceError(
            "save() needs to know how to rebuild the base architecture; pass "
            "source='torchvision:NAME' / 'pkg.mod:factory' or a Source from splice.load_source"
        )
    return {
        "spec": src.spec, "kwargs": dict(src.kwargs), "input_shape": tuple(src.input_shape),
        "normalisation": src.normalisation, "class_names": src.class_names, "leaves": list(src.leaves),
        "source_weights_sha256": src.weights_sha256, "source_weights_path": src.weights_path,
        "random_init": src.random_init, "points": [], "tuning": None,
    }


def save(model: nn.Module, folder: str | os.PathLike, *, overwrite: bool = False, source=None,
         tuning: Mapping | None = None, class_names=None, normalisation=None) -> Path:
    """Write ``model`` to ``folder`` as ``weights.safetensors`` + ``splice.json``, atomically.

    ``model`` is a spliced model from :func:`splice.insert` (it carries its own
    provenance) or a plain model together with ``source`` (a spec string or
    :class:`~splice.sources.Source`). The folder is built beside the target and
    renamed into place, so a failure leaves no partial output.

    >>> spliced = splice.insert("torchvision:resnet18", at="layer1")   # doctest: +SKIP
    >>> splice.save(spliced, "out/r18-affine")                          # doctest: +SKIP
    PosixPath('out/r18-affine')
    """
    from safetensors.torch import save_file

    from .surgery import splice_info

    info = dict(splice_info(model) or _plain_info(model, source))
    if tuning is not None:
        info["tuning"] = dict(tuning)
    if class_names is not None:
        info["class_names"] = list(class_names)
    if normalisation is not None:
        info["normalisation"] = dict(normalisation)
    state = {k: v.detach().to("cpu").contiguous().clone() for k, v in model.state_dict().items()}
    from .surgery import WARP_PREFIX

    manifest = {
        "schema_version": SCHEMA_VERSION,
        "format": _FORMAT,
        "source": {
            "spec": info["spec"],
            "kwargs": info.get("kwargs") or {},
            "weights_file": info.get("source_weights_path"),
            "weights_sha256": info.get("source_weights_sha256"),
            "random_init": bool(info.get("random_init", False)),
        },
        "input_shape": [int(d) for d in info["input_shape"]],
        "normalisation": info.get("normalisation"),
        "class_names": info.get("class_names"),
        "leaves": list(info.get("leaves") or []),
        "points": [dict(p) for p in info.get("points") or []],
        "weights": {"file": WEIGHTS_NAME, "sha256": "", "base_sha256": state_dict_sha256(state, prefix_exclude=WARP_PREFIX + ".")},
        "tuning": info.get("tuning"),
        "versions": _versions(),
        "created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
    }
    validate_manifest(manifest, "the manifest being written")
    with atomic_dir(folder, overwrite=overwrite) as tmp:
        save_file(state, str(tmp / WEIGHTS_NAME), metadata={"format": "pt"})
        manifest["weights"]["sha256"] = file_sha256(tmp / WEIGHTS_NAME)
        (tmp / MANIFEST_NAME).write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    return Path(folder)


# ----------------------------------------------------------------------------- load


def _read_checked_weights(folder: Path, manifest: dict) -> dict[str, torch.Tensor]:
    """The folder's tensors, after the file matched its recorded hash, in memory of their own.

    safetensors maps the file; its tensors stay backed by the file's pages, and
    a file truncated while they are alive kills the process (SIGBUS). A loaded
    model lives long, so its tensors are copied out of the mapping (still far
    cheaper than the random init it replaces).
    """
    from .sources import read_safetensors

    path = folder / manifest["weights"]["file"]
    if not path.is_file():
        raise WeightsError(f"'{path}' is missing; the folder is incomplete — re-create it with 'splice insert'")
    actual = file_sha256(path)
    if actual != manifest["weights"]["sha256"]:
        raise IntegrityError(
            f"'{path}' does not match the sha256 recorded in {MANIFEST_NAME} "
            f"(recorded {manifest['weights']['sha256'][:12]}…, found {actual[:12]}…); the weights were "
            "changed or damaged after saving — restore the folder from a good copy"
        )
    return {k: v.clone() for k, v in read_safetensors(path).items()}


def _rebuild_base(manifest: dict, *, trust_pickle: bool = False) -> nn.Module:
    from .sources import build_model, load_source

    spec = manifest["source"]["spec"]
    if ":" not in spec:  # a pickled whole module
        return load_source(spec, input_shape=manifest["input_shape"], trust_pickle=trust_pickle).model
    model, _ = build_model(spec, manifest["source"].get("kwargs") or {})
    return model


_META = torch.device("meta")


def _empty_base(manifest: dict) -> nn.Module | None:
    """The base architecture with its tensors on the meta device (no memory, no random init), or ``None``.

    Only builders (``torchvision:NAME``, ``module:factory``) can be built this
    way; a builder that computes with its tensors while it runs fails on the
    meta device and gets ``None`` (the caller then builds it normally).
    """
    from .sources import build_model

    spec = manifest["source"]["spec"]
    if ":" not in spec:
        return None
    try:
        with _META:
            model, _ = build_model(spec, manifest["source"].get("kwargs") or {})
    except Exception:  # any failure here only means "build it the slow way"
        return None
    return model


def _on_meta(model: nn.Module) -> bool:
    return any(t.is_meta for t in (*model.parameters(), *model.buffers()))


def _adopt(model: nn.Module, state: Mapping[str, torch.Tensor]) -> None:
    """``load_state_dict(state, strict=True, assign=True)``, keeping tied tensors tied.

    Assigning gives every state-dict name a tensor of its own; a tensor that
    sat under several names (tied weights, a module used twice) would come
    out untied. Each such group is pointed back at one adopted tensor.
    """
    groups: dict[int, list[str]] = {}
    for name, t in model.state_dict(keep_vars=True).items():
        if isinstance(t, torch.Tensor):
            groups.setdefault(id(t), []).append(name)
    model.load_state_dict(with_metadata(model, state), strict=True, assign=True)
    for names in (g for g in groups.values() if len(g) > 1):
        first_owner, _, first_leaf = names[0].rpartition(".")
        keep = getattr(model.get_submodule(first_owner) if first_owner else model, first_leaf)
        for name in names[1:]:
            owner_path, _, leaf = name.rpartition(".")
            owner = model.get_submodule(owner_path) if owner_path else model
            if leaf in owner._parameters:
                owner._parameters[leaf] = keep
            else:
                owner._buffers[leaf] = keep


def _fill(model: nn.Module, state: Mapping[str, torch.Tensor]) -> nn.Module | None:
    """``model`` (built on the meta device) with ``state`` as its tensors, or ``None`` if that does not cover it.

    The tensors are adopted, not copied (``load_state_dict(assign=True)``),
    in the dtype they were saved in; a key or shape that does not fit is left
    to the strict load of the slow path, which names it. ``None`` also when a
    tensor outside the state dict (a non-persistent buffer) would stay on the
    meta device.
    """
    own = model.state_dict(keep_vars=True)
    if set(own) != set(state) or any(tuple(own[k].shape) != tuple(state[k].shape) for k in own):
        return None
    _adopt(model, state)
    return None if _on_meta(model) else model


def _base_from_state(manifest: dict, base_state: Mapping[str, torch.Tensor], *,
                     trust_pickle: bool = False, empty: nn.Module | None = None) -> nn.Module:
    """The base network holding ``base_state``: built empty and filled when it can be, else built and loaded.

    ``empty`` may pass in an :func:`_empty_base` to fill (it is used up).
    """
    empty = empty if empty is not None else _empty_base(manifest)
    model = _fill(empty, base_state) if empty is not None else None
    if model is None:
        model = _rebuild_base(manifest, trust_pickle=trust_pickle)
        model.load_state_dict(with_metadata(model, base_state), strict=True)
    return model.eval()


def _base_part(state: Mapping[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    from .surgery import WARP_PREFIX

    return {k: v for k, v in state.items() if not k.startswith(WARP_PREFIX + ".")}


def _restore_info(model: nn.Module, manifest: dict, folder: Path) -> None:
    from .surgery import _attach_info

    _attach_info(model, {
        "spec": manifest["source"]["spec"],
        "kwargs": dict(manifest["source"].get("kwargs") or {}),
        "input_shape": tuple(manifest["input_shape"]),
        "normalisation": manifest.get("normalisation"),
        "class_names": manifest.get("class_names"),
        "leaves": list(manifest.get("leaves") or []),
        "source_weights_sha256": manifest["source"].get("weights_sha256"),
        "source_weights_path": manifest["source"].get("weights_file"),
        "random_init": bool(manifest["source"].get("random_init", False)),
        "points": [dict(p) for p in manifest["points"]],
        "tuning": manifest.get("tuning"),
        "folder": str(folder),
    })


def assemble(base: nn.Module, manifest: dict, state: dict[str, torch.Tensor], folder: str | os.PathLike, *,
             copy_base: bool = False) -> nn.Module:
    """Re-apply a manifest's splice to ``base`` and load ``state`` strictly.

    Splicing traces a private copy of ``base``; a manifest without points uses
    ``base`` itself unless ``copy_base``. Weights that do not fit are refused
    by name. A ``base`` on the meta device (built empty) adopts the tensors
    of ``state`` instead of copying them.
    """
    return _load_into(_frame(base, manifest, copy_base=copy_base), state, folder, assign=_on_meta(base))


def _frame(base: nn.Module, manifest: dict, *, copy_base: bool = False) -> nn.Module:
    """The spliced architecture of ``manifest`` around a traced copy of ``base``, weights not loaded.

    Around an empty base the warps are built on the CPU in the default dtype;
    :func:`_load_into` gives them the dtype of the saved tensors.
    """
    from .surgery import SplicePlan, _apply_plan
    from .warps import WarpConfig

    if not manifest["points"]:
        return copy.deepcopy(base) if copy_base else base
    plan = [SplicePlan(p["name"], WarpConfig.from_dict(p["warp"])) for p in manifest["points"]]
    return _apply_plan(base, plan, tuple(manifest["input_shape"]), leaves=tuple(manifest.get("leaves") or ()),
                       factory={"device": "cpu"} if _on_meta(base) else None, shapes=_recorded_shapes(manifest))


def _load_into(model: nn.Module, state: Mapping[str, torch.Tensor], folder, *, assign: bool) -> nn.Module:
    """Load ``state`` into ``model`` strictly (adopting the tensors with ``assign``), naming what does not fit."""
    from .warps import Warp

    own = model.state_dict()
    missing = sorted(set(own) - set(state))
    unexpected = sorted(set(state) - set(own))
    wrong = sorted(k for k in own if k in state and tuple(own[k].shape) != tuple(state[k].shape))
    if missing or unexpected or wrong:
        raise WeightsError(
            f"'{folder}' weights do not fit the architecture in its manifest "
            f"(missing {missing[:4]}, unexpected {unexpected[:4]}, wrong shape {wrong[:4]}); "
            "the folder was written by an incompatible version or edited by hand"
        )
    if not assign:
        model.load_state_dict(with_metadata(model, state), strict=True)
    else:
        _adopt(model, state)
        for warp in (m for m in model.modules() if isinstance(m, Warp)):
            p = next(iter(warp.parameters()), None)
            if p is not None and (p.dtype != warp.base_grid.dtype or p.device != warp.base_grid.device):
                warp.to(device=p.device, dtype=p.dtype)  # rebuilds its grid buffers in float64, then rounds once
        if _on_meta(model):
            raise WeightsError(f"'{folder}': the model keeps tensors outside its state dict; build its base for "
                               "real before assembling it")
    return model


def _recorded_shapes(manifest: dict) -> dict[str, tuple[int, ...]] | None:
    """``{point: (C, H, W)}`` as splice.json records them, or ``None`` if a warp reads a point not recorded."""
    shapes = {p["name"]: tuple(p["shape"]) for p in manifest["points"] if p.get("shape")}
    if len(shapes) != len(manifest["points"]):
        return None
    for p in manifest["points"]:
        loc = (p.get("warp") or {}).get("loc_from")
        if loc is not None and loc not in shapes:
            return None
    return shapes


def load(folder: str | os.PathLike, *, trust_pickle: bool = False) -> nn.Module:
    """Rebuild a model saved by :func:`save`: base from its spec, warps re-applied, weights loaded.

    The weights file is refused if its sha256 differs from the one recorded at
    save time. The model is returned in eval mode.

    >>> model = splice.load("out/r18-affine")   # doctest: +SKIP
    """
    folder = Path(folder)
    return _load(folder, read_manifest(folder), trust_pickle=trust_pickle)


def _load(folder: Path, manifest: dict, *, trust_pickle: bool) -> nn.Module:
    from .sources import check_finite

    state = _read_checked_weights(folder, manifest)
    check_finite(state, f"'{folder / manifest['weights']['file']}'")
    model = _assembled(manifest, state, folder, trust_pickle=trust_pickle)
    _restore_info(model, manifest, folder)
    model.eval()
    return model


def load_base(folder: str | os.PathLike, *, trust_pickle: bool = False) -> nn.Module:
    """The base network of a folder: its architecture with the base part of the saved weights."""
    folder = Path(folder)
    manifest = read_manifest(folder)
    return _base_from_state(manifest, _base_part(_read_checked_weights(folder, manifest)), trust_pickle=trust_pickle)


def _assembled(manifest: dict, state: dict[str, torch.Tensor], folder: Path, *, trust_pickle: bool,
               empty: nn.Module | None = None, frame: nn.Module | None = None) -> nn.Module:
    """The spliced model holding ``state``: assembled on an empty base when it can be, else on a built one.

    ``empty`` may pass in an :func:`_empty_base`; with points it is traced
    (copied), not changed, so it can still be filled afterwards. ``frame``
    may pass in ``_frame(empty, manifest)``, built while the weights were
    still being checked.
    """
    if frame is None:
        empty = empty if empty is not None else _empty_base(manifest)
        if empty is not None:
            frame = _frame(empty, manifest, copy_base=True)
    if frame is not None:
        try:
            return _load_into(frame, state, folder, assign=True)
        except WeightsError:
            pass  # the strict, slow path below names what does not fit
    return assemble(_rebuild_base(manifest, trust_pickle=trust_pickle), manifest, state, folder)


def load_folder_source(folder: str | os.PathLike, *, input_shape=None, trust_pickle: bool = False):
    """A :class:`~splice.sources.Source` for a spliced (or plain, from ``tune``) folder."""
    from .sources import Source

    folder = Path(folder)
    manifest = read_manifest(folder)
    model = _load(folder, manifest, trust_pickle=trust_pickle)
    shape = tuple(input_shape) if input_shape is not None else tuple(manifest["input_shape"])
    return Source(
        model=model,
        spec=manifest["source"]["spec"],
        kwargs=dict(manifest["source"].get("kwargs") or {}),
        input_shape=shape,  # type: ignore[arg-type]
        weights_path=str(folder / manifest["weights"]["file"]),
        weights_sha256=manifest["weights"].get("base_sha256"),
        normalisation=manifest.get("normalisation"),
        class_names=manifest.get("class_names"),
        manifest=manifest,
        random_init=bool(manifest["source"].get("random_init", False)),
        leaves=tuple(manifest.get("leaves") or ()),
    )
