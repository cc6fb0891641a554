"""Detection quality against labelled anomalous intervals: window labels, ROC AUC and its standard error."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.stats import rankdata

from fleetsift.errors import InputError


# A labels file names its intervals as the windows table names a window's: recording_id, t_start_s, t_end_s.
LABEL_COLUMNS = ("recording_id", "t_start_s", "t_end_s")
# The names before 0.3, still read for one release (with a deprecation message).
LEGACY_LABEL_COLUMNS = dict(zip(("recording", "start_s", "end_s"), LABEL_COLUMNS))


def read_labels(path: str) -> pd.DataFrame:
    """Labels CSV with columns recording_id,t_start_s,t_end_s (seconds from the recording's first sample) and
    optionally kind (free text; ``ignore`` marks an interval left out of the evaluation). The older header
    recording,start_s,end_s is read too, with a deprecation message."""
    want = ",".join(LABEL_COLUMNS)
    try:
        df = pd.read_csv(path)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as e:
        raise InputError(path, "content", f"a CSV with columns {want}", str(e)) from None
    old = [c for c in LEGACY_LABEL_COLUMNS if c in df.columns and LEGACY_LABEL_COLUMNS[c] not in df.columns]
    if old:
        import warnings

        warnings.warn(f"{path}: label columns {','.join(old)} are deprecated: name them "
                      f"{','.join(LEGACY_LABEL_COLUMNS[c] for c in old)}", FutureWarning, stacklevel=2)
        df = df.rename(columns={c: LEGACY_LABEL_COLUMNS[c] for c in old})
    for col in LABEL_COLUMNS:
        if col not in df.columns:
            raise InputError(path, f"column {col!r}", f"columns {want}", list(df.columns))
    for col in LABEL_COLUMNS[1:]:
        if not pd.api.types.is_numeric_dtype(df[col]):
            raise InputError(path, f"column {col!r}", "numbers (seconds)", df[col].dtype)
    bad = df[df["t_end_s"] < df["t_start_s"]]
    if len(bad):
        raise InputError(path, f"row {bad.index[0] + 2}", "t_end_s >= t_start_s", bad.iloc[0].to_dict())
    df["recording_id"] = df["recording_id"].astype(str)
    return df


IGNORE = "ignore"  # a labels row of this kind marks an interval left out of the evaluation


def label_windows(windows: pd.DataFrame, labels: pd.DataFrame) -> np.ndarray:
    """A window is anomalous when its centre lies inside a labelled interval of its recording (rows whose
    ``kind`` is ``ignore`` label nothing; see :func:`ignored_windows`)."""
    centre = ((windows["t_start_s"] + windows["t_end_s"]) / 2).to_numpy()
    rec = windows["recording_id"].astype(str).to_numpy()
    y = np.zeros(len(windows), bool)
    rows = labels if "kind" not in labels.columns else labels[labels["kind"].astype(str) != IGNORE]
    for r, s, e in rows[list(LABEL_COLUMNS)].itertuples(index=False):
        y |= (rec == r) & (centre >= s) & (centre <= e)
    return y


def ignored_windows(windows: pd.DataFrame, labels: pd.DataFrame) -> np.ndarray:
    """Windows that overlap an interval labelled ``kind = ignore``: left out of the evaluation, neither normal nor
    anomalous (a maintenance stop, a sensor swap, or the junction of two independently recorded pieces in a test
    fleet). Overlap is strict: a window that ends where the interval starts is kept."""
    out = np.zeros(len(windows), bool)
    if "kind" not in labels.columns:
        return out
    t0, t1 = windows["t_start_s"].to_numpy(float), windows["t_end_s"].to_numpy(float)
    rec = windows["recording_id"].astype(str).to_numpy()
    for r, s, e in labels[labels["kind"].astype(str) == IGNORE][list(LABEL_COLUMNS)].itertuples(index=False):
        out |= (rec == r) & (t0 < e) & (t1 > s)
    return out


def roc_auc(y: np.ndarray, score: np.ndarray) -> float | None:
    """ROC AUC as the Mann-Whitney U statistic with ties counted half; None when one class is absent."""
    y = np.asarray(y, bool)
    score = np.asarray(score, float)
    n_pos, n_neg = int(y.sum()), int((~y).sum())
    if n_pos == 0 or n_neg == 0:
        return None
    r = rankdata(score)
    return float((r[y].sum() - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg))


def hanley_mcneil_se(auc: float, n_pos: int, n_neg: int) -> float:
    """Standard error of the AUC (Hanley & McNeil 1982, Radiology 143:29-36, eq. 1-3)."""
    q1 = auc / (2 - auc)
    q2 = 2 * auc * auc / (1 + auc)
    var = (auc * (1 - auc) + (n_pos - 1) * (q1 - auc * auc) + (n_neg - 1) * (q2 - auc * auc)) / (n_pos * n_neg)
    return float(np.sqrt(max(var, 0.0)))


def roc_curve(y: np.ndarray, score: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(false positive rate, true positive rate) at every distinct threshold, from (0,0) to (1,1)."""
    y = np.asarray(y, bool)
    order = np.argsort(-np.asarray(score, float), kind="stable")
    s, yy = np.asarray(score, float)[order], y[order]
    distinct = np.r_[np.flatnonzero(np.diff(s)), len(s) - 1]
    tps = np.cumsum(yy)[distinct]
    fps = (distinct + 1) - tps
    tpr = np.r_[0, tps / max(y.sum(), 1)]
    fpr = np.r_[0, fps / max((~y).sum(), 1)]
    return fpr, tpr


# ------------------------------------------------------------------------------------ comparison detectors

def tangent_vectors(descriptors: np.ndarray, mean: np.ndarray) -> np.ndarray:
    """Tangent-space features: ``vec(logm(M^-1/2 X M^-1/2))`` with off-diagonals weighted by sqrt(2).

    The tangent space mapping of Barachant et al. (2012, IEEE TBME 59:920); the Euclidean norm of each vector is
    the affine-invariant distance of X to M, so vector-space detectors see (locally) the manifold's geometry.
    """
    from fleetsift.scoring import geometry

    W = geometry.invsqrtm(mean)
    return geometry.vec(geometry.logm(W @ np.asarray(descriptors, np.float64) @ W))


def comparison_scores(features: np.ndarray, seed: int = 0, n_neighbors: int = 20) -> dict[str, np.ndarray]:
    """Scores (higher = more unusual) of scikit-learn's IsolationForest (Liu et al. 2008) and LocalOutlierFactor
    (Breunig et al. 2000, novelty=False) fitted on all windows, the same unsupervised setting as ours.

    Unlike our kNN scoring these know nothing of recordings: overlapping windows of one span are each other's
    nearest neighbours, which hides a long span from LOF (our exclusion zone exists for that reason).
    """
    from sklearn.ensemble import IsolationForest
    from sklearn.neighbors import LocalOutlierFactor

    X = np.asarray(features, np.float64)
    if len(X) < 3:
        raise ValueError(f"{len(X)} windows: too few for the comparison detectors")
    iso = IsolationForest(n_estimators=200, random_state=seed).fit(X)
    lof = LocalOutlierFactor(n_neighbors=min(n_neighbors, len(X) - 1), novelty=False).fit(X)
    return {"isolation_forest": -iso.score_samples(X), "local_outlier_factor": -lof.negative_outlier_factor_}
