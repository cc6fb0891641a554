"""The `fleetsift` command."""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
from pathlib import Path

from fleetsift.flows import env
from fleetsift.safety import SAFETY_NOTE
from fleetsift.errors import EXIT_CODES
from fleetsift.vocabulary import SCORED, UNSCORED, VERDICTS

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_UNSCORED, EXIT_LOCKED, EXIT_NO_SERVER = (EXIT_CODES[k]["code"] for k in (
    "ok", "input_error", "usage", "unscored", "locked", "no_server"))
EXIT_EPILOG = "exit codes: " + "; ".join(f"{v['code']} {v['meaning']}" for v in EXIT_CODES.values())


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
            per[rid] = {"n_windows": int(len(sc)), "n_unscored_windows": int(g["score"].isna().sum()),
                        "max_score": _num(sc.max()) if len(sc) else None, "n_flagged": int(g["flagged"].sum())}
    unscored = [{"recording_id": r["recording_id"], "reason": r["reason"]}
                for r in result["recordings"] if r["status"] == UNSCORED]
    recs = []
    for r in result["recordings"]:
        item = {"recording_id": r["recording_id"], "status": r["status"]}
        if r["status"] == SCORED:
            item.update(per.get(r["recording_id"], {"n_windows": 0, "max_score": None, "n_flagged": 0}))
            item["duration_s"] = _num(r["duration_s"])
        else:
            item["reason"] = r["reason"]
        recs.append(item)
    return {
        "run_id": result["run_id"],
        "store": result["store"],
        # The runs table's version that committed this run (as `fleetsift history` and `report --as-of` use it);
        # each table has its own version, all in table_versions (for DeltaTable(STORE/TABLE, version=...)).
        "store_version": result["store_version"],
        "table_versions": result.get("table_versions"),
        "baseline_id": (result.get("score") or {}).get("baseline_id"),
        # Which references the scores were measured against: earlier nights (history), tonight's batch, or chosen
        # recordings; their count, recordings and the runs they come from.
        "baseline": (result.get("score") or {}).get("baseline"),
        "metric": metric,
        "thresholds": (result.get("score") or {}).get("thresholds"),
        "recordings": recs,
        "unscored": unscored,
        "quarantined": unscored,  # deprecated name of "unscored", removed in the next release
        "stages": result["stages"],
        # Of tonight's computed embeddings: frames sampled, those skipped as unchanged, damaged spans skipped.
        "embed_frames": result.get("embed_frames", {"frames": 0, "frames_skipped": 0, "damaged_spans": 0}),
        "orchestrator": result.get("orchestrator", "prefect"),
        "elapsed_s": result["elapsed_s"],
        "report": result.get("report"),
        "safety_note": SAFETY_NOTE,
        "note": SAFETY_NOTE,  # deprecated name of "safety_note", removed in the next release
    }


def print_table(summary: dict, out=sys.stdout) -> None:
    print(f"run {summary['run_id']}  runs-table version {summary['store_version']}  baseline {summary['baseline_id']}  "
          f"metric {summary['metric']}", file=out)
    print(f"{'recording':<28} {'status':<12} {'windows':>7} {'flagged':>7} {'max score':>10}", file=out)
    for r in summary["recordings"]:
        if r["status"] == SCORED:
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
    from fleetsift.flows import night

    storage = storage_settings(inbox, profile)
    # A missing inbox, a profile that does not parse or a misspelt --rebuild name is reported before any store
    # folder is made or read.
    fleet = night.fleet_profile(night.discover_inbox(inbox, storage), profile)
    if rebuild:
        night.rebuild_plan(fleet, tuple(rebuild))
    env.configure(store)
    from fleetsift.location import resolved
    from fleetsift.store import Store

    inbox = str(resolved(inbox, storage))
    st = Store(store, storage).init()
    with st.lock(wait_s=wait_s):
        # Rows of a run killed between its appends belong to no completed run: drop them before writing again.
        removed = st.remove_orphans()
        if any(removed.values()):
            print(f"removed rows of unfinished runs: {removed}", file=sys.stderr)

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
    warming = _warm_backbones(st, inbox, profile) if runner == "local" else None
    try:
        return fl(inbox=inbox, store=str(st.root), profile_path=profile, parallel=parallel,
                  progress=progress, rebuild=list(rebuild))
    finally:
        # A flow that fails early must not let the process exit while the thread is inside torch's or ONNX
        # Runtime's native code, which can abort it ("terminate called without an active exception").
        if warming is not None:
            warming.join()


def _warm_backbones(st, inbox: str, profile: str | None):
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
        except Exception:  # noqa: BLE001 - the embed task meets the same error and reports it
            pass

    thread = threading.Thread(target=load, name="fleetsift-warm-backbones", daemon=True)
    thread.start()
    return thread


def _guarded(fn):
    """Run ``fn()``; a locked store exits 4 and unusable input exits 1, each with one line and no traceback."""
    from fleetsift.errors import InputError, StoreLockedError

    try:
        return fn(), None
    except StoreLockedError as e:
        print(f"fleetsift: {e}", file=sys.stderr)
        return None, EXIT_LOCKED
    except InputError as e:
        print(f"fleetsift: {e}", file=sys.stderr)
        return None, EXIT_ERROR


def _existing_store(store: str, runs: bool = True):
    """The store at ``store``, or InputError when it holds no committed run (with ``runs=False``: none of the
    store's tables nor its stage cache). Nothing is created."""
    from fleetsift.errors import InputError
    from fleetsift.store import TABLES, Store

    st = Store(store)
    found = (st.root / "runs" / "_delta_log").exists() if runs else (
        (st.root / "cache").is_dir() or any((st.root / t / "_delta_log").exists() for t in TABLES))
    if not found:
        raise InputError(st.root, "store", "a results store with committed runs" if runs else "a results store",
                         "no such folder" if not st.root.exists() else "no runs table" if runs else "no store")
    return st


def cmd_run(a) -> int:
    from fleetsift.profile import load_profile

    result, code = _guarded(lambda: do_run(a.inbox, a.store, a.profile, a.runner, a.dask_address, a.wait,
                                           progress=not a.json, orchestrate=a.orchestrate,
                                           rebuild=tuple(a.rebuild or ())))
    if code is not None:
        return code
    metric = load_profile(result["profile"]).scoring.metric
    summary = summarise(result, metric)
    if a.json:
        print(json.dumps(summary))
    else:
        print_table(summary)
    for q in summary["unscored"]:
        print(f"unscored {q['recording_id']}: {q['reason']}", file=sys.stderr)
    return EXIT_UNSCORED if summary["unscored"] else EXIT_OK


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
    return EXIT_UNSCORED if summary["unscored"] else EXIT_OK


def cmd_make_sample(a) -> int:
    from fleetsift.demo import fleet as demo_fleet

    names = demo_fleet.make_fleet(a.out, n_recordings=a.recordings, duration_s=a.seconds, seed=a.seed)
    print(f"wrote {len(names)} recordings to {a.out}")
    return EXIT_OK


def cmd_evaluate(a) -> int:
    from fleetsift.errors import InputError

    if a.no_baselines_deprecated:
        print("fleetsift: --no-baselines is deprecated: use --no-comparison-detectors", file=sys.stderr)

    def go():
        if a.labels and not Path(a.labels).is_file():  # before an inbox is scored for nothing
            raise InputError(a.labels, "--labels", "a labels CSV file", "no such file")
        store = a.store or tempfile.mkdtemp(prefix="fleetsift-eval-")
        result = do_run(a.inbox, store, a.profile, "local", None, a.wait, progress=not a.json, report=False)
        from fleetsift.flows.evaluate import evaluate_store

        plot = a.plot or str(Path(store) / "reports" / f"{result['run_id']}-roc.png")
        return evaluate_store(store, result["run_id"], a.labels, plot=plot,
                              comparison=not (a.no_comparison or a.no_baselines_deprecated),
                              reviews_store=a.reviews_from)

    ev, code = _guarded(go)
    if code is not None:
        return code
    if a.json:
        print(json.dumps(ev))
    else:
        rows = [(m, v, ev["auc_se"].get(m)) for m, v in ev["auc"].items()]
        rows += [(f"{b.replace('_', ' ')} (comparison detector)", v, ev["comparison_detectors_se"].get(b))
                 for b, v in ev.get("comparison_detectors", {}).items()]
        for name, v, se in rows:
            auc = "n/a (one class only)" if v is None else f"{v:.3f}" + (f" +- {se:.3f}" if se is not None else "")
            print(f"{name:<44} ROC AUC {auc}")
        if ev.get("comparison_detectors_reason"):
            print(f"comparison detectors: {ev['comparison_detectors_reason']}")
        print(f"windows {ev['n_windows']}, anomalous {ev['n_anomalous']}" + (f"; ROC plot {ev['plot']}"
                                                                             if ev.get("plot") else ""))
    return EXIT_OK


def cmd_review(a) -> int:
    from fleetsift.flows.review import record_review

    def go():
        st = _existing_store(a.store)
        with st.lock(wait_s=a.wait):
            return record_review(str(st.root), a.run, a.verdict, windows=a.window or [],
                                 recordings=a.recording or [], note=a.note or "", reviewer=a.reviewer)

    rows, code = _guarded(go)
    if code is not None:
        return code
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
    def go():
        _existing_store(a.store)  # before env.configure, which makes folders in the store
        env.configure(a.store)
        from fleetsift.flows.report import write_report

        return write_report(a.store, a.run, a.out, as_of=a.as_of, top_n=a.top, profile=a.profile)

    path, code = _guarded(go)
    if code is not None:
        return code
    print(path)
    return EXIT_OK


def cmd_sweep(a) -> int:
    def go():
        from fleetsift.flows import night

        night.fleet_profile(night.discover_inbox(a.inbox), a.profile)  # before any store folder is made
        env.configure(a.store)
        from fleetsift.flows.sweep import run_sweep

        return run_sweep(a.inbox, a.store, a.labels, grid_path=a.grid, profile_path=a.profile, out_dir=a.out,
                         wait_s=a.wait)

    out, code = _guarded(go)
    if code is not None:
        return code
    if a.json:
        print(json.dumps(out))
        return EXIT_OK
    print(f"{'point':>5} {'varied':<9} {'window_s':>8} {'hop_s':>6} {'k':>3} {'kind':<10} {'shrinkage':<11} "
          f"{'metric':<10} {'ridge':>7} {'AUC':>6} {'+-':>6}")
    for r in out["points"]:
        auc = "  -   " if r["auc"] is None else f"{r['auc']:.3f}"
        se = "" if r["auc_se"] is None else f"{r['auc_se']:.3f}"
        print(f"{r['point']:>5} {r['varied']:<9} {r['window_s']:>8g} {r['hop_s']:>6g} {r['k']:>3} {r['kind']:<10} "
              f"{r['shrinkage']:<11} "
              f"{r['metric']:<10} {r['ridge']:>7g} {auc:>6} {se:>6}" + (f"  {r['error']}" if r["error"] else ""))
    print(f"table {out['csv']}\nplot  {out['plot']}")
    return EXIT_OK


def cmd_history(a) -> int:
    st, code = _guarded(lambda: _existing_store(a.store, runs=False))
    if code is not None:
        return code
    hist = st.runs_history()
    if a.json:
        print(hist.to_json(orient="records", date_format="iso"))
    else:
        print(hist.to_string(index=False) if len(hist) else "no runs yet")
    return EXIT_OK


def cmd_maintain(a) -> int:
    def go():
        st = _existing_store(a.store, runs=False)
        with st.lock(wait_s=a.wait):
            return st.maintain(retention_hours=a.retention_hours)

    out, code = _guarded(go)
    if code is not None:
        return code
    print(json.dumps(out) if a.json else "\n".join(f"{k}: {v}" for k, v in out.items()))
    return EXIT_OK


def cmd_serve(a) -> int:
    from fleetsift.flows import night

    _, code = _guarded(lambda: night.fleet_profile(night.discover_inbox(a.inbox), a.profile))
    if code is not None:
        return code
    from fleetsift.flows.serve import NO_SERVER, serve

    if not os.environ.get("PREFECT_API_URL"):
        print(NO_SERVER, file=sys.stderr)
        return EXIT_NO_SERVER
    env.configure(a.store)

    return serve(inbox=a.inbox, store=a.store, cron=a.cron, profile=a.profile, name=a.name)


class _HelpFormatter(argparse.HelpFormatter):
    """Every option's help ends with its default (or says it is required), so no option is left unexplained."""

    def _get_help_string(self, action):
        text = action.help or ""
        if not action.option_strings or "default" in text or text == argparse.SUPPRESS:
            return text
        if action.required:
            return f"{text} (required)"
        d = action.default
        if d is None or d is argparse.SUPPRESS:
            return text  # tests/test_cli.py requires such help to say its default in words
        if isinstance(d, bool):
            d = "on" if d else "off"
        return f"{text} (default: {d})"


def _sub(sub, name: str, **kw) -> argparse.ArgumentParser:
    return sub.add_parser(name, formatter_class=_HelpFormatter, description=kw.get("help"), **kw)


def _common(ps, *, inbox=False, store=None, profile=False, wait=False, json_=False) -> None:
    """Options that several commands share, with one wording each."""
    if inbox:
        ps.add_argument("--inbox", required=True, metavar="DIR",
                        help="inbox folder or s3://bucket/prefix URL, one sub-folder per recording")
    if store == "required":
        ps.add_argument("--store", required=True, metavar="DIR",
                        help="results store folder or s3://bucket/prefix URL (Delta Lake tables)")
    if profile:
        ps.add_argument("--profile", metavar="FILE",
                        help="sensor profile TOML (default: INBOX/profile.toml)")
    if wait:
        ps.add_argument("--wait", type=float, default=0.0, metavar="SECONDS",
                        help="seconds to wait for another run's store lock before exit 4")
    if json_:
        ps.add_argument("--json", action="store_true", help="print one JSON object instead of a table")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="fleetsift", formatter_class=_HelpFormatter,
                                description="Screen fleet recordings for abnormal windows. " + SAFETY_NOTE,
                                epilog=EXIT_EPILOG)
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    r = _sub(sub, "run", help="score every new or changed recording in an inbox into a results store")
    _common(r, inbox=True, store="required", profile=True)
    r.add_argument("--runner", choices=("local", "dask"), default="local",
                   help="local: one process; dask: per-recording stages on a Dask cluster")
    r.add_argument("--dask-address", metavar="ADDR",
                   help="scheduler of an existing Dask cluster, tcp://HOST:8786 "
                        "(default: a temporary 2-worker local cluster)")
    _common(r, wait=True)
    r.add_argument("--rebuild", action="append", metavar="NAME",
                   help="recompute a stage (tables, embed, score) or a stream's branch even when cached; "
                        "repeatable (default: none)")
    r.add_argument("--orchestrate", choices=("auto", "always"), default="auto",
                   help="auto: a night with nothing to compute is recorded without starting Prefect; "
                        "always: every night runs as a Prefect flow")
    _common(r, json_=True)
    r.set_defaults(fn=cmd_run)

    e = _sub(sub, "evaluate", help="score an inbox and compare with labelled anomalous intervals")
    _common(e, inbox=True)
    lab = e.add_mutually_exclusive_group(required=True)
    lab.add_argument("--labels", metavar="FILE",
                     help="CSV recording_id,t_start_s,t_end_s of anomalous intervals; "
                          "this or --reviews-from is required")
    lab.add_argument("--reviews-from", dest="reviews_from", metavar="STORE",
                     help="use the engineers' verdicts in this store as the labels (only reviewed windows count); "
                          "this or --labels is required")
    _common(e, profile=True)
    e.add_argument("--store", metavar="DIR", help="store to use (default: a scratch folder)")
    e.add_argument("--plot", metavar="FILE", help="write ROC curves to this PNG (default: STORE/reports/RUN-roc.png)")
    e.add_argument("--no-comparison-detectors", action="store_true", dest="no_comparison",
                   help="skip the comparison detectors (IsolationForest, LocalOutlierFactor)")
    e.add_argument("--no-baselines", action="store_true", dest="no_baselines_deprecated",
                   help="deprecated name of --no-comparison-detectors, removed in the next release")
    _common(e, wait=True, json_=True)
    e.set_defaults(fn=cmd_evaluate)

    rv = _sub(sub, "review", help="record an engineer's verdict on scored windows or recordings")
    _common(rv, store="required")
    rv.add_argument("--run", required=True, metavar="RUN_ID", help="the run whose windows were reviewed")
    rv.add_argument("--window", action="append", metavar="RECORDING:INDEX",
                    help="a reviewed window, e.g. rover-01-zone-s:12; repeatable (default: none)")
    rv.add_argument("--recording", action="append", metavar="RECORDING",
                    help="a whole reviewed recording; repeatable (default: none)")
    rv.add_argument("--verdict", required=True, choices=VERDICTS,
                    help="normal: the window joins the baseline and is not flagged again; fault: it never joins")
    rv.add_argument("--note", metavar="TEXT", help="free text kept with the verdict (default: empty)")
    rv.add_argument("--reviewer", metavar="NAME", help="who reviewed (default: the login name)")
    _common(rv, wait=True, json_=True)
    rv.set_defaults(fn=cmd_review)

    rp = _sub(sub, "report", help="write a self-contained HTML report of a run")
    _common(rp, store="required")
    rp.add_argument("--run", metavar="RUN_ID", help="the run to report (default: the latest run)")
    rp.add_argument("--as-of", type=int, dest="as_of", metavar="VERSION",
                    help="runs-table version to read, as `fleetsift history` lists it (default: the newest)")
    rp.add_argument("--out", required=True, metavar="FILE", help="HTML file to write")
    rp.add_argument("--top", type=int, default=10, metavar="N",
                    help="flagged windows shown with thumbnails and traces")
    rp.add_argument("--profile", metavar="FILE",
                    help="profile to read the recordings with (default: the inbox's profile.toml)")
    rp.set_defaults(fn=cmd_report)

    sw = _sub(sub, "sweep", help="ROC AUC against labels over a grid of window, hop, k, descriptor, metric")
    _common(sw, inbox=True)
    sw.add_argument("--labels", required=True, metavar="FILE",
                    help="CSV recording_id,t_start_s,t_end_s of anomalous intervals")
    sw.add_argument("--store", required=True, metavar="DIR", help="store whose stage cache the sweep reuses (and fills)")
    sw.add_argument("--grid", metavar="FILE",
                    help="grid TOML (default: one parameter at a time around the profile, 12 points)")
    _common(sw, profile=True)
    sw.add_argument("--out", metavar="DIR", help="folder for sweep.csv and sweep.png (default: STORE/sweeps/<time>)")
    _common(sw, wait=True, json_=True)
    sw.set_defaults(fn=cmd_sweep)

    h = _sub(sub, "history", help="list the store's runs with the runs-table version that committed each")
    _common(h, store="required", json_=True)
    h.set_defaults(fn=cmd_history)

    mt = _sub(sub, "maintain", help="compact the store's tables and vacuum files outside the retention")
    _common(mt, store="required")
    mt.add_argument("--retention-hours", type=float, default=168.0, dest="retention_hours", metavar="HOURS",
                    help="keep files (and time travel) this many hours back")
    _common(mt, wait=True, json_=True)
    mt.set_defaults(fn=cmd_maintain)

    s = _sub(sub, "serve", help="serve the nightly run on a cron schedule against a Prefect server")
    _common(s, inbox=True, store="required")
    s.add_argument("--cron", default="0 2 * * *", metavar="SCHEDULE", help="cron schedule of the nightly run")
    _common(s, profile=True)
    s.add_argument("--name", default="nightly", help="deployment name, fleetsift-scheduled/NAME")
    s.set_defaults(fn=cmd_serve)

    d = _sub(sub, "demo", help="run the whole job on the bundled demo fleet and write the report")
    d.add_argument("--inbox", metavar="DIR",
                   help="inbox to score (default: sample_raw/ with one recording written as a ROS 2 bag)")
    d.add_argument("--store", metavar="DIR", help="store folder (default: demo_out/store)")
    d.set_defaults(fn=cmd_demo)

    m = _sub(sub, "make-sample", help="generate a demo fleet of warehouse rover recordings")
    m.add_argument("--out", required=True, metavar="DIR", help="folder to write the recordings into")
    m.add_argument("--recordings", type=int, default=8, metavar="N", help="number of recordings")
    m.add_argument("--seconds", type=float, default=60.0, help="length of each recording in seconds")
    m.add_argument("--seed", type=int, default=7, help="random seed")
    m.set_defaults(fn=cmd_make_sample)
    return p


def _show_deprecation(message, category, filename, lineno, file=None, line=None, _default=None):
    """Deprecation messages (renamed profile keys, label columns) as one plain line, not a source excerpt."""
    if issubclass(category, FutureWarning):
        print(f"fleetsift: deprecated: {message}", file=sys.stderr)
    else:
        _default(message, category, filename, lineno, file, line)


def main(argv: list[str] | None = None) -> int:
    import functools
    import warnings

    if not getattr(warnings.showwarning, "fleetsift", False):  # once per process
        warnings.showwarning = functools.partial(_show_deprecation, _default=warnings.showwarning)
        warnings.showwarning.fleetsift = True
    args = build_parser().parse_args(argv)
    return int(args.fn(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
