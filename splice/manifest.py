"""What a splice is: one typed record (:class:`SpliceInfo`) and its one round trip to ``splice.json``.

A spliced model carries its :class:`SpliceInfo` (:func:`attach_info`,
:func:`info_of`); :func:`splice.store.save` writes it as ``splice.json`` with
:meth:`SpliceInfo.to_manifest`, and a folder is read back with
:meth:`SpliceInfo.from_manifest`, which validates the file first
(:func:`validate_manifest`). The record is rebuilt only from splice's own
classes: warp configurations become :class:`~splice.warps.WarpConfig`.

``splice.json`` (schema version 1, or 2 when the splice needs more than a
graph rewrite)::

    {
      "schema_version": 1 | 2,
      "format": "splice-folder",
      "source": {"spec": str, "kwargs": {...}, "weights_file": str | null,
                 "weights_sha256": str | null, "random_init": bool,
                 "trained_on": str | null, "code_sha256": str (path/file.py:factory only),
                 "not_loaded": [str, ...] (a partial load: tensors no weights file gave)},
      "input_shape": [C, H, W],
      "extra_inputs": [[...], ...],              (2: a model with several inputs; per-sample shapes)
      "mechanism": "fx" | "hooks",               (2: "hooks")
      "within": str,                             (2: a submodule's qualname)
      "normalisation": {"mean": [...], "std": [...]} | null,
      "class_names": [str, ...] | null,
      "leaves": [str, ...],
      "points": [{"name": str, "shape": [C, H, W], "cut": bool, "warp": {WarpConfig}}],
      "sites": {point: {"module": str, "call": int, "shape": [C, H, W], "calls": int}},   (2: hooks;
                                                        calls, optional: the module's calls per forward)
      "loc_reads": "unwarped" | "warped",        (2: hooks; absent in older folders: "warped")
      "weights": {"file": "weights.safetensors", "sha256": str, "base_sha256": str},
      "tuning": null | {"recipe": str, "base_changed": bool, ...},
      "versions": {"splice": str, "torch": str, "torchvision": str},
      "created": ISO-8601 UTC
    }

The *mechanism* says how the warps sit in the model: ``fx`` rewrites the
traced graph (:func:`splice.surgery.apply_plan`); ``hooks`` keeps the model's
own class and puts each warp on a module's output with a forward hook
(:mod:`splice.hooks`), for models torch.fx cannot trace and for splices
``within`` a submodule. A folder that uses anything schema 1 does not know is
written as schema 2, which older readers refuse instead of misreading.

``source.weights_sha256`` is the canonical hash of the base state dict the
splice started from (provenance); ``weights.sha256`` is the hash of the
``weights.safetensors`` bytes as written (integrity); ``weights.base_sha256``
is the canonical hash of the base part of the saved state dict.
``source.trained_on`` names the images the base network was trained on (a
data set name or an absolute folder path), as ``splice tune`` recorded it;
``splice insert`` carries it over from a folder, and warp pre-training takes
its upright reference from it. Absent or null when unknown. A folder read
while its model file differs from ``source.code_sha256`` is told, with a warning.
"""

from __future__ import annotations

import dataclasses
import json
import os
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from .copies import tree_copy
from .errors import EditedManifestWarning, ManifestError, SpliceWarning
from .schema import (FORMAT, MANIFEST_NAME, MECHANISMS, SCHEMA_VERSION, SCHEMA_VERSIONS, WEIGHTS_NAME,
                     record_problems, shape_ok, validate_manifest)
from .sources import MODULE_SPEC, code_change
from .sources.specs import spec_identity
from .warps import WarpConfig

__all__ = [
    "POINTS_KEY",
    "FIELDS_KEY",
    "MODEL_FIELDS",
    "points_sha256",
    "fields_sha256",
    "weights_metadata",
    "edited_fields",
    "warn_if_edited",
    "SCHEMA_VERSION",
    "SCHEMA_VERSIONS",
    "MECHANISMS",
    "FORMAT",
    "MANIFEST_NAME",
    "WEIGHTS_NAME",
    "PointRecord",
    "SpliceInfo",
    "validate_manifest",
    "info_of",
    "attach_info",
    "remember_base",
    "remembered_base",
    "copy_model",
]



# ----------------------------------------------------------------------------- the record


@dataclass(frozen=True)
class PointRecord:
    """One spliced point: its name, the warp's configuration, and the shape and cut seen at splice time."""

    name: str
    warp: WarpConfig
    shape: tuple[int, int, int] | None = None
    cut: bool | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise ManifestError(f"a point needs a non-empty string name, got {self.name!r}; name a point from "
                                "'splice points MODEL'")
        if isinstance(self.warp, Mapping):
            object.__setattr__(self, "warp", WarpConfig.from_dict(self.warp))
        if not isinstance(self.warp, WarpConfig):
            raise ManifestError(f"point {self.name!r}: warp must be a WarpConfig or its dict, got "
                                f"{type(self.warp).__name__}; pass WarpConfig(family=...)")
        if self.shape is not None:
            object.__setattr__(self, "shape", tuple(self.shape))
            if not shape_ok(list(self.shape)):
                raise ManifestError(f"point {self.name!r}: shape must be (C, H, W) positive integers, found "
                                    f"{self.shape!r}; take it from 'splice points MODEL'")

    def to_json(self) -> dict:
        out: dict[str, Any] = {"name": self.name, "warp": self.warp.to_dict()}
        if self.shape is not None:
            out["shape"] = list(self.shape)
        if self.cut is not None:
            out["cut"] = bool(self.cut)
        return out

    @classmethod
    def from_json(cls, data: Mapping) -> PointRecord:
        shape = data.get("shape")
        warp = dict(data.get("warp") or {})
        if warp.get("family") == "similarity":  # written before frames were recorded: normalised coordinates
            warp.setdefault("frame", "normalised")
        return cls(data["name"], WarpConfig.from_dict(warp), tuple(shape) if shape else None, data.get("cut"))


def _in_folder(path: str | None, folder) -> str | None:
    """``source.weights_file`` as a path to open: splice writes it absolute; a relative one (written by hand, or
    by an older run that recorded ``--weights`` as typed) is read as relative to the folder, never to the current
    directory of whoever opens it."""
    if path is None or folder is None or os.path.isabs(path):
        return path
    return os.path.join(os.path.abspath(os.fspath(folder)), path)


@dataclass(frozen=True)
class SpliceInfo:
    """What a splice is: its source, input, points and warps, and its tuning history.

    ``spec``/``kwargs`` rebuild the base architecture; ``source_weights_sha256``
    and ``source_weights_path`` say which weights it started from
    (``random_init`` when none); ``code_sha256`` the sha256 of the model file a
    ``path/file.py:factory`` spec builds from; ``source_not_loaded`` the base's
    tensors the weights file did not give (a partial load, ``--allow-partial``),
    which kept the builder's initialisation; ``trained_on`` the images the base was
    trained on, when known. ``points`` are :class:`PointRecord` in
    graph order. ``tuning`` is what ``splice tune`` recorded (``None`` for a
    fresh splice). ``extra_inputs`` are the per-sample shapes of the model's
    inputs after the first (any number of dimensions: a vector of metadata is
    ``(4,)``). ``mechanism`` is ``"fx"`` (a graph rewrite) or ``"hooks"``
    (forward hooks at module outputs, see :mod:`splice.hooks`); ``within`` the
    submodule the points belong to (``""``: the whole model); ``sites`` where
    the hooks go, ``{point: {"module", "call", "shape"}}`` (and ``"calls"``, when known); ``loc_reads`` which
    tensor a localisation head reads at a point that is warped too (``"unwarped"``, as a graph splice does;
    ``"warped"`` for a hooks folder written before splice recorded it, which was tuned so). Not written to
    ``splice.json``: ``folder`` (where the record was read from) and ``check``
    (:func:`splice.insert`'s identity check on the spliced model).
    """

    spec: str = MODULE_SPEC
    input_shape: tuple[int, int, int] | None = None
    kwargs: dict = field(default_factory=dict)
    normalisation: dict | None = None
    class_names: list[str] | None = None
    leaves: tuple[str, ...] = ()
    source_weights_sha256: str | None = None
    source_weights_path: str | None = None
    random_init: bool = False
    points: tuple[PointRecord, ...] = ()
    tuning: dict | None = None
    trained_on: str | None = None
    code_sha256: str | None = None
    folder: str | None = None
    check: dict | None = None
    extra_inputs: tuple[tuple[int, ...], ...] = ()
    mechanism: str = "fx"
    within: str = ""
    sites: dict = field(default_factory=dict)
    source_not_loaded: tuple[str, ...] = ()
    loc_reads: str = "unwarped"

    def __post_init__(self) -> None:
        norm = self.normalisation
        if isinstance(norm, Mapping) and all(isinstance(v, Sequence) for v in norm.values()):
            object.__setattr__(self, "normalisation", {k: list(v) for k, v in norm.items()})
        if self.class_names is not None and isinstance(self.class_names, (list, tuple)):
            object.__setattr__(self, "class_names", list(self.class_names))
        if self.input_shape is not None and isinstance(self.input_shape, Sequence):
            object.__setattr__(self, "input_shape", tuple(self.input_shape))
        object.__setattr__(self, "kwargs", dict(self.kwargs or {}))
        object.__setattr__(self, "leaves", tuple(self.leaves or ()))
        object.__setattr__(self, "source_not_loaded", tuple(self.source_not_loaded or ()))
        object.__setattr__(self, "extra_inputs", tuple(tuple(s) if isinstance(s, Sequence) else s
                                                       for s in self.extra_inputs or ()))
        object.__setattr__(self, "sites", {k: ({**v, "shape": list(v["shape"])} if isinstance(v, Mapping)
                                               and isinstance(v.get("shape"), Sequence) else v)
                                           for k, v in dict(self.sites or {}).items()})
        object.__setattr__(self, "points", tuple(p if isinstance(p, PointRecord) else PointRecord.from_json(p)
                                                 for p in self.points or ()))
        if self.folder is not None:
            object.__setattr__(self, "folder", str(self.folder))
        problems = record_problems(self._json())
        if problems:
            raise ManifestError("splice info is invalid: " + "; ".join(problems)
                                + ". Build it with SpliceInfo.from_source or SpliceInfo.from_manifest")

    # -- the one round trip

    def _json(self) -> dict:
        """The record's part of ``splice.json`` (no header, weights, versions or date)."""
        return {
            "source": {"spec": self.spec, "kwargs": self.kwargs, "weights_file": self.source_weights_path,
                       "weights_sha256": self.source_weights_sha256, "random_init": bool(self.random_init),
                       "trained_on": self.trained_on,
                       **({"code_sha256": self.code_sha256} if self.code_sha256 else {}),
                       **({"not_loaded": list(self.source_not_loaded)} if self.source_not_loaded else {})},
            "input_shape": list(self.input_shape) if isinstance(self.input_shape, tuple) else self.input_shape,
            "normalisation": self.normalisation,
            "class_names": self.class_names,
            "leaves": list(self.leaves),
            "points": [p.to_json() for p in self.points],
            "tuning": self.tuning,
            **({"extra_inputs": [list(s) for s in self.extra_inputs]} if self.extra_inputs else {}),
            **({"mechanism": self.mechanism, "within": self.within, "sites": self.sites}
               if self.mechanism != "fx" or self.within else {}),
            **({"loc_reads": self.loc_reads} if self.mechanism == "hooks" else {}),
        }

    @property
    def schema_version(self) -> int:
        """1 for a plain graph rewrite; 2 when the splice needs hooks, a submodule or several inputs."""
        return 2 if self.extra_inputs or self.mechanism != "fx" or self.within else SCHEMA_VERSION

    @property
    def input_shapes(self) -> tuple[tuple[int, ...], ...]:
        """One shape per model input: ``(C, H, W)``, then the per-sample shapes of the others."""
        return () if self.input_shape is None else (tuple(self.input_shape), *self.extra_inputs)

    def to_manifest(self, *, weights: Mapping, versions: Mapping, created: str) -> dict:
        """The ``splice.json`` dict for this record, with the folder's ``weights`` entry, versions and date."""
        return {"schema_version": self.schema_version, "format": FORMAT, **self._json(), "weights": dict(weights),
                "versions": dict(versions), "created": created}

    @classmethod
    def from_manifest(cls, data: Any, *, folder=None, where: str = MANIFEST_NAME) -> SpliceInfo:
        """The record of a parsed ``splice.json``, validated first (:class:`ManifestError` names every violation)."""
        validate_manifest(data, where)
        src = data["source"]
        told = code_change(src["spec"], src.get("code_sha256")) if folder is not None else None
        if told is not None:  # what loads is built from other code than was spliced (verify fails provenance)
            warnings.warn(f"'{folder}': {told}", SpliceWarning, stacklevel=3)
        return cls(
            spec=src["spec"], kwargs=dict(src.get("kwargs") or {}), input_shape=tuple(data["input_shape"]),
            normalisation=data.get("normalisation"), class_names=data.get("class_names"),
            leaves=tuple(data.get("leaves") or ()), source_weights_sha256=src.get("weights_sha256"),
            source_weights_path=_in_folder(src.get("weights_file"), folder),
            random_init=bool(src.get("random_init", False)),
            points=tuple(PointRecord.from_json(p) for p in data["points"]), tuning=data.get("tuning"),
            trained_on=src.get("trained_on"), code_sha256=src.get("code_sha256"),
            folder=None if folder is None else str(folder),
            extra_inputs=tuple(tuple(s) for s in data.get("extra_inputs") or ()),
            mechanism=data.get("mechanism", "fx"), within=data.get("within", ""), sites=data.get("sites") or {},
            source_not_loaded=tuple(src.get("not_loaded") or ()),
            # a hooks folder written before the record said so fed localisation heads the warped tensor at a point
            loc_reads=data.get("loc_reads", "warped" if data.get("mechanism") == "hooks" else "unwarped"),
        )

    @classmethod
    def from_source(cls, src, *, points: Sequence[PointRecord] = (), leaves: Sequence[str] | None = None,
                    check: dict | None = None, mechanism: str = "fx", within: str = "",
                    sites: Mapping | None = None) -> SpliceInfo:
        """The record of a :class:`~splice.sources.Source` spliced at ``points`` (none: the plain model)."""
        return cls(
            spec=src.spec, kwargs=dict(src.kwargs), input_shape=src.input_shape, normalisation=src.normalisation,
            class_names=src.class_names, leaves=tuple(src.leaves if leaves is None else leaves),
            source_weights_sha256=src.weights_sha256, source_weights_path=src.weights_path,
            random_init=bool(src.random_init), points=tuple(points), check=check,
            trained_on=((src.manifest or {}).get("source") or {}).get("trained_on"),
            code_sha256=(getattr(src, "code_sha256", None)
                         or ((src.manifest or {}).get("source") or {}).get("code_sha256")),
            extra_inputs=tuple(getattr(src, "extra_inputs", ()) or ()), mechanism=mechanism, within=within,
            sites=dict(sites or {}), source_not_loaded=tuple(getattr(src, "not_loaded", ()) or ()),
        )

    # -- reading it

    def replace(self, **changes) -> SpliceInfo:
        """A copy with ``changes`` (validated again)."""
        return dataclasses.replace(self, **changes)

    @property
    def point_names(self) -> list[str]:
        return [p.name for p in self.points]

    def recorded_shapes(self) -> dict[str, tuple[int, ...]] | None:
        """``{point: (C, H, W)}`` as recorded, or ``None`` if a point (or a warp's ``loc_from``) has none."""
        shapes = {p.name: tuple(p.shape) for p in self.points if p.shape}
        if len(shapes) != len(self.points):
            return None
        if any(p.warp.loc_from is not None and p.warp.loc_from not in shapes for p in self.points):
            return None
        return shapes


# ----------------------------------------------------------------------------- on a model


def info_of(model) -> SpliceInfo | None:
    """The :class:`SpliceInfo` a spliced (or loaded) model carries, or ``None`` for plain models.

    It lives in ``model.splice_info`` and, so that ``copy.deepcopy`` keeps it
    (fx's deepcopy drops custom attributes), in ``model.meta["splice_info"]``.
    """
    info = getattr(model, "splice_info", None)
    if info is None:
        meta = getattr(model, "meta", None)  # fx's dict; a model of the user's may name a submodule so
        info = meta.get("splice_info") if isinstance(meta, dict) else None
        if info is not None:
            model.splice_info = info
    return info


def attach_info(model, info: SpliceInfo) -> None:
    """Give ``model`` its record (``model.splice_info``, and ``model.meta`` where fx keeps it through deepcopy)."""
    if not isinstance(info, SpliceInfo):
        raise TypeError(f"attach_info needs a SpliceInfo, got {type(info).__name__}")
    model.splice_info = info
    if isinstance(getattr(model, "meta", None), dict):
        model.meta["splice_info"] = info


class _BaseLink:
    """The module object a splice was made from, held on the splice itself (so that ordinary garbage collection
    frees the two together, cycles included); a copy of the splice (deepcopy, pickle) carries no base."""

    def __init__(self, base=None):
        self.base = base

    def __deepcopy__(self, memo):
        return _BaseLink()

    def __reduce__(self):
        return (_BaseLink, ())


_LINK = "_splice_base_link"


def remember_base(spliced, base) -> None:
    """Remember that ``spliced`` was made from the module object ``base``: kept alive (not copied) while
    ``spliced`` lives, so that ``splice.verify(splice.insert(Net()))`` can compare with it; a copy of
    ``spliced`` (deepcopy, pickle) has no link."""
    object.__setattr__(spliced, _LINK, _BaseLink(base))  # a plain attribute: not a submodule, not in state_dict


def remembered_base(spliced):
    """The module object ``spliced`` was made from, or ``None`` (a copy, or a splice of a spec)."""
    link = spliced.__dict__.get(_LINK) if hasattr(spliced, "__dict__") else None
    return link.base if isinstance(link, _BaseLink) else None


def copy_model(model):
    """A deep copy of ``model`` that keeps its record (so the caller's module is never trained in place)."""
    twin = tree_copy(model)
    info = info_of(model)
    if info is not None:
        attach_info(twin, info)
    return twin


#: the safetensors metadata key that holds :func:`points_sha256` of the points a folder's weights were written with
#: (the only such hash a folder written before :data:`FIELDS_KEY` keeps)
POINTS_KEY = "splice_points_sha256"
#: the safetensors metadata key that holds, as a JSON object, the sha256 of each of :data:`MODEL_FIELDS` as splice.json
#: held it when the weights were written
FIELDS_KEY = "splice_fields_sha256"
#: the fields of splice.json (dotted: inside ``source``) that change what the model computes or what its outputs
#: mean: the architecture (the spec, a model file's folder left out: :func:`splice.sources.specs.spec_identity`)
#: and the builder's arguments, the inputs' shapes, the preprocessing, the class names, the tracing leaves, the
#: warps (places, configs) and how they are attached. Provenance stays out (the source weights file and hashes,
#: ``trained_on``, the tuning record, versions, dates): the provenance row reads those. A field a file was written
#: without (``source.spec`` before 2026-12-06) is not checked in it.
MODEL_FIELDS = ("source.spec", "source.kwargs", "input_shape", "extra_inputs", "normalisation", "class_names",
                "leaves", "points", "mechanism", "within", "sites", "loc_reads")


def points_sha256(points) -> str:
    """sha256 of a manifest's ``points`` list in canonical JSON (sorted keys, no spaces)."""
    import hashlib

    return hashlib.sha256(json.dumps(points, sort_keys=True, separators=(",", ":")).encode("utf-8")).hexdigest()


def fields_sha256(manifest: Mapping) -> dict[str, str]:
    """``{field: sha256}`` of each of :data:`MODEL_FIELDS` in ``manifest`` (an absent field hashes as ``null``).
    Pass the manifest as it reads back from JSON (tuples as lists)."""
    out = {}
    for name in MODEL_FIELDS:
        node: Any = manifest
        for part in name.split("."):
            node = node.get(part) if isinstance(node, Mapping) else None
        out[name] = points_sha256(spec_identity(node) if name == "source.spec" else node)
    return out


def weights_metadata(manifest: Mapping) -> dict[str, str]:
    """The hashes a folder's weights file keeps of ``manifest``, taken as it reads back from JSON."""
    manifest = json.loads(json.dumps(manifest))
    return {POINTS_KEY: points_sha256(manifest.get("points")), FIELDS_KEY: json.dumps(fields_sha256(manifest))}


def edited_fields(weights_file, manifest: Mapping) -> list[str]:
    """The :data:`MODEL_FIELDS` of ``manifest`` (splice.json now) that are not those ``weights_file`` was written
    with. A file written before the fields were hashed is checked on its points alone; one written before that
    (or whose header cannot be read) on nothing."""
    try:
        from safetensors import safe_open

        with safe_open(str(weights_file), framework="pt") as f:
            meta = f.metadata() or {}
    except Exception:  # noqa: BLE001 - an unreadable header is the integrity row's finding, not this one's
        return []
    try:
        written = json.loads(meta[FIELDS_KEY])
    except (KeyError, TypeError, ValueError):
        written = None
    if isinstance(written, dict):
        now = fields_sha256(manifest)
        return [name for name in MODEL_FIELDS if name in written and written[name] != now[name]]
    points = meta.get(POINTS_KEY)
    return ["points"] if points is not None and points != points_sha256(manifest.get("points")) else []


def warn_if_edited(folder, weights_file, manifest: Mapping) -> None:
    """Warn (:class:`~splice.errors.EditedManifestWarning`) when :func:`edited_fields` names any."""
    edited = edited_fields(weights_file, manifest)
    if edited:
        warnings.warn(f"'{folder}': {MANIFEST_NAME}'s {', '.join(edited)} differ from those its weights were written "
                      "with (it was edited after saving), so the model computes or labels something else and "
                      f"verify's integrity row fails; restore {MANIFEST_NAME} from a good copy or insert again",
                      EditedManifestWarning, stacklevel=3)
