"""Streaming top/bottom-K and statistics of the units of one layer, merged exactly across batches and ranks.

Ranking is by (score, corpus order), so the kept lists are the same for any batch size, worker
count, shard split or resume. `LayerTally.added` returns a new tally with a batch added and leaves
the old one whole, so the mining pass (mining.py) keeps whole batches only in its checkpoints.
"""
from __future__ import annotations

import math

import numpy as np
import torch

from .units import LayerUnits

PAD = 2**62  # image index of an empty slot; larger than any real index so real images win ties

# Histogram of per-image maxima on a fixed asinh scale, so histograms from any batch or process
# merge by adding counts: bin j covers x with floor(asinh(x / HIST_SCALE) * HIST_STEPS) == j - HIST_HALF.
HIST_SCALE = 1e-2
HIST_STEPS = 16
HIST_HALF = 240  # covers |x| up to about HIST_SCALE * sinh(15) = 1.6e4; beyond goes to the end bins
HIST_BINS = 2 * HIST_HALF


def hist_edges() -> np.ndarray:
    """Left edges of the histogram bins (HIST_BINS + 1 values; the outer ones are open-ended)."""
    j = np.arange(HIST_BINS + 1) - HIST_HALF
    return HIST_SCALE * np.sinh(j / HIST_STEPS)


def class_selectivity(class_means: np.ndarray, eps: float = 1e-7) -> np.ndarray:
    """Class selectivity index per unit, Morcos et al. 2018: (mu_max - mu_-max) / (mu_max + mu_-max).

    class_means: (L, U) mean activation of each unit per class, L >= 2. mu_-max is the mean over
    the other classes. The small eps in the denominator follows Leavitt & Morcos 2021.
    """
    L = class_means.shape[0]
    if L < 2:
        return np.full(class_means.shape[1], np.nan)
    top = class_means.max(0)
    rest = (class_means.sum(0) - top) / (L - 1)
    return (top - rest) / (top + rest + eps)


class LayerTally:
    """Streaming top/bottom-K and statistics for the chosen units of one layer."""

    def __init__(self, units: tuple[int, ...], channels: int, width: int, k: int, n_classes: int):
        U = len(units)
        self.units = torch.tensor(units, dtype=torch.long)
        self.all_units = list(units) == list(range(channels))
        self.width, self.k = width, k
        self.top_val = torch.full((U, k), -math.inf)
        self.top_img = torch.full((U, k), PAD, dtype=torch.long)
        self.top_pos = torch.zeros((U, k), dtype=torch.long)
        self.bot_val = torch.full((U, k), math.inf)
        self.bot_img = torch.full((U, k), PAD, dtype=torch.long)
        self.bot_pos = torch.zeros((U, k), dtype=torch.long)
        self.count = torch.zeros((), dtype=torch.long)
        self.sum_max = torch.zeros(U, dtype=torch.float64)
        self.sumsq_max = torch.zeros(U, dtype=torch.float64)
        self.sum_mean = torch.zeros(U, dtype=torch.float64)
        self.fires = torch.zeros(U, dtype=torch.long)
        self.low = torch.full((U,), math.inf)  # smallest value at any position
        self.high = torch.full((U,), -math.inf)
        self.hist = torch.zeros((U, HIST_BINS), dtype=torch.long)
        self.class_sum = torch.zeros((max(n_classes, 1), U), dtype=torch.float64)
        self.class_count = torch.zeros(max(n_classes, 1), dtype=torch.long)
        self.groups: torch.Tensor | None = None  # near-duplicate group per corpus image, with --dedupe

    STATE = ("top_val", "top_img", "top_pos", "bot_val", "bot_img", "bot_pos", "count", "sum_max",
             "sumsq_max", "sum_mean", "fires", "low", "high", "hist", "class_sum", "class_count")

    def state(self) -> dict[str, np.ndarray]:
        return {k: getattr(self, k).numpy() for k in self.STATE}

    def load(self, st: dict[str, np.ndarray]) -> None:
        for k in self.STATE:
            setattr(self, k, torch.from_numpy(np.array(st[k])))

    def update(self, fmap: torch.Tensor, ids: torch.Tensor, classes: torch.Tensor | None):
        """Add a batch in place (see `added`); returns its per-image (max, mean), each (B, U)."""
        new, mx, mean = self.added(fmap, ids, classes)
        self.__dict__.update(new.__dict__)  # one step: an interrupt cannot land between the fields
        return mx, mean

    def added(self, fmap: torch.Tensor, ids: torch.Tensor, classes: torch.Tensor | None):
        """This tally with a batch added, and its per-image (max, mean), each (B, U); self is unchanged,
        so a pass interrupted mid-batch still holds whole batches only.

        fmap (B, C, H, W); ids (B,) corpus indices; classes (B,) class ids or -1."""
        import copy

        f = fmap if self.all_units else fmap.index_select(1, self.units)
        flat = f.flatten(2).float()  # (B, U, H*W)
        mx, amx = flat.max(2)  # (B, U)
        mn, amn = flat.min(2)
        mean = flat.mean(2)
        mx = torch.nan_to_num(mx, nan=-math.inf)
        mn = torch.nan_to_num(mn, nan=math.inf)
        ids_u = ids.view(1, -1).expand(mx.shape[1], -1)  # (U, B)
        new = copy.copy(self)  # every state tensor below is a new one; none is changed in place
        new.top_val, new.top_img, new.top_pos = keep_best(
            self.top_val, self.top_img, self.top_pos, mx.T, ids_u, amx.T, self.k, largest=True, groups=self.groups)
        new.bot_val, new.bot_img, new.bot_pos = keep_best(
            self.bot_val, self.bot_img, self.bot_pos, mn.T, ids_u, amn.T, self.k, largest=False, groups=self.groups)
        m64 = mx.double()
        new.count = self.count + mx.shape[0]
        new.sum_max = self.sum_max + m64.sum(0)
        new.sumsq_max = self.sumsq_max + (m64 * m64).sum(0)
        new.sum_mean = self.sum_mean + mean.double().sum(0)
        new.fires = self.fires + (mx > 0).sum(0)
        new.low = torch.minimum(self.low, mn.min(0).values)
        new.high = torch.maximum(self.high, mx.max(0).values)
        b = torch.floor(torch.asinh(mx / HIST_SCALE) * HIST_STEPS).long() + HIST_HALF
        b = b.clamp_(0, HIST_BINS - 1)  # (B, U)
        offs = torch.arange(mx.shape[1]).view(1, -1) * HIST_BINS
        new.hist = self.hist.view(-1).index_add(0, (b + offs).view(-1),
                                                torch.ones(b.numel(), dtype=torch.long)).view_as(self.hist)
        if classes is not None:
            ok = classes >= 0
            if ok.any():
                new.class_sum = self.class_sum.index_add(0, classes[ok], mean[ok].double())
                new.class_count = self.class_count.index_add(0, classes[ok], torch.ones(int(ok.sum()), dtype=torch.long))
        return new, mx, mean

    def merge(self, other: "LayerTally") -> None:
        """Fold another tally over a disjoint set of images into this one (exact)."""
        self.top_val, self.top_img, self.top_pos = keep_best(
            self.top_val, self.top_img, self.top_pos, other.top_val, other.top_img, other.top_pos,
            self.k, largest=True, groups=self.groups)
        self.bot_val, self.bot_img, self.bot_pos = keep_best(
            self.bot_val, self.bot_img, self.bot_pos, other.bot_val, other.bot_img, other.bot_pos,
            self.k, largest=False, groups=self.groups)
        for k in ("count", "sum_max", "sumsq_max", "sum_mean", "fires", "hist", "class_sum", "class_count"):
            setattr(self, k, getattr(self, k) + getattr(other, k))
        self.low = torch.minimum(self.low, other.low)
        self.high = torch.maximum(self.high, other.high)


def keep_best(val, img, pos, new_val, new_img, new_pos, k, largest, groups=None):
    """Keep the k best of both lists, ordered by score then corpus order. All (U, *).
    With `groups` (near-duplicate group per corpus image) only the best of each group is kept."""
    v = torch.cat([val, new_val], 1)
    i = torch.cat([img, new_img], 1)
    p = torch.cat([pos, new_pos], 1)
    o = torch.argsort(i, dim=1, stable=True)  # corpus order first ...
    v, i, p = v.gather(1, o), i.gather(1, o), p.gather(1, o)
    o = torch.argsort(v, dim=1, descending=largest, stable=True)  # ... then score, stable
    if groups is not None:
        from .dedupe import keep_first_of_group

        return keep_first_of_group(v.gather(1, o), i.gather(1, o), p.gather(1, o), k, groups, largest)
    o = o[:, :k]
    return v.gather(1, o), i.gather(1, o), p.gather(1, o)


def colour_moments(images: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, int]:
    """Sums for the colour mean and covariance of uint8 images (B,C,H,W): (sum (C,), sum xx^T (C,C), n)."""
    C = images.shape[1]
    x = images.permute(1, 0, 2, 3).reshape(C, -1).float() / 255.0  # (C, pixels)
    return x.sum(1, dtype=torch.float64), (x @ x.T).double(), x.shape[1]  # no float64 copy of every pixel


def merge_ranks(g, tallies: dict, colour: list, skipped: list, files) -> tuple | None:
    """Rank 0 gets the exact merge of every rank's mining state; the others get None.

    tallies {layer: LayerTally}; colour [sum (C,), outer (C, C), n]; skipped [(file, reason)],
    returned in corpus order (`files`: the corpus's file list) as one process lists them.
    """
    if g.world == 1:
        return tallies, colour, skipped
    mine = ({name: t.state() for name, t in tallies.items()}, [c.numpy() if torch.is_tensor(c) else c
                                                                for c in colour], skipped)
    parts = g.gather(mine, "the mining tallies")
    if not g.main:
        return None

    def blank(t):
        return LayerTally(tuple(t.units.tolist()), 0, t.width, t.k, t.class_count.numel())

    merged = {name: blank(t) for name, t in tallies.items()}
    total = [torch.zeros_like(colour[0]), torch.zeros_like(colour[1]), 0]  # (C,), (C, C): RGB or grey
    bad = []
    for states, (s, o, n), sk in parts:  # rank order; the merge itself does not depend on it
        for name, t in merged.items():
            other = blank(t)
            other.load(states[name])
            t.merge(other)
        total = [total[0] + torch.from_numpy(s), total[1] + torch.from_numpy(o), total[2] + int(n)]
        bad += [tuple(x) for x in sk]
    order = {f: i for i, f in enumerate(files)}
    return merged, total, sorted(bad, key=lambda f: order[f[0]])


def index_arrays(t: LayerTally, info, lu: LayerUnits) -> dict[str, np.ndarray]:
    """The arrays of a layer's index.npz (see store.py) from its finished tally; `info`: the layer's shape."""
    n = max(int(t.count), 1)
    mean_max = (t.sum_max / n).numpy()
    var = (t.sumsq_max / n).numpy() - mean_max**2
    class_mean = (t.class_sum / t.class_count.clamp(min=1).view(-1, 1).double()).numpy()
    seen = t.class_count.numpy() > 0
    csi = class_selectivity(class_mean[seen]) if seen.sum() >= 2 else np.full(len(lu.units), np.nan)
    W = info.width
    return {
        "units": np.array(lu.units, dtype=np.int64),
        "count": np.array(int(t.count)),
        "top_score": t.top_val.numpy(), "top_image": t.top_img.numpy(),
        "top_y": (t.top_pos // W).numpy(), "top_x": (t.top_pos % W).numpy(),
        "bottom_score": t.bot_val.numpy(), "bottom_image": t.bot_img.numpy(),
        "bottom_y": (t.bot_pos // W).numpy(), "bottom_x": (t.bot_pos % W).numpy(),
        "mean_max": mean_max, "std_max": np.sqrt(np.maximum(var, 0)),
        "mean_mean": (t.sum_mean / n).numpy(),
        "fire_rate": t.fires.numpy() / n,
        "low": t.low.numpy(), "high": t.high.numpy(),
        "hist": t.hist.numpy().astype(np.int64), "hist_edges": hist_edges(),
        "class_mean": class_mean, "class_count": t.class_count.numpy(), "csi": csi,
        "shape": np.array([info.channels, info.height, info.width]),
    }
