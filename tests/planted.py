"""Networks with hand-set weights whose units' optimal inputs are known (loadable as tests/planted.py:fn)."""
import math

import torch
from torch import nn

ORIENTATIONS = (0, 30, 60, 90, 120, 150)  # degrees; the wave vector's angle, x to the right, y down
WAVELENGTH = 5.0  # px
SIGMA = 2.5  # px, width of the Gaussian envelope


def gabor(theta_deg: float, size: int = 11, wavelength: float = WAVELENGTH, sigma: float = SIGMA) -> torch.Tensor:
    """A zero-mean, unit-norm Gabor filter (size, size) whose carrier runs along theta."""
    r = torch.arange(size, dtype=torch.float64) - (size - 1) / 2
    y, x = torch.meshgrid(r, r, indexing="ij")
    t = math.radians(theta_deg)
    g = torch.exp(-(x * x + y * y) / (2 * sigma**2)) * torch.cos(2 * math.pi * (x * math.cos(t) + y * math.sin(t)) / wavelength)
    g = g - g.mean()
    return (g / g.norm()).float()


def gabor_net() -> nn.Module:
    """conv (one Gabor per orientation, the same on R, G and B) then ReLU: layer '1' has one unit per
    orientation in ORIENTATIONS."""
    conv = nn.Conv2d(3, len(ORIENTATIONS), 11, padding=5, bias=False)
    with torch.no_grad():
        for k, th in enumerate(ORIENTATIONS):
            conv.weight[k] = gabor(th).expand(3, -1, -1) / 3
    return nn.Sequential(conv, nn.ReLU())


def linear_unit() -> nn.Module:
    """One 16x16 convolution, no bias, no nonlinearity: on a 16x16 input its single output is w . x,
    so under ||x|| = r the optimum is x = r w / ||w|| (Cauchy-Schwarz). Seeded random w."""
    conv = nn.Conv2d(3, 1, 16, bias=False)
    with torch.no_grad():
        conv.weight.copy_(torch.randn(conv.weight.shape, generator=torch.Generator().manual_seed(5)))
    return nn.Sequential(conv)
