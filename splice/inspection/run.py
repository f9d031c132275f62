"""``splice inspect``: capture, describe, summarise and draw every warp of a spliced folder."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import Tensor

from ..fileio import json_safe
from ..errors import DataError, SpliceError
from ..folders import REPORT_FILE, REPORT_FORMAT, check_outside, check_report_folder
from ..options import refuse_several_inputs, refuse_unfit_inputs
from .capture import capture, check_positive_int
from .decompose import QUANTITY_HELP, describe_theta, quantities_for
from .plots import draw_histograms
from .sheets import SHEET_IMAGES, draw_contact_sheet, draw_outline_sheet
from .summary import CSV_QUANTITIES, SCHEMA_VERSION, csv_text, period_of, summarise

__all__ = ["inspect", "sample_indices"]


def sample_indices(labels: Tensor, n: int, seed: int = 0) -> Tensor:
    """``n`` dataset indices drawn across classes: a seeded shuffle within each class, then one class after another.

    A class-sorted ImageFolder would otherwise give a contact sheet of one
    class. Index ``i`` of the result comes from class ``i mod C`` while that
    class has images left (classes in label order), so any first ``k`` cover
    ``min(k, C)`` classes. The same ``seed`` gives the same sample.
    """
    gen = torch.Generator().manual_seed(seed)
    order = torch.randperm(labels.numel(), generator=gen)
    per_class = [order[labels[order] == c].tolist() for c in torch.unique(labels).tolist()]
    picked: list[int] = []
    depth = 0
    while len(picked) < min(n, labels.numel()):
        picked += [members[depth] for members in per_class if depth < len(members)]
        depth += 1
    return torch.tensor(picked[:n], dtype=torch.long)


def _sample_images(ds, n: int, seed: int = 0) -> tuple[Tensor, Tensor, Tensor]:
    """A seeded sample of ``n`` images of a split across its classes (all of them if it is smaller)."""
    if len(ds) == 0:
        raise DataError(f"the {getattr(ds, 'split', '')} split of {getattr(ds, 'name', 'the data')} holds no images; "
                        "choose another split or add images.")
    idx = sample_indices(torch.as_tensor(ds.labels, dtype=torch.long), n, seed)
    if isinstance(getattr(ds, "images", None), Tensor):
        images, labels = ds.images[idx], ds.labels[idx]
    else:
        items = [ds[int(i)] for i in idx]
        images = torch.stack([x for x, _ in items])
        labels = torch.tensor([int(y) for _, y in items], dtype=torch.long)
    return images.to(torch.float32), labels, idx


def _stride(input_shape, warp_shape) -> tuple[float, float]:
    """``(sy, sx)`` = input size / point size: the feature map's footprint on the input, which the drawings need
    (:class:`splice.graph.Point`'s ``stride`` is the ops' cumulative stride, which need not span the image)."""
    return (input_shape[1] / warp_shape[1], input_shape[2] / warp_shape[2])


def _safe_name(point: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in point)


@dataclass
class _Sample:
    """The inspected images with what is known about them."""

    images: Tensor
    labels: Tensor
    indices: Tensor
    classes: list[str] | None
    normalisation: dict | None
    input_shape: tuple[int, ...]
    model_classes: list[str] | None = None
    unlabelled: bool = False
    files: list[str] | None = None  # the image files of a folder, by sample position
    predicted: Tensor | None = None
    accuracy: float | None = None
    accuracy_note: str | None = None


def inspect(folder, *, data: str, n: int = 64, split: str = "test", out, trust_pickle: bool = False,
            sheet_images: int = SHEET_IMAGES, pictures: bool = True, trust_code: bool = False,
            overwrite: bool = False) -> dict:
    """Show what the warps of a spliced folder learned, on ``n`` images of a data split (a seeded sample across
    its classes, :func:`sample_indices`).

    Writes to ``out``: ``warps.csv`` (one row per image per warp, the
    quantities of :data:`QUANTITY_HELP`), ``summary.json`` (the returned dict)
    and, with ``pictures=True``, for each warp ``hist_<point>.png`` plus
    ``sheet_<point>.png`` (input-level warps: input | sampling grid | output for
    the first ``sheet_images`` images of the sample) or ``outline_<point>.png``
    (feature-level warps: the sampling outline projected onto the input).
    ``out`` may be new, empty or an earlier report (its ``summary.json`` says ``"format":
    "splice-inspect-report"``), whose files are replaced; any other folder is refused before any work unless
    ``overwrite=True`` (``--overwrite``), which writes the report beside what the folder holds. ``out`` inside
    the ``data`` folder is refused (its pictures would be read as images).

    Returns ``{"format", "schema_version", "model", "data", "split", "n_images",
    "accuracy", "accuracy_note", "warps": {point: {"family", "level", "shape", "stride",
    "quantities": {name: {"n", "mean", "std", "p5", "p95", "min", "max"}}}},
    "help", "files", "out"}``; statistics of a quantity with no finite value
    are ``None``, and a non-finite number is written as ``"inf"``, ``"-inf"``
    or ``"nan"`` (:func:`splice.fileio.json_safe`).

    >>> report = splice.inspect("out/tray-affine", data="digits-moved", out="out/report")  # doctest: +SKIP
    >>> report["warps"]["input"]["quantities"]["angle_deg"]["mean"]                           # doctest: +SKIP
    """
    from ..fileio import atomic_write_json, atomic_write_text, make_dir

    check_positive_int("n", n)
    check_positive_int("sheet_images", sheet_images)
    if out is None:
        raise SpliceError("inspect needs an output folder for its report; pass out=DIR (--out DIR).")
    check_report_folder(out, overwrite=overwrite)  # before any work: the user's files are not written over
    check_outside(out, data, "report folder", "images")
    model, warps, facts = _load(folder, trust_pickle, trust_code)
    sample = _sample(facts, data, split, n)
    cap = capture(model, sample.images, normalisation=sample.normalisation)
    _score(sample, cap.logits)
    outdir = make_dir(out)
    rows: list[dict] = []
    summary_warps: dict[str, dict] = {}
    files = {"csv": "warps.csv", "summary": REPORT_FILE, "pictures": []}
    for point, warp in warps.items():
        theta = cap.thetas[point]
        desc = describe_theta(warp, theta)
        summary_warps[point] = _warp_summary(point, warp, desc, sample)
        rows += _csv_rows(point, warp, desc, sample)
        if pictures:
            files["pictures"] += _draw(outdir, point, warp, theta, desc, sample,
                                      min(sheet_images, sample.images.shape[0]))
    atomic_write_text(outdir / "warps.csv", csv_text(rows))
    used = sorted({q for w in summary_warps.values() for q in w["quantities"]}, key=CSV_QUANTITIES.index)
    result = json_safe({
        "format": REPORT_FORMAT, "schema_version": SCHEMA_VERSION, "model": _name(folder), "data": str(data),
        "split": None if sample.unlabelled else split,
        "n_images": int(sample.images.shape[0]), "accuracy": sample.accuracy,
        "accuracy_note": sample.accuracy_note, "warps": summary_warps,
        "help": {q: QUANTITY_HELP[q] for q in used}, "files": files,
    })
    atomic_write_json(outdir / REPORT_FILE, result)
    result["out"] = str(outdir)
    return result


def _name(folder) -> str:
    from ..manifest import info_of

    info = info_of(folder) if not isinstance(folder, (str, os.PathLike)) else None
    return info.spec if info is not None else str(folder)


def _load(folder, trust_pickle: bool, trust_code: bool = False):
    """The spliced model of ``folder`` (or ``folder`` itself, a spliced model in memory, run on a twin), its warps
    and its record's facts."""
    from torch import nn

    from ..copies import private_buffers
    from ..manifest import info_of
    from ..store import load
    from ..surgery import warps_of

    if isinstance(folder, nn.Module) and info_of(folder) is not None:
        model = private_buffers(folder)  # the caller's model keeps its buffers and modes
    else:
        model = load(folder, trust_pickle=trust_pickle, trust_code=trust_code)
    warps = warps_of(model)
    if not warps:
        raise SpliceError(
            f"'{_name(folder)}' holds no warps, so there is nothing to inspect; give a folder written by "
            "'splice insert' or 'splice tune' with a warp recipe."
        )
    info = info_of(model)
    refuse_several_inputs("inspect", info.input_shapes if info is not None else ())
    refuse_unfit_inputs(model, info.input_shapes if info is not None else ())
    return model, warps, info


def _sample(facts, data: str, split: str, n: int) -> _Sample:
    from ..data import open_data

    input_shape = tuple(facts.input_shape)
    ds = _unlabelled(data, input_shape, facts.class_names)  # a site's images, else a labelled split
    if ds is None:
        ds = open_data(data, split, input_shape=input_shape)
    unlabelled = ds.classes == []
    classes = list(getattr(ds, "classes", []) or []) or facts.class_names
    images, labels, indices = _sample_images(ds, n)
    if facts.class_names and ds.classes:
        classes, labels = _by_name(list(facts.class_names), classes, labels)
    sample = _Sample(images=images, labels=labels, indices=indices, classes=classes,
                     normalisation=facts.normalisation, input_shape=input_shape,
                     model_classes=list(facts.class_names) if facts.class_names else None, unlabelled=unlabelled,
                     files=[str(ds.samples[int(i)][0]) for i in indices] if hasattr(ds, "samples") else None)
    if unlabelled:
        sample.accuracy_note = ("no accuracy: the images carry no labels (a site's folder: images, not folders of the "
                                "model's classes)")
    return sample


def _by_name(model_classes: list, classes: list, labels: Tensor) -> tuple[list, Tensor]:
    """Labels of class folders that are some of the model's classes (a labelled batch from a site of a few classes),
    renumbered by the model's own order of names, when every folder with images in the sample is one of them (an
    empty extra folder, such as ``__MACOSX/`` holding hidden files only, is passed over); else as they are."""
    from ..imagefolder import class_key

    index = {class_key(c): i for i, c in enumerate(model_classes)}
    names = [class_key(c) for c in classes]
    used = {int(k) for k in labels.unique()} if labels.numel() else set()
    if not names or not all(names[k] in index for k in used):  # a folder with images that is none of the classes
        return classes, labels
    names = [n if n in index else next(iter(index)) for n in names]  # an empty extra folder (__MACOSX): no label
    mapping = torch.tensor([index[n] for n in names], dtype=torch.long)
    return model_classes, mapping[labels]


def _unlabelled(data, input_shape, model_classes=None):
    """Every image under the folder ``data`` (as ``tune --site`` reads a site) as a split without labels (label
    -1), unless it is an ImageFolder tree: split folders, or subfolders of which one at least is named as one of
    ``model_classes`` (a typo or an extra folder is then the tree's mismatch, which inspect names); when the model
    names no classes, subfolders and no image file beside them. Subfolders none of which is a class of the model
    (a site's ``day1/``, ``day2/``) make it a site's. ``None`` for a data set name or a tree, which
    :func:`splice.data.open_data` reads and checks."""
    from ..data import ImageFolderSet
    from ..imagefiles import image_suffixes, list_image_files
    from ..imagefolder import class_key, split_folders

    root = Path(str(data))
    if not root.is_dir():
        return None
    visible = [p for p in root.iterdir() if not p.name.startswith(".")]
    dirs = [p for p in visible if p.is_dir()]
    loose = any(p.is_file() and p.suffix.lower() in image_suffixes() for p in visible)
    if dirs:
        if split_folders(root):
            return None
        known = {class_key(c) for c in model_classes or ()}
        if (not known and not loose) or any(class_key(d.name) in known for d in dirs):
            return None
    files = list_image_files(root)
    if not files:
        return None
    return ImageFolderSet(root, "images", [], [(f, -1) for f in files], input_shape, folder=root)


def _score(sample: _Sample, logits: Tensor | None) -> None:
    """Predicted classes and accuracy, when the model returns one logit per class."""
    from ..data import first_class_difference, same_classes, shown_classes

    classes = sample.classes
    if logits is None or (classes and logits.shape[1] != len(classes)):
        shape = "no (N, classes) logits" if logits is None else f"{logits.shape[1]} scores per image"
        extra = [c for c in classes or () if sample.model_classes and c not in sample.model_classes]
        sample.accuracy_note = sample.accuracy_note or (
            f"no accuracy or predictions: the model's output holds {shape}"
            + (f", and the classes are {len(classes)}" if classes and logits is not None else "")
            + (f" (folders that are none of the model's classes: {shown_classes(extra)})" if extra else ""))
        return
    if sample.unlabelled:
        sample.predicted = logits.argmax(dim=1)  # what the model says, with nothing to score it against
        return
    if sample.model_classes and classes and not same_classes(sample.model_classes, classes):
        sample.accuracy_note = (f"no accuracy: the model was trained on classes {shown_classes(sample.model_classes)} "
                                f"but the data has {shown_classes(classes)} ("
                                f"{first_class_difference(sample.model_classes, classes)}), so the labels would not "
                                "line up")
        return
    if classes:  # the early returns above leave logits of one score per class
        sample.predicted = logits.argmax(dim=1)
        sample.accuracy = float((sample.predicted == sample.labels).to(torch.float64).mean())


def _level(point: str) -> str:
    return "input" if point == "input" else "feature"


def _warp_summary(point: str, warp, desc: dict, sample: _Sample) -> dict:
    stride = _stride(sample.input_shape, warp.shape)
    return {
        "family": warp.family,
        "level": _level(point),
        "shape": list(warp.shape),
        "stride": [stride[0], stride[1]],
        "quantities": {q: summarise(desc[q], period=period_of(q))
                       for q in quantities_for(warp.family)},
    }


def _csv_rows(point: str, warp, desc: dict, sample: _Sample) -> list[dict]:
    rows = []
    for i in range(sample.images.shape[0]):
        row = {"image": int(sample.indices[i]), "label": "" if sample.unlabelled else int(sample.labels[i]),
               "predicted": "" if sample.predicted is None else int(sample.predicted[i]),
               "point": point, "family": warp.family, "file": sample.files[i] if sample.files else ""}
        row.update({q: float(desc[q][i]) for q in quantities_for(warp.family)})
        rows.append(row)
    return rows


def _draw(outdir: Path, point: str, warp, theta: Tensor, desc: dict, sample: _Sample, k: int) -> list[str]:
    """The sheet (input level) or outline (feature level) of the first ``k`` images, and the histograms."""
    name = _safe_name(point)
    images = sample.images
    common = {"labels": None if sample.unlabelled else sample.labels[:k], "classes": sample.classes,
              "indices": sample.indices[:k],
              "of": int(images.shape[0])}
    if _level(point) == "input":
        path = draw_contact_sheet(outdir / f"sheet_{name}.png", warp, point, theta[:k], images[:k],
                                  predicted=None if sample.predicted is None else sample.predicted[:k],
                                  normalisation=sample.normalisation, **common)
    else:
        path = draw_outline_sheet(outdir / f"outline_{name}.png", warp, point, theta[:k], images[:k],
                                  _stride(sample.input_shape, warp.shape), **common)
    hist = draw_histograms(outdir / f"hist_{name}.png", point, warp.family, desc)
    return [path.name, hist.name]
