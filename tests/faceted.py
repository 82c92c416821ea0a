"""A hand-built two-faceted unit (loadable as tests/faceted.py:two_faced).

Layer 'detect' (after its ReLU, layer '1'): channel 0 fires on red (R - (G+B)/2 of the raw pixels),
channel 1 on a vertical stripe pattern (a horizontal [1, -1] difference of grey, squared by
rectifying both signs). Layer 'mix' (a 1x1 convolution): channels 0 and 1 copy them, channel 2
is their sum, so it responds to either red or stripes: two unrelated things.
"""
import torch
from torch import nn

MEAN = torch.tensor([0.485, 0.456, 0.406])  # ImageNet statistics, the default preprocessing
STD = torch.tensor([0.229, 0.224, 0.225])


def _raw(w: torch.Tensor) -> tuple[torch.Tensor, float]:
    """A filter on raw RGB pixels (3, kh, kw) as weights and bias on normalised inputs."""
    return w * STD.view(3, 1, 1), float((w * MEAN.view(3, 1, 1)).sum())


def two_faced() -> nn.Module:
    detect = nn.Conv2d(3, 3, (1, 2))
    mix = nn.Conv2d(3, 3, 1, bias=False)
    with torch.no_grad():
        red = torch.zeros(3, 1, 2)
        red[:, 0, 0] = torch.tensor([1.0, -0.5, -0.5])
        grey = torch.zeros(3, 1, 2)
        grey[:, 0, 0], grey[:, 0, 1] = 1 / 3, -1 / 3
        for c, w in enumerate((red, grey, -grey)):  # stripes: both signs of the difference
            detect.weight[c], detect.bias[c] = _raw(w)
        mix.weight.zero_()
        mix.weight[0, 0] = 1
        mix.weight[1, 1] = mix.weight[1, 2] = 1
        mix.weight[2, 0] = mix.weight[2, 1] = mix.weight[2, 2] = 1
    return nn.Sequential(detect, nn.ReLU(), nn.Sequential(mix))
