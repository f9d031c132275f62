"""The :class:`Recipe` dataclass: every key of a recipe file, checked once."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from ..errors import RecipeError, suggest
from .checks import choice, integer, is_number, number
from .sections import Augment, Pretrain, Site

__all__ = ["RECIPE_SCHEMA_VERSION", "MODES", "OPTIMIZERS", "SCHEDULES", "REFERENCES", "RESET_HEAD", "WARP_MODES",
           "LABEL_FREE_MODES", "SECTIONS", "Recipe"]

RECIPE_SCHEMA_VERSION = 1
MODES = ("baseline", "warp-only", "joint", "staged", "label-free", "batchnorm-stats")
OPTIMIZERS = ("sgd", "adamw")
SCHEDULES = ("cosine", "step", "constant")
# Where warp pre-training takes its images: "auto" uses the data set's upright
# reference when it has one (digits-moved -> digits), else the training images;
# "train" always uses the training images; anything else names a data set
# (digits, or an ImageFolder DIR) whose train split is the reference.
REFERENCES = ("auto", "train")
# Zero the final layer before a baseline fine-tune: "auto" when the trained
# model is confidently wrong on the new data (see splice.training.head).
RESET_HEAD = ("auto", "always", "never")
WARP_MODES = ("warp-only", "joint", "staged", "label-free")
# Modes that read no label: they learn from unlabelled site images (splice.adapt)
LABEL_FREE_MODES = ("label-free", "batchnorm-stats")
# The recipe's tables, in file order
SECTIONS = {"augment": Augment, "pretrain": Pretrain, "site": Site}



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
      ``warp_lr_scale`` applies only while the base trains too; alone, the heads train at ``lr``.
    - ``label-free``: no label is read. The base is frozen as in ``warp-only``;
      the warp heads learn from upright reference images and unlabelled site
      images (``[site]``, :mod:`splice.adapt`); ``epochs`` counts passes over
      the site images.
    - ``batchnorm-stats``: no label is read and nothing trains; the BatchNorm
      running statistics are re-estimated on the site images (AdaBN), over
      ``epochs`` passes.

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
    manifest or factory; for a random-init model whose factory declares
    nothing, the mean and std of the training split), ``"none"``, or
    ``{mean = [...], std = [...]}``. ``reset_head`` (``baseline`` only):
    ``"auto"`` zeroes the final layer of a trained model whose validation loss
    on the new data is above a uniform guess's, ``"always"``, or ``"never"``
    (see :mod:`splice.training.head`).
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
    reset_head: str = "never"
    augment: Augment = field(default_factory=Augment)
    pretrain: Pretrain = field(default_factory=Pretrain)
    site: Site = field(default_factory=Site)
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
        self.mode = choice(o, "mode", self.mode, MODES)
        self.optimizer = choice(o, "optimizer", self.optimizer, OPTIMIZERS)
        self.lr = number(o, "lr", self.lr, low=0, low_open=True, high=10, hint=" (the learning rate)")
        self.warp_lr_scale = number(o, "warp_lr_scale", self.warp_lr_scale, low=0, low_open=True, high=1000)
        self.weight_decay = number(o, "weight_decay", self.weight_decay, low=0, high=1)
        self.momentum = number(o, "momentum", self.momentum, low=0, high=0.999)
        self.epochs = integer(o, "epochs", self.epochs)
        self.batch_size = integer(o, "batch_size", self.batch_size, low=1)
        self.schedule = choice(o, "schedule", self.schedule, SCHEDULES)
        self.warmup_epochs = number(o, "warmup_epochs", self.warmup_epochs, low=0, high=10_000)
        self.step_epochs = integer(o, "step_epochs", self.step_epochs, low=1)
        self.step_gamma = number(o, "step_gamma", self.step_gamma, low=0, low_open=True, high=1)
        self.label_smoothing = number(o, "label_smoothing", self.label_smoothing, low=0, high=0.99)
        self.grad_clip = number(o, "grad_clip", self.grad_clip, low=0, hint=" (0 switches clipping off)")
        if isinstance(self.freeze, str) or not isinstance(self.freeze, Sequence) or not all(
                isinstance(p, str) and p for p in self.freeze):
            raise ValueError(f"freeze must be a list of module-name patterns such as [\"conv1*\"]; got {self.freeze!r}")
        self.freeze = list(self.freeze)
        self.identity_reg = number(o, "identity_reg", self.identity_reg, low=0, high=1e6)
        self.identity_reg_decay = number(o, "identity_reg_decay", self.identity_reg_decay, low=0, high=1,
                                          hint=" (multiplier per epoch)")
        self.warp_only_fraction = number(o, "warp_only_fraction", self.warp_only_fraction, low=0, high=1,
                                          hint=" (share of the epochs a staged recipe trains warps only)")
        self.seed = integer(o, "seed", self.seed)
        self.eval_every = integer(o, "eval_every", self.eval_every, low=1)
        self.patience = integer(o, "patience", self.patience, hint=" (0 never stops early)")
        self.normalisation = _check_normalisation(self.normalisation)
        self.reset_head = choice(o, "reset_head", self.reset_head, RESET_HEAD)
        for sec, kind in SECTIONS.items():
            if isinstance(getattr(self, sec), Mapping):
                setattr(self, sec, _build(kind, getattr(self, sec), f"{sec}."))
            if not isinstance(getattr(self, sec), kind):
                raise ValueError(f"{sec} must be a table ([{sec}]); got {getattr(self, sec)!r}")

    # -- derived -----------------------------------------------------------------

    @property
    def uses_warps(self) -> bool:
        """True for recipes that need a spliced model (everything but ``baseline``)."""
        return self.mode in WARP_MODES

    @property
    def label_free(self) -> bool:
        """True for recipes that read no label (``label-free``, ``batchnorm-stats``)."""
        return self.mode in LABEL_FREE_MODES

    def base_frozen(self, epoch: int) -> bool:
        """Whether the base is frozen during (0-based) ``epoch``."""
        if self.mode in ("warp-only", "label-free"):
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
            return dataclasses.replace(self, **{sec: dataclasses.replace(getattr(self, sec)) for sec in SECTIONS},
                                       **changes)
        except ValueError as exc:
            flag = {"epochs": "--epochs", "lr": "--lr", "batch_size": "--batch-size", "seed": "--seed"}
            given = ", ".join(f"{flag[k]} {v}" for k, v in changes.items())
            raise RecipeError(f"bad command-line override ({given}): {exc}") from None

    def to_dict(self) -> dict[str, Any]:
        """A plain dict (JSON/TOML-ready) with every key, sections as nested dicts."""
        d = dataclasses.asdict(self)
        for sec in SECTIONS:
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
            for sec, kind in SECTIONS.items():
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
        ok = all(isinstance(s, Sequence) and not isinstance(s, str) and len(s) >= 1 and all(is_number(x) for x in s)
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

