"""The ``splice.json`` schema: its constants and the checks :func:`validate_manifest` runs (every violation named).

The schema itself is described in :mod:`splice.manifest`, which builds the typed record on these checks.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

from .errors import ManifestError
from .warps import WarpConfig

__all__ = ["SCHEMA_VERSION", "SCHEMA_VERSIONS", "MECHANISMS", "FORMAT", "MANIFEST_NAME", "WEIGHTS_NAME",
           "validate_manifest", "record_problems", "shape_ok"]

SCHEMA_VERSION = 1
SCHEMA_VERSIONS = (1, 2)  # the versions this splice reads; 2 is written only when needed
MECHANISMS = ("fx", "hooks")
FORMAT = "splice-folder"
MANIFEST_NAME = "splice.json"
WEIGHTS_NAME = "weights.safetensors"


# ----------------------------------------------------------------------------- schema checks


def shape_ok(v: Any) -> bool:
    """A JSON ``[C, H, W]`` of positive integers."""
    return isinstance(v, list) and len(v) == 3 and all(isinstance(d, int) and not isinstance(d, bool) and d > 0
                                                       for d in v)


def _extra_shape_ok(v: Any) -> bool:
    """A JSON per-sample shape of an input after the first: a list of one or more positive integers."""
    return isinstance(v, list) and len(v) >= 1 and all(isinstance(d, int) and not isinstance(d, bool) and d > 0
                                                       for d in v)


def _number(x: Any) -> bool:
    """A finite JSON number (``NaN``/``Infinity``, which Python's json reads, and booleans are not)."""
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _header(data: dict, problems: list[str]) -> None:
    version = data.get("schema_version")
    if version not in SCHEMA_VERSIONS or isinstance(version, bool):
        problems.append(f"schema_version is {version!r}, this splice reads {' and '.join(map(str, SCHEMA_VERSIONS))}")
    if data.get("format") != FORMAT:
        problems.append(f"format is {data.get('format')!r}, expected {FORMAT!r}")


def _source(data: dict, problems: list[str]) -> None:
    src = data.get("source")
    if not isinstance(src, dict):
        problems.append("source must be an object")
        return
    if not isinstance(src.get("spec"), str) or not src.get("spec"):
        problems.append("source.spec must be a non-empty string")
    if not isinstance(src.get("kwargs", {}), dict):
        problems.append("source.kwargs must be an object")
    for key in ("weights_sha256", "weights_file", "trained_on", "code_sha256"):
        if src.get(key) is not None and not isinstance(src.get(key), str):
            problems.append(f"source.{key} must be a string or null")
    left = src.get("not_loaded", [])
    if not (isinstance(left, list) and all(isinstance(n, str) for n in left)):
        problems.append("source.not_loaded must be a list of tensor names")


def _inputs(data: dict, problems: list[str]) -> None:
    """Input shape, normalisation, class names and leaves."""
    if not shape_ok(data.get("input_shape")):
        problems.append(f"input_shape must be [C, H, W] positive integers, found {data.get('input_shape')!r}")
    norm = data.get("normalisation")
    if norm is not None:
        if not (isinstance(norm, dict) and set(norm) == {"mean", "std"}
                and all(isinstance(norm[k], list) and all(_number(x) for x in norm[k]) for k in norm)):
            problems.append("normalisation must be null or {\"mean\": [finite numbers], \"std\": [finite numbers]}")
        elif any(s <= 0 for s in norm["std"]):
            problems.append("normalisation.std values must be positive")
        elif len(norm["mean"]) != len(norm["std"]):
            problems.append("normalisation.mean and normalisation.std must have one value per channel each")
    names = data.get("class_names")
    if names is not None and not (isinstance(names, list) and all(isinstance(n, str) for n in names)):
        problems.append("class_names must be null or a list of strings")
    if not isinstance(data.get("leaves", []), list):
        problems.append("leaves must be a list of strings")
    extra = data.get("extra_inputs", [])
    if not (isinstance(extra, list) and all(_extra_shape_ok(s) for s in extra)):
        problems.append("extra_inputs must be a list of per-sample shapes, each a list of positive integers")
    if data.get("mechanism", "fx") not in MECHANISMS:
        problems.append(f"mechanism must be one of {', '.join(MECHANISMS)}, found {data.get('mechanism')!r}")
    if not _qualname_ok(data.get("within", ""), empty=True):
        problems.append(f"within must be a module qualname such as 'backbone.body', found {data.get('within')!r}")


def _points(data: dict, problems: list[str]) -> None:
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


def _qualname_ok(name: Any, empty: bool) -> bool:
    return isinstance(name, str) and (name == "" and empty or
                                      name != "" and all(p.isidentifier() or p.isdigit() for p in name.split(".")))


def _sites(data: dict, problems: list[str]) -> None:
    """Where the hooks mechanism puts each point: the n-th call of a module, and the point's shape."""
    sites = data.get("sites", {})
    if not isinstance(sites, dict):
        problems.append("sites must be an object {point: {module, call, shape}}")
        return
    for name, site in sites.items():
        calls = site.get("calls", 1) if isinstance(site, dict) else None  # optional: older folders have none
        ok = (isinstance(site, dict) and set(site) - {"calls"} == {"module", "call", "shape"}
              and _qualname_ok(site["module"], empty=name == "input") and shape_ok(site["shape"])
              and isinstance(site["call"], int) and not isinstance(site["call"], bool) and site["call"] >= 0
              and isinstance(calls, int) and not isinstance(calls, bool) and calls > site["call"])
        if not ok:
            problems.append(f"sites[{name!r}] must be {{\"module\": qualname, \"call\": n >= 0, "
                            "\"shape\": [C, H, W]} and optionally \"calls\": more than call")
    if data.get("loc_reads", "unwarped") not in ("unwarped", "warped"):
        problems.append("loc_reads must be \"unwarped\" or \"warped\"")
    if data.get("mechanism", "fx") == "hooks":
        needed = {p.get("name") for p in data.get("points") or [] if isinstance(p, dict)}
        needed |= {p["warp"].get("loc_from") for p in data.get("points") or []
                   if isinstance(p, dict) and isinstance(p.get("warp"), dict)} - {None}
        missing = sorted(str(n) for n in needed if n not in sites)
        if missing:
            problems.append(f"the hooks mechanism needs a site for every point; none for {', '.join(missing)}")


def _weights(data: dict, problems: list[str]) -> None:
    w = data.get("weights")
    if not (isinstance(w, dict) and isinstance(w.get("file"), str) and isinstance(w.get("sha256"), str)):
        problems.append("weights must be {\"file\": str, \"sha256\": str, ...}")
    elif "/" in w["file"] or "\\" in w["file"] or w["file"].startswith("."):
        problems.append(f"weights.file must be a plain file name inside the folder, found {w['file']!r}")


def _tuning(data: dict, problems: list[str]) -> None:
    tuning = data.get("tuning")
    if tuning is not None and not isinstance(tuning, dict):
        problems.append("tuning must be null or an object")


# in the order of the file; the record checks its own part (no header, no weights)
_FILE_CHECKS: tuple[Callable[[dict, list[str]], None], ...] = (_header, _source, _inputs, _points, _sites, _weights,
                                                               _tuning)
_RECORD_CHECKS = (_source, _inputs, _points, _sites, _tuning)


def _problems(data: dict, checks) -> list[str]:
    problems: list[str] = []
    for check in checks:
        check(data, problems)
    return problems


def record_problems(record: dict) -> list[str]:
    """The violations in a record's part of ``splice.json`` (no header, no weights entry)."""
    return _problems(record, _RECORD_CHECKS)


def validate_manifest(data: Any, where: str = MANIFEST_NAME) -> dict:
    """Check a parsed ``splice.json``; raise :class:`ManifestError` naming every violation."""
    if not isinstance(data, dict):
        raise ManifestError(f"{where} must hold a JSON object, found {type(data).__name__}; re-create the folder "
                            "with 'splice insert'")
    problems = _problems(data, _FILE_CHECKS)
    if problems:
        raise ManifestError(
            f"{where} violates the splice folder schema: " + "; ".join(problems)
            + ". Re-create the folder with 'splice insert' rather than editing it by hand"
        )
    return data
