"""``splice tune``: the public entry point and its internals, one module per concern.

:mod:`~splice.training.tune` (the public :func:`tune` and :func:`tune_keywords`),
:mod:`~splice.training.options` (:class:`RecipeOverrides`, :class:`RunOptions`),
:mod:`~splice.training.setup` (recipe, model and data resolution),
:mod:`~splice.training.runfolder` (run.json, recipe.toml, metrics.jsonl, resume checks),
:mod:`~splice.training.state` (the state of one run),
:mod:`~splice.training.epochs` (the loop: start, resume, pre-train, epochs),
:mod:`~splice.training.recording` (metrics rows, best/last folders, checkpoints),
:mod:`~splice.training.params` (freezing, optimiser groups, modes),
:mod:`~splice.training.batches` (data order and per-batch randomness as pure
functions of the seed), :mod:`~splice.training.loop` (the optimisation step
and evaluation), :mod:`~splice.training.pretrain` (grid-matching pre-training
of warp heads), :mod:`~splice.training.schedule` (learning-rate schedules),
:mod:`~splice.training.checkpoint` (atomic, ``weights_only`` checkpoints),
:mod:`~splice.training.distributed` (torchrun process groups),
:mod:`~splice.training.reference` (the upright reference of warp
pre-training: :func:`~splice.training.reference.resolve_reference`),
:mod:`~splice.training.normalisation` (the training split's statistics for a
model that declares no normalisation) and :mod:`~splice.training.head` (the
final-layer reset of a confidently wrong model before ``baseline``).

Importing this package loads the loop (torch); ``import splice`` does not.
"""

from .options import RecipeOverrides, RunOptions
from .runfolder import RUN_SCHEMA_VERSION, read_metrics
from .state import TuneInterrupted
from .tune import tune, tune_keywords

__all__ = ["tune", "tune_keywords", "RecipeOverrides", "RunOptions", "read_metrics", "RUN_SCHEMA_VERSION",
           "TuneInterrupted"]
