"""What a run knows about one unit, as a plain dict (the `show` command prints it)."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .errors import UnitlensError
from .store import Run


def _num(x) -> float | None:
    x = float(x)
    return None if math.isnan(x) or math.isinf(x) else x


def unit_summary(run: Run | str, layer: str, channel: int) -> dict:
    """Exemplars and statistics of channel `channel` of `layer` in a run, and its synthesised images.

    A unit that was synthesised but not mined gets `stats`, `histogram` and `exemplars` of None
    (what exists is shown, not refused).

    Every path in the result (the run, exemplar images, synthesised images and traces) is
    absolute, whatever the current folder, so the dict stays usable when passed on.

    >>> unit_summary("runs/r18", "layer3", 37)["exemplars"][0]["score"]  # doctest: +SKIP
    """
    run = Run(Path(run.path if isinstance(run, Run) else run).absolute())
    from .synth.results import unit_images

    if not (run.layer_dir(layer) / "index.npz").is_file():
        synth = unit_images(run, layer, channel)
        if not synth:
            run.index(layer)  # neither mined nor synthesised: the error lists the mined layers
        return {"run": str(run.path), "layer": layer, "unit": channel, "stats": None, "histogram": None,
                "exemplars": None, "synth": synth}
    idx = run.index(layer)
    units = idx["units"].tolist()
    if channel not in units:
        lo, hi = min(units), max(units)
        span = f"{lo}-{hi}" if len(units) == hi - lo + 1 else f"{len(units)} channels between {lo} and {hi}"
        raise UnitlensError(f"Channel {channel} of {layer} was not mined in {run.path} (mined: {span}).")
    u = units.index(channel)
    corpus = run.corpus()

    def listing(kind: str) -> list[dict]:
        out = []
        boxes = idx.get(f"{kind}_box")
        for r in range(idx[f"{kind}_image"].shape[1]):
            i = int(idx[f"{kind}_image"][u, r])
            if i >= len(corpus):
                continue
            e = {
                "rank": r + 1,
                "image": str(corpus.path(i).absolute()),
                "id": corpus.files[i],
                "score": float(idx[f"{kind}_score"][u, r]),
                "position": [int(idx[f"{kind}_y"][u, r]), int(idx[f"{kind}_x"][u, r])],
                "box": [int(v) for v in boxes[u, r]] if boxes is not None else None,
            }
            if corpus.labels is not None:
                e["label"] = corpus.labels[i]
            out.append(e)
        return out

    classes = run.manifest()["corpus"].get("classes") or []
    class_mean = idx["class_mean"][:, u] if len(classes) else []
    counts, edges = idx["hist"][u], idx["hist_edges"]
    nz = np.nonzero(counts)[0]
    result = {
        "run": str(run.path),
        "layer": layer,
        "unit": channel,
        "stats": {
            "images": int(idx["count"]),
            "mean_max": _num(idx["mean_max"][u]),
            "std_max": _num(idx["std_max"][u]),
            "mean_mean": _num(idx["mean_mean"][u]),
            "fire_rate": _num(idx["fire_rate"][u]),
            "min": _num(idx["low"][u]),
            "max": _num(idx["high"][u]),
            "class_selectivity": _num(idx["csi"][u]) if len(classes) >= 2 else None,
            "class_means": {c: _num(v) for c, v in zip(classes, class_mean)},
        },
        "histogram": {
            "edges": [float(edges[j]) for j in range(nz[0], nz[-1] + 2)] if len(nz) else [],
            "counts": [int(c) for c in counts[nz[0]:nz[-1] + 1]] if len(nz) else [],
        },
        "exemplars": listing("top"),
    }
    if float(idx["low"].min()) < 0:
        result["negative_exemplars"] = listing("bottom")
    result["synth"] = unit_images(run, layer, channel)  # [] until `unitlens synth` has run
    return result
