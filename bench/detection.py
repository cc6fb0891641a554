"""Detection quality, side by side in one run: every ordered pair of BasicMotions classes as a two-night fleet,
for the default scores and the alternatives they were chosen against, plus the demo fleet.

    python bench/detection.py                  # seeds 0-2, all variants, BasicMotions only (a few minutes)
    python bench/detection.py --seeds 0 --variants default
    python bench/detection.py --demo           # also the bundled demo fleet (embeds its video once, cached)

Fleets come from tests/opendata.py (build_pair_nights): BasicMotions (Bagnall et al. 2018, the UEA archive, shipped
in the sktime wheel), a watch IMU at 10 Hz; per pair the normal class is normal operation, one case of the anomaly
class is inserted into 3 of 4 recordings per night ("recurring", `--recurring 4`: into every one) or into 1
("one-off"); night 2 uses other cases
than night 1 and is scored against night 1's history. AUC is ROC AUC over windows that lie inside one case (a
window across the junction of two independently recorded cases is left out: labels of kind ignore); "all windows"
repeats it with every window, the junction ones counted as normal. Standard errors: Hanley & McNeil (1982); the
mean's SE assumes independent pairs. IsolationForest / LOF: scikit-learn on the tangent vectors of the same
windows (the comparison detectors of `fleetsift evaluate`).
"""

from __future__ import annotations

import argparse
import itertools
import os
import shutil
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))
warnings.filterwarnings("ignore")

import opendata  # noqa: E402  (tests/opendata.py)

# Profile variants: the default, and what the default was chosen against (each is the default but for one choice;
# "before" is this project's scoring before issue 11: windows, no history, one descriptor, ridge 0.3; "ridge 1" and
# "no trimming" each help the demo fleet a little and are measured here against the pairs).
VARIANTS = {
    "default": "",
    "knn in windows": "[scoring]\nknn_unit = \"window\"\n",
    "density (LOF)": "[scoring]\nmethod = \"density\"\n",
    "distance to mean": "[scoring]\nmethod = \"frechet_mean\"\n",
    "batch only": "[baseline]\nsource = \"batch\"\n",
    "ridge 0.3": "[descriptor]\nridge = 0.3\n",
    "ridge 1": "[descriptor]\nridge = 1.0\n",
    "no trimming": "[scoring]\ntrim_fraction = 0.0\n",
    "before": "[scoring]\nknn_unit = \"window\"\n[baseline]\nsource = \"batch\"\n[descriptor]\nridge = 0.3\n"
              "per_stream = false\n",
}


def _profile(extra: str) -> str:
    return opendata.PAIR_PROFILE + extra


def _all_windows_labels(n) -> Path:
    lab = pd.read_csv(n.labels)
    out = n.labels.with_name("labels-all.csv")
    lab[lab["kind"] != "ignore"].to_csv(out, index=False)
    return out


def run_pairs(seeds, variants, recurring: int, work: Path) -> pd.DataFrame:
    from fleetsift.flows.evaluate import evaluate_store

    rows = []
    for seed in seeds:
        for normal, anomaly in itertools.permutations(opendata.CLASSES, 2):
            for vname in variants:
                base = work / f"{vname.replace(' ', '_')}-{normal}-{anomaly}-{seed}"
                nights = opendata.build_pair_nights(base, normal, anomaly, seed=seed, recurring=recurring,
                                                    profile=_profile(VARIANTS[vname]))
                evs = opendata.score_nights(nights, base / "store", comparison=vname == "default")
                for i, (n, ev) in enumerate(zip(nights, evs)):
                    allw = evaluate_store(str(base / "store"), ev["run_id"], str(_all_windows_labels(n)),
                                          comparison=False)
                    row = {"seed": seed, "normal": normal, "anomaly": anomaly, "variant": vname, "night": i + 1,
                           "n_windows": ev["n_windows"], "n_anomalous": ev["n_anomalous"],
                           "source": ev["baseline"]["source"], "riemann_all": allw["auc"]["riemann"]}
                    for m in ("riemann", "logeuclid", "euclid"):
                        row[m], row[f"{m}_se"] = ev["auc"][m], ev["auc_se"][m]
                    for d in ("isolation_forest", "local_outlier_factor"):
                        row[d], row[f"{d}_se"] = ev["comparison_detectors"].get(d), ev["comparison_detectors_se"].get(d)
                    rows.append(row)
                shutil.rmtree(base, ignore_errors=True)
            print(f"  seed {seed} {normal} -> {anomaly} done", file=sys.stderr, flush=True)
    return pd.DataFrame(rows)


def _mean_se(x: pd.Series, se: pd.Series) -> str:
    x, se = x.astype(float), se.astype(float)
    return f"{x.mean():.3f} +- {np.sqrt((se ** 2).sum()) / len(se):.3f}"


def print_tables(df: pd.DataFrame, title: str) -> None:
    print(f"\n## {title}\n")
    print("Mean ROC AUC over the 12 ordered pairs and the seeds (+- SE of the mean, Hanley & McNeil):\n")
    print("| variant | night | riemann | logeuclid | euclid | riemann, all windows | IsolationForest |")
    print("|---|---|---|---|---|---|---|")
    for (v, night), g in df.groupby(["variant", "night"], sort=False):
        iso = _mean_se(g["isolation_forest"], g["isolation_forest_se"]) if g["isolation_forest"].notna().all() else "-"
        print(f"| {v} | {night} | {_mean_se(g['riemann'], g['riemann_se'])} | "
              f"{_mean_se(g['logeuclid'], g['logeuclid_se'])} | {_mean_se(g['euclid'], g['euclid_se'])} | "
              f"{g['riemann_all'].mean():.3f} | {iso} |")
    d = df[df["variant"] == "default"]
    if len(d):
        print("\nDefault profile, every pair (mean over seeds; riemann AUC +- SE, IsolationForest on the same "
              "windows):\n")
        print("| normal | anomaly | night 1 riemann | night 1 IsolationForest | night 2 riemann | "
              "night 2 IsolationForest | windows / anomalous (night 1) |")
        print("|---|---|---|---|---|---|---|")
        for (nm, an), g in d.groupby(["normal", "anomaly"], sort=False):
            g1, g2 = g[g["night"] == 1], g[g["night"] == 2]
            print(f"| {nm} | {an} | {_mean_se(g1['riemann'], g1['riemann_se'])} | "
                  f"{g1['isolation_forest'].mean():.3f} | {_mean_se(g2['riemann'], g2['riemann_se'])} | "
                  f"{g2['isolation_forest'].mean():.3f} | {g1['n_windows'].mean():.0f} / "
                  f"{g1['n_anomalous'].mean():.0f} |")


def run_demo(variants, work: Path) -> pd.DataFrame:
    """The bundled demo fleet, one night, through the stages in-process (the embeddings are cached in one store
    and reused by every variant: only the profile's scoring sections differ)."""
    from fleetsift.flows import night
    from fleetsift.flows.evaluate import evaluate_store
    from fleetsift.tasks import stages

    plain = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                        write=stages.run_write)
    rows = []
    base_profile = (ROOT / "sample_raw" / "profile.toml").read_text()
    for vname in variants:
        inbox = work / "demo-inbox"
        if not inbox.exists():
            shutil.copytree(ROOT / "sample_raw", inbox, ignore=shutil.ignore_patterns("*.py", "README.md"))
        prof = work / f"demo-{vname.replace(' ', '_')}.toml"
        prof.write_text(_merge(base_profile, VARIANTS[vname]))
        store = work / f"demo-store-{vname.replace(' ', '_')}"
        if store.exists():
            shutil.rmtree(store)
        shutil.copytree(work / "demo-cache", store / "cache", dirs_exist_ok=True) if (work / "demo-cache").exists() \
            else None
        t0 = time.time()
        res = night.run_night(plain, inbox=str(inbox), store=str(store), profile_path=str(prof), progress=True)
        ev = evaluate_store(str(store), res["run_id"], str(inbox / "labels.csv"), comparison=vname == "default")
        if not (work / "demo-cache").exists():
            shutil.copytree(store / "cache", work / "demo-cache", ignore=shutil.ignore_patterns("score"))
        rows.append({"variant": vname, **{m: ev["auc"][m] for m in ev["auc"]},
                     **{f"{m}_se": ev["auc_se"][m] for m in ev["auc_se"]},
                     "isolation_forest": ev["comparison_detectors"].get("isolation_forest"),
                     "n_windows": ev["n_windows"], "n_anomalous": ev["n_anomalous"],
                     "seconds": round(time.time() - t0, 1)})
    return pd.DataFrame(rows)


def run_demo_history(work: Path) -> dict:
    """Two demo nights in one store: night 1 a freshly generated fleet (make-sample seed 8, other rovers, other
    planted anomalies), night 2 the bundled fleet (seed 7), scored against night 1's history."""
    from fleetsift.demo import fleet as demo_fleet
    from fleetsift.flows import night
    from fleetsift.flows.evaluate import evaluate_store
    from fleetsift.tasks import stages

    plain = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                        write=stages.run_write)
    n1 = work / "demo-night-1"
    if not (n1 / "labels.csv").exists():
        demo_fleet.make_fleet(n1, n_recordings=8, duration_s=60.0, seed=8)
    n2 = work / "demo-inbox"
    if not n2.exists():
        shutil.copytree(ROOT / "sample_raw", n2, ignore=shutil.ignore_patterns("*.py", "README.md"))
    store = work / "demo-store-history"
    if store.exists():
        shutil.rmtree(store)
    for cache in ("demo-cache", "demo-history-cache"):  # embeddings of earlier runs of this benchmark
        if (work / cache).exists():
            shutil.copytree(work / cache, store / "cache", dirs_exist_ok=True)
    out = {}
    for name, inbox in (("night 1 (seed 8)", n1), ("night 2 (sample_raw)", n2)):
        res = night.run_night(plain, inbox=str(inbox), store=str(store), progress=True)
        ev = evaluate_store(str(store), res["run_id"], str(inbox / "labels.csv"), comparison=True)
        info = res["score"]["baseline"]
        out[name] = {**ev["auc"], "riemann_se": ev["auc_se"]["riemann"],
                     "isolation_forest": ev["comparison_detectors"].get("isolation_forest"),
                     "source": info["source"] + (" + tonight" if info["source"] == "history" and info["tonight"] else ""),
                     "n_windows": ev["n_windows"], "n_anomalous": ev["n_anomalous"]}
    shutil.copytree(store / "cache", work / "demo-history-cache", ignore=shutil.ignore_patterns("score"),
                    dirs_exist_ok=True)
    return out


def _merge(profile: str, extra: str) -> str:
    """The demo profile with one variant's keys set: each key's line in its section is replaced, or added right
    under the section header (the demo profile has every section the variants touch)."""
    import tomllib

    lines = profile.splitlines()
    for sec, keys in tomllib.loads(extra).items():
        head = lines.index(f"[{sec}]")
        end = next((i for i in range(head + 1, len(lines)) if lines[i].startswith("[")), len(lines))
        for key, v in keys.items():
            text = f'{key} = "{v}"' if isinstance(v, str) else f"{key} = {str(v).lower() if isinstance(v, bool) else v}"
            at = next((i for i in range(head + 1, end) if lines[i].split("=")[0].strip() == key), None)
            if at is None:
                lines.insert(head + 1, text)
                end += 1
            else:
                lines[at] = text
    return "\n".join(lines) + "\n"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seeds", default="0,1,2", help="comma-separated seeds (default 0,1,2)")
    ap.add_argument("--variants", default=",".join(VARIANTS), help=f"comma-separated, of {list(VARIANTS)}")
    ap.add_argument("--recurring", type=int, default=3, choices=(2, 3, 4),
                    help="how many of the 4 recordings per night carry the recurring fault (default 3; 4: every "
                         "recording, which no neighbour count in recordings can tell from normal operation)")
    ap.add_argument("--no-one-off", action="store_true", help="skip the one-off fault (1 of 4 recordings)")
    ap.add_argument("--demo", action="store_true", help="also score the bundled demo fleet per variant")
    ap.add_argument("--demo-history", action="store_true", dest="demo_history",
                    help="also score the bundled demo fleet as a second night after a generated one (seed 8)")
    ap.add_argument("--no-pairs", action="store_true", dest="no_pairs", help="skip the BasicMotions pairs")
    ap.add_argument("--work", help="working folder (default: a temporary one; the demo's embeddings are kept there)")
    ap.add_argument("--csv", help="write every row to this CSV")
    a = ap.parse_args(argv)
    seeds = [int(s) for s in a.seeds.split(",")]
    variants = [v.strip() for v in a.variants.split(",")]
    for v in variants:
        if v not in VARIANTS:
            ap.error(f"--variants: unknown {v!r}; known: {list(VARIANTS)}")
    work = Path(a.work) if a.work else Path(tempfile.mkdtemp(prefix="fleetsift-bench-detection-"))
    work.mkdir(parents=True, exist_ok=True)
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    print(f"# Detection benchmark (seeds {seeds}; load average {os.getloadavg()[0]:.1f})")
    t0 = time.time()
    frames = []
    if not a.no_pairs:
        rec = run_pairs(seeds, variants, a.recurring, work / "recurring")
        print_tables(rec, f"BasicMotions class pairs, the fault recurring in {a.recurring} of 4 recordings per night")
        frames.append(rec.assign(case="recurring"))
    if not a.no_one_off and not a.no_pairs:
        one = run_pairs(seeds, [v for v in variants if v in ("default", "before")] or variants[:1], 1,
                        work / "one-off")
        print_tables(one, "BasicMotions class pairs, a one-off fault (1 of 4 recordings per night)")
        frames.append(one.assign(case="one-off"))
    if a.demo:
        demo = run_demo(variants, work)
        print("\n## Demo fleet (sample_raw, one night: 8 rovers x 60 s)\n")
        print("| variant | riemann | logeuclid | euclid | IsolationForest | windows / anomalous |")
        print("|---|---|---|---|---|---|")
        for r in demo.itertuples():
            iso = "-" if r.isolation_forest is None or pd.isna(r.isolation_forest) else f"{r.isolation_forest:.3f}"
            print(f"| {r.variant} | {r.riemann:.3f} +- {r.riemann_se:.3f} | {r.logeuclid:.3f} | {r.euclid:.3f} | "
                  f"{iso} | {r.n_windows} / {r.n_anomalous} |")
        frames.append(demo.assign(case="demo"))
    if a.demo_history:
        hist = run_demo_history(work)
        print("\n## Demo fleet as the second night of a history (default profile)\n")
        print("| night | source | riemann | logeuclid | euclid | IsolationForest | windows / anomalous |")
        print("|---|---|---|---|---|---|---|")
        for name, r in hist.items():
            print(f"| {name} | {r['source']} | {r['riemann']:.3f} +- {r['riemann_se']:.3f} | {r['logeuclid']:.3f} | "
                  f"{r['euclid']:.3f} | {r['isolation_forest']:.3f} | {r['n_windows']} / {r['n_anomalous']} |")
    if a.csv:
        pd.concat(frames, ignore_index=True).to_csv(a.csv, index=False)
    print(f"\n({time.time() - t0:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
