"""Parameter sweep: ROC AUC against labels over a grid of window length, hop, k, descriptor kind, metric (and
the descriptor ridge).

Every grid point re-runs only the fleet step (windows -> descriptors -> baseline -> scores) on the cached table and
video stage outputs: the table cache key holds the clock rate and gap tolerance but not the window settings, and
the video embeddings hold no window setting at all, so nothing is decoded or embedded again.

Grid file (TOML), every key optional:

    design = "one_at_a_time"   # each parameter varies alone around the profile's settings; "full" = every combination
    window_s = [2.0, 8.0]
    hop_s = [1.0, 4.0]
    k = [1, 10]
    kind = ["rbf", "lagged"]
    shrinkage = ["oas"]
    metric = ["logeuclid", "euclid"]
    ridge = [1e-2, "auto"]     # optional: the descriptor's ridge (a noise floor on the standardised channels)

Every point scores the batch as a first night would (tonight's windows, robustly trimmed): a sweep compares settings
on one inbox, and a history fitted under one setting means nothing under another.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import time
import tomllib
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd
from prefect import flow, task, unmapped
from prefect.cache_policies import NONE
from prefect.task_runners import ThreadPoolTaskRunner

from fleetsift.scoring import fleet
from fleetsift.scoring.evaluation import hanley_mcneil_se, label_windows, read_labels, roc_auc
from fleetsift.errors import InputError
from fleetsift.profile import Profile
from fleetsift.flows.evaluate import prepare
from fleetsift.tasks import flow_tasks, stages
from fleetsift.vocabulary import DESCRIPTOR_KINDS, METRICS, SHRINKAGE_ESTIMATORS

PARAMS = ("window_s", "hop_s", "k", "kind", "shrinkage", "metric", "ridge")
DESIGNS = ("one_at_a_time", "full")
MAX_POINTS = 100
COLUMNS = ["point", "varied", *PARAMS, "auc", "auc_se", "n_windows", "n_anomalous", "n_flagged", "threshold",
           "elapsed_s", "error"]


def base_values(profile: Profile) -> dict:
    return {"window_s": profile.windowing.window_s, "hop_s": profile.windowing.hop_s, "k": profile.scoring.k,
            "kind": profile.descriptor.kind, "shrinkage": profile.descriptor.shrinkage, "metric": profile.scoring.metric,
            "ridge": profile.descriptor.ridge}


def default_grid(profile: Profile) -> dict:
    """One-at-a-time around the profile: half and double the window and hop, k = 1 and 2k, the other descriptor
    kinds and metrics (12 points for the default profile, base included)."""
    b = base_values(profile)
    rate = profile.windowing.rate_hz
    return {"design": "one_at_a_time",
            "window_s": [w for w in (b["window_s"] / 2, b["window_s"] * 2) if w * rate >= 4],
            "hop_s": [b["hop_s"] / 2, b["hop_s"] * 2],
            "k": sorted({1, 2 * b["k"]} - {b["k"]}),
            "kind": [x for x in DESCRIPTOR_KINDS if x != b["kind"]],
            "shrinkage": [x for x in SHRINKAGE_ESTIMATORS if x != b["shrinkage"]],
            "metric": [x for x in METRICS if x != b["metric"]], "ridge": []}


def parse_grid(data: dict, path: str, profile: Profile) -> dict:
    """Validate a grid (a parsed TOML table); raises InputError naming the file and key."""
    allowed = {"design", *PARAMS}
    for key in data:
        if key not in allowed:
            raise InputError(path, key, f"one of the keys {sorted(allowed)}", "an unknown key")
    design = data.get("design", "one_at_a_time")
    if design not in DESIGNS:
        raise InputError(path, "design", f"one of {list(DESIGNS)}", repr(design))
    out = {"design": design}
    rate = profile.windowing.rate_hz
    for key in PARAMS:
        if key not in data:
            out[key] = []
            continue
        vals = data[key]
        if not isinstance(vals, list) or not vals:
            raise InputError(path, key, "a non-empty list", repr(vals))
        for v in vals:
            if key == "ridge" and v == "auto":
                continue
            if key in ("window_s", "hop_s", "ridge"):
                ok = isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and v > 0
                if ok and key == "window_s" and v * rate < 4:
                    raise InputError(path, key, f"windows of at least 4 samples at {rate:g} Hz", v)
                want = "positive numbers" + (" (seconds)" if key != "ridge" else ' or "auto"')
            elif key == "k":
                ok, want = isinstance(v, int) and not isinstance(v, bool) and v >= 1, "integers >= 1"
            elif key == "kind":
                ok, want = v in DESCRIPTOR_KINDS, f"values from {list(DESCRIPTOR_KINDS)}"
            elif key == "shrinkage":
                ok, want = v in SHRINKAGE_ESTIMATORS, f"values from {list(SHRINKAGE_ESTIMATORS)}"
            else:
                ok, want = v in METRICS, f"values from {list(METRICS)}"
            if not ok:
                raise InputError(path, key, want, repr(v))
        out[key] = [float(v) if key in ("window_s", "hop_s", "ridge") and v != "auto" else v for v in vals]
    return out


def load_grid(path: str | None, profile: Profile) -> dict:
    if path is None:
        return default_grid(profile)
    try:
        data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(path, "file", "an existing grid TOML file", "no such file") from None
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as e:
        raise InputError(path, "content", "a readable TOML file", str(e)) from None
    return parse_grid(data, path, profile)


def grid_points(grid: dict, profile: Profile) -> list[dict]:
    """The grid's points: each a full setting of PARAMS plus ``varied`` (the parameter it moves, "base", or "all")."""
    base = base_values(profile)
    if grid["design"] == "full":
        axes = [grid[p] or [base[p]] for p in PARAMS]
        pts = [dict(zip(PARAMS, combo), varied="all") for combo in itertools.product(*axes)]
    else:
        pts = [dict(base, varied="base")]
        for p in PARAMS:
            for v in dict.fromkeys(grid[p]):  # keep order, drop repeats
                if v != base[p]:
                    pts.append(dict(base, **{p: v}, varied=p))
    if len(pts) > MAX_POINTS:
        raise InputError("grid", "points", f"at most {MAX_POINTS} grid points", len(pts))
    for i, p in enumerate(pts):
        p["point"] = i
    return pts


def point_profile(profile: Profile, point: dict) -> Profile:
    return dataclasses.replace(
        profile,
        windowing=dataclasses.replace(profile.windowing, window_s=float(point["window_s"]),
                                      hop_s=float(point["hop_s"])),
        descriptor=dataclasses.replace(profile.descriptor, kind=point["kind"], shrinkage=point["shrinkage"],
                                       ridge=point["ridge"] if point["ridge"] == "auto" else float(point["ridge"])),
        scoring=dataclasses.replace(profile.scoring, k=int(point["k"]), metric=point["metric"]),
        baseline=dataclasses.replace(profile.baseline, source="recordings" if profile.baseline.recordings
                                     else "batch"))


def score_point(prepared: list[dict], profile: Profile, point: dict, labels_path: str) -> dict:
    """Score the batch at one grid point (fleet step only, on cached stage outputs); returns one table row."""
    t0 = time.time()
    row = {c: point.get(c) for c in ("point", "varied", *PARAMS)}
    prof = point_profile(profile, point)
    m = point["metric"]
    try:
        recs = [stages.load_features(prof, p["tables"], p["embed"]) for p in prepared]
        res = fleet.score_fleet(
            recs, windowing=prof.windowing, descriptor=prof.descriptor, scoring_cfg=prof.scoring,
            baseline_cfg=prof.baseline, pca_dims={s.name: s.pca_dim for s in prof.video_streams()},
            video_gaps={s.name: fleet.video_gap_s(s.sample_hz, prof.windowing.max_gap_s)
                        for s in prof.video_streams()},
            table_streams=stages.table_streams_of(prof), metrics=(m,))
        w = pd.concat([pd.DataFrame({"recording_id": ws.recording_id, "t_start_s": ws.t_start, "t_end_s": ws.t_end,
                                     "score": ws.scores[m], "flagged": ws.flagged[m]}) for ws in res.windows])
        w = w[w["score"].notna()]
        y = label_windows(w, read_labels(labels_path))
        auc = roc_auc(y, w["score"].to_numpy())
        row.update(auc=auc, auc_se=hanley_mcneil_se(auc, int(y.sum()), int((~y).sum())) if auc is not None else None,
                   n_windows=len(w), n_anomalous=int(y.sum()), n_flagged=int(w["flagged"].sum()),
                   threshold=float(prof.scoring.threshold_c), error="")
    except (InputError, ValueError) as e:  # e.g. k larger than the neighbours a short recording allows
        row.update(auc=None, auc_se=None, n_windows=0, n_anomalous=0, n_flagged=0, threshold=None, error=str(e))
    row["elapsed_s"] = round(time.time() - t0, 2)
    return row


score_point_task = task(name="sweep-point", cache_policy=NONE, persist_result=False)(score_point)


def plot_sweep(table: pd.DataFrame, base: dict, path: str) -> None:
    """AUC against each parameter the grid moves: one panel per parameter, error bars = Hanley & McNeil SE."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from fleetsift.flows.report import ACCENT, INK, MUTED

    full = (table["varied"] == "all").any()
    shown = [p for p in PARAMS if (table[p].nunique() > 1 if full else (table["varied"] == p).any())] or ["k"]
    fig, axes = plt.subplots(1, len(shown), figsize=(2.3 * len(shown) + 0.6, 2.6), sharey=True, squeeze=False)
    for ax, p in zip(axes[0], shown):
        sub = table if full else table[table["varied"].isin([p, "base"])]
        vals = sorted(sub[p].unique(), key=lambda v: (isinstance(v, str), v))
        xpos = {v: i for i, v in enumerate(vals)}
        ok = sub[sub["auc"].notna()]
        x = ok[p].map(xpos).to_numpy(float)
        if full and len(ok):
            x = x + np.random.default_rng(0).uniform(-0.12, 0.12, len(x))
            means = ok.groupby(p)["auc"].mean()
            ax.plot([xpos[v] for v in means.index], means.to_numpy(), color=MUTED, lw=1, zorder=3)
        ax.errorbar(x, ok["auc"].to_numpy(float), yerr=ok["auc_se"].to_numpy(float), fmt="o", ms=4,
                    color=INK, ecolor=MUTED, capsize=2, lw=1)
        if not full:
            b = ok[ok["varied"] == "base"]
            ax.plot(b[p].map(xpos), b["auc"], "o", ms=8, mfc="none", mec=ACCENT, label="profile")
        ax.set_xticks(range(len(vals)), [f"{v:g}" if isinstance(v, float) else str(v) for v in vals],
                      fontsize=7, rotation=30 if p in ("kind", "shrinkage", "metric") else 0)
        ax.set_title(p, fontsize=9)
        ax.axhline(0.5, color=MUTED, lw=0.6, ls=":")
        ax.set_xlim(-0.5, len(vals) - 0.5)
    axes[0, 0].set_ylabel("ROC AUC")
    if not full:
        axes[0, 0].legend(fontsize=6, loc="lower left")
    fig.suptitle("AUC against each parameter" + (" (all combinations)" if full else
                 f" (one at a time around {base['kind']}, {base['metric']}, k={base['k']}, "
                 f"window {base['window_s']:g} s, hop {base['hop_s']:g} s, ridge {base['ridge']})"), fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


@flow(name="fleetsift-sweep", log_prints=False, task_runner=ThreadPoolTaskRunner(max_workers=2))
def sweep_flow(inbox: str, store: str, labels: str, grid_path: str | None = None, profile_path: str | None = None,
               out_dir: str | None = None) -> dict:
    """Map the fleet step over the grid's points on the cached stage outputs; write sweep.csv and sweep.png."""
    started = time.time()
    read_labels(labels)  # fail before any work on a bad labels file
    profile, prepared, unscored = prepare(inbox, store, profile_path, tables_fn=flow_tasks.tables_task,
                                             embed_fn=flow_tasks.embed_task)
    if not prepared:
        raise InputError(inbox, "recordings", "at least one readable recording", "none")
    grid = load_grid(grid_path, profile)
    points = grid_points(grid, profile)
    futures = score_point_task.map(prepared=unmapped(prepared), profile=unmapped(profile), point=points,
                                   labels_path=unmapped(labels))
    rows = sorted((f.result() for f in futures), key=lambda r: r["point"])
    table = pd.DataFrame(rows, columns=COLUMNS)
    out = Path(out_dir) if out_dir else (Path(store) / "sweeps" /
                                         datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ"))
    out.mkdir(parents=True, exist_ok=True)
    table.to_csv(out / "sweep.csv", index=False)
    plot_sweep(table, base_values(profile), str(out / "sweep.png"))
    reused = sum(bool(p["tables"]["reused"]) for p in prepared)
    emb_reused = sum(p["embed"]["reused"] for p in prepared)
    emb_computed = sum(p["embed"]["computed"] for p in prepared)
    return {"csv": str(out / "sweep.csv"), "plot": str(out / "sweep.png"), "design": grid["design"],
            "points": rows, "unscored": unscored,
            "stages": {"tables": {"computed": len(prepared) - reused, "reused": reused},
                       "embed": {"computed": emb_computed, "reused": emb_reused}},
            "elapsed_s": round(time.time() - started, 2)}


def run_sweep(inbox: str, store: str, labels: str, grid_path: str | None = None, profile_path: str | None = None,
              out_dir: str | None = None, wait_s: float = 0.0) -> dict:
    """The sweep under the store's write lock (it may fill the stage cache)."""
    from fleetsift.flows import env

    env.configure(store)
    from fleetsift.store import Store

    st = Store(store).init()
    with st.lock(wait_s=wait_s):
        return sweep_flow(inbox=str(Path(inbox).resolve()), store=str(st.root), labels=str(labels),
                          grid_path=grid_path, profile_path=profile_path, out_dir=out_dir)
