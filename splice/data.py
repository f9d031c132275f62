"""Datasets: the embedded tray-camera digits, ImageFolder trees, preprocessing.

Two kinds of data source are understood by :func:`open_data`:

``digits`` / ``digits-moved``
    The demo scenario. A bench camera looks down at a tray where parts carrying
    one stamped digit are dropped at any angle and offset. The digits are
    scikit-learn's bundled handwritten digits (``sklearn.datasets.load_digits``,
    UCI optdigits: 1797 images of 8x8 pixels with values 0..16, shipped inside
    scikit-learn, nothing is downloaded). Each digit is scaled to [0, 1],
    upscaled bilinearly to half the canvas size (24x24 by default) and pasted
    centred on a dark canvas (1x48x48 by default).

    * ``digits``: upright and centred — what the base network is trained on.
    * ``digits-moved``: the same images, each with a seeded random rotation
      uniform in +-60 degrees, scale uniform in [0.8, 1.2] and shift uniform in
      +-0.25 of the canvas size per axis (+-12 px on 48x48), applied with
      :func:`splice.distort.apply_affine` about the canvas centre (angle sign as
      in torchvision's ``affine``: positive turns clockwise on screen). With
      these ranges digits stay mostly in frame: over the 1797 images at seed 0
      the mean fraction of ink kept is 99.8 % and the worst image keeps 84 %.

    Splits are fixed and stratified by class: within each class a permutation
    with the fixed seed ``_SPLIT_SEED`` puts 60 % in ``train``, 20 % in ``val``
    and the rest in ``test`` (1078 / 359 / 360 images). The split does not depend
    on ``seed``; ``seed`` only drives the random motions of ``digits-moved``.
    The moved variant uses the same membership, so ``digits-moved`` test image
    ``k`` is the moved version of ``digits`` test image ``k`` (``ImageSet.indices``
    holds the optdigits row of every image).

A folder (ImageFolder layout)
    ``DIR/train/<class>/*``, ``DIR/val/<class>/*``, optionally ``DIR/test/<class>/*``,
    read lazily by :mod:`splice.imagefolder`.

Everything returned is float32 in [0, 1]. Normalisation is a separate step
(:func:`normalise`) done by the training and evaluation code.
"""

from __future__ import annotations

import functools
import os
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import Tensor
from torch.utils.data import Dataset

from . import distort
from .errors import DataError, DataWarning, suggest
from .imagefiles import IMAGE_SUFFIXES, check_input_shape, load_images, refuse_unreadable
from .imagefolder import FOLDER_LAYOUT, SPLITS, ImageFolderSet, class_key, open_folder

__all__ = [
    "refuse_unreadable",
    "same_classes",
    "shown_classes",
    "first_class_difference",
    "DATASETS",
    "SPLITS",
    "DIGITS_SHAPE",
    "IMAGE_SUFFIXES",
    "ImageSet",
    "ImageFolderSet",
    "open_data",
    "upright_counterpart",
    "embedded",
    "digits_split_indices",
    "normalise",
    "load_images",
]

DATASETS = ("digits", "digits-moved")
DIGITS_SHAPE = (1, 48, 48)

_SPLIT_SEED = 8_8_1797  # fixed: the digits splits never change
_SPLIT_FRACTIONS = (0.6, 0.2)  # train, val; test is the rest
_MOVED = distort.DistortionRange(rotation_deg=60.0, scale=(0.8, 1.2), shift=0.25)
_SHADOWED: set[str] = set()  # folders a data set name has been said to shadow, in this process
_DIGIT_FRACTION = 0.5  # the upscaled digit spans half the canvas per axis


# ---------------------------------------------------------------------------
# containers
# ---------------------------------------------------------------------------


@dataclass(eq=False)  # comparing tensors with == has no single truth value
class ImageSet(Dataset):
    """A whole split held in memory; also a map-style ``Dataset`` of ``(image, label)``.

    ``reference`` names the upright counterpart of a distorted set (``"digits"``
    for ``"digits-moved"``), ``indices`` the optdigits row of each image and
    ``params`` the per-image motion of ``digits-moved`` (``angle_deg``, ``scale``,
    ``shift`` as in :func:`splice.distort.sample_distortion`).
    """

    images: Tensor
    labels: Tensor
    classes: list[str]
    name: str
    split: str
    reference: str | None = None
    indices: Tensor | None = None
    params: dict[str, Tensor] | None = field(default=None, repr=False)

    def __post_init__(self) -> None:
        if not isinstance(self.images, Tensor) or self.images.dim() != 4 or not self.images.is_floating_point():
            raise ValueError("ImageSet.images must be a float tensor (N, C, H, W)")
        if not isinstance(self.labels, Tensor) or self.labels.shape != (self.images.shape[0],) \
                or self.labels.dtype != torch.long:
            raise ValueError(
                f"ImageSet.labels must be a LongTensor with one label per image ({self.images.shape[0]}); "
                f"got {getattr(self.labels, 'dtype', type(self.labels))} of shape "
                f"{tuple(getattr(self.labels, 'shape', ()))}"
            )
        if len(self.labels) and not 0 <= int(self.labels.min()) <= int(self.labels.max()) < len(self.classes):
            raise ValueError(f"ImageSet.labels must lie in [0, {len(self.classes)}) for classes {self.classes}")

    def __len__(self) -> int:
        return self.images.shape[0]

    def __getitem__(self, i):
        return self.images[i], self.labels[i]

    @property
    def input_shape(self) -> tuple[int, int, int]:
        return tuple(self.images.shape[1:])


# ---------------------------------------------------------------------------
# entry point
# ---------------------------------------------------------------------------


def upright_counterpart(spec: str) -> str | None:
    """The undistorted version of a dataset (``"digits"`` for ``"digits-moved"``), else ``None``."""
    return "digits" if spec == "digits-moved" else None


def open_data(spec: str, split: str = "train", *, input_shape: Sequence[int] | None = None,
              seed: int = 0) -> ImageSet | ImageFolderSet:
    """Open one split of ``"digits"``, ``"digits-moved"`` or an ImageFolder tree.

    ``input_shape`` is the model's ``(C, H, W)`` (C = 1 or 3); it is required
    for folders and defaults to ``DIGITS_SHAPE`` for the digits. ``seed`` drives
    the random motions of ``digits-moved`` only.
    """
    if split not in SPLITS:
        raise DataError(f"unknown split {split!r}{_hint(str(split), SPLITS)} one of {', '.join(SPLITS)}.")
    builtin = embedded(spec)
    shape = None if input_shape is None else check_input_shape(input_shape, 8 if builtin else 1)
    if builtin:
        return _open_digits(spec, split, shape or DIGITS_SHAPE, seed)
    path = Path(os.fspath(spec)).expanduser()
    if not path.exists():
        if os.sep in str(spec) or str(spec).startswith("."):
            raise DataError(
                f"image folder {str(path)!r} does not exist; check the path, or use one of "
                f"{', '.join(DATASETS)}. A folder is laid out as {FOLDER_LAYOUT}."
            )
        raise DataError(
            f"unknown dataset {str(spec)!r}{_hint(str(spec), DATASETS)} one of {', '.join(DATASETS)} "
            f"or the path of an existing image folder laid out as {FOLDER_LAYOUT}."
        )
    if shape is None:
        raise DataError(
            f"input_shape is needed to open the image folder {str(path)!r}: pass the model's (C, H, W), "
            "e.g. input_shape=source.input_shape."
        )
    return open_folder(path, split, shape)


def embedded(spec) -> bool:
    """Whether the string ``spec`` names an embedded data set (:data:`DATASETS`). The bare name always does, even
    when a folder of that name lies in the working directory: one :class:`DataWarning` then says how to read the
    folder (``./digits``). A path object never names one."""
    if not isinstance(spec, str) or spec not in DATASETS:
        return False
    if os.path.isdir(spec) and os.path.realpath(spec) not in _SHADOWED:
        _SHADOWED.add(os.path.realpath(spec))  # one line a folder, however many splits a command opens
        warnings.warn(f"{spec!r} names splice's embedded data set; the folder ./{spec} is not read: pass ./{spec} "
                      "to read it.", DataWarning, stacklevel=3)
    return True


def _hint(word: str, choices: Sequence[str]) -> str:
    """"; did you mean 'x'? Use" or "; use", to be followed by the list of choices."""
    close = suggest(word, choices)
    return f"{close} Use" if close else "; use"


# ---------------------------------------------------------------------------
# digits
# ---------------------------------------------------------------------------


@functools.lru_cache(maxsize=1)
def _optdigits() -> tuple[Tensor, Tensor]:
    """The 1797 optdigits images as float32 (N, 1, 8, 8) in [0, 1] and their labels."""
    from .copies import rng_kept

    with rng_kept():  # importing scikit-learn draws from Python's generator: the caller's next draw is unmoved
        from sklearn.datasets import load_digits  # heavy import, kept out of `import splice`

        bunch = load_digits()
    images = torch.from_numpy(bunch.images).to(torch.float32).div_(16.0).unsqueeze(1)
    labels = torch.from_numpy(bunch.target).to(torch.long)
    return images, labels


@functools.lru_cache(maxsize=1)
def digits_split_indices() -> dict[str, Tensor]:
    """Optdigits row numbers of each split (sorted), stratified by class, fixed forever."""
    import numpy as np

    _, labels = _optdigits()
    rng = np.random.RandomState(_SPLIT_SEED)  # legacy generator: stream is stable across numpy versions
    parts: dict[str, list] = {s: [] for s in SPLITS}
    for c in range(10):
        members = np.flatnonzero(labels.numpy() == c)
        members = members[rng.permutation(len(members))]
        n_train = round(_SPLIT_FRACTIONS[0] * len(members))
        n_val = round(_SPLIT_FRACTIONS[1] * len(members))
        parts["train"].append(members[:n_train])
        parts["val"].append(members[n_train:n_train + n_val])
        parts["test"].append(members[n_train + n_val:])
    return {s: torch.from_numpy(np.sort(np.concatenate(p))).to(torch.long) for s, p in parts.items()}


def _render_upright(h: int, w: int) -> Tensor:
    """(1797, 1, h, w): each digit upscaled to half the canvas and pasted in the centre."""
    images, _ = _optdigits()
    bh, bw = max(1, round(h * _DIGIT_FRACTION)), max(1, round(w * _DIGIT_FRACTION))
    box = F.interpolate(images, size=(bh, bw), mode="bilinear", align_corners=False,
                        antialias=bh < 8 or bw < 8)
    canvas = torch.zeros(images.shape[0], 1, h, w, dtype=torch.float32)
    top, left = (h - bh) // 2, (w - bw) // 2
    canvas[:, :, top:top + bh, left:left + bw] = box.clamp_(0.0, 1.0)
    return canvas


@functools.lru_cache(maxsize=4)
def _digits_all(variant: str, h: int, w: int, seed: int) -> tuple[Tensor, dict[str, Tensor] | None]:
    """Every digit of a variant at one channel; cached per process, never handed out directly."""
    upright = _render_upright(h, w)
    if variant == "digits":
        return upright, None
    gen = torch.Generator().manual_seed(int(seed))
    full = distort.sample_distortion(gen, upright.shape[0], _MOVED)
    params = {k: full[k] for k in ("angle_deg", "scale", "shift")}
    moved = distort.apply_affine(upright, params["angle_deg"], params["scale"], params["shift"], fill=0.0)
    return moved.clamp_(0.0, 1.0), params


def _open_digits(spec: str, split: str, shape: tuple[int, int, int], seed: int) -> ImageSet:
    if isinstance(seed, bool) or not isinstance(seed, int):
        raise DataError(f"seed must be an integer; got {seed!r}.")
    c, h, w = shape
    images, params = _digits_all(spec, h, w, seed)
    _, labels = _optdigits()
    idx = digits_split_indices()[split]
    picked = images[idx]  # advanced indexing copies: the cache cannot be changed through it
    if c == 3:
        picked = picked.repeat(1, 3, 1, 1)
    return ImageSet(
        images=picked,
        labels=labels[idx].clone(),
        classes=[str(d) for d in range(10)],
        name=spec,
        split=split,
        reference=upright_counterpart(spec),
        indices=idx.clone(),
        params=None if params is None else {k: v[idx] for k, v in params.items()},
    )


# ---------------------------------------------------------------------------
# image folders
# ---------------------------------------------------------------------------


# ---------------------------------------------------------------------------
# normalisation
# ---------------------------------------------------------------------------


def same_classes(a: Sequence[str] | None, b: Sequence[str] | None) -> bool:
    """Two class lists name the same classes in the same order, compared after Unicode NFC normalisation (a
    model trained on a tree written on macOS, where names are decomposed, matches the same tree elsewhere)."""
    return [class_key(n) for n in a or []] == [class_key(n) for n in b or []]


def shown_classes(names: Sequence[str] | None, limit: int = 12) -> str:
    """A class list for a message: the first ``limit`` names, and how many more (never cut silently)."""
    names = [str(n) for n in names or []]
    more = f", … {len(names) - limit} more" if len(names) > limit else ""
    return "[" + ", ".join(repr(n) for n in names[:limit]) + more + "]"


def first_class_difference(a: Sequence[str] | None, b: Sequence[str] | None) -> str:
    """Where two class lists first part (after NFC, as :func:`same_classes` compares), in words: "class 9 is '9'
    in one and 'nine' in the other", or how many each has when one list begins the other."""
    na, nb = [class_key(n) for n in a or []], [class_key(n) for n in b or []]
    for i, (x, y) in enumerate(zip(na, nb)):
        if x != y:
            return f"class {i} is {x!r} in one and {y!r} in the other"
    return f"{len(na)} classes against {len(nb)}"


def normalise(x: Tensor, normalisation: dict | None) -> Tensor:
    """``(x - mean) / std`` per channel; ``None`` returns ``x`` unchanged. Never in place.

    ``normalisation`` is ``{"mean": [...], "std": [...]}`` with one value per
    channel (or a single value for all); ``x`` is ``(N, C, H, W)`` or ``(C, H, W)``.
    """
    if normalisation is None:
        return x
    if not isinstance(normalisation, dict) or set(normalisation) != {"mean", "std"}:
        got = sorted(normalisation) if isinstance(normalisation, dict) else type(normalisation).__name__
        raise DataError(
            f"normalisation must be a dict with exactly the keys 'mean' and 'std'; got {got}. "
            "Use e.g. {'mean': [0.5], 'std': [0.25]} or None."
        )
    if x.dim() not in (3, 4):
        raise DataError(f"normalise expects images (N, C, H, W) or (C, H, W); got shape {tuple(x.shape)}.")
    c = x.shape[-3]
    out = []
    for key in ("mean", "std"):
        value = normalisation[key]
        try:
            t = torch.as_tensor(value, dtype=x.dtype if x.is_floating_point() else torch.float32).reshape(-1)
        except (TypeError, ValueError, RuntimeError):
            raise DataError(f"normalisation {key!r} must be a list of numbers; got {value!r}.") from None
        if t.numel() not in (1, c):
            raise DataError(
                f"normalisation {key!r} has {t.numel()} values but the images have {c} channel(s); "
                "give one value per channel."
            )
        if not torch.isfinite(t).all() or (key == "std" and (t <= 0).any()):
            raise DataError(f"normalisation {key!r} must be finite{' and positive' if key == 'std' else ''}; "
                            f"got {value!r}.")
        out.append(t.to(x.device).view(-1, 1, 1))
    mean, std = out
    return (x - mean) / std
