"""What the atlas shows of `unitlens label` (concepts.py): card columns, a unit's concepts, and its
top exemplars' mask outlines as SVG paths over the crop box. Reads the run folder only."""
from __future__ import annotations

import numpy as np

from ..concepts import CUTOFF, layer_concepts
from ..store import Run, read_npz


def outline_path(mask: np.ndarray) -> str:
    """SVG path (grid units) of the edges between cells inside `mask` (G, G) and cells outside it; the
    crop's own border is no edge (the mask goes on beyond it)."""
    m = np.pad(mask, 1, mode="edge")
    parts = []
    ys, xs = np.nonzero(m[1:, 1:-1] != m[:-1, 1:-1])  # horizontal edges at y between rows y-1 and y
    parts += [f"M{x} {y}h1" for y, x in zip(ys, xs)]
    ys, xs = np.nonzero(m[1:-1, 1:] != m[1:-1, :-1])  # vertical edges at x
    parts += [f"M{x} {y}v1" for y, x in zip(ys, xs)]
    return "".join(parts)


def atlas_columns(run: Run, layer: str, units: list[int]) -> tuple[dict, dict]:
    """What the atlas adds for a labelled layer: card columns (concept, IoU, the layer summary) and
    details (a unit's concepts, its top exemplars' mask outlines); ({}, {}) when not labelled."""
    named = layer_concepts(run, layer)
    d = run.layer_dir(layer, "concepts")
    if named is None or not (d / "overlap.npz").is_file():
        return {}, {}
    z = read_npz(d / "overlap.npz")
    at = {u: j for j, u in enumerate(named["units"])}
    rows = [at.get(u) for u in units]
    label = [named["label"][j] if j is not None else None for j in rows]
    names = sorted({c for c in label if c is not None})
    cards = {"concept": label, "iou": [None if j is None else round(named["iou"][j], 4) for j in rows],
             "concept_rank": [names.index(c) if c is not None else None for c in label],
             "concept_summary": named["summary"]}
    top = []
    for j in rows:
        if j is None:
            top.append(None)
            continue
        order = np.argsort(-z["iou"][j], kind="stable")[:5]
        top.append([[str(z["concepts"][k]), round(float(z["iou"][j, k]), 4), int(z["images"][k])] for k in order])
    details = {"concepts": top, "concept_cutoff": CUTOFF}
    if (d / "outlines.npz").is_file():
        o = read_npz(d / "outlines.npz")
        G = int(o["size"])
        grid = np.unpackbits(o["grid"], axis=-1, count=G).astype(bool)  # (U, K, G, G)
        idx = run.index(layer)
        boxes = idx.get("top_view", idx.get("top_box"))  # the box the grid was sampled over (concepts.py)
        outlines = []
        for j, c in zip(rows, label):
            if j is None or c is None or boxes is None:
                outlines.append(None)
                continue
            paths = [outline_path(grid[j, r]) if o["known"][j, r] else None for r in range(grid.shape[1])]
            sizes = [[int(b[2] - b[0]), int(b[3] - b[1])] for b in boxes[j]]
            outlines.append({"concept": c, "grid": G, "paths": paths, "boxes": sizes})
        details["outlines"] = outlines
    return cards, details
