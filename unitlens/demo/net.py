"""The demo network: a small CNN trained on the swatch corpus to tell the six kinds of cloth apart.

Its weights ship with the package (`swatch_net.pt`, made by `scripts/train_demo_model.py`), so
`unitlens demo` never trains and never downloads. Layers are named for what a user will ask about:
`block1`..`block4` are conv-BN-ReLU stages (each block after the first halves the resolution),
`head` the classifier.

>>> net = swatch_net()
>>> net(torch.zeros(2, 3, INPUT_SIZE, INPUT_SIZE)).shape
torch.Size([2, 6])
"""
from __future__ import annotations

from pathlib import Path

import torch
from torch import nn

from unitlens.demo.swatches import CLASSES  # absolute: load_model imports this file by path

INPUT_SIZE = 96
WIDTHS = (16, 32, 64, 96)
# Per-channel RGB statistics of swatch corpora (measured by scripts/train_demo_model.py over its
# training images); the demo normalises with these, not with ImageNet's.
MEAN = (0.671, 0.653, 0.615)
STD = (0.270, 0.259, 0.238)
PREPROCESS = {"size": INPUT_SIZE, "mean": MEAN, "std": STD}  # read by load_model for file.py:function specs
WEIGHTS = Path(__file__).with_name("swatch_net.pt")


def _block(c_in: int, c_out: int, stride: int) -> nn.Sequential:
    return nn.Sequential(nn.Conv2d(c_in, c_out, 3, stride, 1, bias=False), nn.BatchNorm2d(c_out), nn.ReLU(inplace=True))


class SwatchNet(nn.Module):
    def __init__(self, classes: int = len(CLASSES)):
        super().__init__()
        w = WIDTHS
        self.block1 = _block(3, w[0], 1)
        self.block2 = _block(w[0], w[1], 2)
        self.block3 = _block(w[1], w[2], 2)
        self.block4 = _block(w[2], w[3], 2)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.head = nn.Linear(w[3], classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:  # (B, 3, H, W) -> (B, classes)
        x = self.block4(self.block3(self.block2(self.block1(x))))
        return self.head(torch.flatten(self.pool(x), 1))


def swatch_net() -> SwatchNet:
    """The architecture, with untrained weights (load `WEIGHTS` for the trained ones)."""
    return SwatchNet()


def spec() -> str:
    """The model spec for `load_model`: this module and its builder function. By module, not by
    file: a run folder must find the network again after unitlens is reinstalled elsewhere."""
    return f"{__name__}:swatch_net"
