"""Adapting to a new site without labels: the ``label-free`` and ``batchnorm-stats`` recipes.

``splice tune SPLICED --recipe label-free --reference REF --site SITE --out RUN``
reads no label anywhere. REF are images of the kind the base was trained on
(an ImageFolder whose labels are ignored, a flat folder, or ``digits``); SITE
are unlabelled images from the new site (a flat folder or an ImageFolder,
``digits-moved`` for the demo). The base stays bit-for-bit frozen; only the
warp heads train. ``--recipe batchnorm-stats`` re-estimates the BatchNorm
statistics on SITE instead (AdaBN), the published label-free baseline.

One module per concern: :mod:`.images` (unlabelled images), :mod:`.ranges`
(estimating how the site moves its images from a probe's readings),
:mod:`.probe` (the probe), :mod:`.regress` (grid-regression pre-training with
upright-safe draws), :mod:`.objective` (what the heads learn from the site
images), :mod:`.diagnostics` (label-free diagnostics), :mod:`.batchnorm`
(AdaBN), :mod:`.setup`, :mod:`.steps`, :mod:`.record`, :mod:`.run` and
:mod:`.bnstats` (the two runs, in the run folder of ``splice tune``).
The entry point is :func:`splice.training.tune` (``site=``).
"""

from .batchnorm import refresh_batchnorm_
from .diagnostics import site_diagnostics
from .images import open_images
from .ranges import RangeEstimate

__all__ = ["RangeEstimate", "open_images", "site_diagnostics", "refresh_batchnorm_"]
