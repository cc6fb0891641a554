"""The nightly run: what runs when. Tasks do the work; this file only wires them."""

from __future__ import annotations

import time
import uuid
from datetime import datetime, timezone
from pathlib import Path

from prefect import flow

from fleetsift import __version__
from fleetsift.errors import InputError
from fleetsift.profile import PROFILE_NAME, Profile, load_profile, profile_for
from fleetsift.store import Store
from tasks import stages


def _is_store(p: Path) -> bool:
    # A store inside the inbox has its cache folders (Store.init) before its first table exists, so the runs
    # table alone would not reveal it on the first night.
    return ((p / "_delta_log").exists() or (p / "runs" / "_delta_log").exists() or (p / ".lock").exists()
            or ((p / "cache" / "tables").is_dir() and (p / "baselines").is_dir()))


def discover(inbox: Path) -> list[Path]:
    """Every sub-folder of the inbox is a recording (hidden ones and the store, if inside, are skipped)."""
    if not inbox.is_dir():
        raise InputError(inbox, "inbox", "a folder of recording folders", "no such folder")
    return sorted(p for p in inbox.iterdir() if p.is_dir() and not p.name.startswith((".", "_"))
                  and not _is_store(p))


def new_run_id() -> str:
    return datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ") + "-" + uuid.uuid4().hex[:6]


def fleet_profile(inbox: Path, profile_path: str | None) -> Profile:
    if profile_path:
        return load_profile(profile_path)
    return load_profile(inbox / PROFILE_NAME)


@flow(name="fleetsift-nightly", log_prints=False)
def nightly_flow(inbox: str, store: str, profile_path: str | None = None, run_id: str | None = None,
                 parallel: bool = False, progress: bool = True) -> dict:
    """Score every recording in the inbox against the fleet's baseline and append the run to the store."""
    started = time.time()
    run_id = run_id or new_run_id()
    st = Store(store).init()
    inbox_p = Path(inbox).resolve()
    fleet = fleet_profile(inbox_p, profile_path)
    recs = discover(inbox_p)

    rec_rows: dict[str, dict] = {}
    jobs: list[tuple[str, Profile]] = []
    for rec in recs:
        try:
            prof = profile_for(rec, fleet)
        except InputError as e:
            rec_rows[rec.name] = {"recording_id": rec.name, "content_hash": "", "duration_s": None,
                                  "status": "quarantined", "reason": str(e)}
            continue
        # Windowing, descriptor and scoring are the fleet's; a recording's own profile may only re-describe streams.
        jobs.append((str(rec), Profile(path=prof.path, streams=prof.streams, windowing=fleet.windowing,
                                       descriptor=fleet.descriptor, scoring=fleet.scoring, baseline=fleet.baseline)))

    if parallel:
        tab_f = [stages.tables_task.submit(r, p, str(st.root)) for r, p in jobs]
        emb_f = [stages.embed_task.submit(r, p, str(st.root), False) for r, p in jobs]
        tabs = [f.result() for f in tab_f]
        embs = [f.result() for f in emb_f]
    else:
        tabs = [stages.tables_task(r, p, str(st.root)) for r, p in jobs]
        embs = [stages.embed_task(r, p, str(st.root), progress) for r, p in jobs]

    prepared = []
    stats = {"tables": {"computed": 0, "reused": 0}, "embed": {"computed": 0, "reused": 0},
             "score": {"computed": 0, "reused": 0}}
    for (rec, prof), tab, emb in zip(jobs, tabs, embs):
        name = Path(rec).name
        if tab["status"] == "ok":
            stats["tables"]["reused" if tab["reused"] else "computed"] += 1
        if emb["status"] == "ok":
            stats["embed"]["reused"] += emb["reused"]
            stats["embed"]["computed"] += emb["computed"]
        if tab["status"] == "ok" and tab["duration_s"] < fleet.windowing.window_s:
            tab = {"status": "quarantined", "content": tab["content"], "duration_s": tab["duration_s"],
                   "reason": f"{rec}: windowing.window_s: expected a recording at least one window "
                             f"({fleet.windowing.window_s:g} s) long, got {tab['duration_s']:.3g} s"}
        bad = next((x for x in (tab, emb) if x["status"] != "ok"), None)
        if bad is not None:
            rec_rows[name] = {"recording_id": name, "content_hash": tab.get("content", ""),
                              "duration_s": tab.get("duration_s"), "status": "quarantined", "reason": bad["reason"]}
            continue
        prepared.append({"tables": tab, "embed": emb})
        rec_rows[name] = {"recording_id": name, "content_hash": tab["content"], "duration_s": tab["duration_s"],
                          "status": "scored", "reason": ""}

    score = None
    if prepared:
        try:
            score = stages.score_task(prepared, fleet, str(st.root), run_id)
            stats["score"]["reused" if score["reused"] else "computed"] += 1
        except ValueError as e:
            # A fleet-level failure (e.g. channels differing between recordings): nothing scored, reason kept.
            for p in prepared:
                rid = p["tables"]["recording_id"]
                rec_rows[rid].update(status="quarantined", reason=f"fleet scoring: {e}")
    rows = [rec_rows[k] for k in sorted(rec_rows)]
    written = stages.write_task(str(st.root), run_id, started, fleet, __version__, rows, score, str(inbox_p))
    return {"run_id": run_id, "store": str(st.root), "store_version": written["version"],
            "windows_version": written["windows_version"], "score": score, "recordings": rows, "stages": stats,
            "profile": fleet.path, "elapsed_s": round(time.time() - started, 2)}


@flow(name="fleetsift-scheduled", log_prints=True)
def scheduled_run(inbox: str, store: str, profile_path: str | None = None) -> dict:
    """What a scheduled deployment runs: the nightly flow under the store's write lock, plus the report."""
    from flows.report import write_report

    st = Store(store).init()
    with st.lock(wait_s=3600):
        result = nightly_flow(inbox=inbox, store=store, profile_path=profile_path, progress=False)
    out = st.root / "reports" / f"{result['run_id']}.html"
    write_report(str(st.root), result["run_id"], str(out))
    print(f"fleetsift run {result['run_id']}: store version {result['store_version']}, report {out}")
    return {"run_id": result["run_id"], "store_version": result["store_version"], "report": str(out)}
