"""Prefect tasks: each loads its inputs, calls the featurizers, persists its output in the store and returns paths.

Every stage output is stored under stage_key(content hash, the profile section the stage reads, code version), so
a warm night reuses everything unchanged and an IMU-calibration change never re-decodes video. The plain functions
(`run_*`) do the work and are what tests call; the `@task` wrappers in tasks/flow_tasks.py are all Prefect sees.
This module never imports Prefect: a night with nothing to compute runs these functions directly.
"""

from __future__ import annotations

import functools
import hashlib
import json
import sys
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from fleetsift import codebase
from fleetsift.errors import InputError
from fleetsift.profile import Profile, VideoStream
from fleetsift.location import ObjectPath, location, read_parquet, write_atomic
from fleetsift.store import Store, code_version, stage_key
from fleetsift.vocabulary import METRICS, OK, PARTIAL, SCORED, UNSCORED
from fleetsift.featurizers import recording, video, weights
from fleetsift.scoring import fleet
from fleetsift.scoring.history import Bank, Reviews, assemble
# featurizers/embed.py (torch, torchvision) is imported only where frames are embedded: a night that reuses every
# embedding never loads them.

_BACKBONES: dict[tuple, Any] = {}
_BACKBONES_LOCK = threading.Lock()


class NotCached(Exception):
    """A stage called with ``cached_only=True`` whose output is not in the cache (raised before any work)."""


# What each stage runs, by its entry modules: its code version hashes these and every featurizer or scoring module
# they import (fleetsift.codebase.closure, lazy imports included), the vocabularies, and the stage's own functions
# below. A module a stage does not reach (the demo's video writer, the PCA for the embeddings) stays out of its
# version, and so does the rest of the core: the profile values a stage reads are in its key already (its profile
# section), errors and the store only shape messages and files; so a new profile key never re-embeds a video.
STAGE_CODE: dict[str, tuple[str, ...]] = {
    "tables": ("fleetsift.featurizers.recording",),
    "embed": ("fleetsift.featurizers.video", "fleetsift.featurizers.embed", "fleetsift.featurizers.weights",
              "fleetsift.featurizers.logs"),  # logs: frames of image topics in ROS 2 bags
    "score": tuple(codebase.subpackage("fleetsift.scoring")),
}
STAGE_FUNCTIONS: dict[str, tuple[str, ...]] = {
    "tables": ("run_tables",), "embed": ("run_embed", "_frames", "_backbone", "skip_gap_s", "int8_calibration",
                        "int8_calibration_recordings"),
    "score": ("run_score", "load_features", "space_key", "table_streams_of", "load_history", "load_reviews",
              "_history_digest", "_save_baseline"),
}


_HASHED = ("fleetsift.featurizers", "fleetsift.scoring", "fleetsift.vocabulary")


def stage_modules(stage: str) -> list[str]:
    """The modules in a stage's code version (sorted): what it runs of the featurizers, scoring and vocabulary."""
    return [m for m in codebase.closure(STAGE_CODE[stage]) if m.startswith(_HASHED)]


@functools.cache
def stage_version(stage: str) -> str:
    """The code version in a stage's cache keys: the source of every module and function it runs (read, not
    imported: the embed stage's key never loads torch). Cached for the process, like the code it describes."""
    return code_version(*stage_modules(stage), *(f"{__name__}:{f}" for f in STAGE_FUNCTIONS[stage]))


def recording_hash(store: Store, rec_dir: Path, files: list[Path]) -> str:
    import hashlib

    h = hashlib.sha256()
    for f in sorted(files):
        h.update(f.name.encode())
        if f.is_dir():  # a ROS 2 bag folder
            for sub in sorted(p for p in f.rglob("*") if p.is_file()):
                h.update(store.file_hash(sub).encode())
        else:
            h.update(store.file_hash(f).encode())
    return h.hexdigest()[:16]


def unscored(rec_id: str, reason: str, **extra) -> dict:
    return {"recording_id": rec_id, "status": UNSCORED, "reason": reason, **extra}


def run_tables(rec_dir: str, profile: Profile, store_root: str, cached_only: bool = False, force: bool = False) -> dict:
    """Table streams -> calibrated, resampled common clock (one .npz per recording); `force` recomputes and
    overwrites a cached output."""
    store = Store(store_root, profile.storage)
    rec_dir = location(rec_dir, profile.storage)
    rec_id = rec_dir.name
    try:
        streams = profile.table_streams()
        files = [recording.resolve_stream_file(rec_dir, s.file, s.name) for s in streams]
        content = recording_hash(store, rec_dir, files)
        section = {"streams": {s.name: profile.section(f"streams.{s.name}") for s in streams},
                   "rate_hz": profile.windowing.rate_hz, "max_gap_s": profile.windowing.max_gap_s}
        key = stage_key("tables", content, section, stage_version("tables"))
        out = store.cache_path("tables", key)
        if out.exists() and not force:
            meta = json.loads(str(Store.load_arrays(out)["meta"]))
            return {"recording_id": rec_id, "status": OK, "path": str(out), "reused": True, "content": content,
                    **meta}
        if cached_only:
            raise NotCached(f"tables of {rec_id}")
        raws = [recording.read_table_stream(rec_dir, s) for s in streams]
        t0, t, values, valid, names = recording.common_clock(raws, profile.windowing.rate_hz,
                                                             profile.windowing.max_gap_s)
        if len(t) < 2:
            raise InputError(rec_dir, "time span", "a recording longer than two clock samples", f"{len(t)} samples")
        repairs = {Path(r.file).name: r.repairs for r in raws if r.repairs}
        meta = {"t0": t0, "duration_s": float(t[-1] - t[0]), "channels": names, "repairs": repairs,
                "valid_share": float(valid.mean())}
        store.save_arrays(out, t=t, values=values, valid=valid, meta=np.array(json.dumps(meta)))
        return {"recording_id": rec_id, "status": OK, "path": str(out), "reused": False, "content": content, **meta}
    except InputError as e:
        return unscored(rec_id, str(e))


def onnx_cache_dir(store: Store) -> Path:
    """Where the backbone's ONNX export is cached: in a local store, its cache folder; with a store on object
    storage, this machine's temporary folder (ONNX Runtime loads a graph from a local file, and each worker of a
    cluster that shares no disk exports it once; the file name holds every input of the export)."""
    if store.remote:
        import tempfile

        return Path(tempfile.gettempdir()) / "fleetsift-onnx"
    return store.root / "cache" / "onnx"


def _backbone(stream: VideoStream, store: Store, calibration=None):
    """The stream's backbone, loaded once per process (Prefect's worker threads share it; its calls are
    serialised inside, so concurrent recordings never run more than `threads` model threads)."""
    from fleetsift.featurizers import embed

    key = (stream.backbone, stream.weights, stream.image_size, stream.threads, stream.runtime, stream.precision,
           str(store.root) if stream.runtime == "onnxruntime" else "",  # the graph is cached in the store
           "" if calibration is None else hashlib.sha256(np.ascontiguousarray(calibration).tobytes()).hexdigest())
    with _BACKBONES_LOCK:
        if key not in _BACKBONES:
            bb = embed.load_backbone(stream.backbone, weights=stream.weights or None, threads=stream.threads,
                                     image_size=stream.image_size)
            if stream.runtime == "onnxruntime":
                fp = weights.backbone_fingerprint(stream.backbone, stream.weights or None)
                bb.use_onnxruntime(onnx_cache_dir(store), fp, stream.precision, calibration)
            _BACKBONES[key] = bb
        return _BACKBONES[key]


def _frames(path: Path, stream: VideoStream, stats: dict | None = None):
    if stream.topic:
        from fleetsift.featurizers import logs

        if isinstance(path, ObjectPath):
            raise InputError(path, f"streams.{stream.name}.file", "a video file on object storage (ROS 2 bags are "
                             "read from local folders only)", "a bag")

        return logs.iter_bag_images(path, stream.topic, stream.sample_hz, stamp=stream.stamp)
    # One decoder thread: decoding runs in its own thread beside the model's `threads` (embed_frames' prefetch).
    return video.iter_frames(path, stream.sample_hz, threads=1, stats=stats)


def skip_gap_s(stream: VideoStream) -> float:
    """Frames farther apart than this are never skipped (a timestamp gap): two sampling intervals."""
    return 2.0 / stream.sample_hz


def _bar_to(bar):
    def update(done: int) -> None:  # embed_frames reports the cumulative count
        bar.update(done - bar.n)
    return update


def run_embed(rec_dir: str, profile: Profile, store_root: str, progress: bool = True,
              cached_only: bool = False, force_streams: tuple[str, ...] = ()) -> dict:
    """Video streams -> per-frame backbone embeddings at their presentation timestamps (one .npz per stream,
    written as the batches come: memory stays flat in the video's length); streams named in `force_streams`
    are recomputed even when cached. The output counts the frames embedded and skipped (`skip_threshold`) and
    the damaged spans decoding resumed after."""
    store = Store(store_root, profile.storage)
    rec_dir = location(rec_dir, profile.storage)
    rec_id = rec_dir.name
    outputs = {}
    reused = computed = 0
    counts = {"frames": 0, "frames_skipped": 0, "damaged_spans": 0}
    try:
        for stream in profile.video_streams():
            path = recording.resolve_stream_file(rec_dir, stream.file, stream.name)
            content = recording_hash(store, rec_dir, [path])
            weights_fp = weights.backbone_fingerprint(stream.backbone, stream.weights or None)
            # Clock offset, PCA size and thread count do not change the embeddings: they stay out of the key.
            section = {"file": stream.file, "topic": stream.topic, "stamp": stream.stamp,
                       "sample_hz": stream.sample_hz, "backbone": stream.backbone, "weights": weights_fp,
                       "image_size": stream.image_size, "skip_threshold": stream.skip_threshold,
                       "runtime": stream.runtime, "precision": stream.precision}
            if stream.precision == "int8":  # the quantised graph depends on the frames it was calibrated on
                section["calibration"] = int8_calibration_recordings(rec_dir.parent, profile)
            key = stage_key("embed", content, section, stage_version("embed"))
            out = store.cache_path("embed", key)
            if out.exists() and stream.name not in force_streams:
                reused += 1
            elif cached_only:
                raise NotCached(f"embeddings of {rec_id}/{stream.name}")
            else:
                from fleetsift.featurizers import embed

                calibration = None
                if stream.precision == "int8":
                    calibration = int8_calibration(rec_dir.parent, profile, stream)
                bb = _backbone(stream, store, calibration)
                bar = None
                if progress:
                    from tqdm import tqdm

                    info = video.probe_video(path) if not stream.topic else {}
                    total = int((info.get("duration_s") or 0) * stream.sample_hz) or None
                    bar = tqdm(total=total, desc=f"embed {rec_id}/{stream.name}", unit="frame", file=sys.stderr,
                               leave=False, mininterval=1.0)
                vstats: dict = {}
                estats: dict = {}
                with store.row_writer(out, "emb", bb.dim) as writer:
                    t, _ = embed.embed_frames(_frames(path, stream, vstats), bb, batch_size=stream.batch_size,
                                              progress=(_bar_to(bar) if bar is not None else None),
                                              skip_threshold=stream.skip_threshold, max_gap_s=skip_gap_s(stream),
                                              sink=lambda _t, rows: writer.append(rows), stats=estats,
                                              decode_ahead=2 * stream.batch_size)
                    if bar is not None:
                        bar.close()
                    if len(t) == 0:
                        raise InputError(path, f"streams.{stream.name}", "a video with decodable frames",
                                         "no frames")
                    gaps = [[-1.0 if a is None else a, b] for a, b in vstats.get("gaps", [])]
                    meta = {"frames": estats["n_frames"], "frames_skipped": estats["n_skipped"],
                            "damaged_spans": vstats.get("n_damaged", 0), "runtime": bb.runtime,
                            "precision": bb.precision}
                    writer.commit(t=t, gaps=np.asarray(gaps, np.float64).reshape(-1, 2),
                                  meta=np.array(json.dumps(meta)))
                counts["frames"] += meta["frames"]
                counts["frames_skipped"] += meta["frames_skipped"]
                counts["damaged_spans"] += meta["damaged_spans"]
                computed += 1
            outputs[stream.name] = str(out)
        return {"recording_id": rec_id, "status": OK, "paths": outputs, "reused": reused, "computed": computed,
                **counts}
    except InputError as e:
        return unscored(rec_id, str(e))


def int8_calibration_recordings(inbox: Path, profile: Profile, n_recordings: int = 4) -> list[str]:
    names = list(profile.baseline.recordings) or sorted(p.name for p in inbox.iterdir() if p.is_dir())
    return names[:n_recordings]


def int8_calibration(inbox: Path, profile: Profile, stream: VideoStream, n_recordings: int = 4,
                     per_recording: int = 4):
    """Calibration frames for int8, from the fleet's own baseline recordings: those of `[baseline] recordings`
    when named, else the inbox's first recordings by name; the first sampled frames of each. The same frames
    for every recording of the fleet, so their embeddings stay comparable."""
    import numpy as np

    frames = []
    for name in int8_calibration_recordings(inbox, profile, n_recordings):
        try:
            path = recording.resolve_stream_file(inbox / name, stream.file, stream.name)
            it = _frames(path, stream)
            for _, (_, rgb) in zip(range(per_recording), it):
                frames.append(rgb)
            close = getattr(it, "close", None)
            if close is not None:
                close()
        except InputError:
            continue
    if not frames or any(f.shape != frames[0].shape for f in frames):
        raise InputError(inbox, f"streams.{stream.name}.precision",
                         "baseline recordings with frames of one size to calibrate int8 on", f"{len(frames)} frames")
    return np.stack(frames)


def load_features(profile: Profile, tab: dict, emb: dict) -> fleet.RecordingFeatures:
    arr = Store.load_arrays(tab["path"])
    meta = json.loads(str(arr["meta"]))
    videos = []
    for stream in profile.video_streams():
        e = Store.load_arrays(emb["paths"][stream.name])
        # Frame pts -> common clock: add the stream's clock offset, then measure from the recording's first sample.
        videos.append((stream.name, e["t"].astype(np.float64) + stream.clock_offset_s - meta["t0"], e["emb"]))
    return fleet.RecordingFeatures(recording_id=tab["recording_id"], t=arr["t"], table_values=arr["values"],
                                   table_valid=arr["valid"].astype(bool), table_channels=list(meta["channels"]),
                                   videos=videos, content=tab.get("content", ""))


def space_key(profile: Profile) -> str:
    """What a night's descriptors depend on besides the recordings: nights with the same key share a descriptor
    space, so a later night can take its references from an earlier one's windows. Any change to the windowing,
    the descriptor, a stream's settings (calibration, clock offset, PCA size, frame sampling, backbone) or the
    featurizers' code starts a new history (that night is scored as a first night)."""
    section = {k: profile.section(k) for k in ("windowing", "descriptor")}
    section["streams"] = {n: profile.section(f"streams.{n}") for n in sorted(profile.streams)}
    section["trim_fraction"] = profile.scoring.trim_fraction  # the space is fitted on the robustly kept windows
    if profile.video_streams():  # the space keeps the scale of its cameras' frame novelty, measured with k
        section["k"] = profile.scoring.k
    version = "/".join([stage_version("tables"), stage_version("embed"),
                        code_version("fleetsift.featurizers.descriptors"), str(fleet.SPACE_VERSION)])
    return stage_key("space", "", section, version)


def table_streams_of(profile: Profile) -> dict[str, str]:
    """Channel name -> the table stream that reads it (the descriptor blocks follow the streams)."""
    return {ch: s.name for s in profile.table_streams() for ch in (s.channels or s.fields)}


def load_history(store: Store, profile: Profile, key: str) -> tuple[fleet.Space | None, list[Bank]]:
    """The banks of the last ``history_nights`` committed nights scored in descriptor space ``key``, newest first,
    and that space (from the newest of them)."""
    if profile.baseline.source != "history":
        return None, []
    runs = store.read("runs")
    if runs.empty or "space_key" not in runs.columns:
        return None, []
    runs = runs[(runs["space_key"] == key) & runs["score_output"].notna() & (runs["score_output"] != "")]
    runs = runs.sort_values("finished_at", ascending=False).head(profile.baseline.history_nights)
    banks, space = [], None
    for r in runs.itertuples(index=False):
        path = store.root / str(r.score_output)
        if not path.exists():  # a bank removed by hand: that night no longer counts
            continue
        a = Store.load_arrays(path)
        if space is None:
            space = fleet.Space.from_arrays(a)
        banks.append(Bank.from_arrays(a, run_id=str(r.run_id)))
    return space, banks


def load_reviews(store: Store) -> tuple[Reviews | None, str]:
    """Engineers' verdicts, oldest first (a later verdict on the same window wins), and their digest."""
    rv = store.read("reviews")
    if rv.empty:
        return None, ""
    rv = rv.sort_values("reviewed_at", kind="stable")
    mid = np.where(rv["window_index"].to_numpy() < 0, np.nan,
                   (rv["t_start_s"].to_numpy(float) + rv["t_end_s"].to_numpy(float)) / 2)
    digest = stage_key("reviews", "", rv[["content_hash", "window_index", "verdict", "reviewed_at"]].astype(str)
                       .to_dict("list"), "")
    return Reviews(content=rv["content_hash"].to_numpy().astype(str), t_mid=mid,
                   verdict=rv["verdict"].to_numpy().astype(str)), digest


def _history_digest(space: fleet.Space | None, banks: list[Bank], reviews: Reviews | None, profile: Profile) -> str:
    """What tonight's references will be, without scoring: the same references give the same scores."""
    if space is None or not banks:
        return ""
    refs = assemble(banks, reviews, max_references=profile.baseline.max_references,
                    tolerance_s=0.5 * profile.windowing.hop_s)
    h = hashlib.sha256()
    for a in (space.center, space.scale, refs.content.astype("U"), refs.t_mid):
        h.update(np.ascontiguousarray(a).tobytes())
    for b in sorted(refs.approved):
        h.update(np.ascontiguousarray(refs.approved[b]).tobytes())
    return h.hexdigest()[:24]


def _save_baseline(store: Store, bl: fleet.FleetBaseline) -> None:
    """Every baseline a score was measured against, with its references: STORE/baselines/<baseline_id>.npz."""
    bpath = store.root / "baselines" / f"{bl.baseline_id}.npz"
    if bpath.exists():
        return
    arrays = {**bl.space.to_arrays(), "reference_recordings": np.array(bl.reference_recordings, dtype=str),
              "info": np.array(json.dumps(bl.info.to_dict()))}
    for b, per_metric in bl.per_block.items():
        first = next(iter(per_metric.values()))
        arrays[f"{b}.references"] = first.references
        arrays[f"{b}.reference_recordings"] = first.ref_rec_ids.astype(str)
        for m, x in per_metric.items():
            arrays[f"{b}.{m}.mean"] = x.mean
            arrays[f"{b}.{m}.threshold"] = np.float64(x.threshold)
            arrays[f"{b}.{m}.loo_scores"] = x.loo_scores
    store.save_arrays(bpath, **arrays)


def run_score(prepared: list[dict], profile: Profile, store_root: str, run_id: str, cached_only: bool = False,
              force: bool = False) -> dict:
    """Score every window against the fleet's baseline (earlier nights' windows, or the batch on a first night);
    writes the run's window rows to a staging Parquet and tonight's bank (descriptors, admission, descriptor
    space) next to it, which later nights take their references from."""
    store = Store(store_root, profile.storage)
    # Recording ids and the inputs' cache keys (file names, not paths: a store moved or copied keeps its scores).
    keys = [[p["tables"]["recording_id"], location(p["tables"]["path"]).name,
             sorted(location(x).name for x in p["embed"].get("paths", {}).values())] for p in prepared]
    section = {k: profile.section(k) for k in ("windowing", "descriptor", "scoring", "baseline")}
    section["pca"] = {s.name: s.pca_dim for s in profile.video_streams()}
    section["offsets"] = {s.name: s.clock_offset_s for s in profile.video_streams()}
    skey = space_key(profile)
    parent, banks = load_history(store, profile, skey)
    reviews, reviews_digest = load_reviews(store)
    section["history"] = _history_digest(parent, banks, reviews, profile)
    section["reviews"] = reviews_digest
    key = stage_key("score", json.dumps(keys), section, stage_version("score"))
    out = store.cache_path("score", key).with_suffix(".parquet")
    bank_path = out.with_suffix(".npz")
    if out.exists() and out.with_suffix(".json").exists() and bank_path.exists() and not force:
        meta = json.loads(out.with_suffix(".json").read_text())
        return {"path": str(out), "reused": True, **meta}
    if cached_only:
        raise NotCached("fleet scores")
    recs = [load_features(profile, p["tables"], p["embed"]) for p in prepared]
    pca_dims = {s.name: s.pca_dim for s in profile.video_streams()}
    gaps = {s.name: fleet.video_gap_s(s.sample_hz, profile.windowing.max_gap_s) for s in profile.video_streams()}
    res = fleet.score_fleet(recs, windowing=profile.windowing, descriptor=profile.descriptor,
                            scoring_cfg=profile.scoring, baseline_cfg=profile.baseline, pca_dims=pca_dims,
                            video_gaps=gaps, table_streams=table_streams_of(profile), space_key=skey,
                            parent_space=parent, history=banks, reviews=reviews)
    bl = res.baseline
    _save_baseline(store, bl)
    c = float(profile.scoring.threshold_c)
    rows = []
    for w in res.windows:
        n = len(w.t_start)
        for m in METRICS:
            rows.append(pd.DataFrame({
                "recording_id": w.recording_id, "window_index": np.arange(n, dtype=np.int64),
                "t_start_s": w.t_start, "t_end_s": w.t_end, "metric": m, "score": w.scores[m],
                "threshold": c, "flagged": w.flagged[m].astype(bool),
                "top_channels": w.top_channels if m == profile.scoring.metric else [""] * n,
            }))
    df = pd.concat(rows, ignore_index=True)
    out.parent.mkdir(parents=True, exist_ok=True)
    store.save_arrays(bank_path, **res.bank.to_arrays(), **(res.history_space or bl.space).to_arrays(),
                      **{f"groups.{b}": g for b, g in res.groups.items()})
    write_atomic(out, df.to_parquet(index=False))
    meta = {"baseline_id": bl.baseline_id, "channels": res.channels, "thresholds": {m: c for m in fleet.METRICS},
            "baseline": bl.info.to_dict(), "space_key": skey,
            "score_output": str(bank_path.relative_to(store.root))}
    write_atomic(out.with_suffix(".json"), json.dumps(meta).encode())
    return {"path": str(out), "reused": False, **meta}


def run_write(store_root: str, run_id: str, started_at: float, profile: Profile, code_ver: str,
              rec_rows: list[dict], score: dict | None, inbox: str = "") -> dict:
    """Append the run to the Delta tables: recordings, then windows, then runs (the run's commit marker)."""
    store = Store(store_root, profile.storage)
    rec_df = pd.DataFrame(rec_rows, columns=["recording_id", "content_hash", "duration_s", "status", "reason"])
    rec_df["path"] = [str(location(inbox) / r) if inbox else "" for r in rec_df["recording_id"]]
    rec_df.insert(0, "run_id", run_id)
    store.append("recordings", rec_df)
    n_windows = n_flagged = 0
    baseline_id = ""
    extra = {"baseline_source": "", "n_references": None, "space_key": "", "score_output": ""}
    if score is not None:
        extra = {"baseline_source": score.get("baseline", {}).get("source", ""),
                 "n_references": score.get("baseline", {}).get("n_references"),
                 "space_key": score.get("space_key", ""), "score_output": score.get("score_output", "")}
        w = read_parquet(score["path"])
        w.insert(0, "run_id", run_id)
        w["baseline_id"] = score["baseline_id"]
        baseline_id = score["baseline_id"]
        store.append("windows", w)
        prim = w[w["metric"] == profile.scoring.metric]
        n_windows = int(prim["score"].notna().sum())
        n_flagged = int(prim["flagged"].sum())
    n_q = int((rec_df["status"] == UNSCORED).sum())
    runs = pd.DataFrame([{
        "run_id": run_id, "started_at": pd.Timestamp(started_at, unit="s", tz="UTC"),
        "finished_at": pd.Timestamp(time.time(), unit="s", tz="UTC"), "fleetsift_version": code_ver,
        "code_version": code_ver,  # deprecated name of fleetsift_version (it never held a stage code version)
        "profile_hash": profile.digest(), "baseline_id": baseline_id, "n_recordings": len(rec_df),
        "n_scored": int((rec_df["status"] == SCORED).sum()), "n_unscored": n_q, "n_windows": n_windows,
        "n_flagged": n_flagged, "status": OK if n_q == 0 else PARTIAL, "inbox": inbox, **extra,
    }])
    store.append("runs", runs)
    versions = {t: store.version(t) for t in ("runs", "recordings", "windows")}
    return {"version": versions["runs"], "windows_version": versions["windows"], "table_versions": versions}
