"""What the atlas shows about one layer, as plain JSON-ready columns (numbers and names only).

Two payloads per layer, so a large layer page becomes usable before its details are parsed:
  cards    everything a unit card needs: ids, key numbers, a re-binned histogram, the first
           synthesised image. Crops need no data: their place in the sprite sheet follows from
           the unit's position in the layer list and the exemplar's rank (see crops.py).
  details  what the unit view adds: every exemplar's file, score, box and where the box lies in
           its crop, class means, the evidence stored beside each synthesised image and its
           (thinned) optimisation trace, and the cells of the whole-image sheets (whole-NNN.jpg:
           each top exemplar's original, letterboxed, for the view of the whole image with its box).
Reads the run folder only (mine/<layer>/index.npz, corpus.json, synth/<layer>/units.json and
the traces); never touches the model.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..store import Run, read_json, read_npz
from ..summary import layer_firing
from ..summary import rounded as _f

HIST_BINS = 24  # linear bins of the re-binned histogram (cards and unit view)
TRACE_POINTS = 96  # at most this many points of an optimisation trace reach the page
FACET_COSINE = 0.5  # facets count as different things when their centres' cosine in the layer's embedding is below this
FACET_THUMB = 48  # whole-image thumbnails of facet members that have no kept crop
FACET_SHOWN = 4  # such thumbnails per facet
WHOLE = 160  # px, longest side of a whole-image thumbnail in the unit view
WHOLE_COLS, WHOLE_ROWS = 16, 16  # cells per whole-image sheet: 2560 px square at most
WHOLE_MAX = 4096  # whole images per layer, rank 1 of every unit first: bounds the atlas's decoding


def _fs(a, digits: int = 4) -> list:
    return [_f(v, digits) for v in np.asarray(a).ravel()]


def rebin(counts: np.ndarray, edges: np.ndarray, low: float, high: float, bins: int = HIST_BINS):
    """Spread a histogram on arbitrary bins onto `bins` equal bins between the data's ends.

    counts (J,), edges (J + 1,). The outer source bins may be open-ended (huge edges); every
    source bin is first clipped to [low, high], the range the values are known to lie in. Mass
    is spread uniformly within a source bin. Returns (lo, hi, new_counts): the linear range
    runs from the first to the last occupied source bin, clipped to [low, high]. All mass in
    one point gives a single bin with lo == hi. No occupied bin gives (None, None, []).
    """
    counts = np.asarray(counts, dtype=np.float64)
    nz = np.nonzero(counts)[0]
    if not len(nz):
        return None, None, []
    low, high = float(low), float(high)
    if not (math.isfinite(low) and math.isfinite(high)) or high < low:
        low, high = float(edges[nz[0]]), float(edges[nz[-1] + 1])
    a = np.clip(edges[:-1], low, high)[nz]  # clipped source intervals [a, b] of occupied bins
    b = np.clip(edges[1:], low, high)[nz]
    c = counts[nz]
    lo, hi = float(a.min()), float(b.max())
    if hi <= lo:
        return lo, lo, [float(c.sum())]
    t = np.linspace(lo, hi, bins + 1)  # target edges
    out = np.zeros(bins)
    width = b - a
    point = width <= (hi - lo) * 1e-12  # a source bin squeezed to a point by the clipping
    if point.any():
        j = np.clip(np.searchsorted(t, a[point], side="right") - 1, 0, bins - 1)
        np.add.at(out, j, c[point])
    w = ~point
    if w.any():
        # overlap of each source interval with each target bin: (S, bins)
        ov = np.clip(np.minimum(b[w, None], t[None, 1:]) - np.maximum(a[w, None], t[None, :-1]), 0, None)
        out += (ov / width[w, None] * c[w, None]).sum(0)
    return lo, hi, out.tolist()


@dataclass
class LayerData:
    """The two payloads of one layer page, and the image files the page refers to."""

    name: str
    cards: dict
    details: dict
    sheets: list[Path] = field(default_factory=list)  # sprite sheets to place in the atlas
    images: list[Path] = field(default_factory=list)  # synthesised PNGs to place in the atlas
    facet_thumbs: list[Path] = field(default_factory=list)  # originals of the cells of the facet sheet, in order
    whole: list[Path] = field(default_factory=list)  # originals of the cells of the whole-image sheets, in order

    @property
    def units(self) -> int:
        return len(self.cards["units"])


def synth_records(run: Run, layer: str) -> tuple[Path, dict[int, dict]]:
    """{channel: record} of units.json (see synth/results.py), {} when the layer has none."""
    d = run.layer_dir(layer, "synth")
    table = read_json(d / "units.json") or {}
    out = {}
    for key, rec in (table.get("units") or {}).items():
        files = [Path(str(im.get("file", ""))).name for im in rec.get("images", [])]
        if files and all(f and (d / f).is_file() for f in files):
            out[int(key)] = rec
    return d, out


def _thin(trace: np.ndarray) -> dict:
    """One trace (T,) with NaN after an early stop -> at most TRACE_POINTS (step, value) pairs."""
    ok = np.nonzero(np.isfinite(trace))[0]
    if not len(ok):
        return {"step": [], "value": []}
    last = int(ok[-1])
    stride = max(1, math.ceil((last + 1) / TRACE_POINTS))
    steps = list(range(0, last + 1, stride))
    if steps[-1] != last:
        steps.append(last)
    return {"step": [s + 1 for s in steps], "value": _fs(trace[steps])}


def _doubts(im: dict, converged: bool | None) -> tuple[list[str], int]:
    """What speaks against trusting one synthesised image, and how many checks could be judged.

    Checks: the optimisation converged (its own early-stop test on the finished trace; not judged
    for an image the loop stopped on purpose at parity, which is still rising by design), parity
    (the synthesis's own field when it wrote one, else a spatial maximum at least the best natural
    exemplar's), rank 1 among the layer's channels on its own image, and keeping at least half of
    its effect under random warps."""
    parity = im.get("parity")
    if isinstance(parity, dict):  # the synthesis's own parity record
        parity = bool(parity.get("reached"))
    elif parity is not None and not isinstance(parity, bool):  # a number: the share of the natural best reached
        parity = float(parity) >= 1
    if parity is None and im.get("ratio") is not None:
        parity = im["ratio"] >= 1
    rob = (im.get("robustness") or {}).get("relative")
    checks = [(converged, "did not converge"), (parity, "below the best natural exemplar"),
              (None if im.get("rank") is None else im["rank"] == 1,
               f"rank {im.get('rank')} on its own image: {(im.get('rank') or 2) - 1} other channel"
               f"{'s' if (im.get('rank') or 2) > 2 else ''} of the layer reach more on it (raw values)"),
              (None if rob is None else rob >= 0.5, "loses most of its effect under small warps")]
    return [why for ok, why in checks if ok is False], sum(ok is not None for ok, _ in checks)


def _synth_payload(d: Path, rec: dict, stop: tuple[int, float | None] = (32, 0.01),
                   parity_stop: tuple[float | None, int | None] = (None, None)) -> tuple[dict, dict, list[Path]]:
    """Card part, detail part and image files of one synthesised unit (names within the layer's image folder).

    `stop`: the run's early-stop window and gain, which also say whether a finished image converged;
    `parity_stop`: the run's stop_at_parity margin and step limit, which say whether the loop stopped
    an image on purpose at parity (its convergence is then not judged)."""
    from ..synth.results import parity_share, stalled

    tr = None
    tname = Path(str(rec.get("trace", ""))).name
    if tname and (d / tname).is_file():
        with np.load(d / tname, allow_pickle=False) as z:  # read the one array needed, not the whole file
            tr = np.atleast_2d(z["trace"]) if "trace" in z.files else None
    images, files = [], []
    for m, im in enumerate(rec.get("images", [])):
        name = Path(str(im["file"])).name
        files.append(d / name)
        rob = im.get("robustness") or None
        par = im.get("parity") or None
        images.append({
            "src": name,
            "activation": _f(im.get("activation", math.nan)),
            "max_activation": _f(im.get("max_activation", math.nan)),
            "ratio": _f(im["vs_best_exemplar"]) if im.get("vs_best_exemplar") is not None else None,
            "rank": im.get("rank"), "channels": im.get("channels"), "steps": im.get("steps"),
            "objective": _f(im.get("objective", math.nan)),
            "nearest": [[n.get("id"), _f(n.get("similarity", math.nan), 3)] for n in im.get("nearest") or []],
            "robustness": None if not rob else {
                "n": rob.get("n"), "mean": _f(rob.get("mean", math.nan)), "std": _f(rob.get("std", math.nan)),
                "relative": _f(rob["relative"]) if rob.get("relative") is not None else None},
            "parity": None if not par else {
                "reached": bool(par.get("reached")), "step": par.get("step"),
                "synthesised": _f(par.get("synthesised", math.nan)), "exemplar": _f(par.get("exemplar", math.nan))},
        })
        row = tr[m][np.isfinite(tr[m])] if tr is not None and m < len(tr) else None
        window, gain = stop
        judged = row is not None and len(row) >= 2 * window
        converged = bool(stalled(row.tolist(), window, gain or 0.01)) if judged else None
        margin, limit = parity_stop
        # stopped early, once past parity, by the loop's own rule: still rising by design, not a failure
        at_parity = margin is not None and (im.get("parity") or {}).get("step") is not None \
            and limit is not None and (im.get("steps") or limit) < limit
        images[-1]["converged"] = None if at_parity and not converged else converged
        images[-1]["stopped_at_parity"] = bool(at_parity)
        images[-1]["doubts"], images[-1]["checks"] = _doubts(images[-1], images[-1]["converged"])
    traces = [_thin(row) for row in tr] if tr is not None else []
    ratios = [im["ratio"] for im in images if im["ratio"] is not None]
    first = images[0] if images else {}
    card = {"src": files[0].name if files else None, "count": len(images),
            "ratio": max(ratios) if ratios else None,
            "parity": parity_share(images),  # share of the unit's images at parity
            # the card shows the first image: its doubts, and the share of its judged checks it passes
            "doubts": first.get("doubts") or [],
            "trust": _f(1 - len(first["doubts"]) / first["checks"], 3) if first.get("checks") else None,
            "own_rank": first.get("rank"), "robust": (first.get("robustness") or {}).get("relative")}
    best = rec.get("best_exemplar")
    detail = {"images": images, "trace": traces, "best_exemplar": _f(best) if best is not None else None}
    strip = Path(str(rec.get("nearest_strip") or "")).name
    if strip and (d / strip).is_file():
        from ..neighbours import NEAR_K, NEAR_THUMB

        files.append(d / strip)
        detail["near"] = {"src": strip, "thumb": NEAR_THUMB, "cols": NEAR_K,
                          "space": rec.get("nearest_space") or "cosine in the layer's embedding of channel means"}
    return card, detail, files


def layer_data(run: Run, layer: str, img_dir: str) -> LayerData | None:
    """Both payloads of `layer`; None when the layer has neither an index nor synthesised units.

    `img_dir` is the folder (relative to the atlas) where the page will find this layer's images.
    """
    ipath = run.layer_dir(layer) / "index.npz"
    idx = read_npz(ipath) if ipath.is_file() else None
    sdir, synth = synth_records(run, layer)
    if idx is None and not synth:
        return None
    mined = [int(u) for u in idx["units"]] if idx is not None else []
    units = mined + sorted(set(synth) - set(mined))
    U = len(units)
    pos = {u: i for i, u in enumerate(mined)}  # place in the mining list = row in the sprite sheets
    cards: dict = {"layer": layer, "units": units, "mined": len(mined) > 0,
                   "synthesised": sum(u in synth for u in units)}
    details: dict = {"layer": layer}
    sheets: list[Path] = []
    if idx is not None:
        c, hist = _mined_cards(idx, units, pos)
        cards.update(c)
        details.update(hist)
        md, whole = _mined_details(run, idx, units, pos)
        details.update(md)
        fd, facet_thumbs = _facet_details(run, layer, units, pos, dict(zip(units, cards["filled"])))
        details.update(fd)
        sheets, cards["sheets"] = sheet_layout(run, layer, idx, len(mined), img_dir)
    images: list[Path] = []
    scard, sdet = [None] * U, [None] * U
    sc = (((read_json(run.manifest_path) or {}).get("synth") or {}).get("settings") or {}).get("config") or {}
    stop = (int(sc.get("stop_window") or 32), sc.get("stop_gain", 0.01))
    parity_stop = (sc.get("stop_at_parity"), sc.get("steps"))
    for i, u in enumerate(units):
        if u in synth:
            scard[i], sdet[i], files = _synth_payload(sdir, synth[u], stop, parity_stop)
            images += files
    cards["img_dir"] = img_dir
    cards["synth_src"] = [c["src"] if c else None for c in scard]
    cards["synth_n"] = [c["count"] if c else 0 for c in scard]
    cards["ratio"] = [c["ratio"] if c else None for c in scard]
    cards["parity"] = [c["parity"] if c else None for c in scard]
    for key in ("trust", "doubts", "own_rank", "robust"):
        cards[key] = [c[key] if c else None for c in scard]
    details["synth"] = sdet
    from .link_data import link_payload

    lcards, ldetails = link_payload(run, layer, units)  # empty unless `unitlens link` has run
    cards.update(lcards)
    details.update(ldetails)
    if idx is not None:  # what `unitlens label` found, if it ran
        from .concept_data import atlas_columns

        named_cards, named_details = atlas_columns(run, layer, units)
        cards.update(named_cards)
        details.update(named_details)
    data = LayerData(layer, cards, details, sheets, images)
    if idx is not None:
        data.facet_thumbs, data.whole = facet_thumbs, whole
    return data


def _pick(a: np.ndarray, units, pos, fill=None) -> list:
    """Per-unit values in `units` order; units that were not mined get `fill`."""
    return [_f(a[pos[u]]) if u in pos else fill for u in units]


SPARK = "0123456789ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz-_"  # 64 bar heights, one character each


def spark(counts) -> str:
    """A histogram as a short string for a card: each bin's height relative to the tallest,
    0..63, one character per bin; an occupied bin is never drawn empty."""
    c = np.asarray(counts, dtype=np.float64)
    if not len(c) or c.max() <= 0:
        return ""
    lv = np.where(c > 0, np.maximum(1, np.round(c / c.max() * 63)), 0).astype(int)
    return "".join(SPARK[v] for v in lv)


def _mined_cards(idx: dict, units: list[int], pos: dict[int, int]) -> tuple[dict, dict]:
    """(card columns, histogram columns for the details) of the mined units."""
    K = int(idx["top_image"].shape[1])
    shape = [int(v) for v in idx["shape"]] if "shape" in idx else None
    hist_lo, hist_hi, hist, sparks, spark_mean = [], [], [], [], []
    for u in units:
        if u not in pos or "hist" not in idx:
            for column, empty in ((hist_lo, None), (hist_hi, None), (hist, []), (sparks, ""), (spark_mean, None)):
                column.append(empty)
            continue
        p = pos[u]
        lo, hi, c = rebin(idx["hist"][p], idx["hist_edges"], idx["low"][p], idx["high"][p])
        hist_lo.append(_f(lo) if lo is not None else None)
        hist_hi.append(_f(hi) if hi is not None else None)
        hist.append([round(v, 2) for v in c])
        sparks.append(spark(c))
        mm = float(idx["mean_max"][p])
        spark_mean.append(round((mm - lo) / (hi - lo), 3) if lo is not None and hi > lo and math.isfinite(mm) else None)
    csi = idx.get("csi")
    if csi is not None and not float(np.nanmin(idx["low"])) >= 0:
        csi = None  # the index assumes non-negative activations: with negative class means it means nothing
    firing = layer_firing(idx)
    top_ok = idx["top_score"]
    cards = {
        "shape": shape, "images": int(idx["count"]), "k": K,
        "negative": "bottom_box" in idx,  # the sheets hold bottom crops only when the layer goes negative
        "peak": _pick(idx["high"], units, pos),
        "fire": _pick(firing["rates"], units, pos),
        "fire_at": _f(firing["threshold"]) if firing["quantile"] is not None else None, "fire_q": firing["quantile"],
        "csi": _pick(csi, units, pos) if csi is not None else [None] * len(units),
        # number of filled exemplar slots per unit (a tiny corpus may have fewer than K images)
        "filled": [int(np.isfinite(top_ok[pos[u]]).sum()) if u in pos else 0 for u in units],
        "spark": sparks, "spark_mean": spark_mean,
        "pos": [pos.get(u) for u in units],
        # the least a crop shows around its field (original pixels; None: crops of the field alone), and
        # where the field lies in each unit's first crop (fractions of the cell)
        "context": int(idx["context"]) if "context" in idx else None,
        "ring": [_ring(idx, "top", pos[u], 0) if u in pos else None for u in units],
    }
    details = {
        "mean_max": _pick(idx["mean_max"], units, pos), "std_max": _pick(idx["std_max"], units, pos),
        "mean_mean": _pick(idx["mean_mean"], units, pos), "low": _pick(idx["low"], units, pos),
        "hist_lo": hist_lo, "hist_hi": hist_hi, "hist": hist,
    }
    return cards, details


def _ring(idx: dict, kind: str, p: int, r: int) -> list[float] | None:
    """Where exemplar r of the unit at place p has its field within its crop (crops.outline_in_cell);
    None without a stored view (crops cut before views were kept) or without a crop."""
    from ..crops import outline_in_cell

    box, view = idx.get(f"{kind}_box"), idx.get(f"{kind}_view")
    if box is None or view is None or "thumb" not in idx or view[p, r, 0] < 0:
        return None
    return outline_in_cell([int(v) for v in box[p, r]], [int(v) for v in view[p, r]], int(idx["thumb"]))


def _mined_details(run: Run, idx: dict, units: list[int], pos: dict[int, int]) -> tuple[dict, list[Path]]:
    """The exemplar lists of the unit view, and the originals of the whole-image sheets' cells."""
    corpus = read_json(run.path / "corpus.json") or {}
    files = corpus.get("files") or []
    labels = corpus.get("labels")
    N = len(files)
    kinds = ["top"] + (["bottom"] if "bottom_box" in idx else [])
    # the files referenced by any exemplar, each sent once
    used = np.unique(np.concatenate([idx[f"{k}_image"].ravel() for k in kinds]))
    used = used[used < N]
    local = {int(i): j for j, i in enumerate(used)}
    out: dict = {"files": [str(files[i]) for i in used],
                 "labels": [labels[i] for i in used] if labels is not None else None}
    for kind in kinds:
        img, score = idx[f"{kind}_image"], idx[f"{kind}_score"]
        box = idx.get(f"{kind}_box")
        lists = []
        for u in units:
            if u not in pos:
                lists.append(None)
                continue
            p = pos[u]
            row = []
            for r in range(img.shape[1]):
                i = int(img[p, r])
                if i >= N:
                    continue  # an empty slot
                b = [int(v) for v in box[p, r]] if box is not None else None
                view = idx.get(f"{kind}_view")
                v = [int(x) for x in view[p, r]] if view is not None and view[p, r, 0] >= 0 else None
                row.append([local[i], _f(score[p, r], 5), r, b if b and b[0] >= 0 else None, v,
                            _ring(idx, kind, p, r)])
            lists.append(row)
        # per unit: [file, score, rank (= sheet column offset), field box, crop box (original pixels, or
        # None), field within the crop (fractions of the cell, or None)]
        out[kind] = lists
    classes = list((read_json(run.manifest_path) or {}).get("corpus", {}).get("classes") or [])
    cm = idx.get("class_mean")
    if classes and cm is not None and cm.shape[0] == len(classes):
        out["classes"] = classes
        out["class_count"] = [int(v) for v in idx["class_count"]]
        out["class_mean"] = [_fs(cm[:, pos[u]]) if u in pos else None for u in units]
    whole: list[Path] = []
    if "top_box" in idx and N:
        # whole images of the top exemplars with a box, rank by rank across units, at most WHOLE_MAX
        img, box = idx["top_image"], idx["top_box"]
        rows = [pos[u] for u in units if u in pos]
        ranked = [int(img[p, r]) for r in range(img.shape[1]) for p in rows if img[p, r] < N and box[p, r, 0] >= 0]
        chosen = list(dict.fromkeys(ranked))[:WHOLE_MAX]
        cell = {i: n for n, i in enumerate(chosen)}
        from ..corpus import Corpus
        from ..errors import UnitlensError

        try:
            where = Corpus.from_json(corpus)
        except UnitlensError:  # a damaged corpus record: no whole images, the rest of the page as usual
            where = None
        if where is not None:
            whole = [where.path(i) for i in chosen]
            out["whole"] = {"thumb": WHOLE, "cols": WHOLE_COLS, "rows": WHOLE_ROWS,  # "sizes": see render.py
                            "cell": [cell.get(int(i), -1) for i in used], "sizes": []}
    return out, whole


def sheet_layout(run: Run, layer: str, idx: dict, n_mined: int, img_dir: str) -> tuple[list[Path], dict | None]:
    from ..crops import SHEET_ROWS, sheet_cell

    if "thumb" not in idx:  # crops not cut (yet)
        return [], None
    rows = int(idx["sheet_rows"]) if "sheet_rows" in idx else SHEET_ROWS
    d = run.layer_dir(layer)
    names = [sheet_cell(p, 0)[0] for p in range(0, n_mined, rows)]  # sheet s holds positions s*rows ...
    present = [n if (d / n).is_file() else None for n in names]
    info = {"dir": img_dir, "rows": rows, "cols": int(idx["sheet_cols"]), "thumb": int(idx["thumb"]),
            "units": n_mined, "names": present}
    return [d / n for n in present if n], info


def _facet_details(run: Run, layer: str, units: list[int], pos: dict[int, int],
                   kept_n: dict[int, int]) -> tuple[dict, list[Path]]:
    """Facets of the top images (facets.npz, see facets.py) and whether near-duplicates were merged;
    and the original files of the facet sheet's cells.

    Per unit: {"k", "n" (images clustered), "silhouette", "sizes" (members per facet),
    "ranks" (facet of each kept top exemplar, by rank; `kept_n`: kept exemplars per unit), "cosine" (the largest cosine between two
    facets' centres in the layer's embedding), "distinct" (below FACET_COSINE), "thumbs" (per facet,
    cells of the facet sheet: members with no kept crop)}; None where the layer has no facets."""
    mine = (read_json(run.manifest_path) or {}).get("mine") or {}
    dd = mine.get("dedupe") or {}
    out: dict = {"dedupe": dd.get("threshold") if dd.get("on") else None}
    path = run.layer_dir(layer) / "facets.npz"
    if not path.is_file():
        return out, []
    z = read_npz(path)
    at = {int(u): j for j, u in enumerate(z["units"])}
    emb = None
    if (z["k"] > 1).any():
        from ..embedding import Embedding

        try:
            emb = Embedding(run, layer)
        except (FileNotFoundError, KeyError):
            emb = None
    corpus = None
    cells: list[Path] = []
    lists = []
    for u in units:
        j = at.get(u) if u in pos else None
        if j is None or int(z["k"][j]) < 1:
            lists.append(None)
            continue
        f = z["facet"][j]
        f = f[f >= 0]
        k = int(z["k"][j])
        entry = {"k": k, "n": int(len(f)), "silhouette": _f(z["silhouette"][j], 3),
                 "sizes": np.bincount(f, minlength=k).tolist(), "ranks": f.tolist()}
        if k > 1:
            rows = z["image"][j][:len(f)]
            if emb is not None:
                x = emb.of_images(rows).astype(np.float64)  # (n, d) unit vectors
                c = np.stack([x[f == a].mean(0) for a in range(k)])
                c /= np.maximum(np.linalg.norm(c, axis=1, keepdims=True), 1e-12)
                cos = c @ c.T
                entry["cosine"] = _f(cos[~np.eye(k, dtype=bool)].max(), 3)
                entry["distinct"] = bool(entry["cosine"] < FACET_COSINE)
            kept = kept_n.get(u, 0)
            thumbs = []
            for a in range(k):
                if (f[:kept] == a).any():
                    thumbs.append([])
                    continue
                if corpus is None:
                    corpus = run.corpus()
                members = [int(i) for i in rows[f == a][:FACET_SHOWN]]
                thumbs.append(list(range(len(cells), len(cells) + len(members))))
                cells += [corpus.path(i) for i in members]
            entry["thumbs"] = thumbs
        lists.append(entry)
    out["facets"] = lists
    out["facet_top_n"] = int(z["top_n"])
    out["facet_cosine"] = FACET_COSINE
    if cells:
        out["facet_sheet"] = {"src": "facets.jpg", "thumb": FACET_THUMB, "cols": 16}
    return out, cells
