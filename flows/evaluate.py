"""Compare a run's window scores with labelled anomalous intervals."""

from __future__ import annotations

import numpy as np

from featurizers.evaluation import hanley_mcneil_se, label_windows, read_labels, roc_auc, roc_curve
from fleetsift.store import Store

METRICS = ("riemann", "logeuclid", "euclid")


def evaluate_store(store: str, run_id: str, labels_path: str, plot: str | None = None) -> dict:
    st = Store(store)
    labels = read_labels(labels_path)
    w = st.read("windows", run_id=run_id)
    w = w[w["score"].notna()]
    known = set(w["recording_id"])
    unknown = sorted(set(labels["recording"]) - known)
    out = {"auc": {}, "auc_se": {}, "n_windows": 0, "n_anomalous": 0, "run_id": run_id,
           "labels_without_recording": unknown, "per_metric": {}}
    curves = {}
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
    if plot and curves:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        fig, ax = plt.subplots(figsize=(4.5, 4.5))
        for m, (fpr, tpr) in curves.items():
            ax.plot(fpr, tpr, label=f"{m} (AUC {out['auc'][m]:.3f})")
        ax.plot([0, 1], [0, 1], color="grey", lw=0.8, ls=":")
        ax.set_xlabel("false positive rate")
        ax.set_ylabel("true positive rate")
        ax.legend(loc="lower right")
        fig.tight_layout()
        fig.savefig(plot, dpi=110)
        plt.close(fig)
        out["plot"] = plot
    return out
