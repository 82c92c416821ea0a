"""Compare two checkpoints on one probe corpus: which layers changed, which units, and how.

Per pair of layers (A's layer, B's layer):
  cka            linear CKA (Kornblith et al. 2019) of per-image channel means, all channels,
                 with a percentile bootstrap interval over images
  cka_full_maps  optional: CKA of whole feature maps by the minibatch estimator with the unbiased
                 HSIC (Song et al. 2012; Nguyen, Raghu & Kornblith 2021), interval over minibatches
  cka_matrix     every chosen layer of A against every chosen layer of B
Per unit (same architecture, same layer): Pearson correlation of the per-image maxima at the same
index, the best-correlated unit of B (Li et al. 2016, "Convergent learning"), the changes in mean
and firing rate (max > 0), the Jaccard overlap of the top-K exemplar sets, and a ranking score.

Memory: never N x C x H x W. A sweep keeps per chosen layer and model the per-image channel means
and maxima of all channels, (N, C) float32 each; cross-products are accumulated in float64 over
row chunks, so run folders' memory maps are read, not copied. Whole-map CKA holds one
batch's (B, B) Gram matrix per layer and keeps a few numbers per layer pair per minibatch. The
pooled-CKA interval reweights (m, m) float64 Gram matrices, m <= bootstrap_images (2048: ~35 MB each).
The estimators themselves live in `_cka.py`.
"""
from __future__ import annotations

import math
import os
from dataclasses import asdict, dataclass, field
from functools import partial
from pathlib import Path

import numpy as np
import torch

from ._cka import cka_matrix, cross_products, MinibatchTally, column_moments, pooled_interval, corr_intervals
from .errors import UnitlensError, interrupted, log, shown
from .runview import Comparison
from .store import Run, atomic_write, check_folder, now, safe_name, write_json
from .summary import finite_or_none

DEAD_TOLERANCE = 1e-6  # a unit is dead when std(max) <= this * |mean(max)|: constant to float precision
RANKING = ("change = 1 - (max(corr, 0) + jaccard) / 2 in [0, 1], largest first (ties: lower unit "
           "index): 0 = same ordering of images and same top-K set; 1 = uncorrelated or anti-correlated "
           "with disjoint top sets. A unit dead in exactly one model scores 1, dead in both 0. "
           "`most_changed` lists the first units of this order that count as changed (CHANGED).")
CHANGED_BELOW = 0.9  # a unit counts as changed when its correlation is significantly below this
CHANGED = (f"a unit counts as changed when the correlation of its per-image maxima in A and B is significantly "
           f"below {CHANGED_BELOW} (the upper end of its bootstrap interval over images lies below it; with the "
           f"bootstrap off, the correlation itself), or when it is dead in exactly one of them")


@dataclass(frozen=True)
class CompareConfig:
    top_k: int = 16              # exemplar set size for the Jaccard overlap
    full_maps: bool = False      # also CKA of whole feature maps (minibatch estimator)
    bootstrap: int = 200         # resamples for the CKA intervals; 0 for none
    confidence: float = 0.95
    bootstrap_images: int = 2048  # the pooled-CKA interval reweights n x n Gram matrices of at most this many images
    batch_size: int = 64         # images per forward pass, and the minibatch of the whole-map estimator
    workers: int | None = None   # decoding processes; None: from the core count
    seed: int = 0                # image order of the sweep, bootstrap resamples
    most_changed: int = 20       # length of each layer's `most_changed` list


# ----------------------------------------------------------------------------- units

@dataclass
class _Held:
    """What one model holds for one layer, rows = corpus indices."""
    channels: int
    pooled: object = None    # (N, C) per-image channel means of all channels
    maxima: object = None    # (N, len(units)) per-image spatial maxima
    units: tuple[int, ...] = ()
    top: np.ndarray | None = None  # (len(units), K) a run's exemplar image indices; else from maxima


def _tops(held: _Held, cols: list[int], rows: np.ndarray, k: int) -> list[list[int]]:
    """The top-k images of each column, best first: a run's exemplars, else from the maxima."""
    if held.top is not None:
        return [[int(i) for i in held.top[c, :k] if i < len(held.maxima)] for c in cols]
    V = np.asarray(held.maxima[rows][:, cols], dtype=np.float32)  # (n, U)
    order = np.argsort(-V, axis=0, kind="stable")[:k]  # ties go to the earlier image, as in mining
    return [rows[order[:, c]].tolist() for c in range(len(cols))]


def _unit_table(A: _Held, B: _Held, chosen, rows: np.ndarray, k: int, cfg: CompareConfig, rng) -> list[dict]:
    col_a = {u: i for i, u in enumerate(A.units)}
    col_b = {u: i for i, u in enumerate(B.units)}
    units = [u for u in chosen if u in col_a and u in col_b]
    if not units:
        return []
    ca = [col_a[u] for u in units]
    mean_a, std_a, fire_a = (v[ca] for v in column_moments(A.maxima, rows))
    mean_b, std_b, fire_b = column_moments(B.maxima, rows)
    dead_a = std_a <= DEAD_TOLERANCE * np.abs(mean_a)
    dead_b = std_b <= DEAD_TOLERANCE * np.abs(mean_b)
    sub = _Columns(A.maxima, ca)
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cross_products(sub, B.maxima, rows, mean_a, mean_b) / (len(rows) * np.outer(std_a, std_b))
    corr = np.clip(corr, -1, 1)  # (U, Ub)
    corr[dead_a] = math.nan
    corr[:, dead_b] = math.nan
    cb = [col_b[u] for u in units]
    same = corr[np.arange(len(units)), cb]  # (U,) correlation with the unit of the same index
    ci = corr_intervals(sub, _Columns(B.maxima, cb), rows, same, cfg, rng)  # (U, 2) or None
    tops_a = _tops(A, ca, rows, k)
    tops_b = _tops(B, cb, rows, k)
    table = []
    for i, u in enumerate(units):
        j = col_b[u]
        da, db = bool(dead_a[i]), bool(dead_b[j])
        live = np.where(np.isnan(corr[i]), -np.inf, corr[i])
        best = int(np.argmax(live)) if np.isfinite(live).any() else None
        sa, sb = set(tops_a[i]), set(tops_b[i])
        jac = None if da or db else len(sa & sb) / len(sa | sb)
        c = None if da or db else float(corr[i, j])
        change = (0.0 if da and db else 1.0) if da or db else 1 - (max(c, 0.0) + jac) / 2
        cci = None if da or db or ci is None or not np.isfinite(ci[i]).all() else [float(v) for v in ci[i]]
        changed = da != db if da or db else (cci[1] if cci else c) < CHANGED_BELOW
        table.append({
            "unit": u, "dead": da or db, "dead_a": da, "dead_b": db,
            "corr": finite_or_none(c) if c is not None else None, "corr_ci": cci, "changed": bool(changed),
            "best_match": None if best is None else B.units[best],
            "best_match_corr": None if best is None else finite_or_none(corr[i, best]),
            "jaccard": jac,
            "mean_a": finite_or_none(mean_a[i]), "mean_b": finite_or_none(mean_b[j]), "mean_change": finite_or_none(mean_b[j] - mean_a[i]),
            "fire_rate_a": finite_or_none(fire_a[i]), "fire_rate_b": finite_or_none(fire_b[j]),
            "fire_rate_change": finite_or_none(fire_b[j] - fire_a[i]),
            "change": round(float(change), 9),  # float noise must not order unchanged units
            "top_a": tops_a[i], "top_b": tops_b[i],
        })
    for rank, entry in enumerate(sorted(table, key=lambda e: (-e["change"], e["unit"])), 1):
        entry["rank"] = rank
    return table


class _Columns:
    """A column subset of a (possibly memory-mapped) array, read by row blocks."""

    def __init__(self, X, cols):
        self.X, self.cols = X, np.asarray(cols)
        self.shape = (X.shape[0], len(cols))

    def __getitem__(self, rows):
        return np.asarray(self.X[rows])[:, self.cols]


# ----------------------------------------------------------------------------- what to compare

@dataclass
class _Plan:
    corpus: object
    ok: np.ndarray                        # (N,) images usable in both
    names_a: list[str]
    names_b: list[str]                    # paired with names_a by position
    chosen: dict[str, tuple[int, ...]]    # A's layer -> units to report
    held: dict[str, dict[str, _Held]]     # "a" / "b" -> layer -> what is held
    loaders: dict                         # "a" / "b" -> () -> LoadedModel, called only when needed
    same_architecture: bool
    sides: dict[str, dict]                # how A and B are described in the summary
    need: dict[str, dict[str, set]] = field(default_factory=lambda: {"a": {}, "b": {}})  # to compute
    recomputed: list[dict] = field(default_factory=list)
    default_out: Path | None = None
    _models: dict = field(default_factory=dict)

    def model(self, side: str):
        if side not in self._models:
            self._models[side] = self.loaders[side]()
        return self._models[side]

    def unit_pairs(self) -> set[str]:
        return {la for la, lb in zip(self.names_a, self.names_b) if self.same_architecture and la == lb}


def _texts(layers) -> list[str]:
    return [layers] if isinstance(layers, str) else list(layers or [])


def _shape_table(model) -> list[tuple]:
    return [(n, i.channels, i.height, i.width) for n, i in model.layers().items()]


def _plan_models(a, b, corpus, layers, layers_b) -> _Plan:
    from .corpus import Corpus, open_corpus
    from .units import parse_layers

    if corpus is None:
        raise UnitlensError("Comparing two models needs probe images: give --corpus DIR (a folder of "
                            "images or a text file of paths).")
    if not _texts(layers):
        raise UnitlensError("Name the layers to compare, e.g. --layers layer3,layer4 "
                            f"(`unitlens layers {a.spec}` lists them).")
    chosen = parse_layers(a, _texts(layers))
    names_a = [lu.layer for lu in chosen]
    if _texts(layers_b):
        names_b = [lu.layer for lu in parse_layers(b, _texts(layers_b))]
        if len(names_b) != len(names_a):
            raise UnitlensError(f"--layers names {len(names_a)} layer(s) of A and --layers-b {len(names_b)} of B; "
                                "give as many of each (they are paired in depth order).")
    else:
        names_b = [b.layer(n).name for n in names_a]
    if a.preprocess.frame != b.preprocess.frame:
        raise UnitlensError(f"Model A takes {_input_text(a)} inputs and model B {_input_text(b)}; both must see "
                            "the same images. Give both one size with --size.")
    corpus = corpus if isinstance(corpus, Corpus) else open_corpus(corpus)
    plan = _Plan(
        corpus=corpus, ok=np.ones(len(corpus), dtype=bool), names_a=names_a, names_b=names_b,
        chosen={lu.layer: lu.units for lu in chosen},
        held={"a": {n: _Held(a.layer(n).channels) for n in names_a},
              "b": {n: _Held(b.layer(n).channels) for n in names_b}},
        loaders={"a": lambda: a, "b": lambda: b}, same_architecture=_shape_table(a) == _shape_table(b),
        sides={"a": {"source": "model", "model": a.describe()}, "b": {"source": "model", "model": b.describe()}})
    units = plan.unit_pairs()
    for side, names in (("a", names_a), ("b", names_b)):
        plan.need[side] = {n: {"pooled", "maxima"} if n in units else {"pooled"} for n in names}
    return plan


def _input_text(model) -> str:
    p = model.preprocess
    return f"{p.size_text()} px {'RGB' if p.channels == 3 else 'grey'} ({p.interpolation})"


def _layer_names(texts, flag: str) -> list[str]:
    names = [n.strip() for t in texts for n in t.split(",") if n.strip()]
    if any(":" in n for n in names):
        raise UnitlensError(f"Comparing runs, {flag} takes layer names only (e.g. layer3,layer4); the units "
                            "compared are those both runs mined.")
    return list(dict.fromkeys(names))


def _held_from_run(run: Run, layer: str) -> _Held:
    idx = run.index(layer)
    units, C = tuple(int(u) for u in idx["units"]), int(idx["shape"][0])
    d = run.layer_dir(layer)
    maxima, means = (np.load(d / f, mmap_mode="r") if (d / f).is_file() else None
                     for f in ("values.npy", "means.npy"))
    pooled = means if means is not None and units == tuple(range(C)) else None
    return _Held(C, pooled, maxima, units, idx["top_image"] if maxima is not None else None)


def _skipped_mask(corpus, manifests) -> np.ndarray:
    ok = np.ones(len(corpus), dtype=bool)
    at = {f: i for i, f in enumerate(corpus.files)}
    for m in manifests:
        for s in m["corpus"].get("skipped", []):
            if s["file"] in at:
                ok[at[s["file"]]] = False
    return ok


def _check_unchanged(corpus, run: Run) -> None:
    """Recomputed features must come from the images that were mined: sizes and dates as recorded."""
    from .corpus import file_stamp

    changed = [f for i, (f, s) in enumerate(zip(corpus.files, corpus.stamps)) if file_stamp(corpus.path(i)) != tuple(s)]
    if changed:
        raise UnitlensError(f"{len(changed)} image(s) of the corpus of {run.path} changed or vanished since it was "
                            f"mined (first: {changed[0]}), so features recomputed now would not match the run. "
                            "Mine both runs again, or compare the models with --corpus.")


def _model_from_run(run: Run, allow_pickle: bool):
    from .synth import model_from_run  # refuses weights that changed since the run was made

    return model_from_run(run, allow_pickle)


def _plan_runs(ra: Run, rb: Run, layers, layers_b, full_maps: bool, allow_pickle: bool) -> _Plan:
    from ._specs import canonical_spec

    ma, mb = ra.manifest(), rb.manifest()
    for label, r, m in (("A", ra, ma), ("B", rb, mb)):
        if not (m.get("mine") or {}).get("done"):
            raise UnitlensError(f"Run {label} ({r.path}) has no finished mining pass. Finish it by running "
                                "the same `unitlens mine` command again.")
    ca, cb = ma["corpus"], mb["corpus"]
    if ca["fingerprint"] != cb["fingerprint"]:
        raise UnitlensError(
            f"The runs were mined over different corpora (A: {ca['source']}, {ca['count']} images, fingerprint "
            f"{ca['fingerprint'][:12]}; B: {cb['source']}, {cb['count']} images, fingerprint {cb['fingerprint'][:12]}). "
            "Runs compare only over the same images: mine both over one corpus, or compare the models with "
            "`unitlens compare MODEL_A MODEL_B --corpus DIR ...`.")
    mined = {"a": ra.mined_layers(), "b": rb.mined_layers()}
    names_a = _layer_names(_texts(layers), "--layers") or (
        mined["a"] if _texts(layers_b) else [n for n in mined["a"] if n in mined["b"]])
    names_b = _layer_names(_texts(layers_b), "--layers-b") or list(names_a)
    if not names_a:
        raise UnitlensError(f"The runs have no mined layer in common (A: {', '.join(mined['a'])}; B: "
                            f"{', '.join(mined['b'])}). Pair layers with --layers and --layers-b.")
    if len(names_a) != len(names_b):
        raise UnitlensError(f"--layers names {len(names_a)} layer(s) and --layers-b {len(names_b)}; give as many of each.")
    for side, r, names in (("a", ra, names_a), ("b", rb, names_b)):
        for n in names:
            if n not in mined[side]:
                raise UnitlensError(f"Layer '{n}' was not mined in run {side.upper()} ({r.path}). "
                                    f"Mined: {', '.join(mined[side]) or 'none'}.")
    corpus = ra.corpus()
    held = {"a": {n: _held_from_run(ra, n) for n in names_a}, "b": {n: _held_from_run(rb, n) for n in names_b}}
    plan = _Plan(
        corpus=corpus, ok=_skipped_mask(corpus, (ma, mb)), names_a=names_a, names_b=names_b,
        chosen={n: held["a"][n].units for n in names_a}, held=held,
        loaders={"a": lambda: _model_from_run(ra, allow_pickle), "b": lambda: _model_from_run(rb, allow_pickle)},
        same_architecture=(canonical_spec(ma["model"]["spec"]) == canonical_spec(mb["model"]["spec"])
                           and (ma["model"].get("arch_options") or {}) == (mb["model"].get("arch_options") or {})),
        sides={"a": {"source": "run", "run": str(ra.path), "model": ma["model"]},
               "b": {"source": "run", "run": str(rb.path), "model": mb["model"]}},
        default_out=ra.path / "compare" / safe_name(rb.path.resolve().name))
    units = plan.unit_pairs()
    for side, names in (("a", names_a), ("b", names_b)):
        for n in names:
            h = held[side][n]
            what = []
            if h.pooled is None:
                what.append(("pooled", f"per-image means of all {h.channels} channels",
                             f"the run mined {len(h.units)} of {h.channels} channels" if h.maxima is not None
                             else "the run kept no per-image values"))
            if h.maxima is None and n in units:
                what.append(("maxima", "per-image maxima", "the run kept no per-image values"))
            for key, text, why in what:
                plan.need[side].setdefault(n, set()).add(key)
                plan.recomputed.append({"model": side, "layer": n, "what": text, "why": why})
    if plan.recomputed or full_maps:
        _check_unchanged(corpus, ra)
    if full_maps:
        plan.recomputed.append({"model": "a and b", "layer": None, "what": "whole feature maps",
                                "why": "runs keep no feature maps"})
    return plan


# ----------------------------------------------------------------------------- the sweep

def _sweep(plan: _Plan, cfg: CompareConfig, progress: bool) -> MinibatchTally | None:
    """One pass over the corpus, in a seeded random order (whole-map minibatches must be random
    samples, not runs of one class folder): one truncated forward per model per batch."""
    from torch.utils.data import DataLoader

    from ._progress import Progress
    from .corpus import CorpusDataset, collate, default_workers
    from ._extract import forward_batch

    sides = [s for s in ("a", "b") if plan.need[s] or cfg.full_maps]
    if not sides:
        return None
    models = {s: plan.model(s) for s in sides}
    sizes = {models[s].preprocess.frame for s in sides}
    if len(sizes) > 1:
        raise UnitlensError(f"The two runs' models take different inputs ({' and '.join(_input_text(models[s]) for s in sides)}), "
                            "so recomputed features would not come from the same images. Compare the models with one --size.")
    size = sizes.pop()
    names = {"a": plan.names_a, "b": plan.names_b}
    wanted = {s: list(names[s]) if cfg.full_maps else [n for n in names[s] if plan.need[s].get(n)] for s in sides}
    extract = {s: models[s].extractor(wanted[s]) for s in sides}
    N = len(plan.corpus)
    for s in sides:
        for n, what in plan.need[s].items():
            h = plan.held[s][n]
            if "pooled" in what:
                h.pooled = np.zeros((N, h.channels), dtype=np.float32)
            if "maxima" in what:  # all channels; exemplar sets then come from these maxima too
                h.maxima, h.units, h.top = np.zeros((N, h.channels), dtype=np.float32), tuple(range(h.channels)), None
    tally = MinibatchTally() if cfg.full_maps else None
    order = np.random.default_rng(cfg.seed).permutation(N)
    loader = DataLoader(CorpusDataset(plan.corpus, size, order.tolist()), batch_size=cfg.batch_size, shuffle=False,
                        collate_fn=partial(collate, size=size),
                        num_workers=default_workers() if cfg.workers is None else cfg.workers)
    bar = Progress(N, 0, "comparing", "img") if progress else None
    done = 0
    try:
        for batch in loader:
            for i, reason in batch.failures:
                plan.ok[i] = False
                log.warning(f"Skipped {shown(plan.corpus.files[i])}: {reason}")
            if len(batch.indices):
                rows = batch.indices.numpy()
                grams = {}
                with torch.inference_mode():
                    for s in sides:
                        feats = forward_batch(extract[s], models[s].normalize(batch.images))
                        for n, f in feats.items():  # (B, C, H, W)
                            what, h = plan.need[s].get(n, ()), plan.held[s][n]
                            flat = f.flatten(2).float()  # (B, C, H*W)
                            if "pooled" in what:
                                h.pooled[rows] = flat.mean(2).numpy()
                            if "maxima" in what:
                                h.maxima[rows] = flat.amax(2).numpy()
                            if tally is not None:
                                g = f.flatten(1).double()  # (B, C*H*W)
                                grams[s, n] = (g @ g.T).numpy()
                if tally is not None:
                    tally.add([grams["a", n] for n in plan.names_a], [grams["b", n] for n in plan.names_b])
            done += len(batch.indices) + len(batch.failures)
            if bar:
                bar.advance(done)
    except KeyboardInterrupt:
        raise interrupted(f"after {done} of {N} images; a comparison keeps no checkpoint, so nothing was written. "
                          "Run the same command to start it again.") from None
    finally:
        if bar:
            bar.close()
    return tally


# ----------------------------------------------------------------------------- the summary

UNIT_COLUMNS = ("unit", "rank", "change", "changed", "dead", "dead_a", "dead_b", "corr", "best_match", "best_match_corr",
                "jaccard", "mean_a", "mean_b", "mean_change", "fire_rate_a", "fire_rate_b", "fire_rate_change")


def _mean_or_none(values) -> float | None:
    values = [v for v in values if v is not None]
    return float(np.mean(values)) if values else None


def _summarise(plan: _Plan, cfg: CompareConfig, tally) -> dict:
    from . import __version__

    rows = np.flatnonzero(plan.ok)
    if len(rows) < 4:
        raise UnitlensError(f"Only {len(rows)} usable image(s) in the corpus; a comparison needs at least 4 "
                            "(a few hundred give tight intervals).")
    rng = np.random.default_rng(cfg.seed + 1)
    pooled_a = [plan.held["a"][n].pooled for n in plan.names_a]
    pooled_b = [plan.held["b"][n].pooled for n in plan.names_b]
    M = cka_matrix(pooled_a, pooled_b, rows)
    F = tally.cka() if tally is not None and tally.kl else None
    unit_pairs = plan.unit_pairs()
    entries = []
    for i, (la, lb) in enumerate(zip(plan.names_a, plan.names_b)):
        ci, how = pooled_interval(pooled_a[i], pooled_b[i], rows, M[i, i], cfg, rng)
        A, B = plan.held["a"][la], plan.held["b"][lb]
        k = min([cfg.top_k] + [h.top.shape[1] for h in (A, B) if h.top is not None])  # a run keeps its own K
        table = _unit_table(A, B, plan.chosen[la], rows, k, cfg, rng) if la in unit_pairs else []
        note = (None if la in unit_pairs else f"{la} of A and {lb} of B are different layers" if plan.same_architecture
                else "different architectures: unit indices do not correspond")
        ranked = sorted(table, key=lambda e: e["rank"])
        entries.append({
            "layer": la, "layer_b": lb, "channels": A.channels, "channels_b": B.channels,
            "cka": finite_or_none(M[i, i]), "cka_ci": ci, "cka_ci_method": how,
            "cka_full_maps": finite_or_none(F[i, i]) if F is not None else None,
            "cka_full_maps_ci": tally.interval(i, i, cfg, rng) if F is not None else None,
            "units_compared": len(table), "units_note": note, "top_k": k,
            "dead": sum(e["dead"] for e in table),
            "mean_corr": _mean_or_none(e["corr"] for e in table),
            "mean_jaccard": _mean_or_none(e["jaccard"] for e in table),
            "changed": sum(e["changed"] for e in table),
            "most_changed": [e["unit"] for e in ranked if e["changed"]][:cfg.most_changed],
            "units": table,
        })
    c = plan.corpus
    skipped = [c.files[i] for i in np.flatnonzero(~plan.ok)]
    nested = lambda m: None if m is None else [[finite_or_none(v) for v in r] for r in m]  # noqa: E731
    return {
        "kind": "unitlens comparison", "format": 1, "unitlens": __version__, "created": now(),
        "a": plan.sides["a"], "b": plan.sides["b"],
        "corpus": {"source": str(c.root), "count": len(c), "fingerprint": c.fingerprint,
                   "images_used": len(rows), "skipped": skipped},
        "same_architecture": plan.same_architecture,
        "settings": {**{key: v for key, v in asdict(cfg).items() if key != "workers"},
                     "layers": plan.names_a, "layers_b": plan.names_b, "unit_statistic": "per-image spatial maximum",
                     "pooled_features": "per-image channel mean", "dead_tolerance": DEAD_TOLERANCE,
                     "ranking": RANKING, "changed": CHANGED, "changed_below": CHANGED_BELOW},
        "recomputed": plan.recomputed,
        "layers": entries,
        "cka_matrix": {"layers_a": plan.names_a, "layers_b": plan.names_b, "pooled": nested(M), "full_maps": nested(F)},
    }


def _write_csv(path: Path, rows) -> None:
    import csv
    import io

    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(["" if v is None else v for v in r] for r in rows)
    atomic_write(path, lambda f: f.write(buf.getvalue().encode()))


def _write(out: Path, summary: dict, corpus) -> None:
    mat = summary["cka_matrix"]
    files = {"summary": "compare.json", "corpus": "corpus.json", "units": {}}
    for key, label in (("pooled", "cka_matrix"), ("full_maps", "cka_matrix_full_maps")):
        if mat[key] is not None:
            files[label] = f"{label}.csv"
            _write_csv(out / files[label], [["layer_a \\ layer_b", *mat["layers_b"]]]
                       + [[la, *row] for la, row in zip(mat["layers_a"], mat[key])])
    for entry in summary["layers"]:
        if entry["units"]:
            name = f"units_{safe_name(entry['layer'])}.csv"
            files["units"][entry["layer"]] = name
            _write_csv(out / name, [UNIT_COLUMNS] + [[e[c] for c in UNIT_COLUMNS] for e in entry["units"]])
    summary["out"], summary["files"] = str(out), files
    write_json(out / "corpus.json", corpus.to_json())
    write_json(out / "compare.json", summary)


# ----------------------------------------------------------------------------- the front door

def _is_run(x) -> bool:
    return isinstance(x, Run) or (isinstance(x, (str, os.PathLike)) and Path(x).is_dir())


def _check(cfg: CompareConfig) -> None:
    problems = [msg for bad, msg in (
        (cfg.top_k < 1, f"top_k must be at least 1, got {cfg.top_k}"),
        (cfg.bootstrap < 0, f"bootstrap must be 0 (none) or more resamples, got {cfg.bootstrap}"),
        (not 0 < cfg.confidence < 1, f"confidence must lie between 0 and 1, got {cfg.confidence}"),
        (cfg.bootstrap_images < 4, f"bootstrap_images must be at least 4, got {cfg.bootstrap_images}"),
        (cfg.batch_size < (4 if cfg.full_maps else 1),
         f"batch size {cfg.batch_size} is too small{' for whole-map CKA (the unbiased HSIC needs more than 3 images per minibatch; 64 or more is better)' if cfg.full_maps else ''}"),
    ) if bad]
    if problems:
        raise UnitlensError("; ".join(problems) + ".")


def compare(a, b, *, corpus=None, layers=None, layers_b=None, out=None, config: CompareConfig = CompareConfig(),
            progress: bool = False, allow_pickle: bool = False, atlas: bool = True,
            strip_paths: bool | None = None) -> Comparison:
    """Compare A with B layer by layer and unit by unit; return the summary (see the module doc), a
    dict with tables and views for notebooks (runview.Comparison).

    `a`, `b`: two LoadedModels (then `corpus` and `layers` are needed; `layers_b` pairs other layers
    of B in depth order, e.g. for another architecture), or two run folders mined over the same
    corpus (then what they hold is used, and what they lack is recomputed from the models in their
    manifests, said on stderr and listed in `recomputed`; `allow_pickle` lets a run's pickled model
    be reloaded for that). With `out` (for runs by default RUN_A/compare/<RUN_B name>) it writes
    compare.json, cka_matrix.csv, units_<layer>.csv and corpus.json there, and with `atlas` its pages
    in OUT/atlas/ (the summary's `atlas` is then the path of their index.html; `strip_paths`: drawn
    without absolute paths, see render_comparison).

    >>> s = compare(load_model(spec, "base.pth"), load_model(spec, "tuned.pth"),
    ...             corpus="probe/", layers=["layer3,layer4"], out="cmp")    # doctest: +SKIP
    >>> [(e["layer"], round(e["cka"], 3), e["most_changed"][:3]) for e in s["layers"]]  # doctest: +SKIP
    """
    _check(config)
    if out is not None:
        check_folder(Path(out))  # before the sweep, not after it
    runs = [_is_run(x) for x in (a, b)]
    if all(runs):
        if corpus is not None:
            raise UnitlensError("Runs carry their corpus; leave out --corpus when comparing two run folders.")
        plan = _plan_runs(*(x if isinstance(x, Run) else Run(x) for x in (a, b)), layers, layers_b, config.full_maps,
                          allow_pickle)
    elif not any(runs) and all(hasattr(x, "extractor") for x in (a, b)):
        plan = _plan_models(a, b, corpus, layers, layers_b)
    else:
        got = ", ".join(f"{label} is {'a run folder' if r else type(x).__name__ + ' ' + repr(str(x))[:60]}"
                        for label, x, r in (("A", a, runs[0]), ("B", b, runs[1])))
        raise UnitlensError(f"Compare two models or two run folders ({got}). Load a model with "
                            "load_model(spec, weights); a run folder is what `unitlens mine --out` made.")
    for r in plan.recomputed:
        where = "every layer" if r["layer"] is None else r["layer"]
        log.warning(f"Note: recomputing {r['what']} of {where} in {r['model'].upper()} from the model named in "
                    f"the run's manifest, over the run's corpus: {r['why']}.")
    tally = _sweep(plan, config, progress)
    summary = _summarise(plan, config, tally)
    out = out if out is not None else plan.default_out
    if out is not None:
        _write(Path(out), summary, plan.corpus)
        if atlas:
            from .atlas.render import draw_comparison

            summary["atlas"] = str(draw_comparison(out, strip_paths))
    return Comparison(summary)


def comparison_text(s: dict) -> str:
    """The table `unitlens compare` prints for `compare(...)`'s summary, then where it wrote."""
    from .atlas.comparison_page import cka_text

    def fmt(v):
        return "-" if v is None else f"{v:.3f}"

    def cka(v):  # enough digits to tell 0.999 from 1
        return "-" if v is None else cka_text(v)

    lines = [f"{'layer':<20} {'CKA':>6} {'95% interval':>15} {'full-map':>9} {'corr':>6} {'jaccard':>7} {'dead':>4} "
             f"{'changed':>7}  most changed"]
    for e in s["layers"]:
        name = e["layer"] if e["layer"] == e["layer_b"] else f"{e['layer']}~{e['layer_b']}"
        ci = f"{cka(e['cka_ci'][0])}-{cka(e['cka_ci'][1])}" if e["cka_ci"] else "-"
        changed = ", ".join(map(str, e["most_changed"][:8])) or e["units_note"] or ""
        lines.append(f"{name:<20} {cka(e['cka']):>6} {ci:>15} {cka(e['cka_full_maps']):>9} {fmt(e['mean_corr']):>6} "
                     f"{fmt(e['mean_jaccard']):>7} {e['dead']:>4} {e['changed']:>7}  {changed}")
    return "\n".join(lines + [str(s["out"]), str(s["atlas"])])
