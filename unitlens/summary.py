"""What a run knows about one unit, as a plain dict (the `show` command prints it)."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .concepts import concepts_text, unit_concepts
from .errors import UnitlensError
from .store import Run, read_npz


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
    result = {
        "run": str(run.path),
        "layer": layer,
        "unit": channel,
        "stats": unit_stats(idx, u, classes),
        "histogram": unit_histogram(idx, u),
        "exemplars": listing("top"),
    }
    if float(idx["low"].min()) < 0:
        result["negative_exemplars"] = listing("bottom")
    result["synth"] = unit_images(run, layer, channel)  # [] until `unitlens synth` has run
    result["facets"] = unit_facets(run, layer, channel, corpus)
    result["concepts"] = unit_concepts(run, layer, channel)  # None until `unitlens label` has run
    return result


def summary_text(s: dict, layer: str, channel: int) -> str:
    """What `unitlens show` prints for `unit_summary(...)`; names from files are made printable."""
    from .errors import shown

    st = s["stats"]
    if st is None:
        lines = [f"{shown(layer)} channel {channel}  (synthesised only: this layer was not mined, so no exemplars "
                 "or statistics)"]
    else:
        sel = f"; class selectivity {st['class_selectivity']:.3f}" if st["class_selectivity"] is not None else ""
        lines = [f"{shown(layer)} channel {channel}  ({st['images']} images)",
                 f"  per-image max: mean {st['mean_max']:.4g}, std {st['std_max']:.4g}, range {st['min']:.4g} .. "
                 f"{st['max']:.4g}",
                 f"  fires (max > 0) on {100 * st['fire_rate']:.1f}% of images{sel}"]
    for title, key in (("top exemplars", "exemplars"), ("most negative", "negative_exemplars")):
        if not s.get(key):
            continue
        lines.append(f"  {title}:")
        for e in s[key]:
            label = f"  [{shown(e['label'])}]" if e.get("label") else ""
            lines.append(f"   {e['rank']:>3}  {e['score']:>10.4g}  box {e['box']}  {shown(e['id'])}{label}")
    lines += concepts_text(s.get("concepts"))
    for r in s.get("synth") or []:
        vs = f", {r['vs_best_exemplar']:.2f} x the best exemplar" if r.get("vs_best_exemplar") is not None else ""
        lines.append(f"  synthesised: {shown(r['image'])}  (spatial max {r['max_activation']:.4g}{vs}; "
                     f"rank {r['rank']} of {r['channels']} channels, {r['steps']} steps)")
        if r.get("nearest"):
            lines.append("    nearest natural images: " + ", ".join(f"{shown(n['id'])} ({n['similarity']:.2f})"
                                                                  for n in r["nearest"][:3]))
    return "\n".join(lines)


def unit_stats(idx: dict, u: int, classes: list[str]) -> dict:
    """The statistics of the unit at place `u` of a layer index (also the rows of a layer table)."""
    class_mean = idx["class_mean"][:, u] if len(classes) else []
    return {
        "images": int(idx["count"]),
        "mean_max": _num(idx["mean_max"][u]),
        "std_max": _num(idx["std_max"][u]),
        "mean_mean": _num(idx["mean_mean"][u]),
        "fire_rate": _num(idx["fire_rate"][u]),
        "min": _num(idx["low"][u]),
        "max": _num(idx["high"][u]),
        "class_selectivity": _num(idx["csi"][u]) if len(classes) >= 2 else None,
        "class_means": {c: _num(v) for c, v in zip(classes, class_mean)},
    }


def unit_histogram(idx: dict, u: int) -> dict:
    """The occupied span of the unit's histogram of per-image maxima (fixed asinh bins, see mining.py)."""
    counts, edges = idx["hist"][u], idx["hist_edges"]
    nz = np.nonzero(counts)[0]
    return {
        "edges": [float(edges[j]) for j in range(nz[0], nz[-1] + 2)] if len(nz) else [],
        "counts": [int(c) for c in counts[nz[0]:nz[-1] + 1]] if len(nz) else [],
    }


def unit_facets(run: Run, layer: str, channel: int, corpus) -> dict | None:
    """The unit's facets (facets.npz, see facets.py): its top images grouped by k-means in the layer's
    embedding. {"k", "silhouette", "groups": [[{"id", "image"}, ...] per facet]}; None without facets."""
    path = run.layer_dir(layer) / "facets.npz"
    if not path.is_file():
        return None
    z = read_npz(path)
    at = np.flatnonzero(z["units"] == channel)
    if not len(at) or int(z["k"][at[0]]) < 1:
        return None
    j = int(at[0])
    groups: list[list[dict]] = [[] for _ in range(int(z["k"][j]))]
    for i, f in zip(z["image"][j], z["facet"][j]):
        if f >= 0 and i < len(corpus):
            groups[int(f)].append({"id": corpus.files[int(i)], "image": str(corpus.path(int(i)).absolute())})
    return {"k": len(groups), "silhouette": _num(z["silhouette"][j]), "groups": groups}
