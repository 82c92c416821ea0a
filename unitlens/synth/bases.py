"""Image bases: what the optimiser actually moves, and how it becomes pixels (the parameterisation).

Both bases end the same way:

    pixels = squash(mean + M @ z)          z (B, C, H, W), one colour vector per pixel

where ``M`` is a CxC colour factor with M @ M.T = Sigma (the covariance of the corpus's C = 3 RGB
or C = 1 grey channels, or a natural-image default), so z is in whitened colour units (for grey,
M is the corpus's standard deviation: decorrelation is a scalar), and ``squash`` maps to [0, 1]:

  "sigmoid"  sigma(logit(mean) + (u - mean) / (mean * (1 - mean))) per channel, i.e. a logistic
             curve through the mean colour with slope 1 there: near the mean, pixels = mean + M z,
             and the image can never leave [0, 1]. This is the default.
  "clip"     clamp(u, 0, 1); the gradient vanishes outside the range
  "none"     u itself (analytic tests; the caller bounds the image, e.g. with a norm)

They differ in what z is:

  SpectralBasis  z = irfft2(scale * c): learnable Fourier coefficients c, white at the start, and a
                 fixed amplitude scale of 1/f (DC clamped to the lowest frequency), so a step of the
                 same size on every coefficient moves low frequencies most. This is the whitened,
                 preconditioned basis of Olah et al. 2017 (Feature Visualization, Distill).
  PixelBasis     z itself, one number per pixel and channel (the plain baseline).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch

from ..errors import UnitlensError

# Natural-image colour default, used when a run has no corpus of its own. Per-channel standard
# deviations are the ImageNet values torchvision normalises with; the correlations are from memory,
# checked against scikit-image's bundled photographs by scripts/measure_colour.py (below).
DEFAULT_MEAN = (0.485, 0.456, 0.406)
DEFAULT_STD = (0.229, 0.224, 0.225)
DEFAULT_CORR = ((1.0, 0.9, 0.8), (0.9, 1.0, 0.9), (0.8, 0.9, 1.0))
# From memory for ImageNet-like photos; scripts/measure_colour.py measures R-G 0.89, G-B 0.90, R-B 0.68 on
# scikit-image's photographs (the test holds the two within 0.15). Adopting the measured values changed
# how far a unit's image drifts between batch sizes on a random ResNet-18, so that change waits for a
# look of its own.
DEFAULT_SOURCE = ("natural-image default: ImageNet channel std 0.229/0.224/0.225 (torchvision), correlation "
                  "R-G 0.9, G-B 0.9, R-B 0.8 [from memory; within 0.15 of scikit-image's photographs]")
SQUASHES = ("sigmoid", "clip", "none")


# Grey is the ITU-R BT.601 luma of the RGB default (what PIL's "L" conversion computes).
LUMA = (0.299, 0.587, 0.114)


def default_covariance() -> np.ndarray:
    s = np.array(DEFAULT_STD)
    return np.array(DEFAULT_CORR) * np.outer(s, s)


@dataclass(frozen=True)
class ColourBasis:
    """Mean colour (C,) and colour factor M (C, C) with M @ M.T = covariance, values in [0, 1];
    C = 3 (RGB) or 1 (grey)."""

    mean: tuple[float, ...]
    factor: tuple[tuple[float, ...], ...]
    source: str
    ridge: float = 0.0  # added to the covariance diagonal when it was (nearly) singular

    @classmethod
    def from_covariance(cls, cov, mean, source: str) -> ColourBasis:
        """Cholesky factor of `cov` (as in Feature Visualization, Distill 2017).

        A grey corpus has a singular covariance; then a ridge of 1e-4 of its trace is added and
        recorded, so colour directions stay reachable, if slowly.
        """
        C = len(mean)
        cov = np.asarray(cov, dtype=np.float64).reshape(C, C)
        cov = (cov + cov.T) / 2
        ridge = 0.0
        if np.linalg.eigvalsh(cov).min() <= 1e-8 * max(np.trace(cov), 1e-12):
            ridge = 1e-4 * max(np.trace(cov), 1e-6)
            cov = cov + ridge * np.eye(C)
        m = np.linalg.cholesky(cov)
        return cls(tuple(float(v) for v in mean), tuple(tuple(float(v) for v in r) for r in m), source, ridge)

    @classmethod
    def default(cls, channels: int = 3) -> ColourBasis:
        if channels == 1:  # the luma of the RGB default: mean w.mu, variance w' Sigma w
            w = np.array(LUMA)
            return cls.from_covariance([[w @ default_covariance() @ w]], [float(w @ np.array(DEFAULT_MEAN))],
                                       f"ITU-R BT.601 luma of the {DEFAULT_SOURCE}")
        return cls.from_covariance(default_covariance(), DEFAULT_MEAN, DEFAULT_SOURCE)

    @classmethod
    def plain(cls, mean=(0.5, 0.5, 0.5)) -> ColourBasis:
        """No decorrelation: z is in pixel units."""
        C = len(mean)
        return cls(tuple(float(v) for v in mean), tuple(tuple(float(i == j) for j in range(C)) for i in range(C)),
                   "plain RGB" if C == 3 else "plain grey")

    @classmethod
    def from_run(cls, manifest: dict, channels: int = 3) -> ColourBasis:
        """The corpus colour statistics a mining pass measured, else the default."""
        c = (manifest.get("mine") or {}).get("colour")
        if c and c.get("pixels", 1) > 1 and len(c["mean"]) == channels:
            return cls.from_covariance(c["cov"], c["mean"], c.get("source", "measured on this run's corpus"))
        return cls.default(channels)

    def covariance(self) -> np.ndarray:
        m = np.array(self.factor)
        return m @ m.T

    def describe(self) -> dict:
        return {"mean": list(self.mean), "factor": [list(r) for r in self.factor], "cov": self.covariance().tolist(),
                "method": "cholesky", "source": self.source, "ridge": self.ridge}

    def apply(self, z: torch.Tensor) -> torch.Tensor:
        """z (B, C, H, W) whitened -> mean + M z (B, C, H, W)."""
        m = torch.tensor(self.factor, dtype=z.dtype)
        mu = torch.tensor(self.mean, dtype=z.dtype).view(1, -1, 1, 1)
        return torch.einsum("ij,bjhw->bihw", m, z) + mu


def squash(u: torch.Tensor, mean, kind: str) -> torch.Tensor:
    """Map mean + M z to [0, 1] (see the module docstring)."""
    if kind == "none":
        return u
    if kind == "clip":
        return u.clamp(0, 1)
    mu = torch.tensor(mean, dtype=u.dtype).clamp(0.05, 0.95).view(1, -1, 1, 1)
    return torch.sigmoid(torch.logit(mu) + (u - mu) / (mu * (1 - mu)))


class _Base:
    """Shared by both parameterisations: colour, squash, and the per-image parameter shape."""

    name = ""

    def __init__(self, size: int, colour: ColourBasis, squash: str = "sigmoid", init_std: float = 0.1):
        if squash not in SQUASHES:
            raise UnitlensError(f"Unknown squash '{squash}'; valid: {', '.join(SQUASHES)}.")
        self.size, self.colour, self.squash, self.init_std = int(size), colour, squash, float(init_std)

    shape: tuple[int, ...] = ()

    @property
    def _folded(self) -> tuple[torch.Tensor, torch.Tensor]:
        """The colour factor divided by the sigmoid's slope (C, C), and its offset (C, 1)."""
        mu = torch.tensor(self.colour.mean)
        c = mu.clamp(0.05, 0.95)
        k = torch.tensor(self.colour.factor) / (c * (1 - c)).view(-1, 1)
        return k, (torch.logit(c) + (mu - c) / (c * (1 - c))).view(-1, 1)

    def init(self, gen: torch.Generator) -> torch.Tensor:
        """One image's starting parameters, drawn from `gen` (its own generator)."""
        return torch.randn(self.shape, generator=gen) * self.init_std

    @property
    def channels(self) -> int:
        return len(self.colour.mean)

    def whitened(self, params: torch.Tensor) -> torch.Tensor:  # (B, *shape) -> z (B, C, H, W)
        raise NotImplementedError

    def pixels(self, params: torch.Tensor) -> torch.Tensor:
        """(B, *shape) -> pixels (B, C, H, W) in [0, 1] (unless squash is 'none')."""
        z = self.whitened(params)
        if self.squash != "sigmoid":
            return squash(self.colour.apply(z), self.colour.mean, self.squash)
        # the same as squash(colour.apply(z), ...), with the colour factor, the slope and the
        # offset folded into one CxC matrix and one bias, applied by one batched matmul
        k, bias = self._folded
        B, C, H, W = z.shape
        return torch.sigmoid(torch.baddbmm(bias.expand(B, C, 1), k.expand(B, C, C), z.reshape(B, C, H * W))).view(B, C, H, W)

    def project(self, params: torch.Tensor, norm: float) -> torch.Tensor:
        """Rescale each image so that its whitened image z has L2 norm `norm` (z is linear in params)."""
        n = self.whitened(params).flatten(1).norm(dim=1).clamp(min=1e-12)  # (B,)
        return params * (norm / n).view(-1, *([1] * (params.dim() - 1)))

    def describe(self) -> dict:
        return {"kind": self.name, "size": self.size, "squash": self.squash, "init_std": self.init_std}


class SpectralBasis(_Base):
    """Learnable Fourier coefficients with a 1/f amplitude scale (see the module docstring).

    `falloff` is the exponent of the scale: 1 gives a 1/f amplitude spectrum, like natural images
    (power ~ 1/f^2; Field 1987). The scale is divided by its root-mean-square over the half
    spectrum, so white coefficients of variance v give pixels of variance about v.
    """

    name = "spectral"

    def __init__(self, size: int, colour: ColourBasis, squash: str = "sigmoid", init_std: float = 0.1,
                 falloff: float = 1.0):
        super().__init__(size, colour, squash, init_std)
        self.falloff = float(falloff)
        h = w = self.size
        self.shape = (self.channels, h, w // 2 + 1, 2)  # real and imaginary parts of the rfft2 half spectrum
        self.freq = frequencies(h, w)  # (H, W//2+1) cycles per pixel
        s = 1.0 / self.freq.clamp(min=1.0 / max(h, w)) ** self.falloff  # DC clamped to the lowest frequency
        self.scale = s / s.pow(2).mean().sqrt()  # (H, W//2+1)

    def whitened(self, params: torch.Tensor) -> torch.Tensor:
        c = torch.view_as_complex(params.contiguous()) * self.scale  # (B, C, H, W//2+1)
        return torch.fft.irfft2(c, s=(self.size, self.size), norm="ortho")  # (B, C, H, W)

    def blur(self, params: torch.Tensor, sigma: float) -> torch.Tensor:
        """Gaussian blur of width `sigma` px, exactly: the Gaussian's transfer function exp(-2 pi^2 s^2 f^2)."""
        g = torch.exp(-2 * math.pi**2 * sigma**2 * self.freq**2)
        return params * g[..., None]

    def describe(self) -> dict:
        return {**super().describe(), "falloff": self.falloff, "dc": "clamped to the lowest frequency"}


class PixelBasis(_Base):
    """One parameter per pixel and channel."""

    name = "pixel"

    def __init__(self, size: int, colour: ColourBasis, squash: str = "sigmoid", init_std: float = 0.1):
        super().__init__(size, colour, squash, init_std)
        self.shape = (self.channels, self.size, self.size)

    def whitened(self, params: torch.Tensor) -> torch.Tensor:
        return params

    def blur(self, params: torch.Tensor, sigma: float) -> torch.Tensor:
        from torchvision.transforms.functional import gaussian_blur

        k = 2 * math.ceil(3 * sigma) + 1
        return gaussian_blur(params, [k, k], [sigma, sigma])


def frequencies(h: int, w: int) -> torch.Tensor:
    """|f| in cycles per pixel on the rfft2 grid (H, W//2+1)."""
    fy = torch.fft.fftfreq(h).view(-1, 1)
    fx = torch.fft.rfftfreq(w).view(1, -1)
    return torch.sqrt(fy * fy + fx * fx)


BASES = {"spectral": SpectralBasis, "pixel": PixelBasis}


def make_basis(kind: str, size: int, colour: ColourBasis, **options):
    """An image basis by name: 'spectral' (default everywhere) or 'pixel'."""
    if kind not in BASES:
        raise UnitlensError(f"Unknown image basis '{kind}'; valid: {', '.join(BASES)}.")
    return BASES[kind](size, colour, **options)
