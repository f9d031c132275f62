"""What the warps learned: the decomposition maths, per-image capture, tables and pictures.

The package has three layers, top to bottom:

1. **Pure maths** (:mod:`.decompose`: :func:`polar_decompose`,
   :func:`describe_linear`, :func:`describe_matrix`, :func:`describe_tps`,
   :func:`describe_theta`): tensors in, tensors out, derivations in the comments.
2. **Capture** (:mod:`.capture`): run a spliced model on images and record
   every warp's raw parameters ``theta`` for each image.
3. **Report** (:mod:`.run`: :func:`inspect`; :mod:`.summary`: statistics, the
   CSV and :func:`render_inspect`; :mod:`.geometry`, :mod:`.sheets` and
   :mod:`.plots`: the pictures): ``warps.csv``, ``summary.json``, the
   pictures, and the table on screen.

Sign conventions (one place, used everywhere below)
---------------------------------------------------
A warp's matrix maps OUTPUT normalised coordinates to INPUT normalised
coordinates (``grid_sample``'s direction): output pixel ``p`` reads the input
at ``f(p)``. The numbers are computed in *pixel units of the warped tensor*
(``x`` to the right, ``y`` **down**, origin at the centre), so a rotation is
rigid in pixels even when the tensor is not square. An angle is positive when
it turns the ``+x`` axis towards ``+y``, which on screen is **clockwise** (the
convention of ``torchvision.transforms.v2.functional.affine`` and of
:mod:`splice.distort`).

*Sampling side* (columns without a prefix) describes ``f`` itself:
``angle_deg``, ``scale_1 >= scale_2``, ``scale_axis_deg``, ``anisotropy``,
``shift_*``. *Viewer side* (columns starting with ``view_``) describes what a
person looking at the warped output sees happen to the content, i.e. the
inverse map ``f^-1``: the content turns by ``view_rotation_deg = -angle_deg``
(for a reflection the angle is its own inverse, see :func:`describe_linear`),
is magnified by ``view_zoom = 1 / scale`` and the input's centre lands at
``view_shift_*``. A warp that has learned to undo a distortion of
``splice.distort.apply_affine(angle_deg=a, scale=s)`` shows ``angle_deg = a``
and ``scale = s``: the sampling side equals the distortion it undoes.
"""

from __future__ import annotations

from .capture import Capture, capture
from .decompose import (
    MATRIX_QUANTITIES,
    PROJECTIVE_QUANTITIES,
    QUANTITY_HELP,
    TPS_QUANTITIES,
    describe_linear,
    describe_matrix,
    describe_theta,
    describe_tps,
    polar_decompose,
    quantities_for,
)
from .geometry import map_points
from .plots import draw_histograms
from .run import inspect
from .sheets import draw_contact_sheet, draw_outline_sheet
from .summary import SCHEMA_VERSION, render_inspect, summarise

__all__ = [
    "SCHEMA_VERSION",
    "MATRIX_QUANTITIES",
    "PROJECTIVE_QUANTITIES",
    "TPS_QUANTITIES",
    "QUANTITY_HELP",
    "polar_decompose",
    "describe_linear",
    "describe_matrix",
    "describe_tps",
    "describe_theta",
    "quantities_for",
    "Capture",
    "capture",
    "summarise",
    "map_points",
    "draw_contact_sheet",
    "draw_outline_sheet",
    "draw_histograms",
    "inspect",
    "render_inspect",
]
