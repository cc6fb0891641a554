"""Compare a run's window scores with labelled anomalous intervals, beside two off-the-shelf outlier detectors."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from fleetsift.scoring.evaluation import (hanley_mcneil_se, label_windows, outlier_baselines, read_labels,
                                          roc_auc, roc_curve, tangent_vectors)
from fleetsift.profile import Profile
from fleetsift.store import Store
from fleetsift.vocabulary import METRICS

BASELINES = ("isolation_forest", "local_outlier_factor")
BASELINE_FEATURES = ("tangent vectors at the riemann baseline's Frechet mean M: upper triangle of "
                     "logm(M^-1/2 X M^-1/2), off-diagonals x sqrt(2) (Barachant et al. 2012)")


def prepare(inbox: str, store: str, profile_path: str | None = None, progress: bool = False,
            tables_fn=None, embed_fn=None) -> tuple[Profile, list[dict], list[dict]]:
    """Every recording's table and video stage outputs, computed or taken from the store's cache.

    Returns (fleet profile, prepared [{"tables": .., "embed": ..}] for the recordings that made it, quarantined
    [{"recording_id", "reason"}]). ``tables_fn``/``embed_fn`` default to the plain stage functions; a flow passes
    its Prefect tasks. The recordings are prepared by the nightly run's own code (flows.night.prepare_recordings),
    so the same recordings are quarantined for the same reasons.
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
           if r["status"] == "quarantined"]
    return fleet, prepared, bad


def run_descriptors(store: str, run_id: str, inbox: str, profile_path: str | None = None) -> dict:
    """The run's window descriptors (recomputed from the cache with the run's baseline), or the reason why not."""
    from fleetsift.tasks import stages

    fleet, prepared, _ = prepare(inbox, store, profile_path)
    if not prepared:
        return {"note": "no recording of the inbox could be read"}
    runs = Store(store).read("runs", run_id=run_id)
    score = stages.run_score(prepared, fleet, store, run_id)
    if len(runs) and score["baseline_id"] != runs["baseline_id"].iloc[0]:
        return {"note": f"the inbox, profile or code changed since run {run_id} (baseline "
                        f"{score['baseline_id']} now, {runs['baseline_id'].iloc[0]} then)"}
    path = stages.run_descriptors(prepared, fleet, store, score)
    a = Store.load_arrays(path)
    base = Store.load_arrays(Path(store) / "baselines" / f"{score['baseline_id']}.npz")
    return {"path": path, "descriptors": a["descriptors"], "recording_id": a["recording_id"].astype(str),
            "window_index": a["window_index"], "mean": base["riemann.mean"]}


def _baseline_scores(wm: pd.DataFrame, d: dict) -> dict[str, np.ndarray] | str:
    """IsolationForest / LOF scores aligned with the rows of ``wm``, or a note saying why there are none."""
    key = pd.MultiIndex.from_arrays([d["recording_id"], d["window_index"]])
    pos = pd.Series(np.arange(len(key)), index=key)
    want = pd.MultiIndex.from_arrays([wm["recording_id"].astype(str).to_numpy(), wm["window_index"].to_numpy()])
    if len(key) != len(want) or not want.isin(key).all():
        return f"descriptors cover {len(key)} windows, the run scored {len(want)}: not the same windows"
    X = tangent_vectors(d["descriptors"][pos.loc[want].to_numpy()], d["mean"])
    return outlier_baselines(X)


def _plot(curves: dict, aucs: dict, path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(4.8, 4.6))
    for name, (fpr, tpr) in curves.items():
        dashed = name in BASELINES
        ax.plot(fpr, tpr, lw=1.0 if dashed else 1.6, ls="--" if dashed else "-",
                label=f"{name.replace('_', ' ')} (AUC {aucs[name]:.3f})")
    ax.plot([0, 1], [0, 1], color="grey", lw=0.8, ls=":")
    ax.set_xlabel("false positive rate")
    ax.set_ylabel("true positive rate")
    ax.set_title("ROC curves, one point per window", fontsize=9, loc="left")
    ax.legend(loc="lower right", fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def evaluate_store(store: str, run_id: str, labels_path: str, plot: str | None = None, inbox: str | None = None,
                   profile: str | None = None, baselines: bool = True) -> dict:
    """ROC AUC (with the Hanley & McNeil standard error) of each metric's window scores of one stored run.

    Windows whose centre lies inside a labelled interval are the positives. With ``baselines`` the same windows
    are scored by IsolationForest and LocalOutlierFactor on tangent vectors of their descriptors (read back from
    the cache: ``inbox`` defaults to the run's, ``profile`` to the inbox's profile.toml).
    """
    st = Store(store)
    labels = read_labels(labels_path)
    w = st.read("windows", run_id=run_id)
    w = w[w["score"].notna()]
    known = set(w["recording_id"])
    out: dict = {"auc": {}, "auc_se": {}, "n_windows": 0, "n_anomalous": 0, "run_id": run_id,
                 "labels_without_recording": sorted(set(labels["recording"]) - known), "per_metric": {},
                 "baselines": {}, "baselines_se": {}, "baseline_features": BASELINE_FEATURES}
    curves, y_ref, wm_ref = {}, None, None
    for m in METRICS:
        wm = w[w["metric"] == m].sort_values(["recording_id", "window_index"])
        y = label_windows(wm, labels)
        s = wm["score"].to_numpy()
        auc = roc_auc(y, s)
        out["auc"][m] = auc
        out["auc_se"][m] = hanley_mcneil_se(auc, int(y.sum()), int((~y).sum())) if auc is not None else None
        flagged = wm["flagged"].to_numpy(bool)
        tp = int((flagged & y).sum())
        out["per_metric"][m] = {"flagged": int(flagged.sum()), "true_positives": tp,
                                "precision": tp / flagged.sum() if flagged.sum() else None,
                                "recall": tp / y.sum() if y.sum() else None}
        out["n_windows"] = int(len(wm))
        out["n_anomalous"] = int(y.sum())
        if auc is not None:
            curves[m] = roc_curve(y, s)
        y_ref, wm_ref = y, wm
    if baselines and wm_ref is not None and len(wm_ref):
        if inbox is None:
            runs = st.read("runs", run_id=run_id)
            inbox = str(runs["inbox"].iloc[0]) if len(runs) else ""
        if not inbox or not Path(inbox).is_dir():
            out["baselines_note"] = f"inbox {inbox!r} not found: no outlier baselines"
        else:
            d = run_descriptors(store, run_id, inbox, profile)
            sc = d["note"] if "note" in d else _baseline_scores(wm_ref, d)
            if isinstance(sc, str):
                out["baselines_note"] = sc
            else:
                for name, s in sc.items():
                    auc = roc_auc(y_ref, s)
                    out["baselines"][name] = auc
                    out["baselines_se"][name] = (hanley_mcneil_se(auc, int(y_ref.sum()), int((~y_ref).sum()))
                                                 if auc is not None else None)
                    if auc is not None:
                        curves[name] = roc_curve(y_ref, s)
    if plot and curves:
        _plot(curves, {**out["auc"], **out["baselines"]}, plot)
        out["plot"] = plot
    return out
