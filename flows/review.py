"""Engineers' verdicts on scored windows: `fleetsift review` appends them to the store's `reviews` table.

A window marked normal joins the fleet's baseline from the next night on and is not flagged again (nor is a window
about as close to it as windows are to their neighbours); a window marked fault never enters the baseline.
Verdicts are matched to windows by the recording's content and the window's time, so they hold on every later
night that scores the same recording.
"""

from __future__ import annotations

import getpass
import time
import uuid

import pandas as pd

from fleetsift.errors import InputError
from fleetsift.scoring.history import VERDICTS
from fleetsift.store import Store


def parse_window(spec: str) -> tuple[str, int]:
    """``RECORDING:INDEX`` -> (recording, window index)."""
    rec, sep, idx = str(spec).rpartition(":")
    if not sep or not rec or not idx.strip().lstrip("-").isdigit() or int(idx) < 0:
        raise InputError("--window", "value", "RECORDING:INDEX, e.g. rover-01-zone-s:12", repr(spec))
    return rec, int(idx)


def record_review(store: str, run_id: str, verdict: str, windows: list[str] = (), recordings: list[str] = (),
                  note: str = "", reviewer: str | None = None) -> pd.DataFrame:
    """Validate the reviewed windows against run ``run_id`` and append one verdict per window (or recording).

    Call under the store's write lock. Returns the rows written.
    """
    if verdict not in VERDICTS:
        raise InputError("--verdict", "value", f"one of {list(VERDICTS)}", repr(verdict))
    if not windows and not recordings:
        raise InputError("review", "--window/--recording", "at least one window or recording to review", "none")
    st = Store(store)
    runs = st.read("runs", run_id=run_id)
    if runs.empty:
        known = st.read("runs")["run_id"].tolist()[-5:]
        raise InputError(st.root, "--run", f"a committed run of this store (latest: {known})", repr(run_id))
    recs = st.read("recordings", run_id=run_id)
    scored = recs[recs["status"] == "scored"].set_index("recording_id")
    w = st.read("windows", run_id=run_id)
    w = w[w["metric"] == w["metric"].iloc[0]] if len(w) else w
    rows = []
    for rec in recordings:
        if rec not in scored.index:
            raise InputError(st.root, "--recording", f"a recording scored in run {run_id} ({sorted(scored.index)})",
                             repr(rec))
        rows.append({"recording_id": rec, "content_hash": scored.loc[rec, "content_hash"], "window_index": -1,
                     "t_start_s": float("nan"), "t_end_s": float("nan")})
    for spec in windows:
        rec, idx = parse_window(spec)
        if rec not in scored.index:
            raise InputError(st.root, "--window", f"a recording scored in run {run_id} ({sorted(scored.index)})",
                             repr(rec))
        hit = w[(w["recording_id"] == rec) & (w["window_index"] == idx)]
        if hit.empty or hit["score"].isna().all():
            n = int((w["recording_id"] == rec).sum())
            raise InputError(st.root, "--window", f"a scored window of {rec} in run {run_id} (0..{n - 1})", idx)
        rows.append({"recording_id": rec, "content_hash": scored.loc[rec, "content_hash"], "window_index": idx,
                     "t_start_s": float(hit["t_start_s"].iloc[0]), "t_end_s": float(hit["t_end_s"].iloc[0])})
    df = pd.DataFrame(rows)
    df.insert(0, "run_id", run_id)
    df.insert(0, "reviewed_at", pd.Timestamp(time.time(), unit="s", tz="UTC"))
    df.insert(0, "review_id", uuid.uuid4().hex)
    df["verdict"] = verdict
    df["note"] = note or ""
    df["reviewer"] = reviewer if reviewer is not None else _whoami()
    st.append("reviews", df)
    return df


def _whoami() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return ""
