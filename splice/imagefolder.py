"""ImageFolder trees: finding a tree's split and class folders, and one split read lazily.

A tree is ``DIR/train/<class>/*``, ``DIR/val/<class>/*``, optionally
``DIR/test/<class>/*``; split folders in another case (``Train/`` + ``Test/``)
count only when folders of ``DIR`` name two or more splits (:func:`split_folders`). Every
image file anywhere under a class folder belongs to that class; which files
count and how each is read is :mod:`splice.imagefiles`. The class folders of
the split being opened must be among those of ``train`` (names compared after
Unicode NFC normalisation); other splits are not looked at. A split other
than ``train`` may lack a class, or hold an empty class folder (one
:class:`DataWarning` names them); ``train`` may not. Classes are numbered in
the order of train's folder names as they are on disk, as torchvision's
``ImageFolder`` numbers them. Without ``train/`` the class list is the opened
split's own, and a folder of class folders with no split folder at all is
read as one ``val`` or ``test`` split.
"""

from __future__ import annotations

import os
import unicodedata
import warnings
from pathlib import Path

import torch
from torch import Tensor
from torch.utils.data import Dataset

from .errors import DataError, DataWarning
from .imagefiles import bad_headers, image_suffixes, list_image_files, read_image, refuse_unreadable
from .limits import image_pixel_cap, max_image_pixels

__all__ = ["SPLITS", "FOLDER_LAYOUT", "ImageFolderSet", "open_folder", "split_folders", "class_key"]

SPLITS = ("train", "val", "test")
FOLDER_LAYOUT = "DIR/train/<class>/*, DIR/val/<class>/*, optionally DIR/test/<class>/*"


class ImageFolderSet(Dataset):
    """One split of an ImageFolder tree, loaded lazily: items are ``(image (C, H, W), label)``."""

    def __init__(self, root: Path, split: str, classes: list[str], samples: list[tuple[Path, int]],
                 input_shape: tuple[int, int, int], *, folder: Path | None = None) -> None:
        self.root = root
        self.split = split
        self.folder = root / split if folder is None else folder
        self.name = str(root)
        self.classes = classes
        self.samples = samples
        self.input_shape = input_shape
        self.reference = None
        # the pixel cap in force when the split was opened, carried with it (a spawned DataLoader worker does not
        # inherit the caller's context, where --max-image-pixels sets the cap)
        self.pixel_cap = max_image_pixels()

    def __len__(self) -> int:
        return len(self.samples)

    def __getitem__(self, i):
        path, label = self.samples[i]
        with image_pixel_cap(self.pixel_cap):
            return read_image(path, self.input_shape), label

    @property
    def labels(self) -> Tensor:
        return torch.tensor([label for _, label in self.samples], dtype=torch.long)

    def check(self) -> None:
        """Decode every image once; raise one :class:`DataError` naming all that fail."""
        bad = []
        for path, _ in self.samples:
            try:
                with image_pixel_cap(self.pixel_cap):
                    read_image(path, self.input_shape)
            except DataError as exc:
                bad.append(f"{path} ({exc.__cause__ or exc})")
        refuse_unreadable(bad, len(self.samples), f"in {self.folder}")

    def bad_headers(self) -> list[str]:
        """:func:`bad_headers` of this split's images, under the pixel cap it was opened with."""
        with image_pixel_cap(self.pixel_cap):
            return bad_headers([path for path, _ in self.samples])

    def __repr__(self) -> str:
        return (f"ImageFolderSet(root={str(self.root)!r}, split={self.split!r}, "
                f"classes={len(self.classes)}, images={len(self.samples)})")



# ---------------------------------------------------------------------------
# finding splits and classes
# ---------------------------------------------------------------------------


def _visible_dirs(path: Path) -> list[Path]:
    """The folders in ``path`` (links to folders followed), hidden ones skipped; a broken link, which would have
    dropped a split or class unseen, is refused naming it."""
    entries = [p for p in path.iterdir() if not p.name.startswith(".")]
    broken = sorted(p for p in entries if p.is_symlink() and not p.exists())
    if broken:
        shown = "; ".join(f"{p} -> {os.readlink(p)}" for p in broken[:5])
        raise DataError(f"{len(broken)} link(s) in {path} point to nothing, where splice reads split and class "
                        f"folders: {shown}. Remove the links or restore what they point to.")
    return sorted((p for p in entries if p.is_dir()), key=lambda p: p.name)


def class_key(name) -> str:
    """The one form a class name is compared in: its text in Unicode NFC (a tree written on macOS, where names are
    decomposed, names the same classes as the same tree elsewhere)."""
    return unicodedata.normalize("NFC", str(name))


def _form(name: str) -> str:
    for form in ("NFC", "NFD"):
        if unicodedata.is_normalized(form, name):
            return form
    return "neither NFC nor NFD"


def _class_names(where: Path) -> dict[str, str]:
    """``{NFC name: folder name}`` of the class folders in ``where`` (a split folder, or a folder of classes)."""
    names: dict[str, str] = {}
    for d in _visible_dirs(where):
        key = class_key(d.name)
        if key in names:
            raise DataError(
                f"{where} holds two class folders whose names differ only in Unicode normalisation: "
                f"{names[key]!r} ({_form(names[key])}) and {d.name!r} ({_form(d.name)}), as when a tree is copied "
                "together from macOS and Linux; merge them into one folder."
            )
        names[key] = d.name
    if not names:
        loose = list_image_files(where)
        extra = (f" It holds {len(loose)} image files directly; move them into one subfolder per class."
                 if loose else "")
        raise DataError(f"{where} has no class folders; expected {where}/<class>/<image>.{extra}")
    return names


def _class_images(where: Path, names: dict[str, str], split: str) -> dict[str, list[Path]]:
    """``{NFC name: image files}``: every image anywhere under each class folder; an empty class is refused in
    ``train`` only (another split is only scored, so an empty folder there just has nothing to score)."""
    found = {key: list_image_files(where / name) for key, name in names.items()}
    empty = [names[key] for key, files in found.items() if not files]
    if empty and (split == "train" or len(empty) == len(names)):
        raise DataError(
            f"{where}: {len(empty)} class folder(s) hold no images: {', '.join(empty)}. "
            f"Add images (suffixes {', '.join(image_suffixes())}) or remove the empty folders."
        )
    return found


def _check_same_classes(root: Path, split: str, train: dict[str, str], other: dict[str, str]) -> None:
    """``split``'s class folders must be among train's: its labels are train's. A class it lacks is allowed."""
    extra = sorted(other[k] for k in other.keys() - train.keys())
    if extra:
        raise DataError(
            f"class folders differ between train and {split} in {root}: {split} has extra {', '.join(extra)}, "
            f"which train does not have. Remove them from {split}, or add them to train."
        )


def _note_lacking(split: str, where: Path, classes: list[str], files: dict[str, list[Path]]) -> None:
    """One :class:`DataWarning` naming the classes a split has no images of (missing or empty folders): their
    labels stay reserved, as torchvision's ``ImageFolder(allow_empty=True)`` keeps them."""
    lacking = [c for c in classes if not files.get(c)]
    if lacking:
        shown = ", ".join(lacking[:10]) + (f" and {len(lacking) - 10} more" if len(lacking) > 10 else "")
        warnings.warn(f"{split} has no images of {shown} (in {where}); the other classes keep their labels.",
                      DataWarning, stacklevel=4)


def split_folders(root: Path) -> dict[str, Path]:
    """``{split: folder}`` of the split folders in ``root``, in the order of :data:`SPLITS`.

    ``train``, ``val`` and ``test`` are always split folders. A name that is one
    of them only in another case (``Train``, ``VAL``) is a split folder only when
    folders of ``root`` name two or more splits in some case (``Train/`` +
    ``Test/``, with ``Validation/`` or anything else beside them), or every folder
    does; a lone one beside other folders is a class (``Bus/``, ``Car/``,
    ``Train/``), as torchvision's ``ImageFolder`` reads it. Two split folders for one split
    (``Test`` and ``test``) are refused.
    """
    dirs = _visible_dirs(root)
    named = [d.name.lower() for d in dirs if d.name.lower() in SPLITS]
    # Train/ + Test/ (+ Validation/, __MACOSX/): splits; Train/ alone beside Bus/ and Car/ (or train/): a class
    any_case = len(set(named)) >= 2 or len(named) == len(dirs)
    found: dict[str, Path] = {}
    for d in dirs:
        split = d.name.lower()
        if split not in SPLITS or (d.name != split and not any_case):
            continue
        if split in found:
            raise DataError(f"{root} holds two folders for the {split!r} split, {found[split].name!r} and "
                            f"{d.name!r}, whose names differ only in case; merge them into one folder.")
        found[split] = d
    return {s: found[s] for s in SPLITS if s in found}


def _split_folder(root: Path, split: str) -> tuple[Path, Path | None]:
    """The folder holding ``split``'s class folders, and ``root``'s ``train`` folder (``None`` without one).

    A folder without any split folder is one split of class folders: it is read
    as ``val`` or ``test``, never as ``train`` (training and validating on the
    same images would go unnoticed).
    """
    present = split_folders(root)
    if split in present:
        return present[split], present.get("train")
    if not present and split != "train":
        return root, None
    if split in ("train", "val"):  # the refusal names what is there (a second look at the folder, on this path only)
        others = [d.name for d in _visible_dirs(root) if d not in present.values()]
        found = ", ".join([d.name for d in present.values()] + others) or "nothing"
        alone = " (a folder of class folders alone is read only as a val or test split)" if not present else ""
        raise DataError(f"{root} has no {split!r} folder (found: {found}); lay it out as {FOLDER_LAYOUT}{alone}.")
    raise DataError(
        f"split {split!r} is not available in {root}; available splits: {', '.join(present)}. "
        f"Add {root / split}/<class>/* or choose one of those."
    )


def open_folder(root: Path, split: str, shape: tuple[int, int, int]) -> ImageFolderSet:
    """One split; its class folders are checked against train's only (tune never reads test, eval may lack train)."""
    if not root.is_dir():
        raise DataError(f"{root} is a file, not a folder; give an image folder laid out as {FOLDER_LAYOUT}.")
    where, train_folder = _split_folder(root, split)
    names = _class_names(where)
    train = names
    if train_folder is not None and split != "train":
        train = _class_names(train_folder)
        _check_same_classes(root, split, train, names)
    # train's folder names sorted as they are on disk, as torchvision's ImageFolder sorts them; NFC only names
    # the classes and matches them across splits and against a model's recorded classes
    classes = sorted(train, key=train.__getitem__)
    files = _class_images(where, names, split)
    if split != "train":
        _note_lacking(split, where, classes, files)
    samples = [(p, i) for i, name in enumerate(classes) for p in files.get(name, [])]
    return ImageFolderSet(root, split, classes, samples, shape, folder=where)


