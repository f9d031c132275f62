"""Batched geometric distortions: rotation, scale, shift, shear, perspective, flips, crops.

Used for training-time augmentation, for building the ``digits-moved`` scenario
and for evaluation sweeps. Everything here is a pure function of tensors; the
only state is the :class:`DistortionRange` dataclass that describes a random
distribution of distortions. :mod:`.matrices` builds forward matrices,
:mod:`.sampling` renders them, :mod:`.ranges` draws random ones.

Conventions
-----------
*Coordinates.* Matrices live in **normalised coordinates** ``(u, v)`` with
``align_corners=False``: ``u = -1`` is the left edge of the left-most pixel,
``u = +1`` the right edge of the right-most pixel, ``v`` goes **down** the image.
Pixel ``(i, j)`` of an ``H x W`` image has its centre at
``u = (2j + 1) / W - 1``, ``v = (2i + 1) / H - 1``. This is the convention of
``F.grid_sample(..., align_corners=False)`` and of torchvision's v2 geometry
kernels, so there is **no** half-pixel offset between splice and torchvision.

*Direction.* Every matrix in this module (``affine_matrix``, the ``"matrix"``
entry returned by :func:`random_distort`, the argument of
:func:`apply_homography`) is the **forward** map: it says where content moves.
Content found at ``p`` in the input appears at ``M @ p`` in the output. To
render the output we sample the input at ``M^-1 @ q`` for every output pixel
``q`` (the sampling direction); that inversion happens inside
:func:`apply_homography` and never leaks into the API.

*Angles.* ``angle_deg`` follows ``torchvision.transforms.v2.functional.affine``
exactly: the linear part is ``scale * [[cos a, -sin a], [sin a, cos a]]`` in
pixel coordinates with ``x`` to the right and ``y`` **down**. On screen that is
a **clockwise** turn of the content for positive angles (a point to the right
of the centre moves down), which is what torchvision documents for ``affine``
("clockwise direction"). Note that ``torchvision...functional.rotate`` uses the
opposite sign (counter-clockwise); splice follows ``affine``.

*Rotation about the centre.* The centre of rotation and scaling is the
geometric image centre ``(W/2, H/2)`` in pixel-edge coordinates, i.e.
``((W - 1)/2, (H - 1)/2)`` in pixel-index coordinates, the same point
torchvision uses (its ``_affine_grid`` places pixel centres at
``linspace((1 - W)/2, (W - 1)/2)``). Rotation is applied in *pixel* units, so a
non-square image is rotated rigidly; in normalised coordinates this becomes
``D^-1 R D`` with ``D = diag(W/2, H/2)`` (pass ``size=(H, W)`` to
:func:`affine_matrix`).

*Shift* is a fraction of the image size per axis: ``shift=(tx, ty)`` moves the
content by ``tx * W`` pixels right and ``ty * H`` pixels down, i.e. torchvision's
``translate=[tx * W, ty * H]``; in normalised units that is ``(2 tx, 2 ty)``.

*Shear* ``shear_deg`` is torchvision's ``shear=[shear_deg, 0]`` (x-shear).

*Perspective points* are in pixel units with ``(0, 0)`` at the top-left
*corner* of the top-left pixel, so pixel ``(i, j)`` has centre
``(j + 0.5, i + 0.5)`` — the convention of torchvision's ``_perspective_grid``
(and Pillow's). ``startpoints`` move to ``endpoints``.

*Fill.* With ``fill=None`` samples outside the image read as zero
(``padding_mode="zeros"``). With a number (or one number per channel) the
result is ``mask * (sampled - fill) + fill`` where ``mask`` is a sampled
all-ones channel — torchvision's ``_apply_grid_transform`` formula, so border
pixels match torchvision for the same ``fill`` too.
"""

from __future__ import annotations

from .matrices import affine_matrix, perspective_matrix
from .ranges import DistortionRange, distortion_matrix, random_distort, random_perspective_points, sample_distortion
from .sampling import apply_affine, apply_homography, apply_perspective

__all__ = [
    "affine_matrix",
    "apply_affine",
    "apply_homography",
    "apply_perspective",
    "perspective_matrix",
    "random_perspective_points",
    "DistortionRange",
    "sample_distortion",
    "distortion_matrix",
    "random_distort",
]
