"""What to synthesise: a goal, stated once as plain fields, and the per-image score it defines.

A goal says which units (the unit grammar of units.py, e.g. ``layer3:0-63,100``), how the feature
map of each image becomes one number (``reduce``), which way to push it (``drive``), and the
weights of the diversity term and of the two penalties. The command line and Python build it with
the same constructor, which checks the syntax; ``layers`` resolves the units and validates the
whole goal against a model before the first step; ``record`` gives the plain fields a run's
manifest keeps (the units are kept per layer there), and ``Goal(units, **record)`` builds it again.

    >>> from unitlens.synth import Goal
    >>> g = Goal("layer3:0-3", reduce="at:2,5", drive="down", smoothness=0.05)
    >>> g.reduce, g.position, g.drive
    ('at', (2, 5), 'down')

How the feature map f (C, H, W) of image i, whose target is t, becomes one number:
  mean       spatial mean of channel t (what most published visualisations use)
  centre     channel t at the centre position (H // 2, W // 2)
  at:Y,X     channel t at position (Y, X)
  direction  spatial mean of the projection of f onto a unit vector over channels: one vector
             for every image, or one row per target ((K, C): target t takes row t)

The loop maximises, per image,
  s * reduce(f)  +  diversity * D  -  smoothness * TV  -  grey_pull * G
with s = +1 to drive the unit up and -1 to drive it down; D the diversity term of Olah et al. 2017
(Feature Visualization, Distill) against the other images of the same unit, TV the total variation
of Mahendran & Vedaldi 2015 with exponent ``tv_beta``, and G the mean |pixel - 0.5|^grey_power.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields
from pathlib import Path

import torch

from ..errors import UnitlensError

REDUCTIONS = ("mean", "centre", "at:Y,X", "direction")
DRIVES = ("up", "down")


@dataclass(frozen=True)
class Goal:
    """What to synthesise (see the module docstring). Bad syntax raises UnitlensError here."""

    units: tuple[str, ...] = ()  # unit grammar, one item per layer ("layer3:0-63,100" or "layer3")
    channels: str | None = None  # channels for layers named without any, e.g. "0-63"
    reduce: str = "mean"  # "mean", "centre", "at" (with position; "at:Y,X" parses), "direction"
    position: tuple[int, int] | None = None  # (y, x) for reduce "at"
    direction: tuple[tuple[float, ...], ...] | None = None  # (K, C) rows, or a .npy file, for "direction"
    drive: str = "up"  # "up": make the unit fire; "down": turn it off
    diversity: float = 0.0  # weight of the diversity term between a unit's images
    diversity_layer: str | None = None  # the layer whose Gram matrices are compared; None: the unit's
    smoothness: float = 0.0  # weight of the total-variation penalty
    tv_beta: float = 2.0
    grey_pull: float = 0.0  # weight of the mean |pixel - 0.5|^grey_power penalty
    grey_power: float = 2.0

    def __post_init__(self):
        put = lambda k, v: object.__setattr__(self, k, v)  # noqa: E731  (normalising a frozen instance)
        units = (self.units,) if isinstance(self.units, str) or hasattr(self.units, "layer") else self.units or ()
        put("units", tuple(_unit_text(u) for u in units))
        reduce, pos = str(self.reduce).strip().lower(), self.position
        if reduce.startswith("at:"):
            pos = _position(reduce[3:], self.reduce)
            reduce = "at"
        reduce = {"center": "centre"}.get(reduce, reduce)
        if reduce not in ("mean", "centre", "at", "direction"):
            raise UnitlensError(f"Unknown reduction '{self.reduce}'; valid: {', '.join(REDUCTIONS)}.")
        if reduce == "at":
            if pos is None:
                raise UnitlensError("reduce 'at' needs a position: write it as at:Y,X, e.g. at:3,4.")
            try:
                pos = tuple(int(v) for v in pos)
            except (TypeError, ValueError):
                pos = ()
            if len(pos) != 2:
                raise UnitlensError(f"A position is two whole numbers (row, column), got {self.position!r}.")
        elif pos is not None:
            raise UnitlensError(f"A position applies to reduce 'at' only, not '{reduce}'.")
        put("reduce", reduce)
        put("position", pos)
        if (reduce == "direction") != (self.direction is not None):
            raise UnitlensError("reduce 'direction' and the direction vectors go together: give both "
                                "(e.g. Goal(units, reduce='direction', direction=vectors)) or neither.")
        if self.direction is not None:
            put("direction", _vectors(self.direction))
        if self.drive not in DRIVES:
            raise UnitlensError(f"drive must be up or down, got '{self.drive}'.")
        for name in ("diversity", "smoothness", "grey_pull", "tv_beta", "grey_power"):
            try:
                v = float(getattr(self, name))
            except (TypeError, ValueError):
                v = math.nan
            if not math.isfinite(v) or v < 0 or (v == 0 and name in ("tv_beta", "grey_power")):
                raise UnitlensError(f"{name} must be a finite number >= 0 (> 0 for an exponent), "
                                    f"got {getattr(self, name)!r}.")
            put(name, v)

    # -- against a model --------------------------------------------------------------------
    def layers(self, model, manifest: dict | None = None):
        """The units as LayerUnits, the whole goal checked against the model. Given a run's manifest,
        a layer named without channels gets the channels mined (or synthesised) there, and no units
        at all means all of those."""
        if manifest is not None:
            from ..units import run_layers

            layers = run_layers(model, manifest, list(self.units), self.channels)
        else:
            from ..units import parse_layers

            layers = parse_layers(model, list(self.units), self.channels)
        for lu in layers:
            self.check(model, lu.layer, lu.units)
        return layers

    def check(self, model, layer: str, targets) -> None:
        """Raise UnitlensError if the goal cannot apply to `targets` of `layer` (before any step)."""
        info = model.layer(layer)
        if self.reduce == "direction" and len(self.direction) > 1:
            bad = [t for t in targets if not 0 <= t < len(self.direction)]
            if bad:
                raise UnitlensError(f"Target {bad[0]} has no direction (there are {len(self.direction)}).")
        elif self.reduce != "direction":
            bad = [t for t in targets if not 0 <= t < info.channels]
            if bad:
                raise UnitlensError(f"Channel {bad[0]} is out of range for {layer} (0-{info.channels - 1}).")
        if self.reduce == "at":
            for name, v, n in zip(("y", "x"), self.position, (info.height, info.width)):
                if not 0 <= v < n:
                    raise UnitlensError(f"Position {name}={v} is outside {layer}'s feature map "
                                        f"({info.height}x{info.width}); valid: 0-{n - 1}.")
        if self.direction is not None and len(self.direction[0]) != info.channels:
            raise UnitlensError(f"A direction needs {info.channels} numbers for {layer}, got {len(self.direction[0])}.")
        if self.diversity_layer is not None:
            model.layer(self.diversity_layer)  # names the closest layers if it is misspelt

    def record(self) -> dict:
        """The plain fields a manifest keeps (all but the units)."""
        d = {f.name: getattr(self, f.name) for f in fields(self) if f.name not in ("units", "channels")}
        d["position"] = list(self.position) if self.position else None
        d["direction"] = [list(r) for r in self.direction] if self.direction else None
        return d

    def scorer(self, layer: str) -> Scorer:
        return Scorer(self, layer)


def _unit_text(u) -> str:
    if hasattr(u, "layer"):  # a LayerUnits already resolved
        from ..units import ranges_text

        return f"{u.layer}:{ranges_text(u.units)}"
    if not isinstance(u, str) or not u.strip():
        raise UnitlensError(f"Units are written like layer3:0-63,100 or layer3, got {u!r}.")
    return u.strip()


def _position(text: str, whole) -> tuple[int, int]:
    try:
        y, x = (int(v) for v in text.split(","))
    except ValueError:
        raise UnitlensError(f"reduce '{whole}' needs a row and a column, e.g. at:3,4.") from None
    return y, x


def _vectors(v) -> tuple[tuple[float, ...], ...]:
    import numpy as np

    if isinstance(v, (str, Path)):
        try:
            v = np.load(v, allow_pickle=False)
        except (OSError, ValueError) as e:
            raise UnitlensError(f"Cannot read direction vectors from {v} ({e}); give a .npy file of (C,) or (K, C).") from None
    try:
        a = np.asarray(v.detach().cpu() if isinstance(v, torch.Tensor) else v, dtype=np.float64)
    except (TypeError, ValueError):  # ragged rows, words
        raise UnitlensError("Direction vectors are (C,) or (K, C) numbers, every row as long as the others; "
                            f"got {str(v)[:60]}.") from None
    a = a.reshape(1, -1) if a.ndim == 1 else a
    if a.ndim != 2 or a.size == 0 or not np.isfinite(a).all():
        raise UnitlensError(f"Direction vectors are (C,) or (K, C) finite numbers, got shape {list(a.shape)}.")
    return tuple(tuple(float(x) for x in row) for row in a)


@dataclass
class Context:
    """What the score sees besides the feature maps."""

    layer: str  # the layer being synthesised
    targets: torch.Tensor  # (B,) long
    groups: torch.Tensor  # (B,) long: images with the same value optimise the same unit
    pixels: torch.Tensor  # (B, 3, H, W) the images in [0, 1], before the random warps


class Scorer:
    """A goal made into a function of one layer's batch: (feats, Context) -> (B,) to maximise."""

    def __init__(self, goal: Goal, layer: str):
        self.goal, self.layer = goal, layer
        self.sign = 1.0 if goal.drive == "up" else -1.0
        self.vectors = None
        if goal.direction is not None:
            v = torch.tensor(goal.direction, dtype=torch.float32)  # (K, C)
            self.vectors = v / v.norm(dim=1, keepdim=True).clamp(min=1e-12)

    def layers(self) -> list[str]:
        """The feature maps the score reads (for the truncated forward)."""
        extra = [self.goal.diversity_layer] if self.goal.diversity and self.goal.diversity_layer else []
        return list(dict.fromkeys([self.layer, *extra]))

    def _where(self, fmap) -> tuple[int, int]:
        H, W = fmap.shape[2:]
        return self.goal.position if self.goal.reduce == "at" else (H // 2, W // 2)

    def per_channel(self, fmap: torch.Tensor) -> torch.Tensor:
        """(B, C, H, W) -> (B, C): the reduction of every channel (to rank the target among them)."""
        if self.goal.reduce == "mean":
            return fmap.mean((2, 3))
        if self.goal.reduce in ("centre", "at"):
            y, x = self._where(fmap)
            return fmap[:, :, y, x]
        raise UnitlensError("A direction goal has no per-channel value to rank.")

    def unit_value(self, fmap: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
        """(B, C, H, W), targets (B,) -> (B,) the reduced target, before the sign."""
        rows = torch.arange(len(fmap))
        if self.goal.reduce == "mean":
            return fmap[rows, targets].mean((1, 2))
        if self.goal.reduce in ("centre", "at"):
            y, x = self._where(fmap)
            return fmap[rows, targets, y, x]
        d = self.vectors[targets if len(self.vectors) > 1 else torch.zeros_like(targets)]  # (B, C)
        return torch.einsum("bchw,bc->bhw", fmap, d).mean((1, 2))

    def __call__(self, feats: dict, ctx: Context) -> torch.Tensor:
        g = self.goal
        score = self.sign * self.unit_value(feats[self.layer], ctx.targets)  # (B,)
        if g.diversity:
            score = score + g.diversity * diversity(feats[g.diversity_layer or self.layer], ctx.groups)
        if g.smoothness:
            score = score - g.smoothness * total_variation(ctx.pixels, g.tv_beta)
        if g.grey_pull:
            score = score - g.grey_pull * grey_distance(ctx.pixels, g.grey_power)
        return score


# -- the published terms, as plain functions of tensors ------------------------------------------

def diversity(fmap: torch.Tensor, groups: torch.Tensor) -> torch.Tensor:
    """-mean over the other images b of the same group of cos(vec G_a, vec G_b), G the channel Gram
    matrix: Olah et al. 2017 (Feature Visualization, Distill) sum this over pairs; the mean keeps
    its weight independent of the number of images per unit. 0 for a single image.
    fmap (B, C, H, W), groups (B,) -> (B,)."""
    f = fmap.flatten(2)  # (B, C, HW)
    g = (f @ f.transpose(1, 2)).flatten(1) / f.shape[2]  # (B, C*C)
    g = g / g.norm(dim=1, keepdim=True).clamp(min=1e-12)
    cos = g @ g.T  # (B, B)
    same = (groups.view(-1, 1) == groups.view(1, -1)) & ~torch.eye(len(g), dtype=torch.bool)
    n = same.sum(1).clamp(min=1)
    return -(cos * same).sum(1) / n


def total_variation(pixels: torch.Tensor, beta: float = 2.0) -> torch.Tensor:
    """mean over pixels of ((dx)^2 + (dy)^2)^(beta/2) (Mahendran & Vedaldi 2015). (B, 3, H, W) -> (B,)."""
    dx = pixels[:, :, :-1, 1:] - pixels[:, :, :-1, :-1]
    dy = pixels[:, :, 1:, :-1] - pixels[:, :, :-1, :-1]
    s = dx * dx + dy * dy
    s = s if beta == 2 else (s + 1e-8) ** (beta / 2)
    return s.flatten(1).mean(1)


def grey_distance(pixels: torch.Tensor, power: float = 2.0) -> torch.Tensor:
    """mean over pixels of |x - 0.5|^power: how far the image strays from mid grey. (B, 3, H, W) -> (B,)."""
    return (pixels - 0.5).abs().pow(power).flatten(1).mean(1)
