"""Internals of ``splice tune``: the loop, checkpoints, distributed set-up, warp pre-training.

One module per concern: :mod:`~splice.training.batches` (data order and
per-batch randomness as pure functions of the seed), :mod:`~splice.training.loop`
(the optimisation step and evaluation), :mod:`~splice.training.pretrain`
(grid-matching pre-training of warp heads), :mod:`~splice.training.schedule`
(learning-rate schedules), :mod:`~splice.training.checkpoint` (atomic,
``weights_only`` checkpoints) and :mod:`~splice.training.distributed`
(torchrun process groups). The public entry point is :func:`splice.tune`.
"""

__all__: list[str] = []
