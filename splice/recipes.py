"""Recipes: how ``splice tune`` trains, as validated dataclasses read from TOML.

Four recipes ship with splice (``recipes/*.toml``): ``baseline``, ``warp-only``, ``joint`` and ``staged``.
``load_recipe(NAME)`` reads a shipped one; ``load_recipe("path/to/file.toml")``
reads a file. Every key is checked: an unknown key or a bad value raises
:class:`~splice.errors.RecipeError` naming the key, the file and what is allowed.

A recipe file (schema version 1)::

    schema_version = 1
    mode = "joint"            # baseline | warp-only | joint | staged
    optimizer = "adamw"       # sgd | adamw
    lr = 0.001
    ...
    [augment]                 # training-time distortions (splice.distort.DistortionRange)
    rotation = 10.0
    [pretrain]                # warp-head pre-training with known warps
    epochs = 20

The resolved recipe (after command-line overrides) is written into the run
folder as ``recipe.toml`` by :func:`dump_recipe`; it is read back only through
these dataclasses (:meth:`Recipe.from_dict`), never by importing names from the
file.
"""

from __future__ import annotations

import dataclasses
import math
import numbers
import os
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from .errors import RecipeError, suggest

if sys.version_info >= (3, 11):
    import tomllib as _toml
else:  # pragma: no cover - Python 3.10
    import tomli as _toml

__all__ = [
    "RECIPE_SCHEMA_VERSION",
    "MODES",
    "OPTIMIZERS",
    "SCHEDULES",
    "REFERENCES",
    "Augment",
    "Pretrain",
    "Recipe",
    "load_recipe",
    "shipped_recipes",
    "dump_recipe",
    "recipe_to_toml",
]

RECIPE_SCHEMA_VERSION = 1
MODES = ("baseline", "warp-only", "joint", "staged")
OPTIMIZERS = ("sgd", "adamw")
SCHEDULES = ("cosine", "step", "constant")
# Where warp pre-training takes its images: "auto" uses the data set's upright
# reference when it has one (digits-moved -> digits), else the training images;
# "train" always uses the training images; anything else names a data set
# (digits, or an ImageFolder DIR) whose train split is the reference.
REFERENCES = ("auto", "train")
WARP_MODES = ("warp-only", "joint", "staged")


# ----------------------------------------------------------------------------- value checks


def _is_number(v: Any) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(float(v))


def _number(owner: str, name: str, v: Any, *, low: float | None = None, high: float | None = None,
            low_open: bool = False, hint: str = "") -> float:
    span = []
    if low is not None:
        span.append(f"{'>' if low_open else '>='} {low:g}")
    if high is not None:
        span.append(f"<= {high:g}")
    want = f"a number {' and '.join(span)}" if span else "a number"
    if not _is_number(v):
        raise ValueError(f"{owner}{name} must be {want}; got {v!r}{hint}")
    f = float(v)
    if low is not None and (f <= low if low_open else f < low):
        raise ValueError(f"{owner}{name} must be {want}; got {v!r}{hint}")
    if high is not None and f > high:
        raise ValueError(f"{owner}{name} must be {want}; got {v!r}{hint}")
    return f


def _integer(owner: str, name: str, v: Any, *, low: int = 0, hint: str = "") -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < low:
        raise ValueError(f"{owner}{name} must be an integer >= {low}; got {v!r}{hint}")
    return int(v)


def _choice(owner: str, name: str, v: Any, allowed: Sequence[str]) -> str:
    if not isinstance(v, str) or v not in allowed:
        hint = suggest(v, allowed) if isinstance(v, str) else ""
        raise ValueError(
            f"{owner}{name} = {v!r} is not allowed{hint or ';'} use one of "
            + ", ".join(repr(a) for a in allowed)
        )
    return v


def _boolean(owner: str, name: str, v: Any) -> bool:
    if not isinstance(v, bool):
        raise ValueError(f"{owner}{name} must be true or false; got {v!r}")
    return v


def _scale_pair(owner: str, name: str, v: Any) -> tuple[float, float]:
    ok = (isinstance(v, Sequence) and not isinstance(v, str) and len(v) == 2
          and all(_is_number(x) for x in v) and 0 < float(v[0]) <= float(v[1]))
    if not ok:
        raise ValueError(
            f"{owner}{name} must be a pair [low, high] with 0 < low <= high, e.g. [0.8, 1.2] "
            f"([1.0, 1.0] for none); got {v!r}"
        )
    return (float(v[0]), float(v[1]))


# ----------------------------------------------------------------------------- sections


@dataclass
class Augment:
    """Training-time random distortions (see :class:`splice.distort.DistortionRange`).

    ``rotation`` is the largest |angle| in degrees, ``scale`` a ``[low, high]``
    range, ``shift`` the largest |shift| as a fraction of the image size per
    axis, ``perspective`` the corner-offset strength (0..1), ``crop`` the
    largest fraction of the area cropped away (0..1), ``hflip``/``vflip`` flip
    with probability 1/2. All zero (the default) means no augmentation.
    """

    rotation: float = 0.0
    scale: tuple[float, float] = (1.0, 1.0)
    shift: float = 0.0
    perspective: float = 0.0
    hflip: bool = False
    vflip: bool = False
    crop: float = 0.0

    _owner = "augment."

    def __post_init__(self) -> None:
        o = self._owner
        self.rotation = _number(o, "rotation", self.rotation, low=0, high=180, hint=" (largest |angle| in degrees)")
        self.scale = _scale_pair(o, "scale", self.scale)
        self.shift = _number(o, "shift", self.shift, low=0, high=1, hint=" (fraction of the image size)")
        self.perspective = _number(o, "perspective", self.perspective, low=0, high=1)
        self.hflip = _boolean(o, "hflip", self.hflip)
        self.vflip = _boolean(o, "vflip", self.vflip)
        self.crop = _number(o, "crop", self.crop, low=0, high=0.99, hint=" (fraction of the area removed)")

    def to_range(self):
        """The equivalent :class:`splice.distort.DistortionRange`."""
        from .distort import DistortionRange

        return DistortionRange(rotation_deg=self.rotation, scale=self.scale, shift=self.shift,
                               perspective=self.perspective, hflip=self.hflip, vflip=self.vflip, crop=self.crop)

    @property
    def is_identity(self) -> bool:
        return self.to_range().is_identity


@dataclass
class Pretrain:
    """Warp-head pre-training: regress each head onto known random warps.

    Each step draws distortions from ``rotation``/``scale``/``shift``/
    ``perspective`` (same meaning as in ``[augment]``), applies them to
    reference images, and trains the heads so that their sampling grid matches
    the grid that undoes the distortion (mean squared error between grids, in
    normalised coordinates). Only the heads change; the base is untouched.

    ``epochs = 0`` switches pre-training off. ``reference`` picks the images:
    ``"auto"`` (the data set's upright reference if it has one, e.g.
    digits-moved -> digits, else its training images), ``"train"`` (the
    training images), or a data set name / folder.
    """

    epochs: int = 0
    lr: float = 0.003
    batch_size: int = 64
    weight_decay: float = 0.0
    reference: str = "auto"
    rotation: float = 0.0
    scale: tuple[float, float] = (1.0, 1.0)
    shift: float = 0.0
    perspective: float = 0.0

    def __post_init__(self) -> None:
        o = "pretrain."
        self.epochs = _integer(o, "epochs", self.epochs)
        self.lr = _number(o, "lr", self.lr, low=0, low_open=True, high=10)
        self.batch_size = _integer(o, "batch_size", self.batch_size, low=1)
        self.weight_decay = _number(o, "weight_decay", self.weight_decay, low=0, high=1)
        if not isinstance(self.reference, str) or not self.reference:
            raise ValueError(
                f"pretrain.reference must be 'auto', 'train', or a data set name / folder; got {self.reference!r}"
            )
        self.rotation = _number(o, "rotation", self.rotation, low=0, high=180)
        self.scale = _scale_pair(o, "scale", self.scale)
        self.shift = _number(o, "shift", self.shift, low=0, high=1)
        self.perspective = _number(o, "perspective", self.perspective, low=0, high=1)

    def to_range(self):
        """The distortions the heads learn to undo, as a :class:`~splice.distort.DistortionRange`."""
        from .distort import DistortionRange

        return DistortionRange(rotation_deg=self.rotation, scale=self.scale, shift=self.shift,
                               perspective=self.perspective)


# ----------------------------------------------------------------------------- the recipe


@dataclass
class Recipe:
    """Everything ``splice tune`` needs to know about how to train.

    Modes:

    - ``baseline``: a model without warps; everything (except ``freeze``) trains.
    - ``warp-only``: the base is frozen (``requires_grad=False``, every base
      module in eval mode, so BatchNorm statistics do not move); only the warp
      heads train. The base tensors stay bit-for-bit identical.
    - ``joint``: everything trains; warp heads at ``warp_lr_scale * lr``.
    - ``staged``: ``warp-only`` for the first ``round(warp_only_fraction * epochs)``
      epochs, then ``joint`` (a fraction, so ``--epochs`` keeps the proportion).

    Learning-rate schedule: linear warm-up over ``warmup_epochs`` (fractions
    allowed), then ``cosine`` (to 0 at the end), ``step`` (times
    ``step_gamma`` every ``step_epochs``) or ``constant``.

    ``identity_reg`` adds ``identity_reg * identity_reg_decay**epoch`` times
    the mean squared distance between each warp's sampling grid and the
    identity grid to the loss (0 switches it off). ``grad_clip`` bounds the
    global gradient norm (0 = off). ``eval_every`` counts epochs between
    evaluations; ``patience`` stops after that many evaluations without a
    better validation accuracy (0 = never stop early). ``freeze`` holds
    module-name glob patterns (``fnmatch``, e.g. ``"features.0*"``) whose
    parameters never train. ``normalisation`` is ``"auto"`` (from the model's
    manifest or factory, else none), ``"none"``, or ``{mean = [...], std = [...]}``.
    """

    name: str = "custom"
    mode: str = "joint"
    optimizer: str = "adamw"
    lr: float = 0.001
    warp_lr_scale: float = 0.1
    weight_decay: float = 0.0001
    momentum: float = 0.9
    epochs: int = 10
    batch_size: int = 64
    schedule: str = "cosine"
    warmup_epochs: float = 0.0
    step_epochs: int = 10
    step_gamma: float = 0.1
    label_smoothing: float = 0.0
    grad_clip: float = 0.0
    freeze: list[str] = field(default_factory=list)
    identity_reg: float = 0.0
    identity_reg_decay: float = 1.0
    warp_only_fraction: float = 0.5
    seed: int = 0
    eval_every: int = 1
    patience: int = 0
    normalisation: Any = "auto"
    augment: Augment = field(default_factory=Augment)
    pretrain: Pretrain = field(default_factory=Pretrain)
    schema_version: int = RECIPE_SCHEMA_VERSION

    def __post_init__(self) -> None:
        o = ""
        if self.schema_version != RECIPE_SCHEMA_VERSION:
            raise ValueError(
                f"schema_version = {self.schema_version!r} is not supported; this splice reads recipe "
                f"schema version {RECIPE_SCHEMA_VERSION}"
            )
        if not isinstance(self.name, str) or not self.name:
            raise ValueError(f"name must be a non-empty string; got {self.name!r}")
        self.mode = _choice(o, "mode", self.mode, MODES)
        self.optimizer = _choice(o, "optimizer", self.optimizer, OPTIMIZERS)
        self.lr = _number(o, "lr", self.lr, low=0, low_open=True, high=10, hint=" (the learning rate)")
        self.warp_lr_scale = _number(o, "warp_lr_scale", self.warp_lr_scale, low=0, low_open=True, high=1000)
        self.weight_decay = _number(o, "weight_decay", self.weight_decay, low=0, high=1)
        self.momentum = _number(o, "momentum", self.momentum, low=0, high=0.999)
        self.epochs = _integer(o, "epochs", self.epochs)
        self.batch_size = _integer(o, "batch_size", self.batch_size, low=1)
        self.schedule = _choice(o, "schedule", self.schedule, SCHEDULES)
        self.warmup_epochs = _number(o, "warmup_epochs", self.warmup_epochs, low=0, high=10_000)
        self.step_epochs = _integer(o, "step_epochs", self.step_epochs, low=1)
        self.step_gamma = _number(o, "step_gamma", self.step_gamma, low=0, low_open=True, high=1)
        self.label_smoothing = _number(o, "label_smoothing", self.label_smoothing, low=0, high=0.99)
        self.grad_clip = _number(o, "grad_clip", self.grad_clip, low=0, hint=" (0 switches clipping off)")
        if isinstance(self.freeze, str) or not isinstance(self.freeze, Sequence) or not all(
                isinstance(p, str) and p for p in self.freeze):
            raise ValueError(f"freeze must be a list of module-name patterns such as [\"conv1*\"]; got {self.freeze!r}")
        self.freeze = list(self.freeze)
        self.identity_reg = _number(o, "identity_reg", self.identity_reg, low=0, high=1e6)
        self.identity_reg_decay = _number(o, "identity_reg_decay", self.identity_reg_decay, low=0, high=1,
                                          hint=" (multiplier per epoch)")
        self.warp_only_fraction = _number(o, "warp_only_fraction", self.warp_only_fraction, low=0, high=1,
                                          hint=" (share of the epochs a staged recipe trains warps only)")
        self.seed = _integer(o, "seed", self.seed)
        self.eval_every = _integer(o, "eval_every", self.eval_every, low=1)
        self.patience = _integer(o, "patience", self.patience, hint=" (0 never stops early)")
        self.normalisation = _check_normalisation(self.normalisation)
        if isinstance(self.augment, Mapping):
            self.augment = _build(Augment, self.augment, "augment.")
        if isinstance(self.pretrain, Mapping):
            self.pretrain = _build(Pretrain, self.pretrain, "pretrain.")
        if not isinstance(self.augment, Augment):
            raise ValueError(f"augment must be a table of distortion ranges; got {self.augment!r}")
        if not isinstance(self.pretrain, Pretrain):
            raise ValueError(f"pretrain must be a table; got {self.pretrain!r}")

    # -- derived -----------------------------------------------------------------

    @property
    def uses_warps(self) -> bool:
        """True for recipes that need a spliced model (everything but ``baseline``)."""
        return self.mode in WARP_MODES

    def base_frozen(self, epoch: int) -> bool:
        """Whether the base is frozen during (0-based) ``epoch``."""
        if self.mode == "warp-only":
            return True
        return self.mode == "staged" and epoch < self.warp_only_epochs

    @property
    def warp_only_epochs(self) -> int:
        """Epochs of warp-only training at the start (all of them for ``warp-only``; none for others)."""
        if self.mode == "warp-only":
            return self.epochs
        if self.mode == "staged":
            return round(self.warp_only_fraction * self.epochs)
        return 0

    def with_overrides(self, *, epochs: int | None = None, lr: float | None = None,
                       batch_size: int | None = None, seed: int | None = None) -> Recipe:
        """A copy with the common command-line overrides applied (and validated)."""
        changes = {k: v for k, v in (("epochs", epochs), ("lr", lr), ("batch_size", batch_size),
                                     ("seed", seed)) if v is not None}
        if not changes:
            return self
        try:
            return dataclasses.replace(self, augment=dataclasses.replace(self.augment),
                                       pretrain=dataclasses.replace(self.pretrain), **changes)
        except ValueError as exc:
            flag = {"epochs": "--epochs", "lr": "--lr", "batch_size": "--batch-size", "seed": "--seed"}
            given = ", ".join(f"{flag[k]} {v}" for k, v in changes.items())
            raise RecipeError(f"bad command-line override ({given}): {exc}") from None

    def to_dict(self) -> dict[str, Any]:
        """A plain dict (JSON/TOML-ready) with every key, sections as nested dicts."""
        d = dataclasses.asdict(self)
        for sec in ("augment", "pretrain"):
            d[sec]["scale"] = list(d[sec]["scale"])
        return d

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], *, where: str = "recipe", name: str | None = None) -> Recipe:
        """Build a recipe from a parsed TOML/JSON mapping; every key and value is checked."""
        if not isinstance(data, Mapping):
            raise RecipeError(f"{where} must be a table of keys, got {type(data).__name__}")
        data = dict(data)
        if name is not None and "name" not in data:
            data["name"] = name
        if "schema_version" not in data:
            raise RecipeError(
                f"{where} has no schema_version; add 'schema_version = {RECIPE_SCHEMA_VERSION}' at the top"
            )
        try:
            _check_keys(cls, data, "", where)
            for sec, kind in (("augment", Augment), ("pretrain", Pretrain)):
                if sec in data:
                    if not isinstance(data[sec], Mapping):
                        raise RecipeError(f"{where}: '{sec}' must be a table ([{sec}]); got {data[sec]!r}")
                    _check_keys(kind, data[sec], f"{sec}.", where)
            return cls(**data)
        except ValueError as exc:
            raise RecipeError(f"{where}: {exc}") from None
        except TypeError as exc:  # pragma: no cover - keys are checked above
            raise RecipeError(f"{where}: {exc}") from None


def _check_normalisation(value: Any) -> Any:
    if value in ("auto", "none"):
        return value
    if isinstance(value, Mapping) and set(value) == {"mean", "std"}:
        mean, std = value["mean"], value["std"]
        ok = all(isinstance(s, Sequence) and not isinstance(s, str) and len(s) >= 1 and all(_is_number(x) for x in s)
                 for s in (mean, std))
        if ok and len(mean) == len(std) and all(float(x) > 0 for x in std):
            return {"mean": [float(x) for x in mean], "std": [float(x) for x in std]}
    raise ValueError(
        "normalisation must be 'auto', 'none', or {mean = [...], std = [...]} with one positive std per "
        f"channel; got {value!r}"
    )


def _fields(kind) -> list[str]:
    return [f.name for f in dataclasses.fields(kind) if not f.name.startswith("_")]


def _check_keys(kind, data: Mapping, prefix: str, where: str) -> None:
    allowed = _fields(kind)
    for key in data:
        if key not in allowed:
            hint = suggest(str(key), allowed)
            raise RecipeError(
                f"{where}: unknown key '{prefix}{key}'{hint or ';'} allowed keys"
                f"{' in [' + prefix[:-1] + ']' if prefix else ''}: {', '.join(allowed)}"
            )


def _build(kind, data: Mapping, prefix: str):
    _check_keys(kind, data, prefix, "recipe")
    return kind(**dict(data))


# ----------------------------------------------------------------------------- loading


# The shipped .toml files live in the top-level ``recipes/`` folder. In a source
# checkout (and an editable install) that is ``<repo>/recipes``; an installed
# wheel carries them as the package data ``splice.recipe_files``.
_DATA_PACKAGE = "splice.recipe_files"


def _recipe_root():
    try:
        return resources.files(_DATA_PACKAGE)
    except ModuleNotFoundError:
        pass
    here = Path(__file__).resolve().parent.parent / "recipes"
    if here.is_dir():
        return here
    raise RecipeError(
        "the shipped recipes are missing from this installation (no recipes/ folder and no "
        f"{_DATA_PACKAGE} package data); reinstall splice, or pass a recipe file with --recipe path.toml"
    )


def shipped_recipes() -> list[str]:
    """Names of the recipes shipped with splice."""
    return sorted(p.name[:-5] for p in _recipe_root().iterdir() if p.name.endswith(".toml"))


def _read_toml(text: str, where: str) -> dict:
    try:
        return _toml.loads(text)
    except _toml.TOMLDecodeError as exc:
        raise RecipeError(f"{where} is not valid TOML ({exc}); fix the syntax") from None


def load_recipe(recipe: str | os.PathLike | Recipe | Mapping) -> Recipe:
    """Load a shipped recipe by name (``"joint"``) or a ``.toml`` file by path.

    >>> load_recipe("warp-only").mode
    'warp-only'
    """
    if isinstance(recipe, Recipe):
        return recipe
    if isinstance(recipe, Mapping):
        return Recipe.from_dict(recipe)
    text_name = os.fspath(recipe)
    path = Path(text_name)
    looks_like_path = text_name.endswith(".toml") or os.sep in text_name or "/" in text_name
    if looks_like_path:
        if not path.is_file():
            raise RecipeError(
                f"recipe file '{path}' does not exist; give a path to a .toml file or one of the shipped "
                f"recipes: {', '.join(shipped_recipes())}"
            )
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise RecipeError(f"cannot read recipe file '{path}' ({exc})") from None
        return Recipe.from_dict(_read_toml(text, f"recipe file '{path}'"), where=f"recipe file '{path}'",
                                name=path.stem)
    names = shipped_recipes()
    if text_name not in names:
        raise RecipeError(
            f"unknown recipe {text_name!r}{suggest(text_name, names) or ';'} use one of "
            f"{', '.join(names)}, or a path to a .toml file"
        )
    text = (_recipe_root() / f"{text_name}.toml").read_text(encoding="utf-8")
    where = f"shipped recipe '{text_name}'"
    return Recipe.from_dict(_read_toml(text, where), where=where, name=text_name)


# ----------------------------------------------------------------------------- writing


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def recipe_to_toml(recipe: Recipe) -> str:
    """The recipe as TOML text that :func:`load_recipe` reads back to an equal recipe."""
    d = recipe.to_dict()
    lines = [f"# resolved splice recipe '{recipe.name}'", f"schema_version = {d.pop('schema_version')}"]
    sections = {k: d.pop(k) for k in ("augment", "pretrain")}
    lines += [f"{k} = {_toml_value(v)}" for k, v in d.items()]
    for sec, values in sections.items():
        lines += ["", f"[{sec}]"] + [f"{k} = {_toml_value(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"


def dump_recipe(recipe: Recipe, path: str | os.PathLike) -> Path:
    """Write the resolved recipe atomically (TOML)."""
    from ._io import atomic_write_text

    return atomic_write_text(path, recipe_to_toml(recipe))
