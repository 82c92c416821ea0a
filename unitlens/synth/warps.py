"""Random warps (transformation robustness): a fresh random geometric transform of each image at each step.

The default sequence is the one of Olah et al. 2017 (Feature Visualization, Distill):
pad 16 px, jitter up to 16 px, scale by one of {1, 0.975, 1.025, 0.95, 1.05}, rotate by an
integer angle in -5..5 degrees, jitter again up to 8 px, crop back to the original size.

Here "jitter up to d" is a translation by an integer drawn from -d..d in each axis, and the whole
sequence is one affine map, sampled with bilinear `grid_sample` from the padded canvas, so it is
differentiable and costs one resampling. The padding shows where content moved away: filled with
the mean colour ("constant") or mirrored ("reflect").

Pixel amounts are given for images of `reference` = 224 px (the size of the published images). For
smaller images they shrink in proportion (a 16 px jitter on a 32 px image would move half the
picture), rounded, and at least 1 px when non-zero; larger images keep them, since what they guard
against, the strides of the network, is a number of pixels whatever the image size.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F

from ..errors import UnitlensError


@dataclass(frozen=True)
class Warps:
    """Settings of the random warps; `Warps.none()` turns them off."""

    pad: int = 16
    jitter: int = 16
    scales: tuple[float, ...] = (1.0, 0.975, 1.025, 0.95, 1.05)
    degrees: tuple[int, ...] = tuple(range(-5, 6))
    fine_jitter: int = 8
    pad_mode: str = "constant"  # "constant" (mean colour) or "reflect"
    reference: int = 224

    @classmethod
    def none(cls) -> Warps:
        return cls(pad=0, jitter=0, scales=(1.0,), degrees=(0,), fine_jitter=0)

    def __post_init__(self):
        if self.pad_mode not in ("constant", "reflect"):
            raise UnitlensError(f"pad_mode must be 'constant' or 'reflect', got '{self.pad_mode}'.")
        if min(self.pad, self.jitter, self.fine_jitter) < 0 or not self.scales or not self.degrees:
            raise UnitlensError("Transform amounts must be >= 0, with at least one scale and one angle.")
        if min(self.scales) <= 0:
            raise UnitlensError(f"Scales must be positive, got {list(self.scales)}.")

    @property
    def identity(self) -> bool:
        return (self.pad == self.jitter == self.fine_jitter == 0 and set(self.scales) == {1.0}
                and set(self.degrees) == {0})

    def at(self, size: int) -> Warps:
        """Pixel amounts for images of `size` px (see the module docstring)."""
        f = min(1.0, size / self.reference)

        def px(v: int) -> int:
            return max(1, round(v * f)) if v else 0

        return Warps(px(self.pad), px(self.jitter), self.scales, self.degrees, px(self.fine_jitter),
                             self.pad_mode, self.reference)

    def describe(self, size: int) -> dict:
        r = self.at(size)
        return {"pad": r.pad, "jitter": r.jitter, "scales": list(r.scales), "degrees": list(r.degrees),
                "fine_jitter": r.fine_jitter, "pad_mode": r.pad_mode,
                "note": f"pixel amounts for {size} px images (given for {self.reference} px, scaled down below it)"}

    def draw(self, rng: np.random.Generator) -> np.ndarray:
        """One transform: (tx, ty, scale, degrees, fine_tx, fine_ty). Call on a spec resolved by `at`."""
        j, fj = self.jitter, self.fine_jitter
        t = rng.integers(-j, j + 1, size=2) if j else np.zeros(2)
        ft = rng.integers(-fj, fj + 1, size=2) if fj else np.zeros(2)
        s = self.scales[rng.integers(len(self.scales))] if len(self.scales) > 1 else self.scales[0]
        a = self.degrees[rng.integers(len(self.degrees))] if len(self.degrees) > 1 else self.degrees[0]
        return np.array([t[0], t[1], s, a, ft[0], ft[1]], dtype=np.float64)


def warp(images: torch.Tensor, draws: torch.Tensor, pad: int, fill, pad_mode: str = "constant") -> torch.Tensor:
    """Apply one transform per image. images (B, C, S, S); draws (B, 6) from `Warps.draw`.

    Content point u (pixels from the centre) goes to v = R(a) * s * (u + t) + t_fine; each output
    pixel v samples the padded canvas at u = R(-a) (v - t_fine) / s - t.
    """
    B, C, S, _ = images.shape
    fill_t = torch.as_tensor(fill, dtype=images.dtype).view(1, -1, 1, 1)
    x = images - fill_t  # so that zero padding (and grid_sample's zeros) means the fill colour
    if pad and pad_mode == "reflect":
        x = F.pad(x, (pad,) * 4, mode="reflect")
        N = S + 2 * pad
    else:  # a constant pad is what grid_sample's zeros give anyway: skip building the canvas
        N = S
    d = draws.to(images.dtype)
    to_norm = 2.0 / N  # pixels -> normalised canvas coordinates (align_corners=False)
    a = d[:, 3] * (math.pi / 180)
    cos, sin = torch.cos(a) / d[:, 2], torch.sin(a) / d[:, 2]
    A = torch.stack([torch.stack([cos, sin], 1), torch.stack([-sin, cos], 1)], 1)  # (B, 2, 2) = R(-a) / s
    t = d[:, 0:2] * to_norm
    ft = d[:, 4:6] * to_norm
    offset = -(A @ ft.unsqueeze(2)).squeeze(2) - t  # (B, 2)
    theta = torch.cat([A * (S / N), offset.unsqueeze(2)], 2)  # output grid spans the central S x S
    grid = F.affine_grid(theta, [B, C, S, S], align_corners=False)
    mode = "border" if pad_mode == "reflect" else "zeros"
    return F.grid_sample(x, grid, mode="bilinear", padding_mode=mode, align_corners=False) + fill_t
