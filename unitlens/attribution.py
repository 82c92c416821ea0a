"""Which input pixels drive a scalar function of the input: integrated gradients, gradient x input,
SmoothGrad. Pure functions of a callable, so they work for any differentiable model.

`f` maps a batch (B, *shape) to (B,) scores, one per row, rows independent (a network in eval
mode). `x` is ONE input (*shape). Every method evaluates f on chunks of `batch` rows (the path
points or the noisy copies) in one forward and one backward each, so the work is batched and
memory stays bounded.

>>> f = lambda b: (b * w).flatten(1).sum(1)                        # doctest: +SKIP
>>> integrated_gradients(f, x, torch.zeros_like(x)).values         # (x - 0) * w exactly  # doctest: +SKIP
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import torch

from .errors import UnitlensError

RULES = ("trapezoid", "midpoint", "left", "right")


@dataclass(frozen=True)
class Attribution:
    """What one method says about one input. `values` has the shape of the input."""

    method: str
    values: torch.Tensor
    f_input: float
    f_baseline: float | None = None  # integrated gradients only
    steps: int | None = None  # path points (integrated gradients) or noisy copies (SmoothGrad)

    @property
    def total(self) -> float:
        return float(self.values.double().sum())

    @property
    def gap(self) -> float | None:
        """Completeness error of integrated gradients, relative to |f(x) - f(baseline)|
        (Sundararajan et al. 2017: the attributions sum to f(x) - f(baseline))."""
        if self.f_baseline is None:
            return None
        change = self.f_input - self.f_baseline
        return abs(self.total - change) / max(abs(change), 1e-12)


Fn = Callable[[torch.Tensor], torch.Tensor]


def gradients(f: Fn, points: torch.Tensor, batch: int = 16) -> tuple[torch.Tensor, torch.Tensor]:
    """f and its input gradient at every row of `points` (N, *shape): ((N,) scores, (N, *shape))."""
    if batch < 1:
        raise UnitlensError(f"batch must be at least 1, got {batch}.")
    scores, grads = [], []
    # near-equal chunks: 17 points go as 9 + 8, not 16 + 1 (a batch of one runs far slower per image)
    for chunk in points.tensor_split(-(-len(points) // batch)):
        chunk = chunk.detach().clone().requires_grad_(True)
        with torch.enable_grad():
            out = f(chunk)
            if out.shape != (len(chunk),):
                raise UnitlensError(f"The attributed function must give one score per input, shape "
                                    f"({len(chunk)},); it gave {tuple(out.shape)}.")
            (g,) = torch.autograd.grad(out.sum(), chunk)
        scores.append(out.detach())
        grads.append(g)
    return torch.cat(scores), torch.cat(grads)


def gradient(f: Fn, x: torch.Tensor) -> Attribution:
    """The plain input gradient of f at x."""
    s, g = gradients(f, x.unsqueeze(0))
    return Attribution("gradient", g[0], float(s[0]))


def gradient_x_input(f: Fn, x: torch.Tensor) -> Attribution:
    """x * df/dx (Shrikumar et al. 2016). The first-order term of integrated gradients from a zero
    baseline; in the input space given (for images: pixels, where zero is black)."""
    s, g = gradients(f, x.unsqueeze(0))
    return Attribution("gradient-x-input", x * g[0], float(s[0]))


def _alphas(steps: int, rule: str) -> tuple[torch.Tensor, torch.Tensor]:
    """Points in [0, 1] and weights of an m-step quadrature of the path integral."""
    m = steps
    if rule == "trapezoid":
        a = torch.arange(m + 1, dtype=torch.float64) / m
        w = torch.full((m + 1,), 1.0 / m, dtype=torch.float64)
        w[0] = w[-1] = 0.5 / m
        return a, w
    k = torch.arange(m, dtype=torch.float64)
    a = {"midpoint": (k + 0.5) / m, "left": k / m, "right": (k + 1) / m}[rule]
    return a, torch.full((m,), 1.0 / m, dtype=torch.float64)


def integrated_gradients(f: Fn, x: torch.Tensor, baseline: torch.Tensor, steps: int = 32, *,
                         rule: str = "trapezoid", batch: int = 16, tolerance: float | None = None,
                         max_steps: int | None = None) -> Attribution:
    """IG_i = (x_i - x'_i) * integral_0^1 df(x' + a (x - x'))/dx_i da  (Sundararajan et al. 2017),
    by an m-step Riemann (`left`, `right`, `midpoint`) or trapezoid rule along the straight path.

    With `tolerance` (trapezoid only), the number of steps doubles, reusing every point already
    computed, until the completeness error (`Attribution.gap`) is below it or `max_steps` is reached.
    """
    if rule not in RULES:
        raise UnitlensError(f"Unknown integration rule '{rule}'. Valid: {', '.join(RULES)}.")
    if steps < 1:
        raise UnitlensError(f"Integrated gradients needs at least 1 step, got {steps}.")
    if baseline.shape != x.shape:
        raise UnitlensError(f"Baseline shape {tuple(baseline.shape)} differs from the input's {tuple(x.shape)}.")
    if tolerance is not None and rule != "trapezoid":
        raise UnitlensError("Refining the steps to a tolerance needs the trapezoid rule.")
    delta = x - baseline
    shape = (-1,) + (1,) * x.dim()

    def path(alphas: torch.Tensor) -> torch.Tensor:
        return baseline.unsqueeze(0) + alphas.to(x.dtype).view(shape) * delta.unsqueeze(0)  # (n, *shape)

    a, w = _alphas(steps, rule)
    s, g = gradients(f, path(a), batch)
    if rule != "trapezoid":
        f_x = float(f(x.unsqueeze(0)).detach()[0]) if rule != "right" else float(s[-1])
        f_b = float(f(baseline.unsqueeze(0)).detach()[0]) if rule != "left" else float(s[0])
        avg = (g.double() * w.view(shape)).sum(0)
        return Attribution("integrated-gradients", (delta.double() * avg).to(x.dtype), f_x, f_b, steps)
    # trapezoid: keep the end points and the interior sum apart, so doubling reuses both
    f_b, f_x = float(s[0]), float(s[-1])
    ends = (g[0].double() + g[-1].double()) / 2
    interior = g[1:-1].double().sum(0)
    m = steps
    while True:
        result = Attribution("integrated-gradients", (delta.double() * (ends + interior) / m).to(x.dtype),
                             f_x, f_b, m)
        if tolerance is None or result.gap <= tolerance or (max_steps is not None and 2 * m > max_steps):
            return result
        new = (torch.arange(m, dtype=torch.float64) + 0.5) / m  # the midpoints of the current grid
        interior = interior + gradients(f, path(new), batch)[1].double().sum(0)
        m *= 2


def smoothgrad(f: Fn, x: torch.Tensor, noise: float = 0.15, samples: int = 32, *, seed: int = 0,
               batch: int = 16, span: float | None = None) -> Attribution:
    """The mean gradient over `samples` copies x + N(0, sigma^2), sigma = noise * (x_max - x_min)
    (Smilkov et al. 2017; they recommend noise 0.10-0.20 and about 50 samples). Signed: take
    absolute values for display only, as the paper does. `span` replaces x_max - x_min."""
    if samples < 1:
        raise UnitlensError(f"SmoothGrad needs at least 1 sample, got {samples}.")
    if noise < 0:
        raise UnitlensError(f"SmoothGrad noise must be >= 0 (a fraction of the input range), got {noise}.")
    span = float(x.max() - x.min()) if span is None else span
    gen = torch.Generator().manual_seed(seed)
    eps = torch.randn((samples, *x.shape), generator=gen, dtype=x.dtype)
    s, g = gradients(f, x.unsqueeze(0) + noise * span * eps, batch)
    f_x = float(s.mean()) if noise == 0 else float(f(x.unsqueeze(0)).detach()[0])
    return Attribution("smoothgrad", g.double().mean(0).to(x.dtype), f_x, None, samples)


def baseline_of(pixels: torch.Tensor, kind: str) -> torch.Tensor:
    """The integrated-gradients baseline of an image (3, S, S) in [0, 1]: black, or blurred."""
    if kind == "black":
        return torch.zeros_like(pixels)
    import math

    from torchvision.transforms.functional import gaussian_blur

    sigma = max(0.05 * pixels.shape[-1], 0.5)
    k = min(2 * math.ceil(3 * sigma) + 1, 2 * (min(pixels.shape[-2:]) // 2) - 1)
    return gaussian_blur(pixels.unsqueeze(0), [k, k], [sigma, sigma])[0]
