"""Per-image embeddings of a mined layer, and search in them.

Embedding of a layer: each image's spatially pooled feature map (the mean of every channel over
space). A layer of at most EMBED_DIM channels keeps them as they are (float32); a wider one is
reduced to EMBED_DIM dimensions by PCA fitted on at most PCA_SAMPLE images spread evenly over
the corpus. When every channel of a narrow layer was mined, mining's means.npy already is the
embedding and nothing more is written. Search space: the embedding minus its corpus mean,
L2-normalised, so inner product = cosine similarity (faiss `IndexFlatIP`).
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np

EMBED_DIM = 256  # layers wider than this are PCA-reduced to this many dimensions
PCA_SAMPLE = 4096  # at most this many images fit the PCA


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
