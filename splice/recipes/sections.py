"""The ``[augment]``, ``[pretrain]`` and ``[site]`` tables of a recipe.

All three hold distortion ranges (``rotation``, ``scale``, ``shift``,
``perspective``); they share one dataclass, :class:`Ranges`, which checks
them and turns them into a :class:`splice.distort.DistortionRange` in one place.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

from ..distort import DistortionRange
from .checks import boolean, choice, integer, number, scale_pair

__all__ = ["OBJECTIVES", "Ranges", "Augment", "Pretrain", "Site"]

# What the label-free recipe learns from the site images themselves (see Site).
OBJECTIVES = ("consistency", "entropy", "none")


@dataclass
class Ranges:
    """Random distortion ranges, as a recipe writes them.

    ``rotation`` is the largest |angle| in degrees, ``scale`` a ``[low, high]``
    range, ``shift`` the largest |shift| as a fraction of the image size per
    axis, ``perspective`` the corner-offset strength (0..1). All zero (the
    default) means no distortion. Subclasses name their table in ``_owner``.
    """

    rotation: float = 0.0
    scale: tuple[float, float] = (1.0, 1.0)
    shift: float = 0.0
    perspective: float = 0.0

    _owner: ClassVar[str] = ""

    def __post_init__(self) -> None:
        o = self._owner
        self.rotation = number(o, "rotation", self.rotation, low=0, high=180, hint=" (largest |angle| in degrees)")
        self.scale = scale_pair(o, "scale", self.scale)
        self.shift = number(o, "shift", self.shift, low=0, high=1, hint=" (fraction of the image size)")
        self.perspective = number(o, "perspective", self.perspective, low=0, high=1)

    def to_range(self, **extra) -> DistortionRange:
        """The equivalent :class:`splice.distort.DistortionRange` (``extra``: its other fields)."""
        return DistortionRange(rotation_deg=self.rotation, scale=self.scale, shift=self.shift,
                               perspective=self.perspective, **extra)


@dataclass
class Augment(Ranges):
    """Training-time random distortions: the :class:`Ranges` plus flips and crops.

    ``crop`` is the largest fraction of the area cropped away (0..0.99),
    ``hflip``/``vflip`` flip with probability 1/2.
    """

    hflip: bool = False
    vflip: bool = False
    crop: float = 0.0

    _owner: ClassVar[str] = "augment."

    def __post_init__(self) -> None:
        super().__post_init__()
        o = self._owner
        self.hflip = boolean(o, "hflip", self.hflip)
        self.vflip = boolean(o, "vflip", self.vflip)
        self.crop = number(o, "crop", self.crop, low=0, high=0.99, hint=" (fraction of the area removed)")

    def to_range(self, **extra) -> DistortionRange:
        return super().to_range(hflip=self.hflip, vflip=self.vflip, crop=self.crop, **extra)

    @property
    def is_identity(self) -> bool:
        return self.to_range().is_identity


@dataclass
class Pretrain(Ranges):
    """Warp-head pre-training: regress each head onto known random warps.

    Each step draws distortions from the :class:`Ranges` (same meaning as in
    ``[augment]``), applies them to reference images, and trains the heads so
    that their sampling grid matches the grid that undoes the distortion (mean
    squared error between grids, in normalised coordinates). Only the heads
    change; the base is untouched.

    ``epochs = 0`` switches pre-training off. ``reference`` picks the images
    (see :mod:`splice.training.reference`): ``"auto"`` (the data set's upright
    counterpart, e.g. digits-moved -> digits, else the data the base was
    trained on as its splice record says, else the embedded ``digits``
    themselves), ``"train"`` (the training images), or a data set name /
    folder. When ``"auto"`` finds nothing, ``if_no_reference`` decides:
    ``"stop"`` (tune stops and says what to pass) or ``"skip"`` (train
    without pre-training).

    ``identity_fraction`` of every batch is left unmoved, with the identity as
    its target, so that on upright images the head learns to stay at the
    identity (measured on the digit folders of ``bench_efficacy``: 25 % cut the
    upright accuracy lost by ``warp-only`` from 1.7 points to 0).
    """

    epochs: int = 0
    lr: float = 0.003
    batch_size: int = 64
    weight_decay: float = 0.0
    reference: str = "auto"
    if_no_reference: str = "stop"
    identity_fraction: float = 0.25

    _owner: ClassVar[str] = "pretrain."

    def __post_init__(self) -> None:
        super().__post_init__()
        o = self._owner
        self.epochs = integer(o, "epochs", self.epochs)
        self.lr = number(o, "lr", self.lr, low=0, low_open=True, high=10)
        self.batch_size = integer(o, "batch_size", self.batch_size, low=1)
        self.weight_decay = number(o, "weight_decay", self.weight_decay, low=0, high=1)
        if not isinstance(self.reference, str) or not self.reference:
            raise ValueError(
                f"pretrain.reference must be 'auto', 'train', or a data set name / folder; got {self.reference!r}"
            )
        self.if_no_reference = choice(o, "if_no_reference", self.if_no_reference, ("stop", "skip"))
        self.identity_fraction = number(o, "identity_fraction", self.identity_fraction, low=0, high=0.9,
                                        hint=" (share of each batch left unmoved, target the identity)")


@dataclass
class Site(Ranges):
    """Label-free adaptation to a new site (read by the ``label-free`` recipe only).

    The :class:`Ranges` here are the *outer limits* of the range estimate: a
    probe (a projective warp head on the input, ``probe_width`` wide, apart
    from the model) is pre-trained for ``probe_epochs`` on random warps within
    them, on all but a ``holdout`` share of the reference images; it then reads
    the site images, and the ranges whose simulation on the held-out reference
    reads the same are the estimate (:mod:`splice.adapt.ranges`). No estimate
    goes beyond these limits. ``estimate = false`` skips all this and keeps the
    ``[pretrain]`` ranges as typed.

    ``unmoved`` is the share of every pre-training batch left unmoved, with the
    identity as target, so that the warp leaves upright images alone.

    ``objective`` is what the heads learn from the unlabelled site images after
    pre-training: ``"consistency"`` (the canonical view of a site image must not
    change when a known small extra warp is applied to it first),
    ``"entropy"`` (the frozen classifier's prediction entropy on the canonical
    views, with a class-balance term against collapse) or ``"none"``;
    ``weight`` scales it. ``anchor`` weighs the pre-training loss on reference
    images that keeps running beside it.
    """

    rotation: float = 90.0
    scale: tuple[float, float] = (0.6, 1.6)
    shift: float = 0.3
    perspective: float = 0.3
    estimate: bool = True
    probe_epochs: int = 40
    probe_width: int = 32
    holdout: float = 0.2
    unmoved: float = 0.25
    objective: str = "consistency"
    weight: float = 1.0
    anchor: float = 1.0

    _owner: ClassVar[str] = "site."

    def __post_init__(self) -> None:
        super().__post_init__()
        o = self._owner
        self.estimate = boolean(o, "estimate", self.estimate)
        self.probe_epochs = integer(o, "probe_epochs", self.probe_epochs, low=1)
        self.probe_width = integer(o, "probe_width", self.probe_width, low=1)
        self.holdout = number(o, "holdout", self.holdout, low=0.05, high=0.5,
                              hint=" (share of the reference kept from the probe to simulate ranges on)")
        self.unmoved = number(o, "unmoved", self.unmoved, low=0, high=0.9,
                              hint=" (share of each pre-training batch left unmoved, target the identity)")
        self.objective = choice(o, "objective", self.objective, OBJECTIVES)
        self.weight = number(o, "weight", self.weight, low=0, high=1000)
        self.anchor = number(o, "anchor", self.anchor, low=0, high=1000)
