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
    "normal_", "uniform_", "zero_", "fill_", "erfinv_", "exponential_", "log_normal_", "cauchy_", "geometric_",
    "random_", "bernoulli_",
})
# in-place arithmetic that initialisers apply to the draws (scale, shift, clip): skipped only with numbers
_SCALERS = frozenset({"mul_", "add_", "sub_", "div_", "clamp_", "clamp_min_", "clamp_max_"})


def _tensor_method(func, name: str) -> bool:
    return func is getattr(torch.Tensor, name, None) or func is getattr(torch._C.TensorBase, name, None)


def _skippable(func, args: tuple, kwargs: dict) -> bool:
    name = getattr(func, "__name__", "")
    if getattr(func, "__module__", None) == "torch.nn.init" and name.endswith("_"):
        # torch.nn.init's initialisers (normal_, trunc_normal_, kaiming_uniform_, ...) fill their first argument
        target = args[0] if args else kwargs.get("tensor")
        return isinstance(target, torch.Tensor) and target.is_meta
    if not args or not isinstance(args[0], torch.Tensor) or not args[0].is_meta or not _tensor_method(func, name):
        return False
    values = (*args[1:], *kwargs.values())
    if name in _WRITERS:
        return all(not isinstance(v, torch.Tensor) or (v.is_meta and v.dim() == 0) for v in values)
    if name in _SCALERS:
        return all(isinstance(v, (int, float, bool)) or v is None for v in values)
    return False


class _SkipInitialisers(TorchFunctionMode):
    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if _skippable(func, args, kwargs):
            return args[0] if args else kwargs["tensor"]
        return func(*args, **kwargs)


@contextmanager
def initialisers_skipped() -> Iterator[None]:
    """Inside the block, initialising a meta tensor in place returns it untouched (there is nothing to write)."""
    with _SkipInitialisers():
        yield
