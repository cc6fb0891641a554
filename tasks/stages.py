"""Prefect tasks: each loads its inputs, calls the featurizers, persists its output in the store and returns paths.

Every stage output is stored under stage_key(content hash, the profile section the stage reads, code version), so
a warm night reuses everything unchanged and an IMU-calibration change never re-decodes video. The plain functions
(`run_*`) do the work and are what tests call; the `@task` wrappers in tasks/flow_tasks.py are all Prefect sees.
This module never imports Prefect: a night with nothing to compute runs these functions directly.
"""

from __future__ import annotations

import functools
import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from fleetsift import codebase
from fleetsift.errors import InputError
from fleetsift.profile import Profile, VideoStream
from fleetsift.store import Store, code_version, stage_key
from fleetsift.vocabulary import METRICS
from fleetsift.featurizers import recording, video, weights
from fleetsift.scoring import fleet
# featurizers/embed.py (torch, torchvision) is imported only where frames are embedded: a night that reuses every
# embedding never loads them.

_BACKBONES: dict[tuple, Any] = {}


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
    "score": tuple(codebase.subpackage("fleetsift.scoring")),  # evaluation too: run_descriptors' output
}
STAGE_FUNCTIONS: dict[str, tuple[str, ...]] = {
    "tables": ("run_tables",), "embed": ("run_embed", "_frames"),
    "score": ("run_score", "load_features", "run_descriptors"),
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


def quarantined(rec_id: str, reason: str, **extra) -> dict:
    return {"recording_id": rec_id, "status": "quarantined", "reason": reason, **extra}


def run_tables(rec_dir: str, profile: Profile, store_root: str, cached_only: bool = False, force: bool = False) -> dict:
    """Table streams -> calibrated, resampled common clock (one .npz per recording); `force` recomputes and
    overwrites a cached output."""
    store = Store(store_root)
    rec_dir = Path(rec_dir)
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
            return {"recording_id": rec_id, "status": "ok", "path": str(out), "reused": True, "content": content,
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
        return {"recording_id": rec_id, "status": "ok", "path": str(out), "reused": False, "content": content, **meta}
    except InputError as e:
        return quarantined(rec_id, str(e))


def _backbone(stream: VideoStream):
    from fleetsift.featurizers import embed

    key = (stream.backbone, stream.weights, stream.image_size, stream.threads)
    if key not in _BACKBONES:
        _BACKBONES[key] = embed.load_backbone(stream.backbone, weights=stream.weights or None,
                                              threads=stream.threads, image_size=stream.image_size)
    return _BACKBONES[key]


def _frames(path: Path, stream: VideoStream):
    if stream.topic:
        from fleetsift.featurizers import logs

        return logs.iter_bag_images(path, stream.topic, stream.sample_hz, stamp=stream.stamp)
    return video.iter_frames(path, stream.sample_hz)


def _bar_to(bar):
    def update(done: int) -> None:  # embed_frames reports the cumulative count
        bar.update(done - bar.n)
    return update


def run_embed(rec_dir: str, profile: Profile, store_root: str, progress: bool = True,
              cached_only: bool = False, force_streams: tuple[str, ...] = ()) -> dict:
    """Video streams -> per-frame backbone embeddings at their presentation timestamps (one .npz per stream);
    streams named in `force_streams` are recomputed even when cached."""
    store = Store(store_root)
    rec_dir = Path(rec_dir)
    rec_id = rec_dir.name
    outputs = {}
    reused = computed = 0
    try:
        for stream in profile.video_streams():
            path = recording.resolve_stream_file(rec_dir, stream.file, stream.name)
            content = recording_hash(store, rec_dir, [path])
            weights_fp = weights.backbone_fingerprint(stream.backbone, stream.weights or None)
            # Clock offset, PCA size and thread count do not change the embeddings: they stay out of the key.
            section = {"file": stream.file, "topic": stream.topic, "stamp": stream.stamp,
                       "sample_hz": stream.sample_hz, "backbone": stream.backbone, "weights": weights_fp,
                       "image_size": stream.image_size}
            key = stage_key("embed", content, section, stage_version("embed"))
            out = store.cache_path("embed", key)
            if out.exists() and stream.name not in force_streams:
                reused += 1
            elif cached_only:
                raise NotCached(f"embeddings of {rec_id}/{stream.name}")
            else:
                bb = _backbone(stream)
                bar = None
                if progress:
                    from tqdm import tqdm

                    info = video.probe_video(path) if not stream.topic else {}
                    total = int(info.get("duration_s", 0) * stream.sample_hz) or None
                    bar = tqdm(total=total, desc=f"embed {rec_id}/{stream.name}", unit="frame", file=sys.stderr,
                               leave=False, mininterval=1.0)
                from fleetsift.featurizers import embed

                t, e = embed.embed_frames(_frames(path, stream), bb, batch_size=stream.batch_size,
                                          progress=(_bar_to(bar) if bar is not None else None))
                if bar is not None:
                    bar.close()
                if len(t) == 0:
                    raise InputError(path, f"streams.{stream.name}", "a video with decodable frames", "no frames")
                store.save_arrays(out, t=t, emb=e.astype(np.float32))
                computed += 1
            outputs[stream.name] = str(out)
        return {"recording_id": rec_id, "status": "ok", "paths": outputs, "reused": reused, "computed": computed}
    except InputError as e:
        return quarantined(rec_id, str(e))


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
                                   videos=videos)


def run_score(prepared: list[dict], profile: Profile, store_root: str, run_id: str, cached_only: bool = False,
              force: bool = False) -> dict:
    """Fit the baseline on the batch and score every window; writes the run's window rows to a staging Parquet."""
    store = Store(store_root)
    # Recording ids and the inputs' cache keys (file names, not paths: a store moved or copied keeps its scores).
    keys = [[p["tables"]["recording_id"], Path(p["tables"]["path"]).name,
             sorted(Path(x).name for x in p["embed"].get("paths", {}).values())] for p in prepared]
    section = {k: profile.section(k) for k in ("windowing", "descriptor", "scoring", "baseline")}
    section["pca"] = {s.name: s.pca_dim for s in profile.video_streams()}
    section["offsets"] = {s.name: s.clock_offset_s for s in profile.video_streams()}
    key = stage_key("score", json.dumps(keys), section, stage_version("score"))
    out = store.cache_path("score", key).with_suffix(".parquet")
    if out.exists() and out.with_suffix(".json").exists() and not force:
        meta = json.loads(out.with_suffix(".json").read_text())
        return {"path": str(out), "reused": True, **meta}
    if cached_only:
        raise NotCached("fleet scores")
    recs = [load_features(profile, p["tables"], p["embed"]) for p in prepared]
    pca_dims = {s.name: s.pca_dim for s in profile.video_streams()}
    gaps = {s.name: fleet.video_gap_s(s.sample_hz, profile.windowing.max_gap_s) for s in profile.video_streams()}
    res = fleet.score_fleet(recs, windowing=profile.windowing, descriptor=profile.descriptor,
                            scoring_cfg=profile.scoring, pca_dims=pca_dims, video_gaps=gaps,
                            baseline_recordings=list(profile.baseline.recordings) or None)
    bl = res.baseline
    bpath = store.root / "baselines" / f"{bl.baseline_id}.npz"
    if not bpath.exists():
        arrays = {"center": bl.center, "scale": bl.scale, "channels": np.array(bl.channels),
                  "reference_recordings": np.array(bl.reference_recordings)}
        for name, p in bl.pca.items():
            for k, v in p.items():
                arrays[f"pca.{name}.{k}"] = v
        for m, b in bl.per_metric.items():
            arrays[f"{m}.references"] = b.references
            arrays[f"{m}.mean"] = b.mean
            arrays[f"{m}.threshold"] = np.float64(b.threshold)
            arrays[f"{m}.loo_scores"] = b.loo_scores
        store.save_arrays(bpath, **arrays)
    rows = []
    for w in res.windows:
        n = len(w.t_start)
        for m in METRICS:
            rows.append(pd.DataFrame({
                "recording_id": w.recording_id, "window_index": np.arange(n, dtype=np.int64),
                "t_start_s": w.t_start, "t_end_s": w.t_end, "metric": m, "score": w.scores[m],
                "threshold": float(bl.per_metric[m].threshold), "flagged": w.flagged[m].astype(bool),
                "top_channels": w.top_channels if m == profile.scoring.metric else [""] * n,
            }))
    df = pd.concat(rows, ignore_index=True)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".tmp")
    df.to_parquet(tmp, index=False)
    tmp.replace(out)
    meta = {"baseline_id": bl.baseline_id, "channels": res.channels,
            "thresholds": {m: float(b.threshold) for m, b in bl.per_metric.items()}}
    tmp = out.with_suffix(".json.tmp")
    tmp.write_text(json.dumps(meta))
    tmp.replace(out.with_suffix(".json"))
    return {"path": str(out), "reused": False, **meta}


def run_descriptors(prepared: list[dict], profile: Profile, store_root: str, score: dict) -> str:
    """Save the window descriptors of a score run next to its parquet, as ``<score>.descriptors.npz`` with
    ``descriptors (n, d, d)``, ``recording_id (n,)`` and ``window_index (n,)`` (valid windows only).

    They are recomputed from the cached stage outputs with the run's stored baseline (standardisation and PCA),
    which is exactly how the fleet step described them; evaluation uses them for vector-space baselines.
    """
    from fleetsift.scoring.evaluation import window_descriptors

    out = Path(score["path"]).with_suffix(".descriptors.npz")
    if out.exists():
        return str(out)
    store = Store(store_root)
    b = Store.load_arrays(store.root / "baselines" / f"{score['baseline_id']}.npz")
    pca = {s.name: {k: b[f"pca.{s.name}.{k}"] for k in ("mean", "components")} for s in profile.video_streams()}
    gaps = {s.name: fleet.video_gap_s(s.sample_hz, profile.windowing.max_gap_s) for s in profile.video_streams()}
    recs = [load_features(profile, p["tables"], p["embed"]) for p in prepared]
    D, rids, idx = window_descriptors(recs, center=b["center"], scale=b["scale"], pca=pca, video_gaps=gaps,
                                      windowing=profile.windowing, descriptor=profile.descriptor)
    store.save_arrays(out, descriptors=D, recording_id=rids, window_index=idx)
    return str(out)


def run_write(store_root: str, run_id: str, started_at: float, profile: Profile, code_ver: str,
              rec_rows: list[dict], score: dict | None, inbox: str = "") -> dict:
    """Append the run to the Delta tables: recordings, then windows, then runs (the run's commit marker)."""
    store = Store(store_root)
    rec_df = pd.DataFrame(rec_rows, columns=["recording_id", "content_hash", "duration_s", "status", "reason"])
    rec_df["path"] = [str(Path(inbox) / r) if inbox else "" for r in rec_df["recording_id"]]
    rec_df.insert(0, "run_id", run_id)
    store.append("recordings", rec_df)
    n_windows = n_flagged = 0
    baseline_id = ""
    if score is not None:
        w = pd.read_parquet(score["path"])
        w.insert(0, "run_id", run_id)
        w["baseline_id"] = score["baseline_id"]
        baseline_id = score["baseline_id"]
        store.append("windows", w)
        prim = w[w["metric"] == profile.scoring.metric]
        n_windows = int(prim["score"].notna().sum())
        n_flagged = int(prim["flagged"].sum())
    n_q = int((rec_df["status"] == "quarantined").sum())
    runs = pd.DataFrame([{
        "run_id": run_id, "started_at": pd.Timestamp(started_at, unit="s", tz="UTC"),
        "finished_at": pd.Timestamp(time.time(), unit="s", tz="UTC"), "code_version": code_ver,
        "profile_hash": profile.digest(), "baseline_id": baseline_id, "n_recordings": len(rec_df),
        "n_scored": int((rec_df["status"] == "scored").sum()), "n_quarantined": n_q, "n_windows": n_windows,
        "n_flagged": n_flagged, "status": "ok" if n_q == 0 else "partial", "inbox": inbox,
    }])
    store.append("runs", runs)
    return {"version": store.version("runs"), "windows_version": store.version("windows")}
