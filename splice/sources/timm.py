"""``timm:NAME``: a timm architecture by its registered name, with random weights.

timm is optional: without it, one line says how to install it. The name is
looked up in timm's registry (``timm.is_model``) and built with
``pretrained=False``; nothing is downloaded and no file is read. Weights come
separately (``--weights`` takes a local timm checkpoint). The architecture's
``pretrained_cfg`` gives the default input shape and normalisation.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ..errors import SourceError, suggest
from .specs import per_channel, positive_int

__all__ = ["build_timm", "timm_lists", "REFUSED_TIMM_KWARGS"]

# arguments that would make timm download or read a file: weights come through --weights only
REFUSED_TIMM_KWARGS = ("pretrained", "pretrained_cfg", "pretrained_cfg_overlay", "checkpoint_path", "cache_dir")


def _timm():
    try:
        import timm
    except ImportError:
        raise SourceError("timm:NAME needs the timm package, which is not installed; "
                          "run: pip install timm") from None
    return timm


def _known(timm, name: str) -> bool:
    arch = name.split(".", 1)[0]  # 'resnet18.a1_in1k' names a pretrained tag of 'resnet18'
    return bool(timm.is_model(arch))


def timm_lists(head: str, name: str, kwargs: Mapping) -> bool:
    """True when ``head:name`` is ``timm:NAME`` for a name timm's registry holds, built without a weights argument.

    The registry lookup of :mod:`splice.sources.trust`: it imports timm (an
    installed library), never anything the spec names.
    """
    if head != "timm":
        return False
    try:
        import timm
    except ImportError:
        return False
    return _known(timm, name) and not any(k in kwargs for k in REFUSED_TIMM_KWARGS)


def build_timm(name: str, kwargs: Mapping[str, Any]):
    """``(model, meta)`` for ``timm:NAME``: ``timm.create_model(NAME, pretrained=False, **kwargs)``.

    ``meta`` holds the ``input_shape`` and ``normalisation`` of the
    architecture's ``pretrained_cfg`` (``None`` when it declares none).
    """
    timm = _timm()
    if not _known(timm, name):
        raise SourceError(f"unknown timm model {name!r}{suggest(name, timm.list_models()) or ';'} "
                          "Run python -c 'import timm; print(timm.list_models())' for the full list")
    refused = [k for k in REFUSED_TIMM_KWARGS if k in kwargs]
    if refused:
        raise SourceError(f"timm:{name} --kwargs {refused[0]!r} would download or read weights, which splice never "
                          "does through a builder; drop it and pass a local checkpoint with --weights FILE")
    try:
        model = timm.create_model(name, pretrained=False, **dict(kwargs))
    except TypeError as exc:
        raise SourceError(f"timm:{name} does not accept --kwargs {dict(kwargs)}: {exc}") from None
    cfg = getattr(model, "pretrained_cfg", None) or {}
    size = cfg.get("input_size")
    shape = tuple(int(s) for s in size) if size and len(size) == 3 else None
    chans = positive_int(kwargs.get("in_chans"))
    if shape is not None and chans is not None:
        shape = (chans, *shape[1:])  # the pretrained_cfg keeps the RGB shape when in_chans changes it
    mean, std = cfg.get("mean"), cfg.get("std")
    norm = {"mean": per_channel(mean, chans), "std": per_channel(std, chans)} if mean and std else None
    return model, {"input_shape": shape, "normalisation": norm}
