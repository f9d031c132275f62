"""Unlabelled images for label-free adaptation: the reference (REF) and the new site (SITE).

Nothing here reads a label. A folder is a set of image files found by walking
it (sorted paths, hidden files and folders skipped); class folder names are
never looked at, so an ImageFolder tree, a flat folder and a folder whose
class names are wrong all give the same images. When a folder has a
``train`` sub-folder (an ImageFolder tree), only that split is used, so the
``val``/``test`` images stay unseen. The embedded ``digits`` and
``digits-moved`` give their train split's images.

An :class:`Images` is a length and a ``batch(indices)`` that returns
``(N, C, H, W)`` float32 in [0, 1], resized like every other splice data path
(:func:`splice.data.load_images`). A folder whose images fit in
:data:`MEMORY_LIMIT` bytes is read once and held in memory (pre-training
passes over the reference a hundred times and more); a larger one is read
batch by batch.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import torch
from torch import Tensor

from ..errors import DataError

__all__ = ["MEMORY_LIMIT", "Images", "TensorImages", "FileImages", "SubsetImages", "open_images", "image_files",
           "split_off", "files_sha256"]


# Folders up to this many bytes of float32 pixels are held in memory (common practice, no source).
MEMORY_LIMIT = 512 * 2**20


class Images:
    """A sequence of unlabelled images: ``len(images)`` and ``images.batch(indices)``."""

    name: str = ""

    def __len__(self) -> int:  # pragma: no cover - interface
        raise NotImplementedError

    def batch(self, indices: Tensor) -> Tensor:  # pragma: no cover - interface
        raise NotImplementedError

    def all(self, batch_size: int = 256) -> Tensor:
        """Every image as one tensor (for small sets: the digits, the held-out reference)."""
        idx = torch.arange(len(self))
        return torch.cat([self.batch(chunk) for chunk in idx.split(batch_size)])


class TensorImages(Images):
    """Images held in memory as one ``(N, C, H, W)`` tensor."""

    def __init__(self, images: Tensor, name: str = "") -> None:
        if not isinstance(images, Tensor) or images.dim() != 4 or not images.is_floating_point():
            raise DataError(f"images must be a float tensor (N, C, H, W); got {type(images).__name__}")
        self.images = images
        self.name = name

    def __len__(self) -> int:
        return self.images.shape[0]

    def batch(self, indices: Tensor) -> Tensor:
        return self.images[indices]

    def all(self, batch_size: int = 256) -> Tensor:  # noqa: ARG002
        return self.images


class FileImages(Images):
    """Image files read lazily, batch by batch, resized to ``input_shape``."""

    def __init__(self, paths: Sequence[Path], input_shape: Sequence[int], name: str = "") -> None:
        self.paths = list(paths)
        self.input_shape = tuple(int(v) for v in input_shape)
        self.name = name

    def __len__(self) -> int:
        return len(self.paths)

    def batch(self, indices: Tensor) -> Tensor:
        from ..data import load_images

        return load_images([self.paths[int(i)] for i in indices], self.input_shape)


class SubsetImages(Images):
    """The images of ``images`` at ``indices``, in that order."""

    def __init__(self, images: Images, indices: Tensor) -> None:
        self.source = images
        self.indices = indices
        self.name = images.name

    def __len__(self) -> int:
        return int(self.indices.numel())

    def batch(self, indices: Tensor) -> Tensor:
        return self.source.batch(self.indices[indices])


def split_off(images: Images, share: float, generator: torch.Generator) -> tuple[Images, Images]:
    """``(the rest, a random share)``: the share (at least one image) is held out from the rest."""
    n = len(images)
    k = min(n - 1, max(1, round(share * n)))
    perm = torch.randperm(n, generator=generator)
    return SubsetImages(images, perm[k:].sort().values), SubsetImages(images, perm[:k].sort().values)


def image_files(root: Path) -> list[Path]:
    """Every image file under ``root`` (:func:`splice.imagefiles.list_image_files`); ``train/`` only if present
    (``Train/`` too, when every folder beside it names a split: :func:`splice.imagefolder.split_folders`)."""
    from ..imagefiles import list_image_files
    from ..imagefolder import split_folders

    return list_image_files(split_folders(root).get("train", root))


def files_sha256(spec) -> str | None:
    """A hash of which image files :func:`open_images` reads from the folder ``spec`` (their paths relative to it,
    their sizes in bytes), the same wherever the folder lies; ``None`` for the embedded data sets."""
    import hashlib

    from ..data import embedded
    from ..fileio import name_bytes

    if embedded(spec):
        return None
    root = Path(os.fspath(spec)).expanduser()
    h = hashlib.sha256()
    for path in image_files(root):  # name_bytes: a name that is not UTF-8 hashed as its bytes
        h.update(name_bytes(f"{path.relative_to(root).as_posix()}\t{path.stat().st_size}\n"))
    return h.hexdigest()


def open_images(spec: str, input_shape: Sequence[int], *, what: str = "site") -> Images:
    """The images of ``spec``: ``digits``, ``digits-moved`` (train split) or a folder; no label is read."""
    from ..data import DATASETS, embedded, open_data
    from ..imagefiles import bad_headers, read_all, refuse_unreadable

    if not isinstance(spec, (str, os.PathLike)) or not os.fspath(spec):
        raise DataError(f"the {what} images must be a folder or one of {', '.join(DATASETS)}; got {spec!r}")
    text = os.fspath(spec)
    if embedded(spec):
        return TensorImages(open_data(text, "train", input_shape=input_shape).images, text)
    root = Path(text).expanduser()
    if not root.is_dir():
        raise DataError(
            f"{what} images {text!r}: no such folder; pass a folder of images (flat, or an ImageFolder tree "
            f"whose labels are ignored) or one of {', '.join(DATASETS)}"
        )
    files = image_files(root)
    if not files:
        from ..imagefiles import image_suffixes

        raise DataError(
            f"{what} folder '{root}' holds no images; add files with one of the suffixes {', '.join(image_suffixes())}"
        )
    images = FileImages(files, input_shape, str(root.resolve()))
    pixels = len(files) * int(torch.tensor(images.input_shape).prod())
    where = f"in {what} folder '{root}'"
    if 4 * pixels <= MEMORY_LIMIT:  # decoded now: every file that fails is named at once
        return TensorImages(read_all(files, images.input_shape, where), images.name)
    refuse_unreadable(bad_headers(files), len(files), where)  # read batch by batch: the headers are checked now
    return images
