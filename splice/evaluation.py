"""Accuracy and loss on a clean split and under distortion sweeps, optionally beside a second model.

A *sweep* is one kind of distortion at a list of *levels*. Every level is
applied to every image of the split, in [0, 1] and before normalisation, with
:mod:`splice.distort` (same semantics as ``torchvision.transforms.v2.functional``
``affine`` / ``perspective``; fill 0, bilinear):

``rotate`` (degrees, 0..180)
    image ``i`` turns by ``+level`` when ``i`` is even and ``-level`` when odd
    (``+`` = clockwise on screen, torchvision ``affine``'s sign), so a sweep is
    not biased to one side.
``scale`` (factor, > 0, up to 10)
    every image is scaled by ``level`` about its centre (< 1 shrinks).
``shift`` (fraction of the image size, 0..1)
    image ``i`` moves by ``level`` of the width or height, in the direction
    right, down, left, up for ``i % 4 = 0, 1, 2, 3``.
``perspective`` (strength, 0..1)
    each corner of image ``i`` moves inwards by ``u * level`` of half the image
    size, with ``u`` uniform in [0, 1) drawn once per image and corner from a
    generator seeded with ``seed`` (:func:`splice.distort.random_perspective_points`),
    so the same ``u`` serve every level and higher levels only grow the motion.

With ``against``, the second model sees exactly the same distorted [0, 1]
images (each model then applies its own normalisation).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import torch
from torch import Tensor, nn
from torch.nn import functional as F

from .compare import class_logits, logits_or_refuse
from .copies import tree_copy
from .errors import DataError, SpliceError, suggest
from .options import ModelOptions, load_against, refuse_several_inputs, refuse_unfit_inputs, split_keywords

__all__ = [
    "improved",
    "SCHEMA_VERSION",
    "DEFAULT_SWEEPS",
    "SWEEP_KINDS",
    "SWEEP_UNITS",
    "parse_distort",
    "sweep_images",
    "EvalOptions",
    "evaluate",
    "evaluate_keywords",
    "render_eval",
    "draw_sweep_plot",
]

SCHEMA_VERSION = 1
# Default levels: rotations up to 60 degrees and shifts up to 0.3 cover what the
# tray camera sees (digits-moved draws +-60 degrees and +-0.25 of the size);
# the rest are common practice, no source.
DEFAULT_SWEEPS: dict[str, tuple[float, ...]] = {
    "rotate": (0.0, 15.0, 30.0, 45.0, 60.0),
    "scale": (0.7, 0.85, 1.0, 1.15, 1.3),
    "shift": (0.0, 0.1, 0.2, 0.3),
    "perspective": (0.0, 0.2, 0.4),
}
SWEEP_KINDS = tuple(DEFAULT_SWEEPS)
SWEEP_UNITS = {
    "rotate": "rotation (degrees, sign alternating per image)",
    "scale": "scale factor",
    "shift": "shift (fraction of the image size)",
    "perspective": "perspective strength (fraction of half the size)",
}
# (low, high, low_inclusive) for each kind's levels
_RANGES = {"rotate": (0.0, 180.0, True), "scale": (0.0, 10.0, False), "shift": (0.0, 1.0, True),
           "perspective": (0.0, 1.0, True)}
_EXAMPLE = "rotate=0,30,60;scale=0.8,1.2;shift=0.1;perspective=0.3"


# ----------------------------------------------------------------------------- the sweep spec


def _spec_error(what: str, spec: str) -> DataError:
    return DataError(
        f"{what} in --distort {spec!r}. Write KEY=LEVELS separated by ';', with keys "
        f"{', '.join(SWEEP_KINDS)} and comma-separated numbers, e.g. '{_EXAMPLE}' (or 'none' for clean only)."
    )


def parse_distort(spec: str | Mapping[str, Sequence[float]] | None) -> dict[str, tuple[float, ...]]:
    """Sweep levels from a ``--distort`` string, a mapping, or ``None`` (the defaults).

    ``"rotate=0,30,60;scale=0.8,1.2"`` sweeps only the kinds it names;
    ``"none"`` (or ``""``) sweeps nothing (clean accuracy only).

    >>> parse_distort("rotate=0,30;shift=0.1")
    {'rotate': (0.0, 30.0), 'shift': (0.1,)}
    """
    if spec is None:
        return dict(DEFAULT_SWEEPS)
    if isinstance(spec, Mapping):
        text = ";".join(f"{k}={','.join(str(v) for v in (vals if isinstance(vals, Sequence) else [vals]))}"
                        for k, vals in spec.items())
        return parse_distort(text) if text else {}
    if not isinstance(spec, str):
        raise DataError(f"distort must be a string such as '{_EXAMPLE}', a mapping or None; got {type(spec).__name__}.")
    if spec.strip().lower() in ("", "none"):
        return {}
    out: dict[str, tuple[float, ...]] = {}
    for token in (t.strip() for t in spec.split(";")):
        if not token:
            continue
        key, sep, rest = token.partition("=")
        key = key.strip().lower()
        if not sep:
            raise _spec_error(f"token {token!r} is not KEY=LEVELS", spec)
        if key not in SWEEP_KINDS:
            hint = suggest(key, SWEEP_KINDS)
            raise _spec_error(f"unknown distortion {key!r} in token {token!r}{hint}", spec)
        if key in out:
            raise _spec_error(f"distortion {key!r} is given twice", spec)
        levels = []
        for raw in rest.split(","):
            raw = raw.strip()
            try:
                value = float(raw)
            except ValueError:
                raise _spec_error(f"level {raw!r} of {key!r} is not a number", spec) from None
            low, high, low_inclusive = _RANGES[key]
            ok = math.isfinite(value) and (value >= low if low_inclusive else value > low) and value <= high
            if not ok:
                bracket = "[" if low_inclusive else "("
                raise _spec_error(f"level {raw!r} of {key!r} is outside {bracket}{low:g}, {high:g}] "
                                  f"({SWEEP_UNITS[key]})", spec)
            levels.append(value)
        out[key] = tuple(levels)
    if not out:
        raise _spec_error("no KEY=LEVELS token", spec)
    return out


# ----------------------------------------------------------------------------- distorted images


def _perspective_points(h: int, w: int, level: float, n: int, seed: int) -> tuple[Tensor, Tensor]:
    from .distort import random_perspective_points

    gen = torch.Generator().manual_seed(int(seed))
    return random_perspective_points(h, w, level, gen, n=n)


def sweep_images(images: Tensor, kind: str, level: float, *, seed: int = 0, first_index: int = 0,
                 total: int | None = None) -> Tensor:
    """``images`` (``(N, C, H, W)`` in [0, 1]) distorted by one sweep level, as :func:`evaluate` feeds them.

    ``first_index`` is the split index of ``images[0]`` (the per-image signs,
    directions and perspective corners depend on the index, not on the batch);
    ``total`` is the split size (the perspective corners are drawn for all
    ``total`` images at once, so batching never changes them).
    """
    from . import distort

    if kind not in SWEEP_KINDS:
        raise DataError(f"unknown distortion {kind!r}{suggest(kind, SWEEP_KINDS)} use one of {', '.join(SWEEP_KINDS)}.")
    n, _, h, w = images.shape
    idx = torch.arange(first_index, first_index + n)
    x = images
    if kind == "rotate":
        sign = 1.0 - 2.0 * (idx % 2).to(torch.float64)
        return distort.apply_affine(x, sign * float(level), 1.0, (0.0, 0.0), fill=0.0)
    if kind == "scale":
        return distort.apply_affine(x, 0.0, float(level), (0.0, 0.0), fill=0.0)
    if kind == "shift":
        directions = torch.tensor([[1.0, 0.0], [0.0, 1.0], [-1.0, 0.0], [0.0, -1.0]], dtype=torch.float64)
        return distort.apply_affine(x, 0.0, 1.0, directions[idx % 4] * float(level), fill=0.0)
    total = first_index + n if total is None else total
    start, end = _perspective_points(h, w, float(level), total, seed)
    return distort.apply_perspective(x, start[first_index:first_index + n], end[first_index:first_index + n],
                                     fill=0.0)


# ----------------------------------------------------------------------------- models and data


def _prepare(source, device: torch.device, given) -> nn.Module:
    """The source's model in eval mode on ``device``; a module the caller passed in is copied first."""
    model = tree_copy(source.model) if isinstance(given, nn.Module) else source.model
    return model.to(device).eval()


def _label(given) -> str:
    return given if isinstance(given, str) else f"<{type(given).__name__}>"


def _batches(ds, batch_size: int, n: int):
    """``(first_index, images, labels)`` batches of the first ``n`` images of a split, in order."""
    held = isinstance(getattr(ds, "images", None), Tensor)
    for start in range(0, n, batch_size):
        stop = min(n, start + batch_size)
        if held:
            yield start, ds.images[start:stop], ds.labels[start:stop]
        else:
            items = [ds[i] for i in range(start, stop)]
            yield (start, torch.stack([x for x, _ in items]),
                   torch.tensor([int(y) for _, y in items], dtype=torch.long))


def _check_classes(logits, classes: list[str], who: str, source, data: str) -> None:
    from .data import first_class_difference, same_classes, shown_classes
    if not isinstance(logits, Tensor) or logits.dim() != 2:
        shape = tuple(logits.shape) if isinstance(logits, Tensor) else type(logits).__name__
        raise DataError(f"{who} returns {shape}, not (N, classes) logits; evaluate needs a classifier.")
    k = logits.shape[1]
    if k != len(classes):
        raise DataError(
            f"{who} outputs {k} classes but {data} has {len(classes)} ({', '.join(classes[:12])}"
            f"{', ...' if len(classes) > 12 else ''}); evaluate it on data with the same classes, or build "
            f"it for this data (e.g. --kwargs '{{\"num_classes\": {len(classes)}}}' and matching --weights)."
        )
    names = getattr(source, "class_names", None)
    if names and not same_classes(names, classes):
        raise DataError(
            f"{who} was trained on classes {shown_classes(names)} but {data} has {shown_classes(classes)} in that "
            f"order ({first_class_difference(names, classes)}); "
            "the labels would not line up. Use data with the same class folders."
        )


class _Tally:
    """Running correct count and summed loss of one model on one condition."""

    __slots__ = ("correct", "loss", "n")

    def __init__(self) -> None:
        self.correct, self.loss, self.n = 0, 0.0, 0

    def add(self, logits: Tensor, labels: Tensor) -> None:
        logits = logits.float()
        self.correct += int((logits.argmax(dim=1) == labels).sum())
        self.loss += float(F.cross_entropy(logits, labels, reduction="sum"))
        self.n += labels.shape[0]

    def result(self) -> dict[str, float]:
        return {"accuracy": self.correct / self.n, "loss": self.loss / self.n}


# ----------------------------------------------------------------------------- evaluate


@dataclass(frozen=True)
class EvalOptions:
    """How :func:`evaluate` runs: ``batch_size`` images per forward pass, ``device`` (``cpu``,
    ``cuda[:N]``, ``mps``; ``None`` picks cuda, then mps, then cpu), ``seed`` of the perspective
    corners, ``limit``: evaluate only the first ``limit`` images of the split (quick checks)."""

    batch_size: int = 128
    device: str | None = None
    seed: int = 0
    limit: int | None = None

    def __post_init__(self) -> None:
        if isinstance(self.batch_size, bool) or not isinstance(self.batch_size, int) or self.batch_size < 1:
            raise DataError(f"batch_size must be a positive integer; got {self.batch_size!r}.")
        if self.limit is not None and (isinstance(self.limit, bool) or not isinstance(self.limit, int)
                                       or self.limit < 1):
            raise DataError(f"limit must be a positive number of images or None; got {self.limit!r}.")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int):
            raise DataError(f"seed must be an integer; got {self.seed!r}.")


def evaluate(model, *, data: str, split: str = "test", against=None, distort=None, plot=None,
             model_options: ModelOptions | None = None, options: EvalOptions | None = None,
             against_options: ModelOptions | None = None) -> dict:
    """Accuracy and mean cross-entropy of ``model`` on a split, clean and under distortion sweeps.

    ``model`` and ``against`` are anything :func:`splice.sources.load_source`
    takes (spec string, spliced or plain folder, ``nn.Module``);
    ``model_options`` (:class:`~splice.options.ModelOptions`) apply to
    ``model``; of ``against_options``, only ``trust_pickle`` and ``trust_code`` are read, for ``against``
    (an opt-in is for one use: trusting the first model's file trusts nothing
    the second names). ``distort`` is a
    ``--distort`` string or mapping (see :func:`parse_distort`; ``None`` is
    :data:`DEFAULT_SWEEPS`). ``plot`` is a PNG path for the accuracy-vs-level
    figure; no plot is written unless it is given. ``options``
    (:class:`EvalOptions`): batch size, device, seed, limit.
    :func:`evaluate_keywords` takes every option as a flat keyword instead.

    Returns::

        {"schema_version": 1, "model": str, "against_model": str | None,
         "data": str, "split": str, "n_images": int, "classes": [str, ...],
         "device": str, "seed": int,
         "clean": {"accuracy": float in [0, 1], "loss": float},
         "sweeps": {kind: [{"level": float, "accuracy": float, "loss": float}, ...]},
         "against": {"clean": {...}, "sweeps": {...}} | None,
         "plot": str | None}
    """
    from .data import open_data
    from .folders import check_outside
    from .pictures import check_png_target
    from .training.distributed import pick_device

    if plot is not None:  # before any work: a plot never replaces a file of the user's
        check_png_target(plot, "--plot target")
        check_outside(plot, data, "--plot target", "images")
    sweeps = parse_distort(distort)
    model_options = model_options or ModelOptions()
    options = options or EvalOptions()
    dev = pick_device(options.device)
    models = _load_models(model, against, model_options, against_options or ModelOptions(), dev)
    src = models[0][2]
    ds = open_data(data, split, input_shape=src.input_shape)
    classes = [str(c) for c in ds.classes]
    n = len(ds) if options.limit is None else min(options.limit, len(ds))
    if n == 0:
        raise DataError(f"the {split} split of {data} holds no images; choose another split.")
    conditions = [("clean", None)] + [(kind, level) for kind, levels in sweeps.items() for level in levels]
    tallies = _tally(models, ds, n, conditions, classes, str(data), options, dev)

    def block(role: str) -> dict:
        return {
            "clean": tallies[(role, ("clean", None))].result(),
            "sweeps": {kind: [{"level": level, **tallies[(role, (kind, level))].result()} for level in levels]
                       for kind, levels in sweeps.items()},
        }

    mine = block("model")
    result = {
        "schema_version": SCHEMA_VERSION, "model": models[0][1],
        "against_model": models[1][1] if against is not None else None,
        "data": str(data), "split": split, "n_images": n, "classes": classes, "device": str(dev),
        "seed": int(options.seed), "clean": mine["clean"], "sweeps": mine["sweeps"],
        "against": block("against") if against is not None else None, "plot": None,
    }
    if plot is not None:
        result["plot"] = str(draw_sweep_plot(result, plot))
    return result


def improved(start, tuned, *, data: str, split: str = "test") -> dict:
    """Did a fine-tune improve on the model it started from? The check a fair control must pass.

    ``start`` and ``tuned`` are model sources (folders, typically ``BASE/best`` and ``RUN/best``). Returns
    ``{"start_error", "tuned_error", "improved"}`` with clean errors on ``data``/``split``; ``improved`` is True
    only when the tuned error is strictly lower. A run that never beat its start on validation keeps the
    unchanged start as ``best/``, and is flagged here.
    """
    both = evaluate(tuned, data=data, split=split, against=start, distort="none")
    start_error = 1.0 - both["against"]["clean"]["accuracy"]
    tuned_error = 1.0 - both["clean"]["accuracy"]
    return {"start_error": start_error, "tuned_error": tuned_error, "improved": tuned_error < start_error}


def evaluate_keywords(model, *, data: str, split: str = "test", against=None, distort=None, plot=None,
                      **keywords) -> dict:
    """:func:`evaluate` with the fields of :class:`~splice.options.ModelOptions` and
    :class:`EvalOptions` as flat keywords (``weights=``, ``batch_size=``, ``device=``, …), and the opt-ins for
    ``against`` as ``against_trust_code=`` and ``against_trust_pickle=``."""
    against_options = ModelOptions(trust_code=keywords.pop("against_trust_code", False),
                                   trust_pickle=keywords.pop("against_trust_pickle", False))
    model_options, options = split_keywords(keywords, (ModelOptions, EvalOptions), "evaluate")
    return evaluate(model, data=data, split=split, against=against, distort=distort, plot=plot,
                    model_options=model_options, options=options, against_options=against_options)


def _load_models(model, against, model_options: ModelOptions, against_options: ModelOptions, dev) -> list[tuple]:
    """``[(role, label, source, module on dev in eval mode)]`` for the model and ``against``."""
    src = model_options.load(model)
    if src.input_shape is None:
        raise SpliceError("evaluate needs the model's input shape; pass --input-shape CxHxW (Python: "
                          "model_options=ModelOptions(input_shape=(C, H, W)))")
    refuse_several_inputs("evaluate", src.input_shapes)
    refuse_unfit_inputs(src.model, src.input_shapes)
    models = [("model", _label(model), src, _prepare(src, dev, model))]
    if against is not None:
        other = ModelOptions(input_shape=src.input_shape if isinstance(against, nn.Module) else None,
                             trust_pickle=against_options.trust_pickle, trust_code=against_options.trust_code)
        # both models see the same preprocessed images: a second model that declares no shape takes the first's
        src2 = load_against(against, other, src.input_shape)
        refuse_several_inputs("evaluate", src2.input_shapes, "--against")
        refuse_unfit_inputs(src2.model, src2.input_shapes, "the --against model")
        if src2.input_shape is not None and tuple(src2.input_shape) != tuple(src.input_shape):
            raise DataError(
                f"the two models take different inputs ({'x'.join(map(str, src.input_shape))} and "
                f"{'x'.join(map(str, src2.input_shape))}); they can only be compared on the same images."
            )
        models.append(("against", _label(against), src2, _prepare(src2, dev, against)))
    return models


@torch.no_grad()
def _tally(models, ds, n: int, conditions, classes: list[str], data: str, options: EvalOptions, dev) -> dict:
    """Correct counts and losses of every model under every condition, batch by batch."""
    from .data import normalise

    tallies = {(role, cond): _Tally() for role, *_ in models for cond in conditions}
    checked = set()
    for first, images, labels in _batches(ds, options.batch_size, n):
        images = images.to(torch.float32)
        for cond in conditions:
            kind, level = cond
            x = images if kind == "clean" else sweep_images(images, kind, level, seed=options.seed,
                                                             first_index=first, total=n)
            for role, name, source, net in models:
                param = next(iter(net.parameters()), None)
                dtype = param.dtype if param is not None else torch.float32
                fed = normalise(x, source.normalisation).to(device=dev, dtype=dtype)
                # a forward may normalise its input in place: the next model and condition get the images
                out = net(fed.clone() if fed.data_ptr() == x.data_ptr() else fed)
                logits = class_logits(out)
                if logits is None:
                    logits_or_refuse(out, f"model {name}")  # says what it returns instead
                if role not in checked:
                    _check_classes(logits, classes, f"model {name}", source, data)
                    checked.add(role)
                tallies[(role, cond)].add(logits.to("cpu"), labels)
    return tallies


# ----------------------------------------------------------------------------- screen and picture


def _short(name: str | None, limit: int = 40) -> str:
    name = name or ""
    return name if len(name) <= limit else "…" + name[-(limit - 1):]


def render_eval(result: Mapping, console) -> None:
    """One table: every condition's accuracy and loss, both models side by side with the difference."""
    from rich.table import Table

    other = result.get("against")
    table = Table(title=f"{result['model']} on {str(result['data']).rstrip('/')}/{result['split']} "
                        f"({result['n_images']} images)",
                  title_justify="left")
    table.add_column("distortion", justify="left")
    table.add_column("level", justify="right")
    table.add_column("accuracy", justify="right")
    table.add_column("loss", justify="right")
    if other is not None:
        table.add_column(f"accuracy ({_short(result['against_model'], 24)})", justify="right")
        table.add_column("loss", justify="right")
        table.add_column("Δ accuracy", justify="right")

    def row(kind: str, level: str, mine: Mapping, theirs: Mapping | None) -> None:
        cells = [kind, level, f"{mine['accuracy']:.4f}", f"{mine['loss']:.4f}"]
        if theirs is not None:
            cells += [f"{theirs['accuracy']:.4f}", f"{theirs['loss']:.4f}",
                      f"{mine['accuracy'] - theirs['accuracy']:+.4f}"]
        table.add_row(*cells)

    row("clean", "-", result["clean"], other["clean"] if other else None)
    for kind, entries in result["sweeps"].items():
        for i, entry in enumerate(entries):
            row(kind, f"{entry['level']:g}", entry, other["sweeps"][kind][i] if other else None)
    console.print(table)
    if other is not None:
        console.print(f"Δ accuracy = {result['model']} minus {result['against_model']}")
    if result.get("plot"):
        console.print(f"wrote {result['plot']}")


def draw_sweep_plot(result: Mapping, path):
    """PNG of accuracy against level, one panel per distortion kind, one curve per model."""
    from .pictures import FONT_SIZE, OKABE_ITO, new_figure, save_png

    kinds = list(result["sweeps"])
    cells = max(1, len(kinds))
    cell_w, cell_h, header = 380, 330, 70
    size = (cells * cell_w, header + cell_h)
    fig = new_figure(*size)
    w, h = size
    fig.text(12 / w, 1 - 12 / h, f"Accuracy under distortion: {result['data']}/{result['split']} "
             f"({result['n_images']} images)", ha="left", va="top", fontsize=FONT_SIZE + 3, weight="bold")
    curves = [(result["model"], result, OKABE_ITO["blue"], "-", "o")]
    if result.get("against"):
        curves.append((result["against_model"], result["against"], OKABE_ITO["orange"], "--", "s"))
    fig.text(12 / w, 1 - 40 / h, "dotted lines: each model's clean accuracy", ha="left", va="top",
             fontsize=FONT_SIZE)
    handles = []
    for k, kind in enumerate(kinds or ["(no sweep)"]):
        ax = fig.add_axes(((k * cell_w + 60) / w, 52 / h, (cell_w - 80) / w, (cell_h - 80) / h))
        for name, block, colour, style, marker in curves:
            ax.axhline(block["clean"]["accuracy"], color=colour, lw=1.0, ls=":")
            if kinds:
                entries = block["sweeps"][kind]
                line, = ax.plot([e["level"] for e in entries], [e["accuracy"] for e in entries], color=colour,
                                ls=style, marker=marker, lw=2.0, ms=6, label=_short(name, 48))
                if k == 0:
                    handles.append(line)
        ax.set_ylim(0.0, 1.02)
        ax.set_xlabel(SWEEP_UNITS.get(kind, kind), fontsize=FONT_SIZE)
        ax.set_ylabel("accuracy", fontsize=FONT_SIZE)
        ax.set_title(kind, fontsize=FONT_SIZE + 1)
        ax.tick_params(labelsize=FONT_SIZE - 1)
        ax.grid(True, color="#cccccc", lw=0.6)
    if handles:
        fig.legend(handles=handles, loc="upper right", bbox_to_anchor=(1 - 12 / w, 1 - 8 / h), ncols=1,
                   fontsize=FONT_SIZE, frameon=False)
    return save_png(fig, path, "--plot target")
