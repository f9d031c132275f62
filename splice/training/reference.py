"""Which images warp pre-training distorts: the run's upright reference.

Pre-training teaches each warp head to undo known random warps of images of
the kind the base network was trained on (upright, centred). Pre-training on
the run's own training images is right only when those are upright too: on
images that are already moved, the head learns to undo a synthetic warp
stacked on a real one. :func:`resolve_reference` decides, in this order:

1. ``given`` (``--reference``, or a recipe's ``[pretrain] reference`` other
   than ``"auto"``): ``"train"`` means the run's training images, anything
   else names a data set (``digits`` or an ImageFolder tree, its train split);
2. the data set's built-in upright counterpart (``digits-moved`` -> ``digits``);
3. the data the base was trained on, as its splice record says
   (``trained_on``, written by ``splice tune`` into every folder it saves and
   carried over by ``splice insert``); a recorded folder that is no longer on
   disk stops the run with one line naming it, or with ``"skip"`` is warned of
   and skipped (origin ``missing``);
4. the embedded ``digits``, which are upright themselves;
5. otherwise none: with ``[pretrain] if_no_reference = "stop"`` (the default)
   tune stops with one line saying what to pass, with ``"skip"`` it trains
   without pre-training.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from ..errors import RecipeError

__all__ = ["Reference", "resolve_reference", "data_record", "gone_text"]

_UPRIGHT_BUILTIN = ("digits",)


@dataclass(frozen=True)
class Reference:
    """The resolved reference: ``data`` (a data spec, ``"train"``, or ``None`` when pre-training is
    skipped) and ``origin``, how it was found (``given``, ``upright counterpart``, ``base``,
    ``embedded``, ``skipped``, ``missing``: the recorded folder ``missing`` is gone)."""

    data: str | None
    origin: str
    missing: str | None = None  # origin "missing": the recorded folder that is gone

    @property
    def skipped(self) -> bool:
        return self.data is None


def gone_text(recorded: str) -> str:
    """The words for a recorded reference folder that is gone (one clause)."""
    return (f"the images the base was trained on, which the model's folder records as '{recorded}' "
            "(source.trained_on), are not there any more")


def _missing_folder(recorded: str) -> bool:
    """A recorded data folder (not a built-in data set's name) that is not on disk."""
    from ..data import DATASETS

    return recorded not in DATASETS and recorded != "train" and not Path(recorded).expanduser().is_dir()


def data_record(data: str) -> str:
    """How a run records its data: a built-in data set by name, a folder by its absolute path."""
    from ..data import DATASETS

    if data in DATASETS or data == "train":
        return data
    return str(Path(os.fspath(data)).expanduser().resolve())


def resolve_reference(data: str, *, given: str | None = None, trained_on: str | None = None,
                      if_missing: str = "stop") -> Reference:
    """The upright images warp pre-training should distort for a run on ``data`` (see the module doc).

    ``given`` is ``--reference`` or the recipe's ``[pretrain] reference``
    (``None`` or ``"auto"``: decide automatically); ``trained_on`` is what the
    model's splice record says its base was trained on; ``if_missing`` is
    ``"stop"`` (raise :class:`~splice.errors.RecipeError`) or ``"skip"``.
    """
    from ..data import upright_counterpart

    if given not in (None, "auto"):
        return Reference(given if given == "train" else data_record(given), "given")
    upright = upright_counterpart(data)
    if upright is not None:
        return Reference(upright, "upright counterpart")
    if trained_on:
        if trained_on == data_record(data):
            return Reference("train", "base")
        if _missing_folder(trained_on):  # known but gone: said by the caller, never skipped silently
            if if_missing != "skip":
                raise RecipeError(f"warp pre-training would read {gone_text(trained_on)}; pass --reference DATA "
                                  "(images of the kind the base was trained on), or set [pretrain] reference = "
                                  "\"train\" to use the training images")
            return Reference(None, "missing", trained_on)
        return Reference(trained_on, "base")
    if data in _UPRIGHT_BUILTIN:
        return Reference(data, "embedded")
    if if_missing == "skip":
        return Reference(None, "skipped")
    raise RecipeError(
        f"warp pre-training needs upright reference images, and none is known for data {data!r} (its own images "
        "may already be moved); pass --reference DATA (in Python, overrides=RecipeOverrides(reference=DATA)): images "
        "of the kind the base was trained on, or set [pretrain] reference = \"train\" to use the training images, or "
        "if_no_reference = \"skip\""
    )
