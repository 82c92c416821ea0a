"""Near-duplicate images, grouped in corpus order while mining (`MineConfig.dedupe`).

A 16x16 RGB thumbnail of the network input, as 768 values minus their mean, L2-normalised. Image
i joins the group of the earliest image j < i with cosine >= threshold (else it starts its own
group), which depends only on corpus order, not on batch size or resume. faiss finds candidates
with a small margin below the threshold (range search); numpy then decides in float64, so the
groups depend neither on faiss's rounding nor on batching.
"""
from __future__ import annotations

import math

import numpy as np
import torch

from ._faiss import one_thread

THUMB = 16  # side of the near-duplicate thumbnails
MARGIN = 1e-3  # faiss finds candidates this far below the threshold; float64 decides
PAD = 2**62  # as in tally.py: an empty slot


def thumbnails(images: torch.Tensor) -> np.ndarray:
    """uint8 (B, C, H, W) network inputs -> uint8 (B, C*THUMB*THUMB) area-averaged thumbnails."""
    t = torch.nn.functional.adaptive_avg_pool2d(images.float(), THUMB)  # pixel sums are exact in float32
    return t.round().clamp(0, 255).to(torch.uint8).reshape(len(images), -1).numpy()


def thumb_vectors(thumbs: np.ndarray) -> np.ndarray:
    """uint8 thumbnails (n, d) -> float64 rows minus their mean, L2-normalised (a flat row gives 0)."""
    x = thumbs.astype(np.float64)
    x -= x.mean(1, keepdims=True)
    n = np.linalg.norm(x, axis=1, keepdims=True)
    return np.divide(x, n, out=np.zeros_like(x), where=n > 0)


class NearDuplicates:
    """Groups of near-identical images, grown in corpus order during mining.

    `thumbs` is mining's (N, d) uint8 memmap; rows of images not yet seen or not decodable are 0
    and never match. `groups[i]` is the group (its earliest member's index) of image i, -1 before
    it is seen.
    """

    def __init__(self, thumbs: np.ndarray, threshold: float):
        import faiss

        self.thumbs, self.threshold = thumbs, float(threshold)
        self.index = faiss.IndexFlatIP(thumbs.shape[1])
        self.groups = torch.full((len(thumbs),), -1, dtype=torch.long)

    def extend(self, upto: int) -> None:
        """Assign groups to images [seen, upto); all earlier rows are in the index."""
        with one_thread():  # a batch's queries: threads cost more than they save
            self._extend(upto)

    def _extend(self, upto: int) -> None:
        a = self.index.ntotal
        if upto <= a:
            return
        v = thumb_vectors(self.thumbs[a:upto])
        self.index.add(v.astype(np.float32))
        lims, _, cand = self.index.range_search(v.astype(np.float32), self.threshold - MARGIN)
        g = self.groups.numpy()
        for q in range(upto - a):
            i = a + q
            js = np.sort(cand[lims[q]:lims[q + 1]])
            js = js[js < i]
            g[i] = i
            if len(js):
                exact = np.einsum("jd,d->j", thumb_vectors(self.thumbs[js]), v[q])  # float64 decides, not faiss's rounding
                hit = js[exact >= self.threshold]
                if len(hit):
                    g[i] = g[int(hit[0])]

    def flush(self) -> None:
        self.thumbs.flush()


def keep_first_of_group(v, i, p, k, groups: torch.Tensor, largest: bool):
    """Lists (U, L) already in ranking order -> the first k entries of distinct groups (U, k);
    slots left over become empty (PAD image, -inf or +inf score)."""
    U, L = i.shape
    n = len(groups)
    real = i < n
    g = torch.where(real, groups[i.clamp(max=n - 1)], -1 - torch.arange(L).expand(U, L))
    o = torch.argsort(g, dim=1, stable=True)  # equal groups stay in ranking order
    gs = g.gather(1, o)
    dup_sorted = torch.zeros_like(gs, dtype=torch.bool)
    dup_sorted[:, 1:] = gs[:, 1:] == gs[:, :-1]
    dup = torch.zeros_like(dup_sorted).scatter_(1, o, dup_sorted)
    keep = torch.argsort(dup.to(torch.int8), dim=1, stable=True)[:, :k]
    d = dup.gather(1, keep)
    v, i, p = v.gather(1, keep), i.gather(1, keep), p.gather(1, keep)
    fill = -math.inf if largest else math.inf
    return v.masked_fill(d, fill), i.masked_fill(d, PAD), p.masked_fill(d, 0)
