"""What runs when on a night: the wiring shared by the Prefect flow (flows/nightly.py) and the direct path.

No Prefect import here. The flow passes its tasks as `steps`; `CACHED_ONLY` passes the plain stage functions, the
per-recording ones with `cached_only=True`, which raise `NotCached` before computing anything. A night on which no
recording needs reading, decoding or embedding (the fleet step alone may re-score, against a grown history, say,
in seconds) is so run and recorded without starting an orchestrator (see fleetsift.flows.cli.do_run).
"""

from __future__ import annotations

import time
import uuid
from dataclasses import dataclass
from datetime import datetime, timezone
from functools import partial
from pathlib import Path
from typing import Any, Callable

from fleetsift import __version__
from fleetsift.errors import InputError
from fleetsift.location import ObjectPath, resolved
from fleetsift.profile import PROFILE_NAME, Profile, load_profile, profile_for
from fleetsift.store import Store
from fleetsift.vocabulary import OK, SCORED, UNSCORED
from fleetsift.tasks import stages
from fleetsift.tasks.stages import NotCached  # noqa: F401 -- raised through run_night by CACHED_ONLY


@dataclass(frozen=True)
class Steps:
    """The stage callables a night calls: Prefect tasks (with .submit for parallel runners) or plain functions."""

    tables: Callable[..., dict]
    embed: Callable[..., dict]
    score: Callable[..., dict]
    write: Callable[..., dict]


CACHED_ONLY = Steps(tables=partial(stages.run_tables, cached_only=True),
                    embed=partial(stages.run_embed, cached_only=True), score=stages.run_score, write=stages.run_write)


def _is_store(p: "Path | ObjectPath") -> bool:
    # A store inside the inbox has its cache folders (Store.init) before its first table exists, so the runs
    # table alone would not reveal it on the first night.
    return ((p / "_delta_log").exists() or (p / "runs" / "_delta_log").exists() or (p / ".lock").exists()
            or ((p / "cache" / "tables").is_dir() and (p / "baselines").is_dir()))


def discover_inbox(inbox: "str | Path | ObjectPath", storage=None) -> "Path | ObjectPath":
    """The inbox folder (or bucket prefix), resolved; InputError naming it when it is not a folder."""
    p = resolved(inbox, storage)
    if not p.is_dir():
        raise InputError(p, "inbox", "a folder of recording folders", "no such folder")
    return p


def discover(inbox: "Path | ObjectPath") -> list["Path | ObjectPath"]:
    """Every sub-folder of the inbox is a recording (hidden ones and the store, if inside, are skipped)."""
    inbox = discover_inbox(inbox)
    return sorted(p for p in inbox.iterdir() if p.is_dir() and not p.name.startswith((".", "_"))
                  and not _is_store(p))


def new_run_id() -> str:
    return datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ") + "-" + uuid.uuid4().hex[:6]


def fleet_profile(inbox: "Path | ObjectPath", profile_path: str | None) -> Profile:
    if profile_path:
        return load_profile(profile_path)
    return load_profile(inbox / PROFILE_NAME)


STAGES = ("tables", "embed", "score")


def rebuild_plan(fleet: Profile, rebuild: tuple[str, ...]) -> dict[str, Any]:
    """What `--rebuild NAME ...` forces: a stage (tables, embed, score) or a stream's branch; the scores always
    follow what they depend on."""
    names = set(STAGES) | set(fleet.streams)
    for n in rebuild:
        if n not in names:
            raise InputError(fleet.path, "--rebuild", f"a stage {list(STAGES)} or a stream {sorted(fleet.streams)}",
                             repr(n))
    tables = "tables" in rebuild or any(s.name in rebuild for s in fleet.table_streams())
    embed = tuple(s.name for s in fleet.video_streams() if "embed" in rebuild or s.name in rebuild)
    return {"tables": tables, "embed": embed, "score": bool(rebuild)}


def prepare_recordings(tables: Callable[..., dict], embed: Callable[..., dict], fleet: Profile, recs: list[Path],
                       store: str, *, parallel: bool = False, progress: bool = True, force_tables: bool = False,
                       force_embed: tuple[str, ...] = ()) -> tuple[list[dict], dict[str, dict], dict[str, dict]]:
    """Each recording's table and video stage outputs (computed, or taken from the store's cache) and its outcome.

    ``tables``/``embed`` are the stage callables (Prefect tasks with ``.submit`` when ``parallel``). A recording
    is read with its own profile laid over the fleet's (windowing, descriptor and scoring stay the fleet's), and
    left unscored with the reason when that profile does not parse, a stage fails on it or it is shorter than one
    window. Returns (prepared ``[{"tables", "embed"}]`` of the recordings to score, rows ``{recording id: its
    recordings-table row}`` for every recording, stats ``{"tables"|"embed": {"computed", "reused"}}``).
    """
    rows: dict[str, dict] = {}
    jobs: list[tuple[str, Profile]] = []
    for rec in recs:
        try:
            prof = profile_for(rec, fleet)
        except InputError as e:
            rows[rec.name] = {"recording_id": rec.name, "content_hash": "", "duration_s": None,
                              "status": UNSCORED, "reason": str(e)}
            continue
        # Windowing, descriptor and scoring are the fleet's; a recording's own profile may only re-describe streams.
        jobs.append((str(rec), Profile(path=prof.path, streams=prof.streams, windowing=fleet.windowing,
                                       descriptor=fleet.descriptor, scoring=fleet.scoring, baseline=fleet.baseline,
                                       storage=fleet.storage)))

    if parallel:
        tab_f = [tables.submit(r, p, store, force=force_tables) for r, p in jobs]
        emb_f = [embed.submit(r, p, store, False, force_streams=force_embed) for r, p in jobs]
        tabs = [f.result() for f in tab_f]
        embs = [f.result() for f in emb_f]
    else:
        tabs = [tables(r, p, store, force=force_tables) for r, p in jobs]
        embs = [embed(r, p, store, progress, force_streams=force_embed) for r, p in jobs]

    prepared = []
    stats = {"tables": {"computed": 0, "reused": 0}, "embed": {"computed": 0, "reused": 0}}
    # Of tonight's computed embeddings (reused ones cost nothing tonight): frames sampled, frames whose embedding
    # was reused as unchanged (skip_threshold), damaged spans decoding skipped to the next keyframe.
    frames = {"frames": 0, "frames_skipped": 0, "damaged_spans": 0}
    for (rec, prof), tab, emb in zip(jobs, tabs, embs):
        name = Path(rec).name
        if tab["status"] == OK:
            stats["tables"]["reused" if tab["reused"] else "computed"] += 1
        if emb["status"] == OK:
            stats["embed"]["reused"] += emb["reused"]
            stats["embed"]["computed"] += emb["computed"]
            for k in frames:
                frames[k] += emb.get(k, 0)
        if tab["status"] == OK and tab["duration_s"] < fleet.windowing.window_s:
            tab = {"status": UNSCORED, "content": tab["content"], "duration_s": tab["duration_s"],
                   "reason": f"{rec}: windowing.window_s: expected a recording at least one window "
                             f"({fleet.windowing.window_s:g} s) long, got {tab['duration_s']:.3g} s"}
        bad = next((x for x in (tab, emb) if x["status"] != OK), None)
        if bad is not None:
            rows[name] = {"recording_id": name, "content_hash": tab.get("content", ""),
                          "duration_s": tab.get("duration_s"), "status": UNSCORED, "reason": bad["reason"]}
            continue
        prepared.append({"tables": tab, "embed": emb})
        rows[name] = {"recording_id": name, "content_hash": tab["content"], "duration_s": tab["duration_s"],
                      "status": SCORED, "reason": ""}
    stats["embed_frames"] = frames  # run_night moves it beside "stages" (whose entries count items)
    return prepared, rows, stats


def run_night(steps: Steps, inbox: str, store: str, profile_path: str | None = None, run_id: str | None = None,
              parallel: bool = False, progress: bool = True, rebuild: tuple[str, ...] = ()) -> dict[str, Any]:
    """Score every recording in the inbox against the fleet's baseline and append the run to the store.

    `rebuild` names stages or streams whose cached outputs are recomputed on purpose (see rebuild_plan).
    """
    started = time.time()
    run_id = run_id or new_run_id()
    st = Store(store).init()
    inbox_p = resolved(inbox)
    fleet = fleet_profile(inbox_p, profile_path)
    force = rebuild_plan(fleet, tuple(rebuild))
    recs = discover(inbox_p)

    prepared, rec_rows, stats = prepare_recordings(steps.tables, steps.embed, fleet, recs, str(st.root),
                                                   parallel=parallel, progress=progress, force_tables=force["tables"],
                                                   force_embed=force["embed"])
    embed_frames = stats.pop("embed_frames")
    stats["score"] = {"computed": 0, "reused": 0}

    score = None
    if prepared:
        try:
            score = steps.score(prepared, fleet, str(st.root), run_id, force=force["score"])
            stats["score"]["reused" if score["reused"] else "computed"] += 1
        except ValueError as e:
            # A fleet-level failure (e.g. channels differing between recordings): nothing scored, reason kept.
            for p in prepared:
                rid = p["tables"]["recording_id"]
                rec_rows[rid].update(status=UNSCORED, reason=f"fleet scoring: {e}")
    rows = [rec_rows[k] for k in sorted(rec_rows)]
    written = steps.write(str(st.root), run_id, started, fleet, __version__, rows, score, str(inbox_p))
    return {"run_id": run_id, "store": str(st.root), "store_version": written["version"],
            "windows_version": written["windows_version"], "table_versions": written["table_versions"],
            "score": score, "recordings": rows, "stages": stats, "embed_frames": embed_frames,
            "profile": fleet.path, "elapsed_s": round(time.time() - started, 2)}
