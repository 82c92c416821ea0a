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
row chunks, so run folders' float16 memory maps are read, not copied. Whole-map CKA holds one
batch's (B, B) Gram matrix per layer and keeps a few numbers per layer pair per minibatch. The
pooled-CKA interval reweights (m, m) float64 Gram matrices, m <= bootstrap_images (2048: ~35 MB each).
"""
from __future__ import annotations

import math
import os
import sys
from dataclasses import asdict, dataclass, field
from functools import partial
from pathlib import Path

import numpy as np
import torch

from .errors import UnitlensError
from .store import Run, _atomic, now, safe_name, write_json
from .summary import _num

DEAD_TOLERANCE = 1e-6  # a unit is dead when std(max) <= this * |mean(max)|: constant to float precision
RANKING = ("change = 1 - (max(corr, 0) + jaccard) / 2 in [0, 1], largest first (ties: lower unit "
           "index): 0 = same ordering of images and same top-K set; 1 = uncorrelated or anti-correlated "
           "with disjoint top sets. A unit dead in exactly one model scores 1, dead in both 0. "
           "`most_changed` lists the first units of this order whose change is above 0.")
_CHUNK = 4096  # rows per float64 block when accumulating cross-products


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


# ----------------------------------------------------------------------------- CKA and HSIC

def _as_rows(x) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    return a.reshape(len(a), -1)


def _ratio(num: float, den: float) -> float:
    return float(num / den) if den > 0 else math.nan


def linear_cka(X, Y) -> float:
    """Linear CKA of X (n, p1) and Y (n, p2), rows the same n examples (Kornblith et al. 2019):
    ||Yc' Xc||_F^2 / (||Xc' Xc||_F ||Yc' Yc||_F), columns centred. Extra dims are flattened.

    >>> X = np.random.default_rng(0).normal(size=(50, 8))
    >>> round(linear_cka(X, 3 * X), 12)
    1.0
    """
    X, Y = _as_rows(X), _as_rows(Y)
    if len(X) != len(Y) or len(X) < 2:
        raise UnitlensError(f"CKA needs the same examples (at least 2) in both, got {len(X)} and {len(Y)} rows.")
    X, Y = X - X.mean(0), Y - Y.mean(0)
    if len(X) < max(X.shape[1], Y.shape[1]):  # fewer examples than features: n x n Grams are cheaper
        K, L = X @ X.T, Y @ Y.T
        return _ratio((K * L).sum(), math.sqrt((K * K).sum() * (L * L).sum()))
    return _ratio(np.linalg.norm(Y.T @ X) ** 2, np.linalg.norm(X.T @ X) * np.linalg.norm(Y.T @ Y))


def _hsic1(Kt: np.ndarray, Lt: np.ndarray) -> float:
    """hsic_unbiased for Gram matrices whose diagonals are already zero."""
    n = len(Kt)
    return float(((Kt * Lt.T).sum() + Kt.sum() * Lt.sum() / ((n - 1) * (n - 2))
                  - 2 / (n - 2) * (Kt.sum(0) @ Lt.sum(1))) / (n * (n - 3)))


def _zero_diagonal(K) -> np.ndarray:
    K = np.array(K, dtype=np.float64)
    np.fill_diagonal(K, 0.0)
    return K


def hsic_unbiased(K, L) -> float:
    """Unbiased HSIC of two n x n Gram matrices, n > 3 (Song et al. 2012):
    [tr(K~L~) + 1'K~1 1'L~1 / ((n-1)(n-2)) - 2/(n-2) 1'K~L~1] / (n(n-3)), K~, L~ with zero diagonals.
    It is the U-statistic of HSIC over distinct index quadruples, so its mean is the population value."""
    if len(K) < 4 or np.shape(K) != np.shape(L):
        raise UnitlensError(f"The unbiased HSIC needs two n x n Gram matrices with n > 3, got "
                            f"{np.shape(K)} and {np.shape(L)}.")
    return _hsic1(_zero_diagonal(K), _zero_diagonal(L))


class _MinibatchTally:
    """Unbiased HSIC per minibatch for every pair (A's layer i, B's layer j) and each layer with itself;
    CKA_mb = mean HSIC(K,L) / sqrt(mean HSIC(K,K) mean HSIC(L,L)) (Nguyen, Raghu & Kornblith 2021)."""

    def __init__(self):
        self.kl, self.kk, self.ll = [], [], []  # per minibatch: (La, Lb), (La,), (Lb,)

    def add(self, Ks: list[np.ndarray], Ls: list[np.ndarray]) -> None:
        if len(Ks[0]) < 4:  # HSIC_1 needs n > 3: a last minibatch this small is left out
            return
        Ks, Ls = [_zero_diagonal(K) for K in Ks], [_zero_diagonal(L) for L in Ls]
        self.kl.append([[_hsic1(K, L) for L in Ls] for K in Ks])
        self.kk.append([_hsic1(K, K) for K in Ks])
        self.ll.append([_hsic1(L, L) for L in Ls])

    def cka(self) -> np.ndarray:
        kl, kk, ll = np.array(self.kl), np.array(self.kk), np.array(self.ll)
        with np.errstate(invalid="ignore", divide="ignore"):
            return kl.mean(0) / np.sqrt(np.outer(kk.mean(0), ll.mean(0)))

    def interval(self, i: int, j: int, cfg: CompareConfig, rng) -> list[float] | None:
        """Percentile bootstrap over minibatches (they hold disjoint random images)."""
        kl, kk, ll = np.array(self.kl)[:, i, j], np.array(self.kk)[:, i], np.array(self.ll)[:, j]
        if cfg.bootstrap == 0 or len(kl) < 2:
            return None
        pick = rng.integers(0, len(kl), (cfg.bootstrap, len(kl)))
        with np.errstate(invalid="ignore", divide="ignore"):
            values = kl[pick].mean(1) / np.sqrt(kk[pick].mean(1) * ll[pick].mean(1))
        return _percentiles(values, cfg.confidence)


def minibatch_cka(X, Y, batch_size: int = 256) -> float:
    """CKA of X (n, ...) and Y (n, ...) by the minibatch estimator over consecutive rows (shuffle
    first if the rows are ordered); a last batch of fewer than 4 rows is left out."""
    X, Y = _as_rows(X), _as_rows(Y)
    if len(X) != len(Y) or len(X) < 4 or batch_size < 4:
        raise UnitlensError(f"Minibatch CKA needs the same examples in both and batches of at least 4, "
                            f"got {len(X)} and {len(Y)} rows, batch size {batch_size}.")
    tally = _MinibatchTally()
    for s in range(0, len(X), batch_size):
        x, y = X[s:s + batch_size], Y[s:s + batch_size]
        tally.add([x @ x.T], [y @ y.T])
    return float(tally.cka()[0, 0])


def _percentiles(values: np.ndarray, confidence: float) -> list[float] | None:
    values = values[np.isfinite(values)]
    if len(values) < 2:
        return None
    tail = (1 - confidence) / 2 * 100
    return [float(v) for v in np.percentile(values, [tail, 100 - tail])]


def _resampled_cka(x: np.ndarray, y: np.ndarray, W: np.ndarray) -> np.ndarray:
    """Linear CKA of x (m, p1), y (m, p2) under each column of W (m, R): image i taken W[i, r] times
    (columns sum to m), without building any resample. With K, L the Gram matrices,
    (m-1)^2 HSIC = tr(K~HL~H) = w'(K*L)w - (2/m) sum_i w_i (Kw)_i (Lw)_i + (w'Kw)(w'Lw)/m^2."""
    x, y = x - x.mean(0), y - y.mean(0)
    K, L = x @ x.T, y @ y.T  # (m, m)
    KW, LW = K @ W, L @ W
    m = len(W)

    def hsic(A, AW, B, BW):  # (R,); the common factor 1/(m-1)^2 cancels in CKA
        return (((A * B) @ W) * W).sum(0) - 2 / m * (W * AW * BW).sum(0) + (W * AW).sum(0) * (W * BW).sum(0) / m**2

    with np.errstate(invalid="ignore", divide="ignore"):
        return hsic(K, KW, L, LW) / np.sqrt(hsic(K, KW, K, KW) * hsic(L, LW, L, LW))


def _pooled_interval(X, Y, rows: np.ndarray, point: float, cfg: CompareConfig, rng):
    """Percentile bootstrap over images of the pooled linear CKA. Above `bootstrap_images` images it
    resamples a random subset of m and scales the spread around the subset's own estimate by
    sqrt(m/N) to the whole corpus (the m-out-of-n bootstrap; Bickel, Goetze & van Zwet 1997)."""
    n_all = len(rows)
    if cfg.bootstrap == 0 or not math.isfinite(point) or n_all < 4:
        return None, None
    m = min(n_all, cfg.bootstrap_images)
    sub = rows if m == n_all else np.sort(rng.choice(rows, m, replace=False))
    x, y = _as_rows(X[sub]), _as_rows(Y[sub])
    W = rng.multinomial(m, np.full(m, 1 / m), size=cfg.bootstrap).T.astype(np.float64)  # (m, R)
    ci = _percentiles(_resampled_cka(x, y, W), cfg.confidence)
    if ci is None or m == n_all:
        return ci, f"percentile bootstrap over {n_all} images, {cfg.bootstrap} resamples"
    own, scale = linear_cka(x, y), math.sqrt(m / n_all)
    ci = [float(min(max(point + scale * (v - own), 0.0), 1.0)) for v in ci]
    return ci, f"m-out-of-n bootstrap: {cfg.bootstrap} resamples of {m} of {n_all} images, spread scaled by sqrt(m/N)"


# ----------------------------------------------------------------------------- chunked moments

def _blocks(X, rows: np.ndarray):
    for s in range(0, len(rows), _CHUNK):
        yield np.asarray(X[rows[s:s + _CHUNK]], dtype=np.float64)


def _mean(X, rows: np.ndarray) -> np.ndarray:
    return sum(b.sum(0) for b in _blocks(X, rows)) / len(rows)


def _moments(X, rows: np.ndarray):
    """Mean, std and firing rate (> 0) of each column of X over `rows`, in float64 (two passes)."""
    total, fires = 0.0, 0.0
    for b in _blocks(X, rows):
        total, fires = total + b.sum(0), fires + (b > 0).sum(0)
    mean = total / len(rows)
    sq = sum(((b - mean) ** 2).sum(0) for b in _blocks(X, rows))
    return mean, np.sqrt(sq / len(rows)), fires / len(rows)


def _cross(X, Y, rows: np.ndarray, mx: np.ndarray, my: np.ndarray) -> np.ndarray:
    """sum over rows of (x - mx)(y - my)', (p1, p2) float64."""
    return sum((a - mx).T @ (b - my) for a, b in zip(_blocks(X, rows), _blocks(Y, rows)))


def _cka_matrix(As: list, Bs: list, rows: np.ndarray) -> np.ndarray:
    """Linear CKA of every (A layer, B layer) from (N, C) pooled features, centred over `rows`."""
    means_a = [_mean(X, rows) for X in As]
    means_b = [_mean(Y, rows) for Y in Bs]
    self_a = [np.linalg.norm(_cross(X, X, rows, m, m)) for X, m in zip(As, means_a)]
    self_b = [np.linalg.norm(_cross(Y, Y, rows, m, m)) for Y, m in zip(Bs, means_b)]
    M = np.full((len(As), len(Bs)), math.nan)
    for i, (X, mx) in enumerate(zip(As, means_a)):
        for j, (Y, my) in enumerate(zip(Bs, means_b)):
            M[i, j] = _ratio(np.linalg.norm(_cross(X, Y, rows, mx, my)) ** 2, self_a[i] * self_b[j])
    return M


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


def _unit_table(A: _Held, B: _Held, chosen, rows: np.ndarray, k: int) -> list[dict]:
    col_a = {u: i for i, u in enumerate(A.units)}
    col_b = {u: i for i, u in enumerate(B.units)}
    units = [u for u in chosen if u in col_a and u in col_b]
    if not units:
        return []
    ca = [col_a[u] for u in units]
    mean_a, std_a, fire_a = (v[ca] for v in _moments(A.maxima, rows))
    mean_b, std_b, fire_b = _moments(B.maxima, rows)
    dead_a = std_a <= DEAD_TOLERANCE * np.abs(mean_a)
    dead_b = std_b <= DEAD_TOLERANCE * np.abs(mean_b)
    sub = _Columns(A.maxima, ca)
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = _cross(sub, B.maxima, rows, mean_a, mean_b) / (len(rows) * np.outer(std_a, std_b))
    corr = np.clip(corr, -1, 1)  # (U, Ub)
    corr[dead_a] = math.nan
    corr[:, dead_b] = math.nan
    tops_a = _tops(A, ca, rows, k)
    tops_b = _tops(B, [col_b[u] for u in units], rows, k)
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
        table.append({
            "unit": u, "dead": da or db, "dead_a": da, "dead_b": db,
            "corr": _num(c) if c is not None else None,
            "best_match": None if best is None else B.units[best],
            "best_match_corr": None if best is None else _num(corr[i, best]),
            "jaccard": jac,
            "mean_a": _num(mean_a[i]), "mean_b": _num(mean_b[j]), "mean_change": _num(mean_b[j] - mean_a[i]),
            "fire_rate_a": _num(fire_a[i]), "fire_rate_b": _num(fire_b[j]),
            "fire_rate_change": _num(fire_b[j] - fire_a[i]),
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
    if a.preprocess.size != b.preprocess.size:
        raise UnitlensError(f"Model A takes {a.preprocess.size} px inputs and model B {b.preprocess.size} px; "
                            "both must see the same images. Give both one size with --size.")
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
    from .corpus import _stamp

    changed = [f for i, (f, s) in enumerate(zip(corpus.files, corpus.stamps)) if _stamp(corpus.path(i)) != tuple(s)]
    if changed:
        raise UnitlensError(f"{len(changed)} image(s) of the corpus of {run.path} changed or vanished since it was "
                            f"mined (first: {changed[0]}), so features recomputed now would not match the run. "
                            "Mine both runs again, or compare the models with --corpus.")


def _model_from_run(run: Run, allow_pickle: bool):
    from .synth import model_from_run  # refuses weights that changed since the run was made

    return model_from_run(run, allow_pickle)


def _plan_runs(ra: Run, rb: Run, layers, layers_b, full_maps: bool, allow_pickle: bool) -> _Plan:
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
        same_architecture=(ma["model"]["spec"] == mb["model"]["spec"]
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

def _sweep(plan: _Plan, cfg: CompareConfig, progress: bool) -> _MinibatchTally | None:
    """One pass over the corpus, in a seeded random order (whole-map minibatches must be random
    samples, not runs of one class folder): one truncated forward per model per batch."""
    from torch.utils.data import DataLoader

    from ._progress import Progress
    from .corpus import CorpusDataset, collate, default_workers
    from .mining import _forward

    sides = [s for s in ("a", "b") if plan.need[s] or cfg.full_maps]
    if not sides:
        return None
    models = {s: plan.model(s) for s in sides}
    sizes = {models[s].preprocess.size for s in sides}
    if len(sizes) > 1:
        raise UnitlensError(f"The two runs' models take different input sizes ({' and '.join(map(str, sorted(sizes)))} px), "
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
    tally = _MinibatchTally() if cfg.full_maps else None
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
                print(f"Skipped {plan.corpus.files[i]}: {reason}", file=sys.stderr)
            if len(batch.indices):
                rows = batch.indices.numpy()
                grams = {}
                with torch.inference_mode():
                    for s in sides:
                        feats = _forward(extract[s], models[s].normalize(batch.images))
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
    finally:
        if bar:
            bar.close()
    return tally


# ----------------------------------------------------------------------------- the summary

UNIT_COLUMNS = ("unit", "rank", "change", "dead", "dead_a", "dead_b", "corr", "best_match", "best_match_corr",
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
    M = _cka_matrix(pooled_a, pooled_b, rows)
    F = tally.cka() if tally is not None and tally.kl else None
    unit_pairs = plan.unit_pairs()
    entries = []
    for i, (la, lb) in enumerate(zip(plan.names_a, plan.names_b)):
        ci, how = _pooled_interval(pooled_a[i], pooled_b[i], rows, M[i, i], cfg, rng)
        A, B = plan.held["a"][la], plan.held["b"][lb]
        k = min([cfg.top_k] + [h.top.shape[1] for h in (A, B) if h.top is not None])  # a run keeps its own K
        table = _unit_table(A, B, plan.chosen[la], rows, k) if la in unit_pairs else []
        note = (None if la in unit_pairs else f"{la} of A and {lb} of B are different layers" if plan.same_architecture
                else "different architectures: unit indices do not correspond")
        ranked = sorted(table, key=lambda e: e["rank"])
        entries.append({
            "layer": la, "layer_b": lb, "channels": A.channels, "channels_b": B.channels,
            "cka": _num(M[i, i]), "cka_ci": ci, "cka_ci_method": how,
            "cka_full_maps": _num(F[i, i]) if F is not None else None,
            "cka_full_maps_ci": tally.interval(i, i, cfg, rng) if F is not None else None,
            "units_compared": len(table), "units_note": note, "top_k": k,
            "dead": sum(e["dead"] for e in table),
            "mean_corr": _mean_or_none(e["corr"] for e in table),
            "mean_jaccard": _mean_or_none(e["jaccard"] for e in table),
            "most_changed": [e["unit"] for e in ranked if e["change"] > 0][:cfg.most_changed],
            "units": table,
        })
    c = plan.corpus
    skipped = [c.files[i] for i in np.flatnonzero(~plan.ok)]
    nested = lambda m: None if m is None else [[_num(v) for v in r] for r in m]  # noqa: E731
    return {
        "kind": "unitlens comparison", "format": 1, "unitlens": __version__, "created": now(),
        "a": plan.sides["a"], "b": plan.sides["b"],
        "corpus": {"source": str(c.root), "count": len(c), "fingerprint": c.fingerprint,
                   "images_used": len(rows), "skipped": skipped},
        "same_architecture": plan.same_architecture,
        "settings": {**{key: v for key, v in asdict(cfg).items() if key != "workers"},
                     "layers": plan.names_a, "layers_b": plan.names_b, "unit_statistic": "per-image spatial maximum",
                     "pooled_features": "per-image channel mean", "dead_tolerance": DEAD_TOLERANCE,
                     "ranking": RANKING},
        "recomputed": plan.recomputed,
        "layers": entries,
        "cka_matrix": {"layers_a": plan.names_a, "layers_b": plan.names_b, "pooled": nested(M), "full_maps": nested(F)},
    }


def _write_csv(path: Path, rows) -> None:
    import csv
    import io

    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(["" if v is None else v for v in r] for r in rows)
    _atomic(path, lambda f: f.write(buf.getvalue().encode()))


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
            progress: bool = False, allow_pickle: bool = False, atlas: bool = True) -> dict:
    """Compare A with B layer by layer and unit by unit; return the summary (see the module doc).

    `a`, `b`: two LoadedModels (then `corpus` and `layers` are needed; `layers_b` pairs other layers
    of B in depth order, e.g. for another architecture), or two run folders mined over the same
    corpus (then what they hold is used, and what they lack is recomputed from the models in their
    manifests, said on stderr and listed in `recomputed`; `allow_pickle` lets a run's pickled model
    be reloaded for that). With `out` (for runs by default RUN_A/compare/<RUN_B name>) it writes
    compare.json, cka_matrix.csv, units_<layer>.csv and corpus.json there, and with `atlas` its pages
    in OUT/atlas/ (the summary's `atlas` is then the path of their index.html).

    >>> s = compare(load_model(spec, "base.pth"), load_model(spec, "tuned.pth"),
    ...             corpus="probe/", layers=["layer3,layer4"], out="cmp")    # doctest: +SKIP
    >>> [(e["layer"], round(e["cka"], 3), e["most_changed"][:3]) for e in s["layers"]]  # doctest: +SKIP
    """
    _check(config)
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
        print(f"Note: recomputing {r['what']} of {where} in {r['model'].upper()} from the model named in "
              f"the run's manifest, over the run's corpus: {r['why']}.", file=sys.stderr)
    tally = _sweep(plan, config, progress)
    summary = _summarise(plan, config, tally)
    out = out if out is not None else plan.default_out
    if out is not None:
        _write(Path(out), summary, plan.corpus)
        if atlas:
            from .atlas.comparison_page import render_comparison

            summary["atlas"] = str(render_comparison(out))
    return summary
