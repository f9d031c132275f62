"""Spec-accepting front doors for the library functions.

These accept whatever a user has at hand — an ``nn.Module``, a spec string
such as ``"torchvision:resnet18"``, a spliced folder or a
:class:`~splice.sources.Source` — resolve it once, and call the module that
does the work.
"""

from __future__ import annotations

from collections.abc import Sequence

from .surgery import insert

__all__ = ["points", "insert"]


def points(model, input_shape=None, *, all: bool = False, leaves: Sequence[str] = (), warp: str = "affine",
           weights=None, kwargs=None):
    """List where a warp can go in ``model``.

    Returns a list of :class:`splice.graph.Point`. By default only points that
    sit between conv layers (plus the model input) are listed; ``all=True``
    lists every 4-D activation.

    >>> import splice
    >>> [p.name for p in splice.points("torchvision:resnet18") if p.recommended]  # doctest: +SKIP
    ['input', 'maxpool']
    """
    from . import graph
    from .sources import load_source

    src = load_source(model, input_shape=input_shape, weights=weights, kwargs=kwargs, leaves=leaves)
    shape = src.input_shape  # load_source already parsed input_shape, or took the model's own
    if shape is None:
        from .errors import SourceError

        raise SourceError("points() needs the model's input shape; pass input_shape=(C, H, W)")
    return graph.points(src.model, shape, all=all, leaves=tuple(leaves) or tuple(src.leaves), warp=warp)
