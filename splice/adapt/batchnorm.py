"""AdaBN: re-estimate BatchNorm statistics on the site images (the ``batchnorm-stats`` recipe).

Li, Wang, Shi, Liu and Hou, "Revisiting batch normalization for practical
domain adaptation" (ICLR workshop 2017, arXiv:1603.04779, 2016): keep every
weight, replace each BatchNorm layer's running mean and variance by those of
the target domain. Here the statistics are the plain average over every
batch of the site images (``momentum = None``, PyTorch's cumulative moving
average), for ``passes`` passes in a seeded order. Only BatchNorm layers are
put in train mode, so dropout and the like stay off; no gradient is computed.
It is the published label-free baseline the warp has to beat.
"""

from __future__ import annotations

from collections.abc import Callable

import torch
from torch import Tensor, nn

from ..copies import modes_kept
from ..errors import DataError
from ..training import batches as _b
from .images import Images

__all__ = ["batchnorm_layers", "refresh_batchnorm_"]


def batchnorm_layers(model: nn.Module) -> list[nn.Module]:
    """Every BatchNorm layer (1d, 2d, 3d, sync) that tracks running statistics."""
    kinds = (nn.BatchNorm1d, nn.BatchNorm2d, nn.BatchNorm3d, nn.SyncBatchNorm)
    return [m for m in model.modules() if isinstance(m, kinds) and m.track_running_stats]


@torch.no_grad()
def refresh_batchnorm_(model: nn.Module, images: Images, *, prepare: Callable[[Tensor], Tensor], batch_size: int,
                       seed: int, passes: int = 1, on_step: Callable[[int, int], None] | None = None) -> int:
    """Replace the running statistics of every BatchNorm layer of ``model`` (in place) by those of ``images``.

    Returns the number of layers refreshed. Batches of one image are skipped
    (a variance needs two); with no batch left, :class:`~splice.errors.DataError`
    is raised and nothing is changed. Modes and momenta are restored afterwards.
    """
    layers = batchnorm_layers(model)
    if not layers:
        return 0
    momenta = {m: m.momentum for m in layers}
    n = len(images)
    batches = [idx for p in range(passes)
               for idx in _b.index_batches(_b.epoch_order(seed, p, n, tag="batchnorm"), batch_size) if len(idx) > 1]
    if not batches:  # checked before any statistic is reset: nothing would replace the reset values
        raise DataError(f"re-estimating BatchNorm statistics needs batches of at least 2 site images; got {n} "
                        f"image{'' if n == 1 else 's'} at batch size {batch_size}: add site images, or raise "
                        "--batch-size")
    with modes_kept(model):
        try:
            model.eval()
            for m in layers:
                m.reset_running_stats()
                m.momentum = None
                m.train()
            for i, idx in enumerate(batches):
                model(prepare(images.batch(idx)))
                if on_step is not None:
                    on_step(i + 1, len(batches))
        finally:
            for m, momentum in momenta.items():
                m.momentum = momentum
    return len(layers)
