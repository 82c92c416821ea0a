"""Facets of a unit: groups among its top images, found by k-means in the layer's embedding.

A unit's top-N images (the exact top-K of the index first, then the next images by per-image
maximum from values.npy) are clustered with faiss k-means for k = 2..MAX_FACETS; the k with the
highest silhouette (Rousseeuw 1987) wins if it reaches MIN_SILHOUETTE and every group has at
least MIN_FACET members, otherwise the unit has one facet. `finish_layers` runs after mining:
the embedding (embedding.py), then the facets of every layer.
"""
from __future__ import annotations

import numpy as np

from ._faiss import one_thread
from .dedupe import PAD
from .embedding import Embedding, finish_embedding

TOP_N = 64  # images clustered into facets per unit
MAX_FACETS = 4
MIN_FACET = 3  # members a facet needs
MIN_SILHOUETTE = 0.25  # below this mean silhouette the top images form one group
SEED = 1234


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
