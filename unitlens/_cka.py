"""The estimators behind `compare`: linear CKA (Kornblith et al. 2019), the unbiased HSIC (Song et al.
2012) and its minibatch CKA (Nguyen, Raghu & Kornblith 2021), bootstrap intervals, and float64
moments of (N, C) arrays read in row blocks, so memory maps are never copied whole.
"""
from __future__ import annotations

import math
import warnings

import numpy as np

from .errors import UnitlensError

_CHUNK = 4096  # rows per float64 block when accumulating cross-products


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


class MinibatchTally:
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

    def interval(self, i: int, j: int, cfg, rng) -> list[float] | None:
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
    tally = MinibatchTally()
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


def resampled_cka(x: np.ndarray, y: np.ndarray, W: np.ndarray) -> np.ndarray:
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


def pooled_interval(X, Y, rows: np.ndarray, point: float, cfg, rng):
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
    ci = _percentiles(resampled_cka(x, y, W), cfg.confidence)
    if ci is None or m == n_all:
        return ci, f"percentile bootstrap over {n_all} images, {cfg.bootstrap} resamples"
    own, scale = linear_cka(x, y), math.sqrt(m / n_all)
    ci = [float(min(max(point + scale * (v - own), 0.0), 1.0)) for v in ci]
    return ci, f"m-out-of-n bootstrap: {cfg.bootstrap} resamples of {m} of {n_all} images, spread scaled by sqrt(m/N)"


def _resampled_corr(x: np.ndarray, y: np.ndarray, W: np.ndarray) -> np.ndarray:
    """Pearson correlation of each column pair x[:, u], y[:, u] (x, y: (m, U)) under each column of W
    (m, R), image i taken W[i, r] times: (R, U), from weighted moments (no resample is built)."""
    x, y = x - x.mean(0), y - y.mean(0)  # centred first: the moments below then lose no digits
    n = W.sum(0)[:, None]  # (R, 1)
    mx, my = W.T @ x / n, W.T @ y / n  # (R, U)
    cov = W.T @ (x * y) / n - mx * my
    vx, vy = W.T @ (x * x) / n - mx**2, W.T @ (y * y) / n - my**2
    with np.errstate(invalid="ignore", divide="ignore"):
        return cov / np.sqrt(vx * vy)


def corr_intervals(X, Y, rows: np.ndarray, point: np.ndarray, cfg, rng) -> np.ndarray | None:
    """(U, 2) percentile-bootstrap intervals over images of the same-column correlations of X and
    Y ((N, U) each, read at `rows`); the m-out-of-n rescaling of `pooled_interval` above
    `bootstrap_images` images. None when the bootstrap is off."""
    n_all = len(rows)
    if cfg.bootstrap == 0 or n_all < 4:
        return None
    m = min(n_all, cfg.bootstrap_images)
    sub = rows if m == n_all else np.sort(rng.choice(rows, m, replace=False))
    x, y = _as_rows(X[sub]), _as_rows(Y[sub])  # (m, U)
    W = rng.multinomial(m, np.full(m, 1 / m), size=cfg.bootstrap).T.astype(np.float64)  # (m, R)
    R = _resampled_corr(x, y, W)  # (R, U)
    tail = (1 - cfg.confidence) / 2 * 100
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a column constant in every resample: all-NaN
        ci = np.nanpercentile(R, [tail, 100 - tail], axis=0).T  # (U, 2)
    if m < n_all:
        own = _resampled_corr(x, y, np.ones((m, 1)))[0]  # (U,) the subset's own estimate
        ci = point[:, None] + math.sqrt(m / n_all) * (ci - own[:, None])
    return np.clip(ci, -1, 1)


# ----------------------------------------------------------------------------- chunked moments

def _blocks(X, rows: np.ndarray):
    for s in range(0, len(rows), _CHUNK):
        yield np.asarray(X[rows[s:s + _CHUNK]], dtype=np.float64)


def mean_of_rows(X, rows: np.ndarray) -> np.ndarray:
    return sum(b.sum(0) for b in _blocks(X, rows)) / len(rows)


def column_moments(X, rows: np.ndarray):
    """Mean, std and firing rate (> 0) of each column of X over `rows`, in float64 (two passes)."""
    total, fires = 0.0, 0.0
    for b in _blocks(X, rows):
        total, fires = total + b.sum(0), fires + (b > 0).sum(0)
    mean = total / len(rows)
    sq = sum(((b - mean) ** 2).sum(0) for b in _blocks(X, rows))
    return mean, np.sqrt(sq / len(rows)), fires / len(rows)


def cross_products(X, Y, rows: np.ndarray, mx: np.ndarray, my: np.ndarray) -> np.ndarray:
    """sum over rows of (x - mx)(y - my)', (p1, p2) float64."""
    return sum((a - mx).T @ (b - my) for a, b in zip(_blocks(X, rows), _blocks(Y, rows)))


def cka_matrix(As: list, Bs: list, rows: np.ndarray) -> np.ndarray:
    """Linear CKA of every (A layer, B layer) from (N, C) pooled features, centred over `rows`."""
    means_a = [mean_of_rows(X, rows) for X in As]
    means_b = [mean_of_rows(Y, rows) for Y in Bs]
    self_a = [np.linalg.norm(cross_products(X, X, rows, m, m)) for X, m in zip(As, means_a)]
    self_b = [np.linalg.norm(cross_products(Y, Y, rows, m, m)) for Y, m in zip(Bs, means_b)]
    M = np.full((len(As), len(Bs)), math.nan)
    for i, (X, mx) in enumerate(zip(As, means_a)):
        for j, (Y, my) in enumerate(zip(Bs, means_b)):
            M[i, j] = _ratio(np.linalg.norm(cross_products(X, Y, rows, mx, my)) ** 2, self_a[i] * self_b[j])
    return M
