"""Scoring windows against a baseline of normal behaviour on the SPD manifold.

Pure numpy (no Prefect). A window's score is its kNN distance to the baseline's reference descriptors (k-th or
mean of the k nearest, never counting itself nor same-recording neighbours within an exclusion zone) or its
distance to the references' Fréchet mean. The threshold comes from the baseline's own leave-one-out scores.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from fleetsift.scoring import geometry
from fleetsift.scoring.index import KNNIndex, knn
from fleetsift.errors import InputError
from fleetsift.profile import Scoring
from fleetsift.vocabulary import KNN_STATS

__all__ = ["MAD_SCALE", "exclusion_mask", "knn_scores", "mean_scores", "robust_z", "median_mad",
           "threshold", "riemannian_potato", "Potato", "Baseline", "fit_baseline", "score", "attribute",
           "top_channels", "OnlineScorer"]

# MAD -> standard deviation for Gaussian data: 1 / Phi^-1(3/4) (common practice).
MAD_SCALE = 1.4826
_SRC = "fleetsift.scoring.baseline"


# ---------------------------------------------------------------------------------------- robust statistics

def median_mad(x) -> tuple[float, float]:
    """Median and median absolute deviation (unscaled) of the finite values of ``x``."""
    x = np.asarray(x, dtype=np.float64).ravel()
    x = x[np.isfinite(x)]
    if len(x) == 0:
        raise InputError(_SRC, "scores", "at least one finite score", "none")
    med = float(np.median(x))
    return med, float(np.median(np.abs(x - med)))


def _robust_scale(x) -> tuple[float, float]:
    med, mad = median_mad(x)
    scale = MAD_SCALE * mad
    if scale == 0:
        # More than half the values tie: fall back to the mean absolute deviation, scaled by sqrt(pi/2) for
        # Gaussian consistency (common practice).
        xf = np.asarray(x, dtype=np.float64).ravel()
        xf = xf[np.isfinite(xf)]
        scale = float(np.sqrt(np.pi / 2) * np.mean(np.abs(xf - med)))
    return med, scale


def robust_z(d, ref_d) -> np.ndarray:
    """Robust z-scores ``(d - median(ref_d)) / (1.4826 * MAD(ref_d))``.

    1.4826 makes the MAD a consistent estimate of the standard deviation for Gaussian data (common practice).
    Non-finite reference values are ignored. If the MAD is 0 the scaled mean absolute deviation is used instead;
    if that is 0 too, values equal to the median get 0 and others +-inf.
    """
    d = np.asarray(d, dtype=np.float64)
    med, scale = _robust_scale(ref_d)
    if scale == 0:
        return np.where(d == med, 0.0, np.where(d > med, np.inf, -np.inf))
    return (d - med) / scale


def threshold(ref_scores, c: float = Scoring.threshold_c) -> float:
    """Flagging threshold ``median + c * 1.4826 * MAD`` of the finite reference scores.

    1.4826 * MAD is the Gaussian-consistent robust standard deviation (common practice), so ``c = 3`` is the
    robust analogue of a 3-sigma rule.
    """
    med, mad = median_mad(ref_scores)
    return med + float(c) * MAD_SCALE * mad


# ------------------------------------------------------------------------------------------ kNN scoring

def exclusion_mask(q_rec, q_t, r_rec, r_t, zone_s: float) -> np.ndarray:
    """Bool ``(n, m)``: True where query i and reference j share a recording id and ``|t_q - t_r| < zone_s``.

    A reference with the same recording id and the same time is always excluded (so a window never counts
    itself, even with ``zone_s = 0``); ``zone_s = inf`` excludes the query's whole recording.
    """
    q_rec, r_rec = np.asarray(q_rec).ravel(), np.asarray(r_rec).ravel()
    q_t, r_t = np.asarray(q_t, dtype=np.float64).ravel(), np.asarray(r_t, dtype=np.float64).ravel()
    if q_rec.shape != q_t.shape or r_rec.shape != r_t.shape:
        raise InputError(_SRC, "rec_ids/times", "one recording id and one time per window",
                         f"{q_rec.shape}/{q_t.shape} and {r_rec.shape}/{r_t.shape}")
    zone_s = float(zone_s)
    if not zone_s >= 0:
        raise InputError(_SRC, "zone_s", "a number >= 0 (or inf)", zone_s)
    same = q_rec[:, None] == r_rec[None, :]
    if np.isinf(zone_s):
        return same
    dt = np.abs(q_t[:, None] - r_t[None, :])
    return same & ((dt < zone_s) | (dt == 0))


def _check_stat(stat: str) -> str:
    if stat not in KNN_STATS:
        raise InputError(_SRC, "stat", f"one of {KNN_STATS}", repr(stat))
    return stat


def _stat(dist: np.ndarray, k: int, stat: str) -> np.ndarray:
    d = dist[:, :k]
    full = np.all(np.isfinite(d), axis=1)
    s = d[:, k - 1] if stat == "kth" else np.mean(np.where(np.isfinite(d), d, 0.0), axis=1)
    return np.where(full, s, np.nan)


def knn_scores(queries, references, k: int = Scoring.k, metric: str = Scoring.metric, stat: str = Scoring.knn_stat,
               exclude=None, index: KNNIndex | None = None) -> np.ndarray:
    """kNN score of each query -> ``(n,)``: the k-th (``stat="kth"``) or mean (``"mean"``) of its k exact
    nearest-reference distances (:func:`fleetsift.scoring.index.knn`).

    ``exclude`` bool ``(n, m)`` as in :func:`exclusion_mask`. A query with fewer than k allowed references has
    an undefined score: NaN. ``index`` may be a prebuilt :class:`~fleetsift.scoring.index.KNNIndex` over
    ``references``.
    """
    _check_stat(stat)
    if index is None:
        dist, _ = knn(queries, references, k, metric, exclude=exclude)
    else:
        dist, _ = index.query(queries, k, exclude=exclude)
    return _stat(dist, int(k), stat)


def mean_scores(queries, mean, metric: str = Scoring.metric) -> np.ndarray:
    """Distance of each query ``(n, d, d)`` to a Fréchet mean ``(d, d)`` -> ``(n,)``."""
    return np.asarray(geometry.distance(queries, mean, metric)).reshape(-1)


@dataclass
class Potato:
    """Result of :func:`riemannian_potato`: the mean of the kept matrices, the kept mask, and the median and
    (unscaled) MAD of the kept matrices' distances to that mean."""

    mean: np.ndarray
    kept: np.ndarray
    median: float
    mad: float
    n_iter: int

    def z(self, X, metric: str = Scoring.metric) -> np.ndarray:
        """Robust z-scores of new matrices' distances to the potato's mean."""
        d = mean_scores(X, self.mean, metric)
        scale = MAD_SCALE * self.mad
        return (d - self.median) / scale if scale > 0 else np.where(d == self.median, 0.0, np.inf)


def riemannian_potato(references, metric: str = Scoring.metric, z_threshold: float = 3.0,
                      max_iter: int = 10) -> Potato:
    """Riemannian potato (Barachant et al. 2013): iteratively reject outliers before re-estimating the mean.

    Each round computes the Fréchet mean of the kept matrices, the distances of *all* matrices to it, and keeps
    those whose robust z-score (median / 1.4826 MAD of the kept distances) is below ``z_threshold``; stops when
    the kept set no longer changes or after ``max_iter`` rounds. Barachant et al. use the mean and standard
    deviation of the distances; the median/MAD variant here resists the outliers it is rejecting.
    """
    X = np.asarray(references, dtype=np.float64)
    kept = np.ones(len(X), dtype=bool)
    M = geometry.frechet_mean(X, metric)
    it = 0
    for it in range(1, int(max_iter) + 1):
        d = mean_scores(X, M, metric)
        z = robust_z(d, d[kept])
        new = z < float(z_threshold)
        if not new.any():
            break
        if np.array_equal(new, kept):
            break
        kept = new
        M = geometry.frechet_mean(X[kept], metric)
    d = mean_scores(X[kept], M, metric)
    med, mad = median_mad(d)
    return Potato(mean=M, kept=kept, median=med, mad=mad, n_iter=it)


# ---------------------------------------------------------------------------------------------- baseline

@dataclass
class Baseline:
    """A reference set of normal windows and everything needed to score new windows against it.

    ``kept`` is a mask over the input of :func:`fit_baseline`: windows not trimmed as the highest scorers.
    ``ref_index`` are the input positions that became references (all kept ones, or an even subset of them
    when ``max_refs`` applies). ``loo_scores`` are the references' leave-one-out scores against each other, from
    which ``threshold = median + c * 1.4826 * MAD`` is taken; ``initial_scores`` are the first-pass scores of
    every input window.
    """

    references: np.ndarray
    ref_rec_ids: np.ndarray
    ref_times: np.ndarray
    mean: np.ndarray
    threshold: float
    k: int
    metric: str
    stat: str
    zone_s: float
    loo_scores: np.ndarray
    kept: np.ndarray
    ref_index: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    initial_scores: np.ndarray = field(default_factory=lambda: np.zeros(0))
    c: float = Scoring.threshold_c
    median: float = float("nan")
    mad: float = float("nan")

    def index(self) -> KNNIndex:
        """A :class:`~fleetsift.scoring.index.KNNIndex` over the references (whitened by ``mean`` for riemann)."""
        return KNNIndex(self.references, self.metric,
                            whiten_point=self.mean if self.metric == "riemann" else None)


def _check_windows(descriptors, rec_ids, times):
    D = np.asarray(descriptors, dtype=np.float64)
    if D.ndim != 3 or D.shape[1] != D.shape[2]:
        raise InputError(_SRC, "descriptors", "SPD matrices of shape (n, d, d)", f"shape {D.shape}")
    rec = np.asarray(rec_ids).ravel()
    t = np.asarray(times, dtype=np.float64).ravel()
    if rec.shape != (len(D),) or t.shape != (len(D),):
        raise InputError(_SRC, "rec_ids/times", f"{len(D)} values each", f"{rec.shape[0]} and {t.shape[0]}")
    if not np.all(np.isfinite(t)):
        raise InputError(_SRC, "times", "finite times", f"{int(np.sum(~np.isfinite(t)))} non-finite")
    return D, rec, t


def fit_baseline(descriptors, rec_ids, times, k: int = Scoring.k, metric: str = Scoring.metric,
                 stat: str = Scoring.knn_stat, zone_s: float = Scoring.exclusion_s,
                 trim_fraction: float = Scoring.trim_fraction, c: float = Scoring.threshold_c,
                 max_refs: int | None = None) -> Baseline:
    """Fit a robust baseline from windows that are mostly normal.

    1. Leave-one-out kNN score of every window against all others (with :func:`exclusion_mask`).
    2. Trim the ``floor(trim_fraction * n)`` highest-scoring windows (NaN scores, i.e. windows without k allowed
       neighbours, are never trimmed).
    3. The remaining windows are the references (at most ``max_refs``, evenly spaced in input order).
    4. Leave-one-out scores of the references against each other give ``threshold = median + c * 1.4826 * MAD``.
    5. ``mean`` is the references' Fréchet mean for ``metric``.
    """
    geometry._check_metric(metric)
    _check_stat(stat)
    D, rec, t = _check_windows(descriptors, rec_ids, times)
    n = len(D)
    k = int(k)
    if n < 2:
        raise InputError(_SRC, "descriptors", "at least 2 windows to fit a baseline", f"{n}")
    if not 0.0 <= float(trim_fraction) < 1.0:
        raise InputError(_SRC, "trim_fraction", "a number in [0, 1)", trim_fraction)
    ex = exclusion_mask(rec, t, rec, t, zone_s)
    initial = knn_scores(D, D, k, metric, stat, exclude=ex)
    n_trim = int(np.floor(float(trim_fraction) * n))
    kept = np.ones(n, dtype=bool)
    if n_trim > 0:
        rank_key = np.where(np.isnan(initial), -np.inf, initial)
        kept[np.argsort(-rank_key, kind="stable")[:n_trim]] = False
    ref_index = np.flatnonzero(kept)
    if max_refs is not None and len(ref_index) > int(max_refs):
        ref_index = ref_index[np.unique(np.linspace(0, len(ref_index) - 1, int(max_refs)).round().astype(int))]
    R, rr, rt = D[ref_index], rec[ref_index], t[ref_index]
    M = geometry.frechet_mean(R, metric)
    ex_r = exclusion_mask(rr, rt, rr, rt, zone_s)
    index = KNNIndex(R, metric, whiten_point=M if metric == "riemann" else None)
    loo = _stat(index.query(R, k, exclude=ex_r, _self=True)[0], k, stat)
    if not np.any(np.isfinite(loo)):
        raise InputError(_SRC, "descriptors", f"references with at least k={k} allowed neighbours "
                         f"(exclusion zone {zone_s} s)", "none: lower k or the exclusion zone, or add recordings")
    med, mad = median_mad(loo)
    return Baseline(references=R, ref_rec_ids=rr, ref_times=rt, mean=M, threshold=threshold(loo, c), k=k,
                    metric=metric, stat=stat, zone_s=float(zone_s), loo_scores=loo, kept=kept,
                    ref_index=ref_index, initial_scores=initial, c=float(c), median=med, mad=mad)


def score(descriptors, rec_ids, times, baseline: Baseline, index: KNNIndex | None = None) -> np.ndarray:
    """kNN scores ``(n,)`` of windows against ``baseline.references``, with the baseline's exclusion zone (a
    window that is itself a reference never counts itself). NaN where fewer than k references are allowed."""
    D, rec, t = _check_windows(descriptors, rec_ids, times)
    ex = exclusion_mask(rec, t, baseline.ref_rec_ids, baseline.ref_times, baseline.zone_s)
    return knn_scores(D, baseline.references, baseline.k, baseline.metric, baseline.stat, exclude=ex,
                      index=index if index is not None else baseline.index())


# ------------------------------------------------------------------------------------------- attribution

def attribute(descriptors, ref_mean, groups, n_groups: int) -> np.ndarray:
    """Share of each channel group in each window's deviation from ``ref_mean`` -> ``(n, n_groups)``.

    With ``L = logm(M^-1/2 X M^-1/2)`` (the whitened log map, whose Frobenius norm is the Riemannian distance to
    M), the share of group g is the energy ``sum_j L_rj^2`` of the rows r with ``groups[r] == g``, over the
    energy of all rows of real channels (full rows: the entries pairing a channel with a ``-1`` dimension, such
    as the mean embedding's, count for that channel). Rows sum to 1; a window equal to M (within 1e-10)
    gets equal shares.
    """
    X = np.asarray(descriptors, dtype=np.float64)
    groups = np.asarray(groups).astype(np.int64).ravel()
    d = X.shape[-1]
    if X.ndim != 3 or groups.shape != (d,):
        raise InputError(_SRC, "groups", f"one group index per dimension ({d})", f"shape {groups.shape}")
    if np.any(groups >= n_groups) or np.any(groups < -1):
        raise InputError(_SRC, "groups", f"indices in [-1, {n_groups})", f"range [{groups.min()}, {groups.max()}]")
    W = geometry.invsqrtm(ref_mean)
    L = geometry.logm(W @ X @ W)
    E = np.sum(L ** 2, axis=-1)  # (n, d) row energies
    real = groups >= 0
    G = np.zeros((int(real.sum()), int(n_groups)))
    G[np.arange(G.shape[0]), groups[real]] = 1.0
    S = E[:, real] @ G
    tot = S.sum(axis=1, keepdims=True)
    # A window within round-off of the mean (distance < 1e-10) has no direction of deviation: equal shares.
    still = np.sqrt(E.sum(axis=1, keepdims=True)) < 1e-10
    return np.where(still | (tot <= 0), 1.0 / n_groups, S / np.where(tot > 0, tot, 1.0))


def top_channels(shares, names, top: int = Scoring.top_channels) -> list[list[tuple[str, float]]]:
    """The ``top`` largest shares of each window as ``[(name, share), ...]``, largest first."""
    shares = np.asarray(shares, dtype=np.float64)
    names = list(names)
    if shares.ndim != 2 or shares.shape[1] != len(names):
        raise InputError(_SRC, "names", f"{shares.shape[-1]} channel names", f"{len(names)}")
    order = np.argsort(-shares, axis=1, kind="stable")[:, :int(top)]
    return [[(names[j], float(shares[i, j])) for j in row] for i, row in enumerate(order)]


# ----------------------------------------------------------------------------------------------- online

class OnlineScorer:
    """Score windows one at a time against a baseline, optionally growing its reference set.

    ``score`` gives exactly what :func:`score` gives for the same window and the same reference set.
    ``update`` appends a window to the references (dropping the oldest once there are more than ``max_refs``)
    and moves the running Fréchet mean one geodesic step of ``1/n`` towards it (the recursive mean of Ho et al.
    2013; for ``logdet``, which has no closed-form geodesic here, the mean is recomputed). The threshold stays
    the baseline's; the running mean does not forget dropped references.
    """

    def __init__(self, baseline: Baseline, max_refs: int | None = None):
        self.baseline = baseline
        self.max_refs = None if max_refs is None else int(max_refs)
        self.index = baseline.index()
        self.rec_ids = np.asarray(baseline.ref_rec_ids).copy()
        self.times = np.asarray(baseline.ref_times, dtype=np.float64).copy()
        self.mean = np.array(baseline.mean, dtype=np.float64)
        self.n_seen = len(self.times)

    @property
    def references(self) -> np.ndarray:
        return self.index.references

    def score(self, descriptor, rec_id, t: float) -> float:
        """kNN score of one window ``(d, d)`` against the current references (NaN if fewer than k allowed)."""
        bl = self.baseline
        ex = exclusion_mask([rec_id], [t], self.rec_ids, self.times, bl.zone_s)
        X = np.asarray(descriptor, dtype=np.float64)[None]
        return float(knn_scores(X, None, bl.k, bl.metric, bl.stat, exclude=ex, index=self.index)[0])

    def update(self, descriptor, rec_id, t: float) -> None:
        """Add one window to the references and update the running mean."""
        X = np.asarray(descriptor, dtype=np.float64)
        self.index.add(X[None])
        self.rec_ids = np.concatenate([self.rec_ids, np.asarray([rec_id])])
        self.times = np.concatenate([self.times, [float(t)]])
        if self.max_refs is not None and len(self.times) > self.max_refs:
            drop = len(self.times) - self.max_refs
            self.index.drop_first(drop)
            self.rec_ids, self.times = self.rec_ids[drop:], self.times[drop:]
        self.n_seen += 1
        if self.baseline.metric == "logdet":
            self.mean = geometry.frechet_mean(self.index.references, "logdet")
        else:
            self.mean = geometry.geodesic(self.mean, X, 1.0 / self.n_seen, self.baseline.metric)
