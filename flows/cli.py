"""The `fleetsift` command."""

from __future__ import annotations

import argparse
import json
import math
import sys
import tempfile
from pathlib import Path

from fleetsift.flows import env
from fleetsift.safety import SAFETY_NOTE
from fleetsift.vocabulary import VERDICTS

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_QUARANTINED, EXIT_LOCKED = 0, 1, 2, 3, 4


def _num(x):
    if x is None:
        return None
    x = float(x)
    return None if math.isnan(x) else round(x, 6)


def summarise(result: dict, metric: str) -> dict:
    """The CLI contract's JSON: run id, store version, per recording its status, windows, top score, flags."""
    import pandas as pd

    per = {}
    if result.get("score"):
        from fleetsift.location import read_parquet

        w = read_parquet(result["score"]["path"])
        w = w[w["metric"] == metric]
        for rid, g in w.groupby("recording_id"):
            sc = g["score"].dropna()
            per[rid] = {"n_windows": int(len(sc)), "n_invalid_windows": int(g["score"].isna().sum()),
                        "max_score": _num(sc.max()) if len(sc) else None, "n_flagged": int(g["flagged"].sum())}
    recs = []
    for r in result["recordings"]:
        item = {"recording_id": r["recording_id"], "status": r["status"]}
        if r["status"] == "scored":
            item.update(per.get(r["recording_id"], {"n_windows": 0, "max_score": None, "n_flagged": 0}))
            item["duration_s"] = _num(r["duration_s"])
        else:
            item["reason"] = r["reason"]
        recs.append(item)
    return {
        "run_id": result["run_id"],
        "store": result["store"],
        "store_version": result["store_version"],
        "baseline_id": (result.get("score") or {}).get("baseline_id"),
        # Which references the scores were measured against: earlier nights (history), tonight's batch, or chosen
        # recordings; their count, recordings and the runs they come from.
        "baseline": (result.get("score") or {}).get("baseline"),
        "metric": metric,
        "thresholds": (result.get("score") or {}).get("thresholds"),
        "recordings": recs,
        "quarantined": [{"recording_id": r["recording_id"], "reason": r["reason"]}
                        for r in result["recordings"] if r["status"] == "quarantined"],
        "stages": result["stages"],
        # Of tonight's computed embeddings: frames sampled, those skipped as unchanged, damaged spans skipped.
        "embed_frames": result.get("embed_frames", {"frames": 0, "frames_skipped": 0, "damaged_spans": 0}),
        "orchestrator": result.get("orchestrator", "prefect"),
        "elapsed_s": result["elapsed_s"],
        "report": result.get("report"),
        "note": SAFETY_NOTE,
    }


def print_table(summary: dict, out=sys.stdout) -> None:
    print(f"run {summary['run_id']}  store version {summary['store_version']}  baseline {summary['baseline_id']}  "
          f"metric {summary['metric']}", file=out)
    print(f"{'recording':<28} {'status':<12} {'windows':>7} {'flagged':>7} {'max score':>10}", file=out)
    for r in summary["recordings"]:
        if r["status"] == "scored":
            ms = "-" if r.get("max_score") is None else f"{r['max_score']:.3f}"
            print(f"{r['recording_id']:<28} {r['status']:<12} {r['n_windows']:>7} {r['n_flagged']:>7} {ms:>10}",
                  file=out)
        else:
            print(f"{r['recording_id']:<28} {r['status']:<12}  {r['reason']}", file=out)
    st = summary["stages"]
    print("stages: " + ", ".join(f"{k} {v['computed']} computed / {v['reused']} reused" for k, v in st.items()),
          file=out)
    emb = summary.get("embed_frames", {})
    if emb.get("frames"):
        print(f"embed: {emb['frames']} frames, {emb['frames_skipped']} skipped as unchanged "
              f"({emb['frames_skipped'] / emb['frames']:.1%})"
              + (f", {emb['damaged_spans']} damaged spans skipped to the next keyframe" if emb.get("damaged_spans")
                 else ""), file=out)
    if summary.get("report"):
        print(f"report: {summary['report']}", file=out)
    print(SAFETY_NOTE, file=out)


def do_run(inbox: str, store: str, profile: str | None, runner: str, dask_address: str | None, wait_s: float,
           progress: bool, report: bool = True, orchestrate: str = "auto", rebuild: tuple[str, ...] = ()) -> dict:
    """One night under the store's write lock, then its report.

    With ``orchestrate="auto"`` a local night first tries the direct path (flows/night.py CACHED_ONLY): when every
    recording's stage outputs (tables, embeddings) are already cached, the fleet step runs and the night is recorded
    without starting Prefect, whose start-up would be most of the time; as soon as one recording needs work
    (checked before any write) the Prefect flow runs instead.
    """
    env.configure(store)
    from fleetsift.location import location, resolved
    from fleetsift.store import Store

    storage = storage_settings(inbox, profile)
    inbox = str(resolved(inbox, storage))
    st = Store(store, storage).init()
    with st.lock(wait_s=wait_s):
        # Rows of a run killed between its appends belong to no completed run: drop them before writing again.
        removed = st.remove_orphans()
        if any(removed.values()):
            print(f"removed rows of unfinished runs: {removed}", file=sys.stderr)
        from fleetsift.flows import night

        if rebuild:  # a misspelt name is refused before anything starts
            night.rebuild_plan(night.fleet_profile(location(inbox), profile), tuple(rebuild))
        result = None
        if orchestrate == "auto" and runner == "local" and not rebuild:
            try:
                result = night.run_night(night.CACHED_ONLY, inbox=inbox, store=str(st.root),
                                         profile_path=profile, progress=progress)
                result["orchestrator"] = "none"
            except night.NotCached as e:
                if progress:
                    print(f"to compute: {e} (and maybe more); starting the Prefect flow", file=sys.stderr)
        if result is None:
            result = _prefect_run(st, inbox, profile, runner, dask_address, progress, rebuild)
        if report:
            try:
                from fleetsift.flows.report import write_report

                out = st.root / "reports" / f"{result['run_id']}.html"
                write_report(str(st.root), result["run_id"], str(out))
                result["report"] = str(out)
            except Exception as e:  # the scores are stored; a report failure must not fail the night
                print(f"warning: report not written: {e}", file=sys.stderr)
    return result


def storage_settings(inbox: str, profile: str | None):
    """The [storage] section of --profile, else of the inbox's profile.toml (then read with the environment's
    settings alone); defaults when neither has one. A profile that does not load is reported by the night itself."""
    from fleetsift.location import location
    from fleetsift.profile import PROFILE_NAME, Storage, load_profile

    try:
        return load_profile(profile if profile else location(inbox) / PROFILE_NAME).storage
    except Exception:  # unreadable here: the night reads it again and names what is wrong
        return Storage()


def _prefect_run(st, inbox: str, profile: str | None, runner: str, dask_address: str | None, progress: bool,
                 rebuild: tuple[str, ...] = ()) -> dict:
    from fleetsift.flows.nightly import nightly_flow

    fl = nightly_flow
    parallel = False
    if runner == "dask":
        import logging

        from prefect_dask import DaskTaskRunner

        logging.getLogger("distributed").setLevel(logging.WARNING)  # dozens of INFO lines per run otherwise

        kwargs = {"address": dask_address} if dask_address else {
            "cluster_kwargs": {"n_workers": 2, "threads_per_worker": 1, "processes": True,
                               "dashboard_address": None}}
        fl = nightly_flow.with_options(task_runner=DaskTaskRunner(**kwargs))
        parallel = True
    if runner == "local":
        _warm_backbones(st, inbox, profile)
    return fl(inbox=inbox, store=str(st.root), profile_path=profile, parallel=parallel,
              progress=progress, rebuild=list(rebuild))


def _warm_backbones(st, inbox: str, profile: str | None) -> None:
    """Load the fleet's backbones (torch import, weights, ONNX export on a new store, ONNX Runtime session) in a
    thread while the flow starts Prefect's temporary server (measured ~8-12 s here), instead of after it: the
    embed tasks of this process then find them loaded (stages._backbone). Any failure is left to the task,
    which reports it per recording."""
    import threading

    from fleetsift.flows import night
    from fleetsift.tasks import stages

    def load() -> None:
        try:
            from fleetsift.location import resolved

            fleet = night.fleet_profile(resolved(inbox, st.storage), profile)
            for stream in fleet.video_streams():
                if stream.precision == "float32":  # int8 calibrates on the fleet's frames: left to the task
                    stages._backbone(stream, st)
        except Exception:  # noqa: BLE001 - the embed task meets the same error and quarantines with it
            pass

    threading.Thread(target=load, name="fleetsift-warm-backbones", daemon=True).start()


def cmd_run(a) -> int:
    from fleetsift.errors import InputError, StoreLockedError
    from fleetsift.profile import load_profile

    try:
        result = do_run(a.inbox, a.store, a.profile, a.runner, a.dask_address, a.wait, progress=not a.json,
                        orchestrate=a.orchestrate, rebuild=tuple(a.rebuild or ()))
    except StoreLockedError as e:
        print(f"fleetsift: {e}", file=sys.stderr)
        return EXIT_LOCKED
    except InputError as e:
        print(f"fleetsift: {e}", file=sys.stderr)
        return EXIT_ERROR
    metric = load_profile(result["profile"]).scoring.metric
    summary = summarise(result, metric)
    if a.json:
        print(json.dumps(summary))
    else:
        print_table(summary)
    for q in summary["quarantined"]:
        print(f"quarantined {q['recording_id']}: {q['reason']}", file=sys.stderr)
    return EXIT_QUARANTINED if summary["quarantined"] else EXIT_OK


DEMO_BAG_RECORDING = "rover-02-zone-z"


def cmd_demo(a) -> int:
    root = Path(__file__).resolve().parent.parent
    store = Path(a.store) if a.store else root / "demo_out" / "store"
    if a.inbox:
        inbox = Path(a.inbox)
    else:
        # The bundled fleet, with one recording written as a ROS 2 bag so the log path runs too.
        from fleetsift.demo.bag import demo_inbox_with_bag

        inbox = demo_inbox_with_bag(root / "sample_raw", store.parent / "demo_inbox", DEMO_BAG_RECORDING)
        print(f"demo inbox {inbox}: {DEMO_BAG_RECORDING} as a ROS 2 bag (MCAP), the rest as CSV + MP4")
    result = do_run(str(inbox), str(store), None, "local", None, 60.0, progress=True)
    from fleetsift.profile import load_profile

    summary = summarise(result, load_profile(result["profile"]).scoring.metric)
    print_table(summary)
    labels = inbox / "labels.csv"
    if labels.exists():
        from fleetsift.flows.evaluate import evaluate_store

        ev = evaluate_store(str(store), result["run_id"], str(labels))
        print("ROC AUC against the demo labels: " + ", ".join(f"{m} {v:.3f}" for m, v in ev["auc"].items()
                                                             if v is not None))
    return EXIT_QUARANTINED if summary["quarantined"] else EXIT_OK


def cmd_make_sample(a) -> int:
    from fleetsift.demo import fleet as demo_fleet

    names = demo_fleet.make_fleet(a.out, n_recordings=a.recordings, duration_s=a.seconds, seed=a.seed)
    print(f"wrote {len(names)} recordings to {a.out}")
    return EXIT_OK


def cmd_evaluate(a) -> int:
    from fleetsift.errors import InputError, StoreLockedError

    store = a.store or tempfile.mkdtemp(prefix="fleetsift-eval-")
    try:
        result = do_run(a.inbox, store, a.profile, "local", None, a.wait, progress=not a.json, report=False)
        from fleetsift.flows.evaluate import evaluate_store

        plot = a.plot or str(Path(store) / "reports" / f"{result['run_id']}-roc.png")
        ev = evaluate_store(store, result["run_id"], a.labels, plot=plot, baselines=not a.no_baselines,
                            reviews_store=a.reviews_from)
    except (InputError, StoreLockedError) as e:
        print(f"fleetsift: {e}", file=sys.stderr)
        return EXIT_ERROR
    if a.json:
        print(json.dumps(ev))
    else:
        rows = [(m, v, ev["auc_se"].get(m)) for m, v in ev["auc"].items()]
        rows += [(b.replace("_", " "), v, ev["baselines_se"].get(b)) for b, v in ev.get("baselines", {}).items()]
        for name, v, se in rows:
            auc = "n/a (one class only)" if v is None else f"{v:.3f}" + (f" +- {se:.3f}" if se is not None else "")
            print(f"{name:<22} ROC AUC {auc}")
        if ev.get("baselines_note"):
            print(f"outlier baselines: {ev['baselines_note']}")
        print(f"windows {ev['n_windows']}, anomalous {ev['n_anomalous']}" + (f"; ROC plot {ev['plot']}"
                                                                             if ev.get("plot") else ""))
    return EXIT_OK


def cmd_review(a) -> int:
    from fleetsift.errors import InputError, StoreLockedError
    from fleetsift.flows.review import record_review
    from fleetsift.store import Store

    st = Store(a.store)
    if not (st.root / "runs" / "_delta_log").exists():
        print(f"fleetsift: {st.root}: store: expected a results store with committed runs, got none", file=sys.stderr)
        return EXIT_ERROR
    try:
        with st.lock(wait_s=a.wait):
            rows = record_review(str(st.root), a.run, a.verdict, windows=a.window or [], recordings=a.recording or [],
                                 note=a.note or "", reviewer=a.reviewer)
    except StoreLockedError as e:
        print(f"fleetsift: {e}", file=sys.stderr)
        return EXIT_LOCKED
    except InputError as e:
        print(f"fleetsift: {e}", file=sys.stderr)
        return EXIT_ERROR
    out = {"review_id": rows["review_id"].iloc[0], "verdict": a.verdict, "run_id": a.run,
           "windows": [{"recording_id": r.recording_id, "window_index": int(r.window_index)}
                       for r in rows.itertuples(index=False)]}
    if a.json:
        print(json.dumps(out))
    else:
        what = ", ".join(f"{w['recording_id']}" + ("" if w["window_index"] < 0 else f":{w['window_index']}")
                         for w in out["windows"])
        print(f"recorded {a.verdict} for {what} (review {out['review_id']}); it applies from the next night on")
    return EXIT_OK


def cmd_report(a) -> int:
    env.configure(a.store)
    from fleetsift.flows.report import write_report

    path = write_report(a.store, a.run, a.out, as_of=a.as_of, top_n=a.top, profile=a.profile)
    print(path)
    return EXIT_OK


def cmd_sweep(a) -> int:
    from fleetsift.errors import InputError, StoreLockedError

    env.configure(a.store)
    from fleetsift.flows.sweep import run_sweep

    try:
        out = run_sweep(a.inbox, a.store, a.labels, grid_path=a.grid, profile_path=a.profile, out_dir=a.out,
                        wait_s=a.wait)
    except (InputError, StoreLockedError) as e:
        print(f"fleetsift: {e}", file=sys.stderr)
        return EXIT_ERROR
    if a.json:
        print(json.dumps(out))
        return EXIT_OK
    print(f"{'point':>5} {'varied':<9} {'window_s':>8} {'hop_s':>6} {'k':>3} {'kind':<12} {'metric':<10} "
          f"{'ridge':>7} {'AUC':>6} {'+-':>6}")
    for r in out["points"]:
        auc = "  -   " if r["auc"] is None else f"{r['auc']:.3f}"
        se = "" if r["auc_se"] is None else f"{r['auc_se']:.3f}"
        print(f"{r['point']:>5} {r['varied']:<9} {r['window_s']:>8g} {r['hop_s']:>6g} {r['k']:>3} {r['kind']:<12} "
              f"{r['metric']:<10} {r['ridge']:>7g} {auc:>6} {se:>6}" + (f"  {r['error']}" if r["error"] else ""))
    print(f"table {out['csv']}\nplot  {out['plot']}")
    return EXIT_OK


def cmd_history(a) -> int:
    from fleetsift.store import Store

    hist = Store(a.store).runs_history()
    if a.json:
        print(hist.to_json(orient="records", date_format="iso"))
    else:
        print(hist.to_string(index=False) if len(hist) else "no runs yet")
    return EXIT_OK


def cmd_maintain(a) -> int:
    from fleetsift.store import Store

    st = Store(a.store)
    with st.lock(wait_s=a.wait):
        out = st.maintain(retention_hours=a.retention_hours)
    print(json.dumps(out) if a.json else "\n".join(f"{k}: {v}" for k, v in out.items()))
    return EXIT_OK


def cmd_serve(a) -> int:
    env.configure(a.store)
    from fleetsift.flows.serve import serve

    return serve(inbox=a.inbox, store=a.store, cron=a.cron, profile=a.profile, name=a.name)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="fleetsift", description="Screen fleet recordings for abnormal windows. "
                                + SAFETY_NOTE)
    sub = p.add_subparsers(dest="command", required=True)

    r = sub.add_parser("run", help="score every new or changed recording in an inbox into a results store")
    r.add_argument("--inbox", required=True)
    r.add_argument("--store", required=True)
    r.add_argument("--profile")
    r.add_argument("--runner", choices=("local", "dask"), default="local")
    r.add_argument("--dask-address")
    r.add_argument("--wait", type=float, default=0.0, help="seconds to wait for another run's store lock")
    r.add_argument("--rebuild", action="append", metavar="NAME",
                   help="recompute a stage (tables, embed, score) or a stream's branch even when cached; repeatable")
    r.add_argument("--orchestrate", choices=("auto", "always"), default="auto",
                   help="auto: a night with nothing to compute is recorded without starting Prefect; "
                        "always: every night runs as a Prefect flow")
    r.add_argument("--json", action="store_true")
    r.set_defaults(fn=cmd_run)

    e = sub.add_parser("evaluate", help="score an inbox and compare with labelled anomalous intervals")
    e.add_argument("--inbox", required=True)
    lab = e.add_mutually_exclusive_group(required=True)
    lab.add_argument("--labels", help="CSV recording,start_s,end_s of anomalous intervals")
    lab.add_argument("--reviews-from", dest="reviews_from", metavar="STORE",
                     help="use the engineers' verdicts in this store as the labels (only reviewed windows count)")
    e.add_argument("--profile")
    e.add_argument("--store", help="store to use (default: a scratch folder)")
    e.add_argument("--plot", help="write ROC curves to this PNG (default STORE/reports/RUN-roc.png)")
    e.add_argument("--no-baselines", action="store_true", dest="no_baselines",
                   help="skip the IsolationForest / LocalOutlierFactor comparison")
    e.add_argument("--wait", type=float, default=0.0)
    e.add_argument("--json", action="store_true")
    e.set_defaults(fn=cmd_evaluate)

    rv = sub.add_parser("review", help="record an engineer's verdict on scored windows or recordings")
    rv.add_argument("--store", required=True, help="the results store holding the run")
    rv.add_argument("--run", required=True, help="the run whose windows were reviewed")
    rv.add_argument("--window", action="append", metavar="RECORDING:INDEX",
                    help="a reviewed window, e.g. rover-01-zone-s:12 (repeatable)")
    rv.add_argument("--recording", action="append", metavar="RECORDING",
                    help="a whole reviewed recording (repeatable)")
    rv.add_argument("--verdict", required=True, choices=VERDICTS,
                    help="normal: the window joins the baseline and is not flagged again; fault: it never joins")
    rv.add_argument("--note", help="free text kept with the verdict")
    rv.add_argument("--reviewer", help="who reviewed (default: the login name)")
    rv.add_argument("--wait", type=float, default=0.0, help="seconds to wait for another run's store lock")
    rv.add_argument("--json", action="store_true")
    rv.set_defaults(fn=cmd_review)

    rp = sub.add_parser("report", help="write a self-contained HTML report of a run")
    rp.add_argument("--store", required=True)
    rp.add_argument("--run")
    rp.add_argument("--as-of", type=int, dest="as_of", help="store version to read (time travel)")
    rp.add_argument("--out", required=True)
    rp.add_argument("--top", type=int, default=10, help="flagged windows shown with thumbnails and traces")
    rp.add_argument("--profile", help="profile to read the recordings with (default: the inbox's profile.toml)")
    rp.set_defaults(fn=cmd_report)

    sw = sub.add_parser("sweep", help="ROC AUC against labels over a grid of window, hop, k, descriptor, metric")
    sw.add_argument("--inbox", required=True)
    sw.add_argument("--labels", required=True)
    sw.add_argument("--store", required=True, help="store whose stage cache the sweep reuses (and fills)")
    sw.add_argument("--grid", help="grid TOML (default: one parameter at a time around the profile, 12 points)")
    sw.add_argument("--profile")
    sw.add_argument("--out", help="folder for sweep.csv and sweep.png (default STORE/sweeps/<time>)")
    sw.add_argument("--wait", type=float, default=0.0)
    sw.add_argument("--json", action="store_true")
    sw.set_defaults(fn=cmd_sweep)

    h = sub.add_parser("history", help="list the store's runs and versions")
    h.add_argument("--store", required=True)
    h.add_argument("--json", action="store_true")
    h.set_defaults(fn=cmd_history)

    mt = sub.add_parser("maintain", help="compact the store's tables and vacuum files outside the retention")
    mt.add_argument("--store", required=True)
    mt.add_argument("--retention-hours", type=float, default=168.0, dest="retention_hours")
    mt.add_argument("--wait", type=float, default=0.0)
    mt.add_argument("--json", action="store_true")
    mt.set_defaults(fn=cmd_maintain)

    s = sub.add_parser("serve", help="serve the nightly run on a cron schedule against a Prefect server")
    s.add_argument("--inbox", required=True)
    s.add_argument("--store", required=True)
    s.add_argument("--cron", default="0 2 * * *")
    s.add_argument("--profile")
    s.add_argument("--name", default="nightly")
    s.set_defaults(fn=cmd_serve)

    d = sub.add_parser("demo", help="run the whole job on the bundled demo fleet and write the report")
    d.add_argument("--inbox", help=argparse.SUPPRESS)
    d.add_argument("--store", help="store folder (default demo_out/store)")
    d.set_defaults(fn=cmd_demo)

    m = sub.add_parser("make-sample", help="generate a demo fleet of warehouse rover recordings")
    m.add_argument("--out", required=True)
    m.add_argument("--recordings", type=int, default=8)
    m.add_argument("--seconds", type=float, default=60.0)
    m.add_argument("--seed", type=int, default=7)
    m.set_defaults(fn=cmd_make_sample)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return int(args.fn(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
