"""The corpus images nearest new inputs (a unit's synthesised images) of a mined layer, and a strip of
their thumbnails (see NaturalNeighbours for the search space)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import torch

from .embedding import Embedding

NEAR_K = 6  # nearest corpus images kept per synthesised image
OWN_WEIGHT = 4.0  # the unit's own channel in the nearest-image search (see NaturalNeighbours)
NEAR_THUMB = 64  # their thumbnails (the network's view of the whole image) in a strip per unit


class NaturalNeighbours:
    """Nearest corpus images of new inputs (e.g. a unit's synthesised images) of a mined layer.

    Search space: the vector of the layer's per-image channel maxima (mining's values.npy, the mined
    channels) minus its corpus mean, with the unit's own channel weighted OWN_WEIGHT times, cosine.
    Maxima keep what a small receptive field sees where channel means average it away, and the
    weight makes the neighbours agree with the unit, not just with the image's overall look. On
    the demo (scripts/nearest_agreement.py, block3, units whose exemplars are >= 80% one swatch
    kind) the share of same-kind nearest images was 36% with channel means, 59% with maxima, 71%
    with the own channel x4 (x8: 72%, close to ranking by the unit alone). Runs mined without
    values.npy keep the channel-mean embedding (faiss). With weights, each query is one
    matrix-vector product over the corpus: |b o w|^2 = |b|^2 + (w^2 - 1) b_u^2 needs no new index.
    """

    def __init__(self, run, layer: str):
        m = run.manifest()
        self.corpus = corpus = run.corpus()
        bad = {s["file"] for s in m["corpus"].get("skipped", [])}
        self.rows = np.array([i for i, f in enumerate(corpus.files) if f not in bad], dtype=np.int64)
        self.files = corpus.files
        vpath = run.layer_dir(layer) / "values.npy"
        if vpath.is_file() and len(self.rows):
            from ._cka import mean_of_rows

            values = np.load(vpath, mmap_mode="r")  # (N, U) per-image maxima of the mined channels
            self.units = np.asarray(run.index(layer)["units"], dtype=np.int64)
            self.centre = mean_of_rows(values, self.rows)  # (U,) float64
            self.base = np.empty((len(self.rows), values.shape[1]), dtype=np.float32)  # centred maxima
            for a in range(0, len(self.rows), 65536):
                self.base[a:a + 65536] = np.asarray(values[self.rows[a:a + 65536]], np.float64) - self.centre
            self.norm2 = np.einsum("ij,ij->i", self.base, self.base, dtype=np.float64)  # (n,)
            self.space = "maxima"
            return
        import faiss

        self.emb = Embedding(run, layer)
        self.space = "means"
        self.index = faiss.IndexFlatIP(self.emb.raw.shape[1])
        for a in range(0, len(self.rows), 65536):
            self.index.add(self.emb.of_images(self.rows[a:a + 65536]))

    def describe(self) -> str:
        return (f"cosine of the per-image channel maxima minus their corpus mean, the unit's own channel weighted "
                f"x{OWN_WEIGHT:g}" if self.space == "maxima" else "cosine in the layer's embedding of channel means")

    def search_maps(self, maps, k: int, unit: int | None = None) -> list[list[tuple[int, float]]]:
        """Per feature map of new inputs (n, C, H, W) torch tensor: [(corpus index, cosine)] best first;
        `unit`: the channel whose images these are (its column weighs OWN_WEIGHT times)."""
        if self.space == "means":
            return self.search(maps.float().mean((2, 3)).numpy(), k)
        q = maps.float().amax((2, 3)).numpy()[:, self.units].astype(np.float64) - self.centre  # (n, U)
        w2 = np.ones(len(self.units))
        col = np.flatnonzero(self.units == unit)
        if len(col):
            w2[col[0]] = OWN_WEIGHT**2
        norm2 = self.norm2 + (w2.max() - 1) * self.base[:, col[0]].astype(np.float64) ** 2 if len(col) else self.norm2
        out = []
        for row in q:
            num = self.base @ (row * w2).astype(np.float32)  # (n,)
            den = np.sqrt(norm2 * float(row @ (row * w2)))
            sim = np.divide(num, den, out=np.zeros(len(num)), where=den > 0)
            top = np.argpartition(-sim, min(k, len(sim)) - 1)[:k] if len(sim) > k else np.arange(len(sim))
            top = top[np.lexsort((top, -sim[top]))]  # best first, ties by corpus order
            out.append([(int(self.rows[b]), float(sim[b])) for b in top])
        return out

    @classmethod
    def for_layer(cls, run, layer: str):
        """None when the layer was not mined with an embedding."""
        if not (run.layer_dir(layer) / "index.npz").is_file():  # not mined: no corpus to search
            return None
        try:
            return cls(run, layer)
        except (FileNotFoundError, KeyError):
            return None

    def search(self, pooled: np.ndarray, k: int) -> list[list[tuple[int, float]]]:
        """Per row of pooled features (n, C), in the channel-mean embedding: [(corpus index, cosine)] best first."""
        sim, j = self.index.search(self.emb.of_features(pooled), min(k, len(self.rows)))
        return [[(int(self.rows[b]), float(s)) for b, s in zip(jr, sr) if b >= 0] for jr, sr in zip(j, sim)]


def synth_neighbours(near: NaturalNeighbours, model, layer: str, u8: np.ndarray, extract, out_dir: Path,
                     stem: str, unit: int | None = None) -> tuple[list[list[dict]], str]:
    """Nearest corpus images of synthesised images u8 (M, H, W, C) in the search space of `near`.

    The images are brought to the network's input size and 8 bits first, as a corpus image is.
    Writes `<stem>.jpg`: row m holds image m's neighbours, best first, NEAR_THUMB px each.
    Returns per image [{"index", "id", "similarity"}] and the strip's file name."""
    from PIL import Image

    from .corpus import CorpusDataset
    from .store import atomic_write

    size = model.preprocess.size  # (H, W)
    x = torch.from_numpy(u8).permute(0, 3, 1, 2).float() / 255.0
    if tuple(x.shape[-2:]) != size:
        x = torch.nn.functional.interpolate(x, size=size, mode="bilinear", antialias=True, align_corners=False)
    x = (x * 255).round().clamp(0, 255) / 255.0
    with torch.no_grad():
        f = extract(model.normalize(x))
        f = f[layer] if layer in f else model.extractor([layer])(model.normalize(x))[layer]
    hits = near.search_maps(f, NEAR_K, unit)
    ds = CorpusDataset(near.corpus, NEAR_THUMB)
    strip = np.full((len(hits) * NEAR_THUMB, NEAR_K * NEAR_THUMB, 3), 128, dtype=np.uint8)
    for m, row in enumerate(hits):
        for c, (i, _s) in enumerate(row):
            _, px, _, problem = ds[i]
            if problem is None:
                strip[m * NEAR_THUMB:(m + 1) * NEAR_THUMB, c * NEAR_THUMB:(c + 1) * NEAR_THUMB] = px.permute(1, 2, 0).numpy()
    name = f"{stem}.jpg"
    atomic_write(out_dir / name, lambda fh: Image.fromarray(strip).save(fh, format="JPEG", quality=88))
    return [[{"index": i, "id": near.files[i], "similarity": s} for i, s in row] for row in hits], name
