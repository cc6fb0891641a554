"""Compare a run's window scores with labelled anomalous intervals, beside two off-the-shelf outlier detectors."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from fleetsift.scoring.evaluation import (hanley_mcneil_se, ignored_windows, label_windows, comparison_scores,
                                          read_labels, roc_auc, roc_curve, tangent_vectors)
from fleetsift.errors import InputError
from fleetsift.profile import Profile
from fleetsift.store import Store
from fleetsift.vocabulary import METRICS, UNSCORED

COMPARISON_DETECTORS = ("isolation_forest", "local_outlier_factor")
COMPARISON_FEATURES = ("tangent vectors of each descriptor block at its riemann baseline's Frechet mean M, side by "
                       "side: upper triangle of logm(M^-1/2 X M^-1/2), off-diagonals x sqrt(2) (Barachant et al. 2012)")


def prepare(inbox: str, store: str, profile_path: str | None = None, progress: bool = False,
            tables_fn=None, embed_fn=None) -> tuple[Profile, list[dict], list[dict]]:
    """Every recording's table and video stage outputs, computed or taken from the store's cache.

    Returns (fleet profile, prepared [{"tables": .., "embed": ..}] for the recordings that made it, unscored
    [{"recording_id", "reason"}]). ``tables_fn``/``embed_fn`` default to the plain stage functions; a flow passes
    its Prefect tasks. The recordings are prepared by the nightly run's own code (flows.night.prepare_recordings),
    so the same recordings are left unscored for the same reasons.
    """
    from fleetsift.flows import env

    env.configure(store)  # a flow's tasks import Prefect, which reads its settings at import time
    from fleetsift.flows.night import discover, fleet_profile, prepare_recordings
    from fleetsift.tasks import stages

    inbox_p = Path(inbox).resolve()
    fleet = fleet_profile(inbox_p, profile_path)
    prepared, rows, _ = prepare_recordings(tables_fn or stages.run_tables, embed_fn or stages.run_embed, fleet,
                                           discover(inbox_p), str(store), progress=progress)
    bad = [{"recording_id": r["recording_id"], "reason": r["reason"]} for _, r in sorted(rows.items())
           if r["status"] == UNSCORED]
    return fleet, prepared, bad


def run_descriptors(store: str, run_id: str) -> dict:
    """The run's window features for the comparison detectors, from the descriptors its score stage kept (the
    bank): tangent vectors of each descriptor block at that block's riemann mean, side by side. Or the reason why
    there are none."""
    from fleetsift.scoring.history import Bank

    st = Store(store)
    runs = st.read("runs", run_id=run_id)
    if runs.empty:
        return {"reason": f"run {run_id} is not in the store"}
    rel = runs["score_output"].iloc[0]
    if not isinstance(rel, str) or not rel or not (st.root / rel).exists():
        return {"reason": f"run {run_id} has no stored window descriptors (written by an older release?)"}
    bank = Bank.from_arrays(Store.load_arrays(st.root / rel))
    base = Store.load_arrays(st.root / "baselines" / f"{runs['baseline_id'].iloc[0]}.npz")
    X = np.hstack([tangent_vectors(bank.descriptors[b], base[f"{b}.riemann.mean"]) for b in bank.descriptors])
    return {"features": X, "recording_id": bank.recording_id, "window_index": bank.window_index}


def _comparison_scores(wm: pd.DataFrame, d: dict) -> dict[str, np.ndarray] | str:
    """IsolationForest / LOF scores aligned with the rows of ``wm``, or the reason why there are none."""
    key = pd.MultiIndex.from_arrays([d["recording_id"], d["window_index"]])
    pos = pd.Series(np.arange(len(key)), index=key)
    want = pd.MultiIndex.from_arrays([wm["recording_id"].astype(str).to_numpy(), wm["window_index"].to_numpy()])
    if not want.isin(key).all():
        return f"descriptors cover {len(key)} windows, the run scored {len(want)}: not the same windows"
    return comparison_scores(d["features"][pos.loc[want].to_numpy()])


def review_labels(windows: pd.DataFrame, recordings: pd.DataFrame, reviews_store: str) -> np.ndarray:
    """Per window of ``windows`` (one run, one metric): True where an engineer marked it (or its recording) a
    fault, False where marked normal, NaN where nobody reviewed it. Windows are matched to verdicts by the
    recording's content and the window centre (within half the hop), so a verdict given on one night labels the
    same window scored on another."""
    from fleetsift.scoring.history import Reviews, verdicts_for

    rv = Store(reviews_store).read("reviews")
    out = np.full(len(windows), np.nan)
    if rv.empty or windows.empty:
        return out
    rv = rv.sort_values("reviewed_at", kind="stable")
    mid = np.where(rv["window_index"].to_numpy() < 0, np.nan,
                   (rv["t_start_s"].to_numpy(float) + rv["t_end_s"].to_numpy(float)) / 2)
    reviews = Reviews(content=rv["content_hash"].to_numpy().astype(str), t_mid=mid,
                      verdict=rv["verdict"].to_numpy().astype(str))
    content = windows["recording_id"].map(dict(zip(recordings["recording_id"], recordings["content_hash"])))
    t_mid = ((windows["t_start_s"] + windows["t_end_s"]) / 2).to_numpy(float)
    hops = windows.groupby("recording_id")["t_start_s"].diff().dropna()
    tol = 0.5 * float(hops.median()) if len(hops) else 1e-6
    v = verdicts_for(content.fillna("").to_numpy().astype(str), t_mid, reviews, tol)
    out[v == "fault"] = 1.0
    out[v == "normal"] = 0.0
    return out


def _plot(curves: dict, aucs: dict, path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from fleetsift.flows.report import MUTED, PALETTE

    fig, ax = plt.subplots(figsize=(4.8, 4.6))
    for i, (name, (fpr, tpr)) in enumerate(curves.items()):
        dashed = name in COMPARISON_DETECTORS
        ax.plot(fpr, tpr, lw=1.0 if dashed else 1.6, ls="--" if dashed else "-", color=PALETTE[i % len(PALETTE)],
                label=f"{name.replace('_', ' ')}{' (comparison)' if dashed else ''} (AUC {aucs[name]:.3f})")
    ax.plot([0, 1], [0, 1], color=MUTED, lw=0.8, ls=":")
    ax.set_xlabel("false positive rate")
    ax.set_ylabel("true positive rate")
    ax.set_title("ROC curves, one point per window", fontsize=9, loc="left")
    ax.legend(loc="lower right", fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def evaluate_store(store: str, run_id: str, labels_path: str | None = None, plot: str | None = None,
                   comparison: bool = True, reviews_store: str | None = None) -> dict:
    """ROC AUC (with the Hanley & McNeil standard error) of each metric's window scores of one stored run.

    Windows whose centre lies inside a labelled interval are the positives. With ``reviews_store`` instead of a
    labels file, engineers' verdicts in that store are the labels and only the windows they reviewed count
    (faults positive, normal negative). With ``comparison`` the same windows are scored by IsolationForest and
    LocalOutlierFactor on tangent vectors of the descriptors the run's score stage kept.
    """
    if (labels_path is None) == (reviews_store is None):
        raise InputError("evaluate", "labels", "a labels CSV or a store whose reviews are the labels (one of them)",
                         "both" if labels_path else "neither")
    st = Store(store)
    labels = read_labels(labels_path) if labels_path else None
    w = st.read("windows", run_id=run_id)
    w = w[w["score"].notna()]
    known = set(w["recording_id"])
    out: dict = {"auc": {}, "auc_se": {}, "n_windows": 0, "n_anomalous": 0, "run_id": run_id,
                 "labels": "reviews" if labels is None else "file",
                 "labels_without_recording": [] if labels is None else sorted(set(labels["recording_id"]) - known),
                 "per_metric": {}, "comparison_detectors": {}, "comparison_detectors_se": {},
                 "comparison_features": COMPARISON_FEATURES}
    recordings = st.read("recordings", run_id=run_id) if labels is None else None
    curves, y_ref, wm_ref = {}, None, None
    for m in METRICS:
        wm = w[w["metric"] == m].sort_values(["recording_id", "window_index"])
        if labels is None:
            yr = review_labels(wm, recordings, reviews_store)
            wm = wm[~np.isnan(yr)]
            y = yr[~np.isnan(yr)].astype(bool)
        else:
            wm = wm[~ignored_windows(wm, labels)]
            y = label_windows(wm, labels)
        s = wm["score"].to_numpy()
        auc = roc_auc(y, s)
        out["auc"][m] = auc
        out["auc_se"][m] = hanley_mcneil_se(auc, int(y.sum()), int((~y).sum())) if auc is not None else None
        flagged = wm["flagged"].to_numpy(bool)
        tp = int((flagged & y).sum())
        out["per_metric"][m] = {"n_flagged": int(flagged.sum()), "true_positives": tp,
                                "precision": tp / flagged.sum() if flagged.sum() else None,
                                "recall": tp / y.sum() if y.sum() else None}
        out["n_windows"] = int(len(wm))
        out["n_anomalous"] = int(y.sum())
        out["n_ignored"] = int((w["metric"] == m).sum() - len(wm))
        if auc is not None:
            curves[m] = roc_curve(y, s)
        y_ref, wm_ref = y, wm
    if comparison and wm_ref is not None and len(wm_ref) >= 3:
        d = run_descriptors(store, run_id)
        sc = d["reason"] if "reason" in d else _comparison_scores(wm_ref, d)
        if isinstance(sc, str):
            out["comparison_detectors_reason"] = sc
        else:
            for name, s in sc.items():
                auc = roc_auc(y_ref, s)
                out["comparison_detectors"][name] = auc
                out["comparison_detectors_se"][name] = (hanley_mcneil_se(auc, int(y_ref.sum()), int((~y_ref).sum()))
                                             if auc is not None else None)
                if auc is not None:
                    curves[name] = roc_curve(y_ref, s)
    if plot and curves:
        _plot(curves, {**out["auc"], **out["comparison_detectors"]}, plot)
        out["plot"] = plot
    # Deprecated names of the comparison detectors' results (README documented "baselines"); removed next release.
    out["baselines"], out["baselines_se"] = out["comparison_detectors"], out["comparison_detectors_se"]
    return out
