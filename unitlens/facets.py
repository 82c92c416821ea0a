"""Per-image embeddings, facets of a unit's top images, near-duplicate groups, nearest natural images.

Everything that searches or clusters goes through faiss (imported inside the functions, so
importing this module stays cheap); numpy checks the borderline cases exactly.

Embedding of a layer: each image's spatially pooled feature map (the mean of every channel over
space). A layer of at most EMBED_DIM channels keeps them as they are (float32); a wider one is
reduced to EMBED_DIM dimensions by PCA fitted on at most PCA_SAMPLE images spread evenly over
the corpus. When every channel of a narrow layer was mined, mining's means.npy already is the
embedding and nothing more is written. Search space: the embedding minus its corpus mean,
L2-normalised, so inner product = cosine similarity.

Facets of a unit: its top-N images (the exact top-K of the index first, then the next images by
per-image maximum from values.npy) clustered with k-means for k = 2..MAX_FACETS; the k with the
highest silhouette (Rousseeuw 1987) wins if it reaches MIN_SILHOUETTE and every group has at
least MIN_FACET members, otherwise the unit has one facet.

Near-duplicates: a 16x16 RGB thumbnail of the network input, as 768 values minus their mean,
L2-normalised. Image i joins the group of the earliest image j < i with cosine >= threshold
(else it starts its own group), which depends only on corpus order, not on batch size or resume.
"""
from __future__ import annotations

import contextlib
import math
import os
from pathlib import Path

import numpy as np
import torch

THUMB = 16  # side of the near-duplicate thumbnails
EMBED_DIM = 256  # layers wider than this are PCA-reduced to this many dimensions
PCA_SAMPLE = 4096  # at most this many images fit the PCA
TOP_N = 64  # images clustered into facets per unit
MAX_FACETS = 4
MIN_FACET = 3  # members a facet needs
MIN_SILHOUETTE = 0.25  # below this mean silhouette the top images form one group
SEED = 1234
MARGIN = 1e-3  # faiss finds candidates this far below the threshold; float64 decides
PAD = 2**62  # as in mining: an empty slot


# -- near-duplicates ---------------------------------------------------------------------------

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


# -- embeddings --------------------------------------------------------------------------------

def needs_pooled(units, channels: int) -> bool:
    """Whether mining must write pooled features (pooled.npy): not when means.npy already holds
    every channel of a narrow layer."""
    return not (list(units) == list(range(channels)) and channels <= EMBED_DIM)


def finish_embedding(layer_dir: Path, skipped: np.ndarray) -> dict:
    """Turn mining's pooled.npy (or means.npy) into the layer's embedding; its manifest entry.

    skipped: (N,) bool, images that could not be decoded (their rows are left as written: zero).
    """
    from .store import new_array, write_npz

    pooled = layer_dir / "pooled.npy"
    if not pooled.is_file():
        path, kind, basis = layer_dir / "means.npy", "channel means (means.npy)", None
    else:
        x = np.load(pooled, mmap_mode="r")
        N, C = x.shape
        if C <= EMBED_DIM:
            path, kind, basis = pooled, "channel means", None
        else:
            ok = np.nonzero(~skipped)[0]
            sample = ok[np.linspace(0, len(ok) - 1, min(len(ok), PCA_SAMPLE)).round().astype(int)] if len(ok) else ok
            mean, comp = _pca(x[sample].astype(np.float64), EMBED_DIM)
            path, tmp = layer_dir / "embed.npy", layer_dir / ".embed.npy.tmp"
            out = new_array(tmp, (N, comp.shape[0]), np.float32)
            for a in range(0, N, 8192):
                out[a:a + 8192] = (x[a:a + 8192].astype(np.float64) - mean) @ comp.T
            out.flush()
            del out, x
            os.replace(tmp, path)
            basis = {"mean": mean, "components": comp}
            kind = f"PCA of {C} channel means to {comp.shape[0]} dimensions, fitted on {len(sample)} images"
    e = np.load(path, mmap_mode="r")
    total = np.zeros(e.shape[1])
    for a in range(0, len(e), 65536):  # in chunks: the embedding may not fit in memory
        total += e[a:a + 65536][~skipped[a:a + 65536]].astype(np.float64).sum(0)
    centre = total / max(int((~skipped).sum()), 1)
    write_npz(layer_dir / "embed-basis.npz", centre=centre,
              **({} if basis is None else {"pca_mean": basis["mean"], "pca_components": basis["components"]}))
    # pooled.npy stays until mining has recorded the run as done (mining.py removes it then), so a
    # run stopped before that can compute the embedding again.
    return {"path": str(path.relative_to(layer_dir.parent.parent)), "dtype": str(e.dtype), "shape": list(e.shape),
            "bytes": path.stat().st_size, "kind": kind, "basis": str((layer_dir / "embed-basis.npz")
                                                                        .relative_to(layer_dir.parent.parent))}


def _pca(x: np.ndarray, d: int) -> tuple[np.ndarray, np.ndarray]:
    """Mean (C,) and the top min(d, n, C) principal axes (D, C) of x (n, C), signs fixed."""
    mean = x.mean(0)
    _, _, vt = np.linalg.svd(x - mean, full_matrices=False)
    vt = vt[:d]
    vt *= np.where(vt[np.arange(len(vt)), np.abs(vt).argmax(1)] < 0, -1.0, 1.0)[:, None]  # deterministic signs
    return mean, vt


class Embedding:
    """A mined layer's embedding in search space (see the module text)."""

    def __init__(self, run, layer: str):
        from .store import read_npz

        d = run.layer_dir(layer)
        entry = ((run.manifest().get("mine") or {}).get("layers", {}).get(layer) or {}).get("embedding")
        if not entry:
            raise FileNotFoundError(f"no embedding for {layer}")
        self.raw = np.load(run.path / entry["path"], mmap_mode="r")
        b = read_npz(run.path / entry["basis"])
        self.centre = b["centre"]
        self.pca = (b["pca_mean"], b["pca_components"]) if "pca_components" in b else None
        self.layer_dir = d

    def of_images(self, rows) -> np.ndarray:
        """float32 search-space vectors of corpus images `rows`."""
        return normalise(self.raw[np.asarray(rows)].astype(np.float64) - self.centre)

    def of_features(self, pooled: np.ndarray) -> np.ndarray:
        """float32 search-space vectors of new inputs' pooled features (n, C)."""
        x = pooled.astype(np.float64)
        if self.pca is not None:
            x = (x - self.pca[0]) @ self.pca[1].T
        return normalise(x - self.centre)


def normalise(x: np.ndarray) -> np.ndarray:
    n = np.linalg.norm(x, axis=1, keepdims=True)
    return np.divide(x, n, out=np.zeros_like(x), where=n > 0).astype(np.float32)


def nearest(base: np.ndarray, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """(similarity, row) of the k rows of `base` with the largest inner product with each query."""
    import faiss

    index = faiss.IndexFlatIP(base.shape[1])
    index.add(np.ascontiguousarray(base, dtype=np.float32))
    return index.search(np.ascontiguousarray(queries, dtype=np.float32), min(k, len(base)))


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


# -- facets ------------------------------------------------------------------------------------

@contextlib.contextmanager
def one_thread():
    """faiss on one thread: for a few dozen points, waking OpenMP threads costs far more than the work."""
    import faiss

    n = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)
    try:
        yield
    finally:
        faiss.omp_set_num_threads(n)


def kmeans(x: np.ndarray, k: int, seed: int = SEED) -> tuple[np.ndarray, np.ndarray]:
    """faiss k-means of the rows of x: (centroids (k, d), assignment (n,) to the nearest centroid)."""
    import faiss

    x = np.ascontiguousarray(x, dtype=np.float32)
    km = faiss.Kmeans(x.shape[1], k, niter=25, nredo=3, seed=seed, verbose=False,
                      min_points_per_centroid=1, max_points_per_centroid=1 << 20)
    km.train(x)
    _, a = km.index.search(x, 1)
    return km.centroids, a[:, 0].astype(np.int64)


def distances(x: np.ndarray) -> np.ndarray:
    """Euclidean distances between the rows of x (n, n)."""
    x = x.astype(np.float64)
    sq = (x * x).sum(1)
    # einsum, not BLAS: for a few dozen rows a threaded BLAS spends far longer waking threads
    dist = np.sqrt(np.maximum(sq[:, None] + sq[None, :] - 2 * np.einsum("id,jd->ij", x, x), 0))
    np.fill_diagonal(dist, 0)
    return dist


def silhouette(x: np.ndarray, labels: np.ndarray, dist: np.ndarray | None = None) -> float:
    """Mean silhouette (Rousseeuw 1987) with Euclidean distances; 0 for one cluster.
    `dist`: distances(x), when already at hand."""
    ks, lab = np.unique(labels, return_inverse=True)
    if len(ks) < 2:
        return 0.0
    dist = distances(x) if dist is None else dist
    onehot = np.eye(len(ks))[lab]  # (n, k)
    count = onehot.sum(0)
    total = dist @ onehot  # (n, k): summed distance to each cluster
    own = count[lab]
    a = total[np.arange(len(x)), lab] / np.maximum(own - 1, 1)
    other = np.where(onehot > 0, np.inf, total / count)
    b = other.min(1)
    s = np.where(own > 1, (b - a) / np.maximum(np.maximum(a, b), 1e-300), 0.0)  # a singleton scores 0
    return float(s.mean())


def facets_of(x: np.ndarray, seed: int = SEED) -> tuple[np.ndarray, float]:
    """Facet of each row of x (n, d) under the rule in the module text, and its silhouette.

    Facets are numbered by size (0 = largest), ties by first member."""
    n = len(x)
    best, best_s = np.zeros(n, dtype=np.int64), 0.0
    dist = distances(x) if n >= 2 * MIN_FACET else None
    for k in range(2, min(MAX_FACETS, n // MIN_FACET) + 1):
        _, a = kmeans(x, k, seed)
        if np.bincount(a, minlength=k).min() < MIN_FACET:
            continue
        s = silhouette(x, a, dist)
        if s >= MIN_SILHOUETTE and s > best_s:
            best, best_s = a, s
    sizes = np.bincount(best)
    first = np.array([np.nonzero(best == c)[0][0] for c in range(len(sizes))])
    order = np.lexsort((first, -sizes))
    rename = np.empty_like(order)
    rename[order] = np.arange(len(order))
    return rename[best], best_s


def top_images(idx: dict, column: np.ndarray | None, u: int, skipped: np.ndarray, n: int,
               groups: np.ndarray | None) -> np.ndarray:
    """Unit u's top-n images: the index's exact top-K in order, then the next ones by per-image
    maximum (`column`: the unit's column of values.npy; ties by corpus order), one per
    near-duplicate group if `groups` is given."""
    N = len(skipped)
    top = [int(i) for i in idx["top_image"][u] if i < N]
    if column is None or len(top) >= n:
        return np.array(top[:n], dtype=np.int64)
    col = column.astype(np.float32)
    col[skipped] = -np.inf
    col[top] = -np.inf
    want = min(N, 4 * n + len(top))
    cut = np.partition(col, N - want)[N - want] if want < N else -np.inf
    cand = np.nonzero((col >= cut) & np.isfinite(col))[0]
    cand = cand[np.lexsort((cand, -col[cand]))]
    seen = {int(groups[i]) for i in top} if groups is not None else set()
    for i in cand:
        if len(top) >= n:
            break
        if groups is not None:
            g = int(groups[i])
            if g in seen:
                continue
            seen.add(g)
        top.append(int(i))
    return np.array(top, dtype=np.int64)


def layer_facets(run, layer: str, skipped: np.ndarray, n: int = TOP_N, groups: np.ndarray | None = None) -> dict:
    """Cluster every unit's top-n images of a mined layer; writes mine/<layer>/facets.npz and
    returns its manifest entry. facets.npz: units (U,), image (U, n) corpus indices (PAD when
    empty), facet (U, n) int16 (-1 when empty), k (U,), silhouette (U,)."""
    from .store import write_npz

    d = run.layer_dir(layer)
    idx = run.index(layer)
    emb = Embedding(run, layer)
    vpath = d / "values.npy"
    values = np.load(vpath, mmap_mode="r") if vpath.is_file() else None
    U = len(idx["units"])
    img = np.full((U, n), PAD, dtype=np.int64)
    fac = np.full((U, n), -1, dtype=np.int16)
    ks, sil = np.ones(U, dtype=np.int64), np.zeros(U, dtype=np.float32)
    with one_thread():
        for a in range(0, U, 64):  # one read of values.npy per block of units
            block = np.asarray(values[:, a:a + 64]) if values is not None else None
            for u in range(a, min(U, a + 64)):
                rows = top_images(idx, block[:, u - a] if block is not None else None, u, skipped, n, groups)
                if not len(rows):
                    ks[u] = 0
                    continue
                f, s = facets_of(emb.of_images(rows))
                img[u, :len(rows)], fac[u, :len(rows)], ks[u], sil[u] = rows, f, f.max() + 1, s
    write_npz(d / "facets.npz", units=idx["units"], image=img, facet=fac, k=ks, silhouette=sil, top_n=np.array(n))
    return {"path": str((d / "facets.npz").relative_to(run.path)), "top_n": n, "max_facets": MAX_FACETS,
            "min_members": MIN_FACET, "min_silhouette": MIN_SILHOUETTE, "multi_faceted": int((ks > 1).sum())}


def finish_layers(run, corpus, layers, skipped_files, dedupe_groups: np.ndarray | None) -> dict[str, dict]:
    """After mining: embeddings and facets of every layer. {layer: {"embedding", "facets"}}."""
    bad = {f for f, _ in skipped_files}
    skipped = np.array([f in bad for f in corpus.files], dtype=bool)
    out = {}
    for lu in layers:
        d = run.layer_dir(lu.layer)
        if not ((d / "pooled.npy").is_file() or (d / "means.npy").is_file()):
            continue  # per-image values were not kept
        out[lu.layer] = {"embedding": finish_embedding(d, skipped)}
        m = run.manifest()
        m["mine"]["layers"][lu.layer]["embedding"] = out[lu.layer]["embedding"]
        run.save_manifest(m)
        out[lu.layer]["facets"] = layer_facets(run, lu.layer, skipped, groups=dedupe_groups)
    return out


# -- nearest natural images of synthesised images -------------------------------------------------

NEAR_K = 6  # nearest corpus images kept per synthesised image
OWN_WEIGHT = 4.0  # the unit's own channel in the nearest-image search (see NaturalNeighbours)
NEAR_THUMB = 64  # their thumbnails (the network's view of the whole image) in a strip per unit


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
