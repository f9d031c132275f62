"""The localisation head: a small CNN that predicts a warp's raw parameters.

Layout for a localisation tensor of shape ``(C, H, W)``, width ``w`` and ``P``
family parameters::

    AvgPool(kh x kw)          only when H > 32 or W > 32: kh = ceil(H / 32), kw = ceil(W / 32)
                              (a depthwise 1/(kh kw) conv on wide inputs, see _BlockMean)
    Conv3x3(C -> w) + ReLU    padding 1, at (h0, w0) = (H // kh, W // kw)
    MaxPool2 (ceil mode)      (h1, w1) = (ceil(h0 / 2), ceil(w0 / 2))
    Conv3x3(w -> w) + ReLU
    average pool to 4 x 4     adaptive-average-pool bins, written as two matrix products
    Flatten -> Linear(16w -> 2w) + ReLU -> Linear(2w -> P)

Parameter count (weights + biases)::

    9Cw + w  +  9w^2 + w  +  32w^2 + 2w  +  2wP + P   =   9Cw + 41w^2 + 4w + (2w + 1)P

e.g. C=3, w=16, affine (P=6): 432 + 10496 + 64 + 198 = 11190.

The 4x4 pool uses PyTorch's adaptive-average-pool bins (bin i covers
``[floor(i n / 4), ceil((i + 1) n / 4))``) but applies them as ``R @ x @ C^T``
with small non-persistent matrices, so it exports to ONNX as MatMul for any
input size (the ONNX exporters only lower adaptive pooling when the output
divides the input). Inputs smaller than 4 are upsampled by repetition, exactly
like ``adaptive_avg_pool2d``.

The final Linear starts with weight 0 and bias = the family's identity
parameters, so the warp is exactly the identity at init (the way resnet's
``zero_init_residual`` starts a block as a no-op). Consequence, documented
rather than hidden: at that exact point only the final layer receives a
gradient; every earlier layer's gradient flows through the zero weight and is
exactly 0 until the first update moves it.
"""

from __future__ import annotations

import math

import torch
from torch import Tensor, nn
from torch.nn import functional as F

from splice.warps.grids import spatial_size

__all__ = [
    "POOL_SIDE",
    "REDUCE_TO",
    "LocalisationHead",
    "head_sizes",
    "head_param_count",
    "head_macs",
]

# Inputs larger than this are average-pooled down first (cheap and keeps the
# head's cost independent of the image size). Common practice, no source.
REDUCE_TO = 32
# Side of the pooled feature map fed to the MLP; 4x4 keeps coarse position
# information, which a global pool would discard (translation needs it).
POOL_SIDE = 4


def head_sizes(shape: tuple[int, int, int]) -> dict[str, int]:
    """Intermediate sizes of the head for a localisation tensor ``(C, H, W)``."""
    _, h, w = shape
    kh = math.ceil(h / REDUCE_TO) if h > REDUCE_TO else 1
    kw = math.ceil(w / REDUCE_TO) if w > REDUCE_TO else 1
    if h > REDUCE_TO or w > REDUCE_TO:
        h0, w0 = h // kh, w // kw
    else:
        kh = kw = 1
        h0, w0 = h, w
    return {"kh": kh, "kw": kw, "h0": h0, "w0": w0, "h1": -(-h0 // 2), "w1": -(-w0 // 2)}


def head_param_count(channels: int, width: int, n_out: int) -> int:
    """Exact number of parameters of :class:`LocalisationHead` (see module docstring)."""
    c, w, p = channels, width, n_out
    return 9 * c * w + 41 * w * w + 4 * w + (2 * w + 1) * p


def head_macs(shape: tuple[int, int, int], width: int, n_out: int) -> int:
    """Multiply-accumulates of one head forward pass for one sample.

    Counted: the reducing average pool (one add per pooled input element),
    both 3x3 convolutions (``9 * C_in * C_out`` per output position), the 4x4
    pooling products (``w * (4 h1 w1 + 16 h1)``) and both Linear layers. Not
    counted: ReLU, max-pool comparisons and bias adds.
    """
    c = shape[0]
    s = head_sizes(shape)
    w = width
    macs = 0
    if s["kh"] > 1 or s["kw"] > 1:
        macs += c * s["h0"] * s["kh"] * s["w0"] * s["kw"]
    macs += 9 * c * w * s["h0"] * s["w0"]
    macs += 9 * w * w * s["h1"] * s["w1"]
    macs += w * (POOL_SIDE * s["h1"] * s["w1"] + POOL_SIDE * POOL_SIDE * s["h1"])
    macs += POOL_SIDE * POOL_SIDE * w * 2 * w
    macs += 2 * w * n_out
    return macs


def _bin_matrix(n_in: int, n_out: int, *, dtype: torch.dtype, device: torch.device | None) -> Tensor:
    """``(n_out, n_in)`` averaging matrix with adaptive-average-pool bins.

    Bin ``i`` averages inputs ``floor(i n_in / n_out) <= j < ceil((i + 1) n_in / n_out)``,
    the rule ``torch.nn.functional.adaptive_avg_pool2d`` uses.
    """
    m = torch.zeros(n_out, n_in, dtype=torch.float64)
    for i in range(n_out):
        start = (i * n_in) // n_out
        end = -(-((i + 1) * n_in) // n_out)
        m[i, start:end] = 1.0 / (end - start)
    return m.to(dtype=dtype, device=device)


class _BinPool(nn.Module):
    """Adaptive average pooling to ``side x side`` as two matrix products."""

    def __init__(self, height: int, width: int, side: int, *, device=None, dtype=None) -> None:
        super().__init__()
        self.side = side
        self._size = (height, width)
        dtype = dtype or torch.get_default_dtype()
        self.register_buffer("rows", _bin_matrix(height, side, dtype=dtype, device=device), persistent=False)
        self.register_buffer("cols", _bin_matrix(width, side, dtype=dtype, device=device), persistent=False)

    def _apply(self, fn, recurse=True):  # torch hook behind .to(), .double(), ...
        super()._apply(fn, recurse)
        # Rebuild from float64 so a float32 -> float64 round trip keeps exact bins.
        h, w = self._size
        ref = self.rows
        self.rows = _bin_matrix(h, self.side, dtype=ref.dtype, device=ref.device)
        self.cols = _bin_matrix(w, self.side, dtype=ref.dtype, device=ref.device)
        return self

    def forward(self, x: Tensor) -> Tensor:
        h, w = spatial_size(x)
        rows, cols = self.rows, self.cols
        if (h, w) != self._size:  # a different size at run time: build the bins on the fly
            rows = _bin_matrix(h, self.side, dtype=x.dtype, device=x.device)
            cols = _bin_matrix(w, self.side, dtype=x.dtype, device=x.device)
        return torch.matmul(rows, torch.matmul(x, cols.t()))


class _BlockMean(nn.Module):
    """Average over non-overlapping ``kh x kw`` blocks, what ``nn.AvgPool2d((kh, kw))`` computes.

    On a wide input (16 channels or more) with a power-of-two block area it
    runs as a depthwise convolution whose weights are all ``1 / (kh kw)``:
    exact in every float dtype, the same average up to summation order, and on the CPU about five
    times faster than ``avg_pool2d`` for 2x2 blocks on 64 channels (measured
    with torch 2.14: 0.2 ms against 1.1 ms at 8x64x56x56). Otherwise, where
    ``avg_pool2d`` is the faster (few channels, e.g. a warp on the image),
    it is ``avg_pool2d``. No state: the weights are a non-persistent buffer.
    """

    def __init__(self, channels: int, kh: int, kw: int, *, device=None, dtype=None) -> None:
        super().__init__()
        self.kernel = (kh, kw)
        area = kh * kw
        self.depthwise = channels >= 16 and area & (area - 1) == 0
        if self.depthwise:
            self.register_buffer("weight", torch.full((channels, 1, kh, kw), 1.0 / area, device=device,
                                                      dtype=dtype or torch.get_default_dtype()), persistent=False)

    def _apply(self, fn, recurse=True):  # torch hook behind .to(), .to_empty() ...
        super()._apply(fn, recurse)
        if self.depthwise:  # refilled, so .to_empty() (meta -> real) keeps the exact weights
            self.weight = torch.full_like(self.weight, 1.0 / (self.kernel[0] * self.kernel[1]))
        return self

    def forward(self, x: Tensor) -> Tensor:
        if self.depthwise:
            return F.conv2d(x, self.weight, stride=self.kernel, groups=self.weight.shape[0])
        return F.avg_pool2d(x, self.kernel, self.kernel)

    def extra_repr(self) -> str:
        return f"kernel_size={self.kernel}, {'depthwise conv' if self.depthwise else 'avg_pool2d'}"


class LocalisationHead(nn.Module):
    """Predicts ``(N, P)`` raw warp parameters from a ``(N, C, H, W)`` tensor.

    Starts at (and :meth:`reset_parameters` returns to) output == ``identity``
    for every input. See the module docstring for the layout and its size.
    """

    def __init__(
        self,
        shape: tuple[int, int, int],
        width: int,
        identity: Tensor,
        *,
        device=None,
        dtype=None,
    ) -> None:
        super().__init__()
        c, h, w = shape
        s = head_sizes(shape)
        n_out = int(identity.numel())
        kw = {"device": device, "dtype": dtype}
        self.shape = tuple(shape)
        self.width = width
        self.reduce: nn.Module = (
            _BlockMean(c, s["kh"], s["kw"], **kw) if s["kh"] > 1 or s["kw"] > 1 else nn.Identity()
        )
        self.conv1 = nn.Conv2d(c, width, 3, padding=1, **kw)
        self.pool1 = nn.MaxPool2d(2, ceil_mode=True)
        self.conv2 = nn.Conv2d(width, width, 3, padding=1, **kw)
        self.pool2 = _BinPool(s["h1"], s["w1"], POOL_SIDE, **kw)
        self.fc1 = nn.Linear(POOL_SIDE * POOL_SIDE * width, 2 * width, **kw)
        self.fc2 = nn.Linear(2 * width, n_out, **kw)
        self._identity_values = tuple(float(v) for v in identity.detach().cpu().double())
        self.register_buffer(
            "identity",
            torch.tensor(self._identity_values, dtype=dtype or torch.get_default_dtype(), device=device),
            persistent=False,
        )
        self.reset_parameters()

    def _apply(self, fn, recurse=True):  # torch hook behind .to(), .double(), .to_empty() ...
        super()._apply(fn, recurse)
        # rebuilt rather than converted, so .to_empty() (meta -> real) keeps exact values
        ref = self.identity
        self.identity = torch.tensor(self._identity_values, dtype=ref.dtype, device=ref.device)
        return self

    @property
    def final(self) -> nn.Linear:
        """The zero-initialised output layer."""
        return self.fc2

    def reset_parameters(self) -> None:
        """Fresh default init for every layer, then the final layer back to the identity."""
        for layer in (self.conv1, self.conv2, self.fc1, self.fc2):
            layer.reset_parameters()
        with torch.no_grad():
            self.fc2.weight.zero_()
            self.fc2.bias.copy_(self.identity)

    def identity_distance(self) -> float:
        """L2 distance of the final layer's (weight, bias) from its identity init."""
        with torch.no_grad():
            dw = self.fc2.weight.double().pow(2).sum()
            db = (self.fc2.bias.double() - self.identity.double()).pow(2).sum()
            return float(torch.sqrt(dw + db))

    def forward(self, loc: Tensor) -> Tensor:
        z = self.reduce(loc)
        z = F.relu(self.conv1(z))
        z = self.pool1(z)
        z = F.relu(self.conv2(z))
        z = self.pool2(z)
        z = F.relu(self.fc1(torch.flatten(z, 1)))
        return self.fc2(z)
