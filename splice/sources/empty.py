"""Building an architecture on the meta device without running its initialisers.

A model built under ``torch.device("meta")`` has tensors without data, so its
initialisers (``nn.init.normal_``, ``trunc_normal_``, ``kaiming_uniform_``,
``zeros_`` ...) compute nothing: they check nothing either, and leave no trace
(the CPU random generator does not move). Yet each of them runs as a Python
decomposition on the meta device, and on a deep network they cost more than
building the modules. Inside :func:`initialisers_skipped`, an in-place
initialiser called on a meta tensor hands the tensor back at once, as it
would have done. Anything else runs as usual.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

import torch
from torch.overrides import TorchFunctionMode

__all__ = ["initialisers_skipped"]

# in-place methods that only write values (random draws, fills): on a meta tensor they do nothing
_WRITERS = frozenset({
    torch.Tensor.normal_, torch.Tensor.uniform_, torch.Tensor.zero_, torch.Tensor.fill_, torch.Tensor.erfinv_,
    torch.Tensor.exponential_, torch.Tensor.log_normal_, torch.Tensor.cauchy_, torch.Tensor.geometric_,
    torch.Tensor.random_, torch.Tensor.bernoulli_,
})
# in-place arithmetic that initialisers apply to the draws (scale, shift, clip): skipped only with numbers
_SCALERS = frozenset({
    torch.Tensor.mul_, torch.Tensor.add_, torch.Tensor.sub_, torch.Tensor.div_, torch.Tensor.clamp_,
    torch.Tensor.clamp_min_, torch.Tensor.clamp_max_,
})


def _skippable(func, args: tuple, kwargs: dict) -> bool:
    if not args or not isinstance(args[0], torch.Tensor) or not args[0].is_meta:
        return False
    if func in _WRITERS:
        values = (*args[1:], *kwargs.values())
        return all(not isinstance(v, torch.Tensor) or (v.is_meta and v.dim() == 0) for v in values)
    if func in _SCALERS:
        return all(isinstance(v, (int, float, bool)) or v is None for v in (*args[1:], *kwargs.values()))
    return False


class _SkipInitialisers(TorchFunctionMode):
    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if _skippable(func, args, kwargs):
            return args[0]
        return func(*args, **kwargs)


@contextmanager
def initialisers_skipped() -> Iterator[None]:
    """Inside the block, initialising a meta tensor in place returns it untouched (there is nothing to write)."""
    with _SkipInitialisers():
        yield
