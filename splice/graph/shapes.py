"""Shapes on the meta device: one batch-1 propagation through a traced graph.

No activation memory, no arithmetic. Common layers use closed-form shape
rules (here for modules and graph functions, :mod:`.rules` for the torch
functions that leaf modules call); everything else runs its meta kernel. A user-registered leaf that
cannot run on the meta device (value-dependent control flow) is run once,
alone, on a CPU copy with an all-zeros input.
"""

from __future__ import annotations

import itertools
import operator
from collections.abc import Callable
from typing import Any

import torch
import torch.fx as fx
from torch import nn

from ..compare import map_tensors
from ..copies import tree_copy
from ..errors import GraphError
from .leaves import is_torch_builtin
from .rules import ShapeRules, meta_rule

__all__: list[str] = []

META = torch.device("meta")


class ShapeFailure(Exception):
    def __init__(self, node: fx.Node, error: BaseException):
        super().__init__(str(error))
        self.node = node
        self.error = error


def meta_module(mod: nn.Module) -> nn.Module:
    """An eval-mode copy of ``mod`` whose parameters and buffers live on the meta device.

    Tensors are swapped for meta tensors through deepcopy's memo, so no weight
    data is copied.
    """
    memo: dict[int, Any] = {}
    for t in itertools.chain(mod.parameters(), mod.buffers()):
        if isinstance(t, (nn.parameter.UninitializedParameter, nn.parameter.UninitializedBuffer)):
            continue
        meta = meta_empty(t.shape, t.dtype)
        memo[id(t)] = nn.Parameter(meta, requires_grad=t.requires_grad) if isinstance(t, nn.Parameter) else meta
    copied = tree_copy(mod, memo)
    set_mode(copied, False)
    return copied


def set_mode(meta: nn.Module, train: bool) -> None:
    """``meta.train(train)`` for a meta-device copy splice owns, unless an override of ``train`` refuses the meta
    device (transformers re-kernelizes there when hub kernels are on), when every module's flag is set as
    ``nn.Module.train`` would: the copy is splice's own, and its flags are all its forward reads."""
    try:
        meta.train(train)
    except Exception:  # noqa: BLE001 - whatever the override raises, the flags below are what it failed to set
        for m in meta.modules():
            m.training = train


def stand_in(mod: nn.Module, memo: dict[int, torch.Tensor]) -> nn.Module:
    """An eval-mode stand-in for ``mod`` whose parameters and buffers are meta tensors, for a module of a tree
    splice owns (a twin): only the tree's mappings are new, and plain tensor attributes are meta tensors too (an
    in-place update in a forward reaches nobody); its other attributes are the twin's, not copies.

    Cheaper than :func:`meta_module` by the deep copy of every attribute (a fused norm-and-activation leaf: 30
    microseconds, not 170); ``memo`` maps tensors to their meta twins, so weights tied across leaves stay tied.
    """
    c = object.__new__(type(mod))
    c.__dict__.update(mod.__dict__)
    for k, v in mod.__dict__.items():
        if isinstance(v, torch.Tensor):  # a plain tensor attribute (the twin shares it with the caller): meta too
            c.__dict__[k] = _meta_twin(v, memo)
    c.__dict__["training"] = False
    c.__dict__["_parameters"] = {k: _meta_twin(v, memo) for k, v in mod._parameters.items()}
    c.__dict__["_buffers"] = {k: _meta_twin(v, memo) for k, v in mod._buffers.items()}
    c.__dict__["_modules"] = {k: (None if v is None else stand_in(v, memo)) for k, v in mod._modules.items()}
    return c


def _meta_twin(t: torch.Tensor | None, memo: dict[int, torch.Tensor]) -> torch.Tensor | None:
    if t is None or isinstance(t, (nn.parameter.UninitializedParameter, nn.parameter.UninitializedBuffer)):
        return t
    found = memo.get(id(t))
    if found is None:
        meta = meta_empty(t.shape, t.dtype)
        found = memo[id(t)] = nn.Parameter(meta, requires_grad=t.requires_grad) if isinstance(t, nn.Parameter) else meta
    return found


def meta_empty(shape, dtype: torch.dtype) -> torch.Tensor:
    # torch.empty is a C++ call on meta; torch.empty_like goes through a Python reference and costs ten times more
    return torch.empty(shape, dtype=dtype, device=META)


def to_meta(value: Any) -> Any:
    return meta_empty(value.shape, value.dtype) if isinstance(value, torch.Tensor) else value


def model_device(model: nn.Module) -> torch.device:
    """The device of the model's first parameter or buffer (the CPU if it has none): where inputs for it go."""
    tensor = next(itertools.chain(model.parameters(), model.buffers()), None)
    return tensor.device if tensor is not None else torch.device("cpu")


def input_dtype(model: nn.Module) -> torch.dtype:
    """The dtype of the model's first floating-point parameter or buffer (float32 if none)."""
    for t in itertools.chain(model.parameters(), model.buffers()):
        if t.is_floating_point():
            return t.dtype
    return torch.float32


def _fetch_attr(root: nn.Module, target: str) -> Any:
    obj: Any = root
    for part in target.split("."):
        obj = getattr(obj, part)
    return obj


# Closed-form shape rules for the layers that dominate CNN graphs; their meta
# kernels are Python decompositions and cost more than the layer's real work at
# batch size 1. A rule returns None when it does not apply, and the meta kernel
# runs instead (and reports any error in its own words).

_SAME_SHAPE_MODULES = frozenset({
    nn.ReLU, nn.ReLU6, nn.SiLU, nn.GELU, nn.Hardswish, nn.Hardsigmoid, nn.Sigmoid, nn.Tanh,
    nn.LeakyReLU, nn.ELU, nn.Mish, nn.Identity, nn.Dropout, nn.Dropout2d,
})


def _conv2d_rule(mod: nn.Conv2d, x: torch.Tensor) -> torch.Tensor | None:
    if x.dim() != 4 or x.shape[1] != mod.in_channels or x.dtype != mod.weight.dtype:
        return None
    n, _, h, w = x.shape
    if mod.padding == "same":
        return meta_empty((n, mod.out_channels, h, w), x.dtype)
    padding = (0, 0) if mod.padding == "valid" else mod.padding
    out = []
    # output size of a convolution: floor((size + 2 pad - dilation (kernel - 1) - 1) / stride) + 1
    for size, k, s, p, d in zip((h, w), mod.kernel_size, mod.stride, padding, mod.dilation):
        o = (size + 2 * p - d * (k - 1) - 1) // s + 1
        if o <= 0:
            return None
        out.append(o)
    return meta_empty((n, mod.out_channels, *out), x.dtype)


def _module_rule(mod: nn.Module, args: tuple, kwargs: dict) -> torch.Tensor | None:
    if kwargs or len(args) != 1 or not isinstance(args[0], torch.Tensor):
        return None
    x = args[0]
    cls = type(mod)
    if cls in _SAME_SHAPE_MODULES:
        return meta_empty(x.shape, x.dtype)
    if cls is nn.Conv2d:
        return _conv2d_rule(mod, x)
    if cls is nn.BatchNorm2d:
        ok = x.dim() == 4 and x.shape[1] == mod.num_features
    elif cls is nn.GroupNorm:
        ok = x.dim() >= 2 and x.shape[1] == mod.num_channels
    elif cls is nn.LayerNorm:
        k = len(mod.normalized_shape)
        ok = x.dim() >= k and tuple(x.shape[x.dim() - k:]) == tuple(mod.normalized_shape)
    elif cls is nn.Linear:
        if x.dim() >= 1 and x.shape[-1] == mod.in_features and x.dtype == mod.weight.dtype:
            return meta_empty((*x.shape[:-1], mod.out_features), x.dtype)
        return None
    elif cls is nn.AdaptiveAvgPool2d and x.dim() in (3, 4):
        size = mod.output_size
        size = (size, size) if isinstance(size, int) else size
        h, w = (o if o is not None else i for o, i in zip(size, x.shape[-2:]))
        return meta_empty((*x.shape[:-2], h, w), x.dtype)
    else:
        return None
    return meta_empty(x.shape, x.dtype) if ok else None


def _broadcast(a: tuple[int, ...], b: tuple[int, ...]) -> tuple[int, ...] | None:
    out = []
    for x, y in itertools.zip_longest(reversed(a), reversed(b), fillvalue=1):
        if x != y and x != 1 and y != 1:
            return None
        out.append(y if x == 1 else x)
    return tuple(reversed(out))


def _elementwise_rule(args: tuple, kwargs: dict) -> torch.Tensor | None:
    """Out-of-place add, sub, mul: broadcast shape, promoted dtype."""
    if kwargs or len(args) != 2:
        return None
    a, b = args
    for v in args:
        if not isinstance(v, (torch.Tensor, int, float, bool)):
            return None
    if not (isinstance(a, torch.Tensor) or isinstance(b, torch.Tensor)):
        return None
    shape = _broadcast(
        tuple(a.shape) if isinstance(a, torch.Tensor) else (),
        tuple(b.shape) if isinstance(b, torch.Tensor) else (),
    )
    if shape is None:
        return None
    return meta_empty(shape, torch.result_type(a, b))


def _cat_rule(args: tuple, kwargs: dict) -> torch.Tensor | None:
    if not args or set(kwargs) - {"dim"} or len(args) > 2:
        return None
    tensors = args[0]
    dim = args[1] if len(args) > 1 else kwargs.get("dim", 0)
    if not isinstance(tensors, (list, tuple)) or not tensors or not isinstance(dim, int):
        return None
    first = tensors[0]
    if not all(isinstance(t, torch.Tensor) and t.dim() == first.dim() and t.dtype == first.dtype for t in tensors):
        return None
    ndim = first.dim()
    if ndim == 0 or not -ndim <= dim < ndim:
        return None
    dim %= ndim
    shape = list(first.shape)
    for t in tensors[1:]:
        if any(a != b for i, (a, b) in enumerate(zip(shape, t.shape)) if i != dim):
            return None
        shape[dim] += t.shape[dim]
    return meta_empty(shape, first.dtype)


_FUNCTION_RULES: dict[Any, Callable[[tuple, dict], torch.Tensor | None]] = {
    torch.cat: _cat_rule,
    **dict.fromkeys((operator.add, operator.sub, operator.mul, torch.add, torch.sub, torch.mul), _elementwise_rule),
}
_METHOD_RULES: dict[str, Callable[[tuple, dict], torch.Tensor | None]] = dict.fromkeys(
    ("add", "sub", "mul"), _elementwise_rule
)


def _same(value: torch.Tensor) -> torch.Tensor:
    return value


def run_for_real(mod: nn.Module, args: tuple, kwargs: dict) -> Any:
    """Run a copy of ``mod`` once on all-zeros inputs of the given meta shapes; return meta outputs."""
    device = model_device(mod)

    def real(v):
        return torch.zeros(v.shape, dtype=v.dtype, device=device)

    with torch.device(device):
        work = tree_copy(mod)
        work.eval()
        out = work(*map_tensors(tuple(args), real), **map_tensors(dict(kwargs), real))
    return map_tensors(out, to_meta)


def _run_module(mod: nn.Module, target: str, args: tuple, kwargs: dict, cache: dict[str, nn.Module],
                memo: dict[int, torch.Tensor]) -> Any:
    meta_mod = cache.get(target)
    if meta_mod is None:
        meta_mod = cache[target] = stand_in(mod, memo)
    try:
        with ShapeRules():
            return meta_mod(*args, **kwargs)
    except Exception:
        if is_torch_builtin(type(mod)):
            raise
        # a user leaf whose forward needs real values (value-dependent control flow)
        try:
            return run_for_real(mod, args, kwargs)
        except Exception:
            pass
        raise


def propagate(
    graph: fx.Graph, root: nn.Module, modules: dict[str, nn.Module], input_shapes: tuple[tuple[int, int, int], ...]
) -> dict[fx.Node, Any]:
    """Run ``graph`` on batch-1 meta tensors (one per input shape); return every node's (meta) value.

    ``modules`` maps qualnames to the modules of ``root``, a tree splice owns (a twin: leaves run as
    :func:`stand_in` copies that share its Python state).
    """
    meta_modules: dict[str, nn.Module] = {}
    memo: dict[int, torch.Tensor] = {}
    values: dict[fx.Node, Any] = {}
    load = values.__getitem__
    given = list(input_shapes)
    with torch.no_grad():
        for node in graph.nodes:
            op = node.op
            try:
                if op == "placeholder":
                    if str(node.target).startswith("*"):
                        value = {} if str(node.target).startswith("**") else ()  # *args, **kwargs: none given
                    elif given:
                        value = meta_empty((1, *given.pop(0)), input_dtype(root))
                    elif node.args:
                        value = node.args[0]  # an optional argument: its default
                    else:
                        n = len(input_shapes)
                        raise GraphError(
                            f"the model's forward takes more inputs than the {n} shape(s) given (also "
                            f"{node.target!r}); give one --input-shape per input, CxHxW for the images and "
                            "then each other input's per-sample shape (input_shape=[(C, H, W), (4,), ...])"
                        )
                elif op == "get_attr":
                    value = to_meta(_fetch_attr(root, node.target))
                elif op == "output":
                    value = fx.node.map_arg(node.args[0], load)
                else:
                    # plain lists and dicts, not fx's immutable ones: a module or function may update what it
                    # is handed (feats[1] = ...), as it may when the traced model runs
                    args = map_tensors(fx.node.map_arg(node.args, load), _same)
                    kwargs = map_tensors(fx.node.map_arg(node.kwargs, load), _same)
                    if op == "call_module":
                        mod = modules[node.target]
                        value = _module_rule(mod, args, kwargs)
                        if value is None:
                            value = _run_module(mod, node.target, args, kwargs, meta_modules, memo)
                    else:
                        rules = _FUNCTION_RULES if op == "call_function" else _METHOD_RULES
                        rule = rules.get(node.target)
                        value = rule(args, kwargs) if rule is not None else None
                        if value is None:
                            value = _call(node, args, kwargs)
            except GraphError:
                raise
            except Exception as exc:
                raise ShapeFailure(node, exc) from exc
            values[node] = value
    return values


def _call(node: fx.Node, args: tuple, kwargs: dict) -> Any:
    func = node.target if node.op == "call_function" else getattr(torch.Tensor, node.target, None)
    value = meta_rule(func, args, kwargs)  # a method's rule takes the tensor first, as torch.Tensor.mean does
    if value is not None:
        return value
    fn = node.target if node.op == "call_function" else getattr(args[0], node.target)
    if node.op == "call_method":
        args = args[1:]
    try:
        return fn(*args, **kwargs)
    except Exception:
        # a factory call (torch.zeros(...), torch.arange(...)) made a CPU tensor
        # that then met a meta one: run the node again with meta as the default device
        with torch.device(META):
            return fn(*args, **kwargs)
