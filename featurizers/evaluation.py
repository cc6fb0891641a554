"""Detection quality against labelled anomalous intervals: window labels, ROC AUC and its standard error."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.stats import rankdata

from fleetsift.errors import InputError


def read_labels(path: str) -> pd.DataFrame:
    """Labels CSV with columns recording,start_s,end_s (seconds from the recording's first sample)."""
    try:
        df = pd.read_csv(path)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as e:
        raise InputError(path, "content", "a CSV with columns recording,start_s,end_s", str(e)) from None
    for col in ("recording", "start_s", "end_s"):
        if col not in df.columns:
            raise InputError(path, f"column {col!r}", "columns recording,start_s,end_s", list(df.columns))
    for col in ("start_s", "end_s"):
        if not pd.api.types.is_numeric_dtype(df[col]):
            raise InputError(path, f"column {col!r}", "numbers (seconds)", df[col].dtype)
    bad = df[df["end_s"] < df["start_s"]]
    if len(bad):
        raise InputError(path, f"row {bad.index[0] + 2}", "end_s >= start_s", bad.iloc[0].to_dict())
    df["recording"] = df["recording"].astype(str)
    return df


def label_windows(windows: pd.DataFrame, labels: pd.DataFrame) -> np.ndarray:
    """A window is anomalous when its centre lies inside a labelled interval of its recording."""
    centre = ((windows["t_start_s"] + windows["t_end_s"]) / 2).to_numpy()
    rec = windows["recording_id"].astype(str).to_numpy()
    y = np.zeros(len(windows), bool)
    for r, s, e in labels[["recording", "start_s", "end_s"]].itertuples(index=False):
        y |= (rec == r) & (centre >= s) & (centre <= e)
    return y


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
