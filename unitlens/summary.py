"""What a run knows about one unit, as a plain dict (the `show` command prints it)."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .concepts import concepts_text, unit_concepts
from .errors import UnitlensError
from .store import Run, read_npz


def rounded(x, digits: int = 4):
    """A float rounded to `digits` significant digits; None for NaN/inf (JSON has neither)."""
    x = float(x)
    if not math.isfinite(x):
        return None
    return float(f"{x:.{digits}g}")


def finite_or_none(x) -> float | None:
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
    from .links import unit_links

    links = unit_links(run, layer, channel)
    if links is not None:  # only where `unitlens link` has run
        result["links"] = links
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
                 f"  {fires_label(st)} on {100 * st['fire_rate']:.1f}% of images{sel}"]
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
    from .links import links_text

    lines += links_text(s.get("links"))
    return "\n".join(lines)


FIRE_QUANTILE = 0.9  # a unit "fires" on an image when its maximum there reaches the layer's 90th percentile


def fire_rates(hist: np.ndarray, edges: np.ndarray, q: float = FIRE_QUANTILE) -> tuple[float, np.ndarray]:
    """(t, per-unit share of images whose per-image maximum is >= t).

    hist (U, J) counts of the per-image maxima on fixed bins, edges (J + 1,). t is the lowest bin
    edge with at most 1 - q of the layer's per-image maxima (all units pooled) at or above it:
    "max > 0" says nothing on a layer whose units are positive on every image, and a threshold
    on a bin edge makes each share exact, read off the counts.
    """
    h = np.asarray(hist, dtype=np.float64)  # (U, J)
    tail = np.append(np.cumsum(h.sum(0)[::-1])[::-1], 0.0)  # (J + 1,): pooled count at or above each edge
    j = int(np.argmax(tail <= (1 - q) * tail[0]))
    n = h.sum(1)
    return float(edges[j]), np.where(n > 0, h[:, j:].sum(1) / np.maximum(n, 1), np.nan)


def layer_firing(idx: dict) -> dict:
    """How often each unit of a layer index fires, by the one definition every view uses:
    {"threshold", "quantile", "units" (pooled), "rates" (U,)}. An index without histograms (older
    runs) has only mining's count of maxima above 0: threshold 0.0, quantile None."""
    if "hist" in idx:
        t, rates = fire_rates(idx["hist"], idx["hist_edges"])
        return {"threshold": t, "quantile": FIRE_QUANTILE, "units": len(rates), "rates": rates}
    return {"threshold": 0.0, "quantile": None, "units": len(idx["fire_rate"]), "rates": np.asarray(idx["fire_rate"])}


def fires_label(st: dict) -> str:
    """What "fires" means for the numbers of unit_stats, e.g. "fires (max >= 0.41, the 90th percentile of
    the layer's 64 units)"; every view that prints the rate prints this beside it."""
    if st.get("fire_quantile") is None:
        return "fires (max > 0)"
    n = st.get("fire_units")
    return (f"fires (max >= {st['fire_threshold']:.3g}, the {round(100 * st['fire_quantile'])}th percentile of per-image "
            f"maxima over the layer's {n} mined unit{'s' if n != 1 else ''})")


def unit_stats(idx: dict, u: int, classes: list[str], firing: dict | None = None) -> dict:
    """The statistics of the unit at place `u` of a layer index (also the rows of a layer table).
    `firing`: layer_firing(idx), when the caller asks for many units of one layer."""
    firing = firing or layer_firing(idx)
    class_mean = idx["class_mean"][:, u] if len(classes) else []
    return {
        "images": int(idx["count"]),
        "mean_max": finite_or_none(idx["mean_max"][u]),
        "std_max": finite_or_none(idx["std_max"][u]),
        "mean_mean": finite_or_none(idx["mean_mean"][u]),
        "fire_rate": finite_or_none(firing["rates"][u]),
        "fire_threshold": firing["threshold"], "fire_quantile": firing["quantile"], "fire_units": firing["units"],
        "min": finite_or_none(idx["low"][u]),
        "max": finite_or_none(idx["high"][u]),
        "class_selectivity": finite_or_none(idx["csi"][u]) if len(classes) >= 2 else None,
        "class_means": {c: finite_or_none(v) for c, v in zip(classes, class_mean)},
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
    return {"k": len(groups), "silhouette": finite_or_none(z["silhouette"][j]), "groups": groups}
