"""Small architectures shipped for the demo and the tests.

``tray_net`` is the base network of the tray-camera demo: a plain CNN that
knows nothing about warps. It is what a user would have trained on upright,
centred digits before reaching for splice; splice then inserts warps between
its convolutions. Use it through the spec string ``splice.models:tray_net``.
"""

from __future__ import annotations

from collections import OrderedDict

import torch
from torch import nn

__all__ = ["TrayNet", "tray_net", "PlainNet", "conv3_net", "conv5_net"]


def _block(c_in: int, c_out: int) -> nn.Sequential:
    return nn.Sequential(OrderedDict(
        conv=nn.Conv2d(c_in, c_out, kernel_size=3, padding=1, bias=False),
        bn=nn.BatchNorm2d(c_out),
        relu=nn.ReLU(inplace=False),
    ))


class TrayNet(nn.Module):
    """Four conv-BN-ReLU blocks, max pooling after the first three, global average pooling, linear.

    Channel widths are ``width, 2*width, 4*width, 4*width``; on a 48x48 input
    the feature maps are 48, 24, 12 and 6 pixels wide, so there is a warp
    point at every resolution. With the defaults it has about 61k parameters.
    fx node names: ``block1_conv``, ``block1_bn``, ``block1_relu``, ``pool1``,
    ..., ``block4_relu``, ``gap``, ``flatten``, ``fc``.
    """

    def __init__(self, num_classes: int = 10, in_channels: int = 1, width: int = 16) -> None:
        super().__init__()
        for name, value in (("num_classes", num_classes), ("in_channels", in_channels), ("width", width)):
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"tray_net {name} must be a positive integer; got {value!r}")
        w = width
        self.block1 = _block(in_channels, w)
        self.pool1 = nn.MaxPool2d(2)
        self.block2 = _block(w, 2 * w)
        self.pool2 = nn.MaxPool2d(2)
        self.block3 = _block(2 * w, 4 * w)
        self.pool3 = nn.MaxPool2d(2)
        self.block4 = _block(4 * w, 4 * w)
        self.gap = nn.AdaptiveAvgPool2d(1)
        self.flatten = nn.Flatten(1)
        self.fc = nn.Linear(4 * w, num_classes)
        self.reset_parameters()

    def reset_parameters(self) -> None:
        for m in self.modules():
            if isinstance(m, nn.Conv2d):
                # common practice, no source: He initialisation for conv layers followed by ReLU
                nn.init.kaiming_normal_(m.weight, mode="fan_out", nonlinearity="relu")
            elif isinstance(m, nn.BatchNorm2d):
                m.reset_parameters()
            elif isinstance(m, nn.Linear):
                m.reset_parameters()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.pool1(self.block1(x))
        x = self.pool2(self.block2(x))
        x = self.pool3(self.block3(x))
        x = self.block4(x)
        return self.fc(self.flatten(self.gap(x)))


def tray_net(num_classes: int = 10, in_channels: int = 1, width: int = 16) -> TrayNet:
    """The demo's base network (``splice.models:tray_net``); see :class:`TrayNet`.

    ``tray_net.input_shape`` is ``(1, 48, 48)``, the default digits canvas; with
    ``in_channels=3`` pass the input shape explicitly. ``tray_net.normalisation``
    is ``None``: the network takes images in [0, 1] as they are. That is a
    deliberate choice for warps: a warp's zero padding then reads as the dark
    tray, whereas after mean/std normalisation zero would be a grey level that
    never occurs in the data. Batch norm after the first conv handles scale.
    """
    return TrayNet(num_classes=num_classes, in_channels=in_channels, width=width)


tray_net.input_shape = (1, 48, 48)
tray_net.normalisation = None


# ----------------------------------------------------------------------------- plain networks


class PlainNet(nn.Module):
    """Two conv-ReLU-maxpool stages, flatten, a hidden linear layer with ReLU, a linear classifier.

    The kind of small classifier users already have: no batch norm, PyTorch's
    default initialisation, and nothing declared about input normalisation
    (the factories below set ``input_shape`` only). ``kernel`` is 3 (padding 1,
    the maps keep their size) or 5 (no padding). fx node names: ``conv1``,
    ``relu1``, ``pool1``, ``conv2``, ``relu2``, ``pool2``, ``flatten``,
    ``fc1``, ``relu3``, ``fc2``.
    """

    def __init__(self, num_classes: int = 10, in_channels: int = 1, size: int = 40, *, kernel: int = 3,
                 widths: tuple[int, int, int] = (32, 64, 128)) -> None:
        super().__init__()
        for name, value in (("num_classes", num_classes), ("in_channels", in_channels), ("size", size)):
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"PlainNet {name} must be a positive integer; got {value!r}")
        pad = 1 if kernel == 3 else 0
        side = size
        for _ in range(2):
            side = (side + 2 * pad - kernel + 1) // 2
        if side < 1:
            raise ValueError(f"PlainNet size {size} is too small for two {kernel}x{kernel} conv + pool stages")
        c1, c2, hidden = widths
        self.conv1 = nn.Conv2d(in_channels, c1, kernel, padding=pad)
        self.relu1 = nn.ReLU()
        self.pool1 = nn.MaxPool2d(2)
        self.conv2 = nn.Conv2d(c1, c2, kernel, padding=pad)
        self.relu2 = nn.ReLU()
        self.pool2 = nn.MaxPool2d(2)
        self.flatten = nn.Flatten(1)
        self.fc1 = nn.Linear(c2 * side * side, hidden)
        self.relu3 = nn.ReLU()
        self.fc2 = nn.Linear(hidden, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.pool1(self.relu1(self.conv1(x)))
        x = self.pool2(self.relu2(self.conv2(x)))
        return self.fc2(self.relu3(self.fc1(self.flatten(x))))


def conv3_net(num_classes: int = 10, in_channels: int = 1, size: int = 40) -> PlainNet:
    """3x3 convs of 32 and 64 channels, a 128-unit hidden layer (``splice.models:conv3_net``).

    Declares ``input_shape = (1, 40, 40)`` and no normalisation; ``size`` is the
    (square) input side. About 0.84 M parameters at 40x40, most in ``fc1``.
    """
    return PlainNet(num_classes, in_channels, size, kernel=3, widths=(32, 64, 128))


def conv5_net(num_classes: int = 10, in_channels: int = 1, size: int = 40) -> PlainNet:
    """5x5 convs of 20 and 50 channels without padding, a 500-unit hidden layer (``splice.models:conv5_net``).

    Declares ``input_shape = (1, 40, 40)`` and no normalisation. About 1.25 M
    parameters at 40x40.
    """
    return PlainNet(num_classes, in_channels, size, kernel=5, widths=(20, 50, 500))


conv3_net.input_shape = (1, 40, 40)
conv5_net.input_shape = (1, 40, 40)
