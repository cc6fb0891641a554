"""Scoring windows against a baseline of normal behaviour on the SPD manifold.

Pure numpy (no Prefect). A baseline is a set of reference window descriptors taken as normal; a window is scored
against it in one of three ways (``method``):

- ``knn``: the k-th (or mean of the k) nearest reference distance. Neighbours are counted in *recordings* by
  default: the nearest window of each of the k nearest recordings, so a behaviour counts as normal only where k
  recordings show it and a fault that recurs in fewer than k recordings of a night cannot hide behind itself.
  Counted in *windows*, a tight cluster of k recurring faulty windows looks like dense normal operation.
- ``density``: the local outlier factor (Breunig et al. 2000) with the SPD distance: a window's reachability
  distance to its neighbours relative to theirs.
- ``mean``: the distance to the references' Fréchet mean, the statistic of the Riemannian potato (Barachant et
  al. 2013).

A window never counts itself nor windows of its own recording within an exclusion zone. Every score is turned into
a robust z against the references' own leave-one-out scores; the threshold is ``median + c * robust sigma``
with robust sigma = 1.4826 * MAD.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from fleetsift.errors import InputError
from fleetsift.profile import Scoring
from fleetsift.scoring import geometry
from fleetsift.scoring.index import KNNIndex
from fleetsift.vocabulary import KNN_STATS
from fleetsift.vocabulary import KNN_UNITS as UNITS
from fleetsift.vocabulary import DENSITY, FRECHET_MEAN, KNN, SCORING_METHODS as METHODS

__all__ = ["MAD_SCALE", "METHODS", "UNITS", "exclusion_mask", "neighbours", "knn_scores", "mean_scores",
           "local_outlier_factors", "robust_z", "median_mad", "robust_scale", "threshold", "riemannian_potato",
           "Potato", "Baseline", "fit_baseline", "fit_references", "raw_scores", "score", "zscore", "attribute",
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


def robust_scale(x) -> tuple[float, float]:
    """Median and robust sigma (1.4826 x MAD; the scaled mean absolute deviation where the MAD is 0)."""
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
    med, scale = robust_scale(ref_d)
    if scale == 0:
        return np.where(d == med, 0.0, np.where(d > med, np.inf, -np.inf))
    return (d - med) / scale


def threshold(ref_scores, c: float = Scoring.threshold_c) -> float:
    """Flagging threshold ``median + c * robust sigma`` (robust sigma = 1.4826 * MAD) of the finite reference scores.

    1.4826 * MAD is the Gaussian-consistent robust standard deviation (common practice), so ``c = 3`` is the
    robust analogue of a 3-sigma rule.
    """
    med, mad = median_mad(ref_scores)
    return med + float(c) * MAD_SCALE * mad


# ------------------------------------------------------------------------------------------ kNN scoring

def exclusion_mask(q_rec, q_t, r_rec, r_t, exclusion_s: float) -> np.ndarray:
    """Bool ``(n, m)``: True where query i and reference j share a recording id and ``|t_q - t_r| < exclusion_s``.

    A reference with the same recording id and the same time is always excluded (so a window never counts
    itself, even with ``exclusion_s = 0``); ``exclusion_s = inf`` excludes the query's whole recording.
    """
    q_rec, r_rec = np.asarray(q_rec).ravel(), np.asarray(r_rec).ravel()
    q_t, r_t = np.asarray(q_t, dtype=np.float64).ravel(), np.asarray(r_t, dtype=np.float64).ravel()
    if q_rec.shape != q_t.shape or r_rec.shape != r_t.shape:
        raise InputError(_SRC, "rec_ids/times", "one recording id and one time per window",
                         f"{q_rec.shape}/{q_t.shape} and {r_rec.shape}/{r_t.shape}")
    exclusion_s = float(exclusion_s)
    if not exclusion_s >= 0:
        raise InputError(_SRC, "exclusion_s", "a number >= 0 (or inf)", exclusion_s)
    same = q_rec[:, None] == r_rec[None, :]
    if np.isinf(exclusion_s):
        return same
    dt = np.abs(q_t[:, None] - r_t[None, :])
    return same & ((dt < exclusion_s) | (dt == 0))


def _check_stat(stat: str) -> str:
    if stat not in KNN_STATS:
        raise InputError(_SRC, "stat", f"one of {KNN_STATS}", repr(stat))
    return stat


def _check_choice(name: str, value: str, choices) -> str:
    if value not in choices:
        raise InputError(_SRC, name, f"one of {tuple(choices)}", repr(value))
    return value


def _check_settings(metric: str, stat: str, method: str, unit: str) -> None:
    geometry._check_metric(metric)
    _check_stat(stat)
    _check_choice("method", method, METHODS)
    _check_choice("unit", unit, UNITS)


def _stat(dist: np.ndarray, k: int, stat: str, partial: bool = False) -> np.ndarray:
    """k-th (or mean of the k) smallest of each row; NaN where a row has fewer than k finite distances, or, with
    ``partial``, the last (mean of the) finite ones where it has at least one."""
    d = dist[:, :k]
    fin = np.isfinite(d)
    n_fin = fin.sum(axis=1)
    if stat == "kth":
        last = d[np.arange(len(d)), np.maximum(n_fin - 1, 0)] if len(d) else np.zeros(0)
        s = last if partial else d[:, k - 1]
    else:
        s = np.sum(np.where(fin, d, 0.0), axis=1) / np.maximum(n_fin, 1)
    ok = n_fin > 0 if partial else n_fin == k
    return np.where(ok, s, np.nan)


def neighbours(queries, index: KNNIndex, k: int, unit: str = "window", ref_groups=None, exclude=None,
               _self: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """The k neighbours of each query among the index's references -> ``(dist (n, k), idx (n, k))``.

    ``unit="window"``: the k nearest allowed reference windows. ``unit="recording"``: the nearest allowed window of
    each of the k nearest recordings (``ref_groups`` names each reference's recording), so one recording never
    supplies two neighbours; the query's own recording can supply one, through its windows outside the exclusion
    zone. Padded with ``inf`` / ``-1`` where fewer are allowed.
    """
    _check_choice("unit", unit, UNITS)
    if unit == "window":
        return index.query(queries, k, exclude=exclude, _self=_self)
    if ref_groups is None:
        raise InputError(_SRC, "ref_groups", "the recording of every reference (unit='recording')", "None")
    return index.query_groups(queries, k, ref_groups, exclude=exclude, _self=_self)


def knn_scores(queries, references, k: int = Scoring.k, metric: str = Scoring.metric, stat: str = Scoring.knn_stat,
               exclude=None, index: KNNIndex | None = None, unit: str = "window", ref_groups=None) -> np.ndarray:
    """kNN score of each query -> ``(n,)``: the k-th (``stat="kth"``) or mean (``"mean"``) of its k exact
    nearest-neighbour distances (see :func:`neighbours` for ``unit``).

    ``exclude`` bool ``(n, m)`` as in :func:`exclusion_mask`. In windows, a query with fewer than k allowed
    references has an undefined score: NaN. In recordings, a query that has fewer than k allowed recordings (a
    fleet of two, say) is scored by the ones it has; NaN only when it has none. ``index`` may be a prebuilt
    :class:`~fleetsift.scoring.index.KNNIndex` over ``references``.
    """
    _check_stat(stat)
    if index is None:
        index = KNNIndex(references, metric)
    dist, _ = neighbours(queries, index, int(k), unit, ref_groups, exclude)
    return _stat(dist, int(k), stat, partial=unit == "recording")


def mean_scores(queries, mean, metric: str = Scoring.metric) -> np.ndarray:
    """Distance of each query ``(n, d, d)`` to a Fréchet mean ``(d, d)`` -> ``(n,)``."""
    return np.asarray(geometry.distance(queries, mean, metric)).reshape(-1)


def local_outlier_factors(dist: np.ndarray, idx: np.ndarray, ref_kdist: np.ndarray, ref_lrd: np.ndarray
                          ) -> np.ndarray:
    """Local outlier factor of queries from their neighbours (Breunig, Kriegel, Ng & Sander 2000, Def. 5-7).

    ``dist``/``idx (n, k)`` are each query's neighbour distances and reference indices (``-1`` padding ignored);
    ``ref_kdist`` is every reference's k-distance, ``ref_lrd`` its local reachability density. The reachability
    distance is ``max(k-distance(r), d(q, r))``; ``lrd(q) = 1 / mean reach``; ``LOF(q) = mean lrd(r) / lrd(q)``.
    Like scikit-learn's LocalOutlierFactor, 1e-10 is added to the mean reachability distance so that duplicates
    keep a finite density. NaN for a query without neighbours.
    """
    ok = idx >= 0
    j = np.where(ok, idx, 0)
    reach = np.where(ok, np.maximum(ref_kdist[j], dist), 0.0)
    cnt = ok.sum(axis=1)
    lrd = 1.0 / (reach.sum(axis=1) / np.maximum(cnt, 1) + 1e-10)
    lof = np.where(ok, ref_lrd[j], 0.0).sum(axis=1) / np.maximum(cnt, 1) / lrd
    return np.where(cnt > 0, lof, np.nan)


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

    ``method`` says how a window is scored against the references (see :func:`raw_scores`); ``loo_scores`` are
    the references' own leave-one-out scores, whose median and robust spread (``median``, ``scale = 1.4826 MAD``)
    turn any score into a robust z (:func:`zscore`) and give ``threshold = median + c * scale`` (the same rule in
    the score's own units: a window is flagged when its z exceeds ``c``). ``kept`` is a mask over the input of
    :func:`fit_baseline` (windows not trimmed as the highest scorers), ``ref_index`` the input positions that
    became references, ``initial_scores`` the first-pass scores of every input window. ``approved`` are windows an
    engineer reviewed as normal: for ``knn`` a window at most as far from one of them as from its k-th neighbour
    scores that distance instead (a reviewed false alarm stops recurring).
    """

    references: np.ndarray
    ref_rec_ids: np.ndarray
    ref_times: np.ndarray
    mean: np.ndarray
    threshold: float
    k: int
    metric: str
    stat: str
    exclusion_s: float
    loo_scores: np.ndarray
    kept: np.ndarray
    ref_index: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    initial_scores: np.ndarray = field(default_factory=lambda: np.zeros(0))
    c: float = Scoring.threshold_c
    median: float = float("nan")
    mad: float = float("nan")
    method: str = KNN
    unit: str = "window"
    scale: float = float("nan")
    ref_kdist: np.ndarray = field(default_factory=lambda: np.zeros(0))
    ref_lrd: np.ndarray = field(default_factory=lambda: np.zeros(0))
    approved: np.ndarray | None = None

    def index(self) -> KNNIndex:
        """A :class:`~fleetsift.scoring.index.KNNIndex` over the references (whitened by ``mean`` for riemann)."""
        return KNNIndex(self.references, self.metric, whiten_point=self.mean if self.metric == "riemann" else None)


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


def _self_scores(D, rec, t, *, k, metric, stat, exclusion_s, method, unit, index=None, mean=None):
    """Leave-one-out scores of a set of windows against the others -> (scores, mean, k-distances, lrds)."""
    if method == FRECHET_MEAN:
        M = geometry.frechet_mean(D, metric) if mean is None else mean
        return mean_scores(D, M, metric), M, np.zeros(0), np.zeros(0)
    index = index if index is not None else KNNIndex(D, metric)
    ex = exclusion_mask(rec, t, rec, t, exclusion_s)
    dist, idx = neighbours(D, index, k, unit, rec, ex, _self=True)
    s = _stat(dist, k, stat, partial=unit == "recording")
    if method == KNN:
        return s, mean, np.zeros(0), np.zeros(0)
    # density: the k-distance of a window is its k-th neighbour distance (the farthest one it has in recordings).
    kdist = _stat(dist, k, "kth", partial=unit == "recording")
    kd = np.where(np.isfinite(kdist), kdist, np.inf)
    ok = idx >= 0
    j = np.where(ok, idx, 0)
    reach = np.where(ok, np.maximum(kd[j], dist), 0.0)
    lrd = 1.0 / (reach.sum(axis=1) / np.maximum(ok.sum(axis=1), 1) + 1e-10)
    lrd = np.where(ok.any(axis=1), lrd, np.nan)
    lof = local_outlier_factors(dist, idx, kd, np.nan_to_num(lrd))
    return lof, mean, kd, lrd


def fit_references(references, rec_ids, times, k: int = Scoring.k, metric: str = Scoring.metric,
                   stat: str = Scoring.knn_stat, exclusion_s: float = Scoring.exclusion_s, c: float = Scoring.threshold_c,
                   method: str = Scoring.method, unit: str = Scoring.knn_unit, approved=None) -> Baseline:
    """A baseline from references taken as normal as they stand (no trimming): a fleet's history, chosen
    recordings. Leave-one-out scores among the references give the robust scale and the threshold."""
    _check_settings(metric, stat, method, unit)
    R, rr, rt = _check_windows(references, rec_ids, times)
    k = int(k)
    if len(R) < 2:
        raise InputError(_SRC, "references", "at least 2 reference windows", f"{len(R)}")
    M = geometry.frechet_mean(R, metric)
    index = KNNIndex(R, metric, whiten_point=M if metric == "riemann" else None)
    loo, _, kd, lrd = _self_scores(R, rr, rt, k=k, metric=metric, stat=stat, exclusion_s=exclusion_s, method=method,
                                   unit=unit, index=index, mean=M)
    if not np.any(np.isfinite(loo)):
        raise InputError(_SRC, "descriptors", f"references with at least k={k} allowed neighbours "
                         f"(exclusion zone {exclusion_s} s)", "none: lower k or the exclusion zone, or add recordings")
    med, mad = median_mad(loo)
    _, scale = robust_scale(loo)
    ap = None if approved is None or len(approved) == 0 else np.asarray(approved, np.float64)
    return Baseline(references=R, ref_rec_ids=rr, ref_times=rt, mean=M, threshold=med + float(c) * scale, k=k,
                    metric=metric, stat=stat, exclusion_s=float(exclusion_s), loo_scores=loo, kept=np.ones(len(R), bool),
                    ref_index=np.arange(len(R)), initial_scores=loo, c=float(c), median=med, mad=mad,
                    method=method, unit=unit, scale=scale, ref_kdist=kd, ref_lrd=lrd, approved=ap)


def fit_baseline(descriptors, rec_ids, times, k: int = Scoring.k, metric: str = Scoring.metric,
                 stat: str = Scoring.knn_stat,
                 exclusion_s: float = Scoring.exclusion_s, trim_fraction: float = Scoring.trim_fraction,
                 c: float = Scoring.threshold_c, max_refs: int | None = None, method: str = Scoring.method,
                 unit: str = Scoring.knn_unit) -> Baseline:
    """Fit a robust baseline from windows that are mostly normal (a first night, chosen recordings).

    1. Leave-one-out score of every window against all others (``method``, with :func:`exclusion_mask`).
    2. Trim the ``floor(trim_fraction * n)`` highest-scoring windows (NaN scores, i.e. windows without allowed
       neighbours, are never trimmed).
    3. The remaining windows are the references (at most ``max_refs``, evenly spaced in input order), fitted as
       :func:`fit_references`: their leave-one-out scores give ``threshold = median + c * 1.4826 * MAD``.
    """
    _check_settings(metric, stat, method, unit)
    D, rec, t = _check_windows(descriptors, rec_ids, times)
    n = len(D)
    k = int(k)
    if n < 2:
        raise InputError(_SRC, "descriptors", "at least 2 windows to fit a baseline", f"{n}")
    if not 0.0 <= float(trim_fraction) < 1.0:
        raise InputError(_SRC, "trim_fraction", "a number in [0, 1)", trim_fraction)
    initial = _self_scores(D, rec, t, k=k, metric=metric, stat=stat, exclusion_s=exclusion_s, method=method, unit=unit)[0]
    n_trim = int(np.floor(float(trim_fraction) * n))
    kept = np.ones(n, dtype=bool)
    if n_trim > 0:
        rank_key = np.where(np.isnan(initial), -np.inf, initial)
        kept[np.argsort(-rank_key, kind="stable")[:n_trim]] = False
    ref_index = np.flatnonzero(kept)
    if max_refs is not None and len(ref_index) > int(max_refs):
        ref_index = ref_index[np.unique(np.linspace(0, len(ref_index) - 1, int(max_refs)).round().astype(int))]
    bl = fit_references(D[ref_index], rec[ref_index], t[ref_index], k=k, metric=metric, stat=stat, exclusion_s=exclusion_s,
                        c=c, method=method, unit=unit)
    bl.kept, bl.ref_index, bl.initial_scores = kept, ref_index, initial
    return bl


def raw_scores(descriptors, rec_ids, times, baseline: Baseline, index: KNNIndex | None = None) -> np.ndarray:
    """Scores ``(n,)`` of windows against the baseline in the method's own units, with the baseline's exclusion
    zone (a window that is itself a reference never counts itself):

    - ``knn``: the k-th (or mean of k) nearest-neighbour distance, in windows or in recordings
      (:func:`knn_scores`), or the distance to the nearest approved window when that is smaller;
    - ``density``: the local outlier factor of the window among the references (:func:`local_outlier_factors`);
    - ``mean``: the distance to the references' Fréchet mean (the Riemannian potato's statistic).
    NaN where the score is undefined (no allowed neighbour).
    """
    D, rec, t = _check_windows(descriptors, rec_ids, times)
    bl = baseline
    if bl.method == FRECHET_MEAN:
        return mean_scores(D, bl.mean, bl.metric)
    index = index if index is not None else bl.index()
    ex = exclusion_mask(rec, t, bl.ref_rec_ids, bl.ref_times, bl.exclusion_s)
    dist, idx = neighbours(D, index, bl.k, bl.unit, bl.ref_rec_ids, ex)
    if bl.method == DENSITY:
        return local_outlier_factors(dist, idx, bl.ref_kdist, np.nan_to_num(bl.ref_lrd))
    s = _stat(dist, bl.k, bl.stat, partial=bl.unit == "recording")
    if bl.approved is not None and len(bl.approved):
        d_ap = KNNIndex(bl.approved, bl.metric).query(D, 1)[0][:, 0]
        s = np.where(np.isfinite(s), np.minimum(s, d_ap), d_ap)
    return s


def score(descriptors, rec_ids, times, baseline: Baseline, index: KNNIndex | None = None) -> np.ndarray:
    """The windows' scores in the method's own units (:func:`raw_scores`), compared with ``baseline.threshold``."""
    return raw_scores(descriptors, rec_ids, times, baseline, index)


def zscore(raw, baseline: Baseline) -> np.ndarray:
    """Robust z of raw scores against the references' leave-one-out scores: ``(s - median) / (1.4826 MAD)``.

    Dimensionless, so scores of different streams, metrics and methods compare; ``z > c`` is exactly
    ``raw > baseline.threshold``.
    """
    raw = np.asarray(raw, dtype=np.float64)
    if not baseline.scale > 0:
        return np.where(raw == baseline.median, 0.0, np.where(raw > baseline.median, np.inf, -np.inf))
    return (raw - baseline.median) / baseline.scale



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


def top_channels(shares, names, top: int = Scoring.n_top_channels) -> list[list[tuple[str, float]]]:
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
        self.kdist, self.lrd = baseline.ref_kdist, baseline.ref_lrd

    @property
    def references(self) -> np.ndarray:
        return self.index.references

    def score(self, descriptor, rec_id, t: float) -> float:
        """Score of one window ``(d, d)`` against the current references, in the method's units (as
        :func:`raw_scores`; NaN where undefined)."""
        bl = self.baseline
        X = np.asarray(descriptor, dtype=np.float64)[None]
        if bl.method == FRECHET_MEAN:
            return float(mean_scores(X, self.mean, bl.metric)[0])
        ex = exclusion_mask([rec_id], [t], self.rec_ids, self.times, bl.exclusion_s)
        if bl.method == DENSITY:
            dist, idx = neighbours(X, self.index, bl.k, bl.unit, self.rec_ids, ex)
            return float(local_outlier_factors(dist, idx, self.kdist, np.nan_to_num(self.lrd))[0])
        dist, _ = neighbours(X, self.index, bl.k, bl.unit, self.rec_ids, ex)
        s = float(_stat(dist, bl.k, bl.stat, partial=bl.unit == "recording")[0])
        if bl.approved is not None and len(bl.approved):
            d_ap = float(KNNIndex(bl.approved, bl.metric).query(X, 1)[0][0, 0])
            s = d_ap if not np.isfinite(s) else min(s, d_ap)
        return s

    def update(self, descriptor, rec_id, t: float) -> None:
        """Add one window to the references and update the running mean."""
        if self.baseline.method == DENSITY:
            # A new reference changes its neighbours' densities too: refit instead (fit_references).
            raise InputError(_SRC, "method", "knn or frechet_mean for an online reference update", "density")
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
