"""The input normalisation of a run whose model declares none: the training split's own statistics."""

from __future__ import annotations

import torch
from torch import Tensor

from ..errors import DataError

__all__ = ["estimate_normalisation"]


def estimate_normalisation(dataset, *, batch_size: int = 256) -> dict:
    """Per-channel mean and standard deviation of every pixel of ``dataset``, for :func:`normalise`.

    ``dataset`` yields ``(image (C, H, W), label)`` in [0, 1] (an
    :class:`ImageSet` or an :class:`ImageFolderSet`). Sums are taken in float64
    over the whole split; the standard deviation is the population one
    (divided by the pixel count, as ``numpy.std`` does by default). Values are
    rounded to 6 decimals so that they read well in ``splice.json``.
    """
    n = len(dataset)
    if n == 0:
        raise DataError("cannot estimate a normalisation from an empty split; add images to it")
    images = getattr(dataset, "images", None)
    total = squares = None
    pixels = 0
    for start in range(0, n, batch_size):
        stop = min(n, start + batch_size)
        if isinstance(images, Tensor):
            x = images[start:stop]
        else:
            x = torch.stack([dataset[i][0] for i in range(start, stop)])
        x = x.to(torch.float64)
        s, q = x.sum(dim=(0, 2, 3)), x.pow(2).sum(dim=(0, 2, 3))
        total = s if total is None else total + s
        squares = q if squares is None else squares + q
        pixels += x.shape[0] * x.shape[2] * x.shape[3]
    mean = total / pixels
    std = (squares / pixels - mean.pow(2)).clamp_min(0.0).sqrt()
    if bool((std <= 0).any()):
        raise DataError(f"every pixel of {getattr(dataset, 'name', 'the split')} has the same value in some channel; "
                        "cannot normalise it. Set the recipe's normalisation by hand")
    return {"mean": [round(float(v), 6) for v in mean], "std": [round(float(v), 6) for v in std]}
