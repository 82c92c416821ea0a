"""What to maximise: terms with weights, combined with ordinary Python arithmetic.

Every term gives one number per image of the batch (higher is better), so one backward pass
serves B images with B different targets. Image i's target is ``ctx.targets[i]`` (a channel, or a
row of a direction matrix); images of the same unit share ``ctx.groups[i]``.

    >>> from unitlens.synth import channel, diversity, total_variation
    >>> objective = channel() + 0.5 * diversity() - 0.05 * total_variation()
    >>> off = -channel()    # the negative: what turns the unit off
    >>> objective
    1*channel + 0.5*diversity + -0.05*total_variation

A term's ``layer`` of None means "the layer being synthesised".
"""
from __future__ import annotations

from dataclasses import dataclass

import torch

from ..errors import UnitlensError


@dataclass
class Context:
    """What terms see besides the feature maps."""

    layer: str  # the layer being synthesised
    targets: torch.Tensor  # (B,) long
    groups: torch.Tensor  # (B,) long: images with the same value optimise the same unit
    pixels: torch.Tensor  # (B, 3, H, W) the images in [0, 1], before the random transforms


class Term:
    layer: str | None = None
    unit = False  # True for terms that read one channel per image (they can rank channels)

    def value(self, feats: dict, ctx: Context) -> torch.Tensor:  # (B,)
        raise NotImplementedError

    def check(self, model, layer: str, targets) -> None:
        """Raise UnitlensError if this term cannot apply to `targets` of `layer` (before any step)."""

    def describe(self) -> dict:
        return {"term": type(self).__name__.lower()}

    def __repr__(self) -> str:
        return f"{self.describe()}"

    def _fmap(self, feats: dict, ctx: Context) -> torch.Tensor:
        return feats[self.layer or ctx.layer]

    # a bare term does arithmetic like a one-term Objective
    def __add__(self, o): return Objective.of(self) + o
    def __radd__(self, o): return Objective.of(o) + self
    def __sub__(self, o): return Objective.of(self) - o
    def __rsub__(self, o): return Objective.of(o) - self
    def __mul__(self, k): return Objective.of(self) * k
    def __rmul__(self, k): return Objective.of(self) * k
    def __neg__(self): return -Objective.of(self)


class Channel(Term):
    """Spatial mean of the target channel (the objective of most published visualisations)."""

    unit = True

    def __init__(self, layer: str | None = None):
        self.layer = layer

    def all_channels(self, fmap: torch.Tensor) -> torch.Tensor:  # (B, C, H, W) -> (B, C)
        return fmap.mean((2, 3))

    def value(self, feats, ctx):
        f = self._fmap(feats, ctx)
        return f[torch.arange(len(f)), ctx.targets].mean((1, 2))

    def check(self, model, layer, targets):
        c = model.layer(self.layer or layer).channels
        bad = [t for t in targets if not 0 <= t < c]
        if bad:
            raise UnitlensError(f"Channel {bad[0]} is out of range for {self.layer or layer} (0-{c - 1}).")

    def describe(self):
        return {"term": "channel", "layer": self.layer}


class Neuron(Channel):
    """The target channel at one spatial position (y, x) of the feature map; the centre by default."""

    def __init__(self, layer: str | None = None, y: int | None = None, x: int | None = None):
        self.layer, self.y, self.x = layer, y, x

    def _where(self, fmap):
        H, W = fmap.shape[2:]
        return (H // 2 if self.y is None else self.y), (W // 2 if self.x is None else self.x)

    def all_channels(self, fmap):
        y, x = self._where(fmap)
        return fmap[:, :, y, x]

    def value(self, feats, ctx):
        f = self._fmap(feats, ctx)
        y, x = self._where(f)
        return f[torch.arange(len(f)), ctx.targets, y, x]

    def check(self, model, layer, targets):
        super().check(model, layer, targets)
        info = model.layer(self.layer or layer)
        for name, v, n in (("y", self.y, info.height), ("x", self.x, info.width)):
            if v is not None and not 0 <= v < n:
                raise UnitlensError(f"Neuron {name}={v} is outside {info.name}'s feature map "
                                    f"({info.height}x{info.width}); valid: 0-{n - 1}.")

    def describe(self):
        return {"term": "neuron", "layer": self.layer, "y": self.y, "x": self.x}


class Direction(Term):
    """Spatial mean of the projection of the feature vector onto a direction over channels.

    `vectors` is (C,) for one direction, or (K, C): then the target of each image picks a row.
    """

    def __init__(self, vectors, layer: str | None = None):
        v = torch.as_tensor(vectors, dtype=torch.float32)
        self.vectors = (v.view(1, -1) if v.dim() == 1 else v)
        self.vectors = self.vectors / self.vectors.norm(dim=1, keepdim=True).clamp(min=1e-12)  # (K, C)
        self.layer = layer

    def value(self, feats, ctx):
        f = self._fmap(feats, ctx)  # (B, C, H, W)
        rows = ctx.targets if len(self.vectors) > 1 else torch.zeros_like(ctx.targets)
        d = self.vectors[rows]  # (B, C)
        return torch.einsum("bchw,bc->bhw", f, d).mean((1, 2))

    def check(self, model, layer, targets):
        c = model.layer(self.layer or layer).channels
        if self.vectors.shape[1] != c:
            raise UnitlensError(f"A direction needs {c} numbers for {self.layer or layer}, got {self.vectors.shape[1]}.")
        if len(self.vectors) > 1:
            bad = [t for t in targets if not 0 <= t < len(self.vectors)]
            if bad:
                raise UnitlensError(f"Target {bad[0]} has no direction (there are {len(self.vectors)}).")

    def describe(self):
        return {"term": "direction", "layer": self.layer, "count": len(self.vectors)}


class Diversity(Term):
    """-mean over the other images b of the same unit of cos(vec G_a, vec G_b), G the channel Gram
    matrix of the layer: Olah et al. 2017 (Feature Visualization, Distill) sum this over pairs; the
    mean keeps its weight independent of the number of images per unit. 0 for a single image."""

    def __init__(self, layer: str | None = None):
        self.layer = layer

    def value(self, feats, ctx):
        f = self._fmap(feats, ctx).flatten(2)  # (B, C, HW)
        g = (f @ f.transpose(1, 2)).flatten(1) / f.shape[2]  # (B, C*C)
        g = g / g.norm(dim=1, keepdim=True).clamp(min=1e-12)
        cos = g @ g.T  # (B, B)
        same = (ctx.groups.view(-1, 1) == ctx.groups.view(1, -1)) & ~torch.eye(len(g), dtype=torch.bool)
        n = same.sum(1).clamp(min=1)
        return -(cos * same).sum(1) / n

    def describe(self):
        return {"term": "diversity", "layer": self.layer}


class TotalVariation(Term):
    """mean over pixels of ((dx)^2 + (dy)^2)^(beta/2) on the [0, 1] image (Mahendran & Vedaldi 2015).
    A penalty: subtract it."""

    def __init__(self, beta: float = 2.0):
        self.beta = float(beta)

    def value(self, feats, ctx):
        p = ctx.pixels
        dx = p[:, :, :-1, 1:] - p[:, :, :-1, :-1]
        dy = p[:, :, 1:, :-1] - p[:, :, :-1, :-1]
        s = dx * dx + dy * dy
        s = s if self.beta == 2 else (s + 1e-8) ** (self.beta / 2)
        return s.flatten(1).mean(1)

    def describe(self):
        return {"term": "total_variation", "beta": self.beta}


class PixelNorm(Term):
    """mean over pixels of |x - 0.5|^p (p = 1 or 2): L1/L2 size of the image. A penalty: subtract it."""

    def __init__(self, p: float = 2.0):
        self.p = float(p)

    def value(self, feats, ctx):
        return (ctx.pixels - 0.5).abs().pow(self.p).flatten(1).mean(1)

    def describe(self):
        return {"term": "pixel_norm", "p": self.p}


class Objective:
    """A weighted sum of terms. Build with the functions below and + - * ; call to evaluate."""

    def __init__(self, terms):
        self.terms = tuple((float(w), t) for w, t in terms)

    @staticmethod
    def of(x) -> Objective:
        if isinstance(x, Objective):
            return x
        if isinstance(x, Term):
            return Objective([(1.0, x)])
        raise TypeError(f"not an objective: {type(x).__name__}")

    def __add__(self, other):
        if isinstance(other, (int, float)) and other == 0:  # sum([...]) starts from 0
            return self
        return Objective(self.terms + Objective.of(other).terms)

    __radd__ = __add__

    def __mul__(self, k: float):
        return Objective([(w * float(k), t) for w, t in self.terms])

    __rmul__ = __mul__

    def __neg__(self):
        return self * -1.0

    def __sub__(self, other):
        return self + (-Objective.of(other))

    def __call__(self, feats: dict, ctx: Context) -> torch.Tensor:
        """(B,) value per image: sum of weight * term."""
        total = 0
        for w, t in self.terms:
            if w:
                total = total + w * t.value(feats, ctx)
        return total

    def layers(self, default: str) -> list[str]:
        return list(dict.fromkeys(t.layer or default for _, t in self.terms
                                  if not isinstance(t, (TotalVariation, PixelNorm))))

    def check(self, model, layer: str, targets) -> None:
        for _, t in self.terms:
            t.check(model, layer, targets)

    def unit_term(self) -> tuple[float, Term] | None:
        """(sign, term) of the single channel/neuron term, or None if there is not exactly one."""
        found = [(w, t) for w, t in self.terms if t.unit and w]
        if len(found) != 1:
            return None
        w, t = found[0]
        return (1.0 if w > 0 else -1.0), t

    def describe(self) -> list[dict]:
        return [{"weight": w, **t.describe()} for w, t in self.terms]

    def __repr__(self) -> str:
        return " + ".join(f"{w:g}*{t.describe()['term']}" for w, t in self.terms)


def channel(layer: str | None = None) -> Objective:
    """Maximise the spatial mean of each image's target channel."""
    return Objective.of(Channel(layer))


def neuron(layer: str | None = None, y: int | None = None, x: int | None = None) -> Objective:
    """Maximise the target channel at one position of the feature map (centre by default)."""
    return Objective.of(Neuron(layer, y, x))


def direction(vectors, layer: str | None = None) -> Objective:
    """Maximise the projection onto a direction in channel space ((C,) or one row per target (K, C))."""
    return Objective.of(Direction(vectors, layer))


def negative(objective) -> Objective:
    """Minimise instead of maximise."""
    return -Objective.of(objective)


def diversity(layer: str | None = None) -> Objective:
    """Push the images of one unit apart (Gram-matrix cosine); weight it, e.g. 0.5 * diversity()."""
    return Objective.of(Diversity(layer))


def total_variation(beta: float = 2.0) -> Objective:
    """Total variation of the image; subtract it with a weight to smooth, e.g. - 0.05 * total_variation()."""
    return Objective.of(TotalVariation(beta))


def pixel_norm(p: float = 2.0) -> Objective:
    """Mean |pixel - 0.5|^p; subtract it with a weight to keep images mid-grey."""
    return Objective.of(PixelNorm(p))
