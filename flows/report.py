"""A self-contained HTML report of one run: one file, every image embedded as a data URI, no script, no link out.

Contents: the run and the safety note; the fleet at a glance (recordings, status, flagged windows and spans,
highest scores, why a recording was left unscored); the top-N flagged windows, each with video thumbnails from the window, the
table-stream traces around it and the channels that drive its deviation; and a score timeline per recording with
the threshold and the flagged spans. Thumbnails and traces are read from the recording folders named in the store
(`recordings.path`, else `runs.inbox`); a folder that is gone is noted, not an error.
"""

from __future__ import annotations

import base64
import html
import io
import re
from pathlib import Path

import numpy as np
import pandas as pd

from fleetsift import __version__
from fleetsift.location import ObjectPath, location, write_atomic
from fleetsift.store import Store
from fleetsift.safety import SAFETY_NOTE
from fleetsift.vocabulary import KNN_STATS, SCORED, SCORING_METHODS, UNSCORED

TOP_N = 10
THUMB_W = 176  # px; three JPEG thumbnails per window stay ~15 KB
PLOT_DPI = 90
ACCENT, INK, MUTED = "#b7472a", "#24425f", "#8aa1b4"
# Line colours of every plot fleetsift draws (report, ROC curves, sweep), in order: the report's palette, not
# Matplotlib's defaults.
PALETTE = (INK, ACCENT, "#3f8f6b", "#d08c2c", "#6b4f9e", MUTED, "#526170")


def iso_time(t) -> str:
    """A timestamp as ISO 8601 to the second, in UTC (``2026-12-03T02:00:07Z``); '-' when missing."""
    if t is None or (not isinstance(t, str) and pd.isna(t)):
        return "-"
    ts = pd.Timestamp(t)
    ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    return ts.strftime("%Y-%m-%dT%H:%M:%SZ")


def score_axis_label(metric: str, scoring=None) -> str:
    """What a score axis shows: the robust z of which distance, by which statistic."""
    if scoring is None:
        return f"robust z of the {metric} distance"
    stat = dict(zip(SCORING_METHODS, (f"{'k-th' if scoring.knn_stat == KNN_STATS[0] else 'mean of k'} nearest "
                                      f"(k = {scoring.k})", f"local outlier factor (k = {scoring.k})",
                                      "to the Fréchet mean"))).get(scoring.method, scoring.method)
    return f"robust z of the {metric} distance, {stat}"


THRESHOLD_TEXT = ("A window's score is a robust z: (distance - median) / robust sigma of the references' own "
                  "leave-one-out distances, robust sigma = 1.4826 x MAD (the median absolute deviation, scaled "
                  "to the standard deviation of normal data). A window is flagged when its score exceeds c, "
                  "i.e. its distance exceeds median + c x robust sigma; c = 3 is about three standard deviations "
                  "beyond typical normal operation.")


# ------------------------------------------------------------------------------------------------ encoding

def _png(fig) -> str:
    """A Matplotlib figure as a palette PNG data URI (64 colours keep line plots legible at a third the size)."""
    import matplotlib.pyplot as plt
    from PIL import Image

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=PLOT_DPI)
    plt.close(fig)
    buf.seek(0)
    img = Image.open(buf).convert("RGB").quantize(colors=64, method=Image.Quantize.MEDIANCUT)
    out = io.BytesIO()
    img.save(out, format="PNG", optimize=True)
    return "data:image/png;base64," + base64.b64encode(out.getvalue()).decode()


def _jpeg(rgb: np.ndarray) -> str:
    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(rgb).save(buf, format="JPEG", quality=72, optimize=True)
    return "data:image/jpeg;base64," + base64.b64encode(buf.getvalue()).decode()


def _mpl():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _anchor(rid: str) -> str:
    return "rec-" + re.sub(r"[^A-Za-z0-9_-]", "_", rid)


# ------------------------------------------------------------------------------------------ window logic

def flagged_spans(g: pd.DataFrame) -> list[tuple[float, float]]:
    """Union of the flagged windows' [t_start, t_end] (overlapping windows merge into one span)."""
    f = g[g["flagged"]].sort_values("t_start_s")
    spans: list[list[float]] = []
    for s, e in zip(f["t_start_s"], f["t_end_s"]):
        if spans and s <= spans[-1][1]:
            spans[-1][1] = max(spans[-1][1], e)
        else:
            spans.append([float(s), float(e)])
    return [(s, e) for s, e in spans]


def pick_top(prim: pd.DataFrame, n: int) -> pd.DataFrame:
    """The n highest-scoring flagged windows, skipping any that overlaps a window already picked in the same
    recording, so overlapping windows of one flagged span do not fill the list (non-maximum suppression, common
    practice in detection)."""
    cand = prim[prim["flagged"]].sort_values(["score", "recording_id", "window_index"],
                                            ascending=[False, True, True])
    picked: list = []
    taken: dict[str, list[tuple[float, float]]] = {}
    for r in cand.itertuples():
        spans = taken.setdefault(r.recording_id, [])
        if any(r.t_start_s < e and s < r.t_end_s for s, e in spans):
            continue
        spans.append((r.t_start_s, r.t_end_s))
        picked.append(r.Index)
        if len(picked) >= n:
            break
    return cand.loc[picked]


def parse_channels(s: str) -> list[tuple[str, float]]:
    """'ax:0.234,gz:0.120' -> [('ax', 0.234), ('gz', 0.12)]."""
    out = []
    for item in (s or "").split(","):
        name, _, share = item.rpartition(":")
        if name:
            try:
                out.append((name, float(share)))
            except ValueError:
                continue
    return out


# -------------------------------------------------------------------------------------- recording sources

class RecordingSource:
    """Lazy access to one recording folder's table streams and videos, on the common clock of the store."""

    def __init__(self, rec_dir: Path, profile):
        from fleetsift.featurizers import recording

        self.dir = rec_dir
        self.profile = profile
        self.tables = [recording.read_table_stream(rec_dir, s) for s in profile.table_streams()]
        self.units = {ch: u for s in profile.table_streams() for ch, u in s.units.items()}
        # Times in the store are seconds from the earliest sample of any table stream (fleetsift.featurizers.recording).
        self.t0 = min(float(tb.t[0]) for tb in self.tables)

    def traces(self, t_from: float, t_to: float) -> list[tuple[str, np.ndarray, np.ndarray]]:
        """(channel, t relative to the first sample, values) of every table channel inside [t_from, t_to]."""
        out = []
        for tb in self.tables:
            rel = tb.t - self.t0
            sel = (rel >= t_from) & (rel <= t_to)
            for j, ch in enumerate(tb.channels):
                out.append((ch, rel[sel], tb.values[sel, j]))
        return out

    def thumbnails(self, targets: list[float]) -> dict[str, list[np.ndarray | None]]:
        """Per video stream, the frame nearest each target time (seconds from the first sample), decoded in one
        sequential pass (seeking is slow with long keyframe intervals)."""
        from fleetsift.featurizers import recording, video

        out = {}
        for s in self.profile.video_streams():
            path = recording.resolve_stream_file(self.dir, s.file, s.name)
            # Common clock -> the stream's own clock: the fleet step adds clock_offset_s and subtracts t0.
            want = np.asarray(targets, float) + self.t0 - s.clock_offset_s
            if s.topic:
                from fleetsift.featurizers import logs

                frames = logs.iter_bag_images(path, s.topic, 30.0, stamp=s.stamp)
                size = None
            else:
                info = video.probe_video(path)
                h = max(2, int(round(THUMB_W * info["height"] / max(info["width"], 1))))
                size = (THUMB_W, h)
                frames = video.iter_frames(path, None, size=size)
            best_d = np.full(len(want), np.inf)
            best: list[np.ndarray | None] = [None] * len(want)
            last = want.max(initial=-np.inf) + 1.0
            try:
                for t, rgb in frames:
                    d = np.abs(want - t)
                    better = d < best_d
                    for i in np.flatnonzero(better):
                        best_d[i], best[i] = d[i], rgb
                    if t > last:
                        break
            finally:
                close = getattr(frames, "close", None)
                if close:
                    close()
            if size is None:
                from PIL import Image

                best = [None if b is None else np.asarray(Image.fromarray(b).resize(
                    (THUMB_W, max(2, int(THUMB_W * b.shape[0] / b.shape[1]))))) for b in best]
            # A target more than a second from any frame lies outside the video: no thumbnail.
            out[s.name] = [b if dd <= 1.0 else None for b, dd in zip(best, best_d)]
        return out


def _source(rec_path: str, fleet_profile):
    """(RecordingSource or None, note)."""
    from fleetsift.errors import InputError
    from fleetsift.profile import profile_for

    p = location(rec_path) if rec_path else None
    if p is None or not p.is_dir():
        return None, f"recording folder {rec_path or '(unknown)'} is gone: no thumbnails or traces"
    try:
        return RecordingSource(p, profile_for(p, fleet_profile)), ""
    except (InputError, OSError) as e:
        return None, f"recording unreadable now ({e}): no thumbnails or traces"


# ---------------------------------------------------------------------------------------------- figures

def timeline_png(g: pd.DataFrame, threshold: float, marks: dict[int, int], ylabel: str = "score") -> str:
    """Score against time with the threshold, flagged spans shaded, unscored windows ticked, top windows numbered."""
    plt = _mpl()
    fig, ax = plt.subplots(figsize=(9.0, 2.1))
    ok = g[g["score"].notna()]
    c = (ok["t_start_s"] + ok["t_end_s"]) / 2
    for s, e in flagged_spans(ok):
        ax.axvspan(s, e, color=ACCENT, alpha=0.16, lw=0)
    ax.plot(c, ok["score"], color=INK, lw=1.1, marker=".", ms=3, label="window score")
    ax.axhline(threshold, color=ACCENT, ls="--", lw=1, label=f"threshold c = {threshold:.3g}")
    bad = g[g["score"].isna()]
    if len(bad):
        y0 = float(ok["score"].min()) if len(ok) else 0.0
        ax.plot((bad["t_start_s"] + bad["t_end_s"]) / 2, np.full(len(bad), y0), "|", color=MUTED, ms=8,
                label="unscored (gap)")
    by_idx = ok.set_index("window_index")
    for widx, rank in marks.items():
        if widx in by_idx.index:
            r = by_idx.loc[widx]
            ax.annotate(str(rank), ((r["t_start_s"] + r["t_end_s"]) / 2, r["score"]), xytext=(0, 5),
                        textcoords="offset points", ha="center", fontsize=7, color=ACCENT, weight="bold")
    ax.set_xlabel("seconds from the recording's first sample", fontsize=8)
    ax.set_ylabel(ylabel, fontsize=7)
    ax.tick_params(labelsize=7)
    ax.margins(x=0.01, y=0.18)
    ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), fontsize=7, ncol=3, frameon=False, borderaxespad=0.1)
    fig.tight_layout(pad=0.4)
    return _png(fig)


def traces_png(series: list[tuple[str, np.ndarray, np.ndarray]], t_start: float, t_end: float,
               shares: dict[str, float], max_rows: int = 8, units: dict[str, str] | None = None) -> str:
    """The table channels around the window as stacked strips of one plot (each scaled to its own range, which is
    printed at the right); channels named among the drivers in the accent. One Axes instead of a panel per channel
    draws several times faster."""
    return _png(traces_figure(series, t_start, t_end, shares, max_rows=max_rows, units=units))


def traces_figure(series: list[tuple[str, np.ndarray, np.ndarray]], t_start: float, t_end: float,
                  shares: dict[str, float], max_rows: int = 8, units: dict[str, str] | None = None):
    """The figure of :func:`traces_png`."""
    import matplotlib.transforms as mtransforms

    plt = _mpl()
    ranked = sorted(series, key=lambda s: -shares.get(s[0], 0.0))[:max_rows]
    order = {name: i for i, (name, _, _) in enumerate(series)}
    ranked.sort(key=lambda s: order[s[0]])  # keep the stream's own channel order
    n = len(ranked)
    fig, ax = plt.subplots(figsize=(6.0, 0.46 * n + 0.5))
    ax.axvspan(t_start, t_end, color="#f3e3c3", lw=0)
    right = mtransforms.blended_transform_factory(ax.transAxes, ax.transData)
    x_range = 1.005  # where each range label starts, in axes widths
    labels, colours, ranges = [], [], []
    for i, (name, t, v) in enumerate(ranked):
        y0 = n - 1 - i
        hot = name in shares
        v = np.asarray(v, dtype=np.float64)
        lo, hi = (float(np.nanmin(v)), float(np.nanmax(v))) if np.isfinite(v).any() else (0.0, 0.0)
        span = hi - lo if hi > lo else 1.0
        ax.plot(t, y0 - 0.4 + 0.8 * (v - lo) / span, lw=0.7, color=ACCENT if hot else INK)
        unit = f" {(units or {}).get(name, '')}".rstrip()
        ranges.append(ax.text(x_range, y0, f"{lo:.3g} .. {hi:.3g}{unit}", transform=right, fontsize=6, va="center",
                              color="#526170"))
        labels.append(f"{name} {shares[name]:.0%}" if hot else name)
        colours.append(ACCENT if hot else "#333")
    ax.set_yticks(np.arange(n)[::-1], labels, fontsize=7)
    for lab, c in zip(ax.get_yticklabels(), colours):
        lab.set_color(c)
    ax.set_ylim(-0.6, n - 0.4)
    ax.tick_params(axis="y", length=0)
    ax.tick_params(axis="x", labelsize=6, length=2)
    for side in ("top", "right", "left"):
        ax.spines[side].set_visible(False)
    ax.set_xlabel("seconds from the recording's first sample (window shaded; each strip scaled to the range at "
                  "its right)", fontsize=7)
    h = fig.get_figheight()
    # Room at the right for the widest range label, units included (a unit of any length stays inside the image).
    fig.set_dpi(PLOT_DPI)  # text widths do not scale exactly with resolution: measure at the one saved
    renderer = fig.canvas.get_renderer()
    widest = max((r.get_window_extent(renderer).width for r in ranges), default=0.0) / (fig.dpi * fig.get_figwidth())
    left = 0.2  # a label starts at left + x_range x the axes' width, in figure fractions
    fig.subplots_adjust(left=left, right=min(0.9, left + (0.98 - widest - left) / x_range), top=1 - 0.08 / h,
                        bottom=0.42 / h)
    return fig


# ------------------------------------------------------------------------------------------------ report

CSS = """
body{font:14px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;max-width:64em;margin:1.2em auto;padding:0 1em;
color:#1c2530}
h1{font-size:1.5em;margin:.2em 0}h2{font-size:1.15em;margin:1.6em 0 .5em;border-bottom:2px solid #d8e0e8}
h3{font-size:1em;margin:.2em 0 .4em}
.meta{color:#526170;font-size:.9em}.meta code{font-size:.95em}
.safety{background:#fff7e6;border-left:5px solid #d08c2c;padding:.5em .8em;margin:.8em 0}
.tiles{display:flex;gap:.6em;flex-wrap:wrap;margin:.6em 0}
.tile{background:#f2f5f8;border-radius:6px;padding:.4em .9em;min-width:7em}
.tile b{display:block;font-size:1.35em}
table{border-collapse:collapse;width:100%;font-size:.9em}th,td{border-bottom:1px solid #dfe5eb;padding:3px 6px;
text-align:left;vertical-align:top}th{background:#f2f5f8}td.n{text-align:right;font-variant-numeric:tabular-nums}
tr.unscored td{background:#fdf0ee}
.card{border:1px solid #d8e0e8;border-radius:8px;padding:.6em .8em;margin:.8em 0;break-inside:avoid}
.rank{display:inline-block;background:#b7472a;color:#fff;border-radius:4px;padding:0 .45em;margin-right:.4em}
.row{display:flex;gap:1em;flex-wrap:wrap;align-items:flex-start}
.thumbs{display:flex;gap:4px}.thumbs figure{margin:0;font-size:.75em;color:#526170;text-align:center}
.drivers{min-width:15em}.bar{height:.7em;background:#b7472a;border-radius:2px;display:inline-block;
vertical-align:middle;margin-right:.4em}
.note{color:#7a5a2a;font-size:.85em}.verdict{font-size:.8em;font-weight:normal;padding:1px 6px;border-radius:3px;
margin-left:6px}.verdict.normal{background:#e6f4ea;color:#1e5631}.verdict.fault{background:#fde8e8;color:#8a1c1c}img{max-width:100%;display:block}
"""


def _fmt(x, spec=".3f") -> str:
    return "-" if x is None or (isinstance(x, float) and np.isnan(x)) else format(x, spec)


def _primary_metric(w: pd.DataFrame) -> str:
    """The run's primary metric: the one whose rows carry the channel attribution."""
    carrying = w.loc[w["top_channels"].fillna("") != "", "metric"].unique()
    return str(carrying[0]) if len(carrying) else "riemann"


def _fleet_profile(run, profile: str | None):
    from fleetsift.errors import InputError
    from fleetsift.profile import PROFILE_NAME, load_profile

    path = location(profile) if profile else (location(str(run["inbox"])) / PROFILE_NAME if run["inbox"] else None)
    if path is None or not path.exists():
        return None, f"profile {path} not found"
    try:
        prof = load_profile(path)
    except InputError as e:
        return None, str(e)
    note = ""
    if run["profile_hash"] and prof.digest() != run["profile_hash"]:
        note = (f"the profile {path} has changed since this run (hash {prof.digest()}, the run's "
                f"{run['profile_hash']}): thumbnails and traces were read with the current one")
    return prof, note


def window_verdicts(st: Store, prim: pd.DataFrame, recs: pd.DataFrame) -> dict[tuple[str, int], dict]:
    """Engineers' verdicts on this run's windows (given on any night, matched by recording content and window
    centre): (recording, window index) -> the latest review row."""
    from fleetsift.scoring.history import Reviews, verdicts_for

    rv = st.read("reviews")
    if rv.empty or prim.empty:
        return {}
    rv = rv.sort_values("reviewed_at", kind="stable").reset_index(drop=True)
    mid = np.where(rv["window_index"].to_numpy() < 0, np.nan,
                   (rv["t_start_s"].to_numpy(float) + rv["t_end_s"].to_numpy(float)) / 2)
    content = prim["recording_id"].map(dict(zip(recs["recording_id"], recs["content_hash"]))).fillna("")
    t_mid = ((prim["t_start_s"] + prim["t_end_s"]) / 2).to_numpy(float)
    hops = prim.sort_values("t_start_s").groupby("recording_id")["t_start_s"].diff().dropna()
    tol = 0.5 * float(hops.median()) if len(hops) else 1e-6
    out = {}
    for i, row in rv.iterrows():  # newest last: a later review overwrites
        one = Reviews(content=np.array([row["content_hash"]]), t_mid=mid[i:i + 1], verdict=np.array([row["verdict"]]))
        hit = verdicts_for(content.to_numpy().astype(str), t_mid, one, tol) != ""
        for r in prim[hit].itertuples():
            out[(r.recording_id, int(r.window_index))] = {"verdict": row["verdict"], "note": row["note"] or "",
                                                          "reviewer": row["reviewer"] or "",
                                                          "reviewed_at": iso_time(row["reviewed_at"])}
    return out


def _verdict_html(v: dict | None) -> str:
    if not v:
        return ""
    who = f" by {_e(v['reviewer'])}" if v["reviewer"] else ""
    note = f": {_e(v['note'])}" if v["note"] else ""
    return f"<span class='verdict {_e(v['verdict'])}'>reviewed {_e(v['verdict'])}{who}, {_e(v['reviewed_at'])}{note}</span>"


def _references_html(st: Store, run) -> str:
    """Which references this run's scores were measured against (the baseline's record)."""
    import json

    path = st.root / "baselines" / f"{run['baseline_id']}.npz"
    if not run["baseline_id"] or not path.exists():
        return ""
    a = Store.load_arrays(path)
    if "info" not in a:
        return ""
    info = json.loads(str(a["info"]))
    from fleetsift.vocabulary import BASELINE_SOURCES

    what = ("earlier nights' windows (the fleet's history)",
            "this run's own windows, robustly trimmed (a first night, or a profile change)",
            "the recordings the profile lists")
    src = dict(zip(BASELINE_SOURCES, what)).get(info["source"], info["source"])
    runs = info.get("reference_runs") or []
    extra = []
    if runs:
        extra.append(f"from {len(runs)} earlier run{'s' if len(runs) != 1 else ''} ({', '.join(_e(r) for r in runs[-3:])}"
                     + (", ..." if len(runs) > 3 else "") + ")")
    if info["source"] == "history" and info.get("tonight"):
        from fleetsift.scoring.fleet import UNLIKE_HISTORY_MAX

        unlike = info.get("unlike_history")
        extra.append(f"joined by this run's own windows: {unlike:.0%} of them were unlike the history alone"
                     if unlike is not None and unlike > UNLIKE_HISTORY_MAX
                     else "joined by this run's own windows while the history is thin")
    if info.get("n_approved"):
        extra.append(f"{info['n_approved']} windows reviewed as normal")
    for name, (n_frames, n_recs) in (info.get("novelty_frames") or {}).items():
        extra.append(f"{_e(name)} frame novelty against {n_frames} frames of {n_recs} recordings")
    ridges = ", ".join(f"{_e(b)} {v:.3g}" for b, v in info.get("ridges", {}).items())
    return (f"<p class='meta' id='references'>References: {src}; {info['n_references']} windows of "
            f"{info['n_reference_recordings']} recordings" + ("; " + "; ".join(extra) if extra else "")
            + f". Neighbours k = {info.get('k')}; descriptor noise floor (ridge) {ridges}.</p>")


def _body_key(w: pd.DataFrame, recs: pd.DataFrame, fleet_prof, prof_note: str, top_n: int,
              verdicts: dict | None = None) -> str:
    """What the windows and timelines sections show: the run's window rows (not its id), the recordings it read
    (where, with what content and outcome), the profile they are read with, and this module's code."""
    import hashlib
    import sys

    from fleetsift.store import code_version

    h = hashlib.sha256(code_version(sys.modules[__name__]).encode())
    cols = [c for c in w.columns if c != "run_id"]
    h.update(pd.util.hash_pandas_object(w[cols].sort_values(["recording_id", "metric", "window_index"]),
                                        index=False).values.tobytes())
    rcols = [c for c in ("recording_id", "status", "reason", "duration_s", "content_hash", "path") if c in recs]
    h.update(pd.util.hash_pandas_object(recs[rcols].astype(str), index=False).values.tobytes())
    own = []
    for pth in recs.get("path", pd.Series(dtype=str)).astype(str):
        f = location(pth) / "profile.toml" if pth else None
        if isinstance(f, ObjectPath):
            own.append(f.signature() if f.is_file() else "")
        else:
            own.append(f"{f.stat().st_mtime_ns}:{f.stat().st_size}" if f is not None and f.is_file() else "")
    units = sorted((s.name, sorted(s.units.items())) for s in fleet_prof.table_streams()) if fleet_prof else []
    h.update(repr((fleet_prof.digest() if fleet_prof is not None else None, units, prof_note, int(top_n), own,
                   sorted((verdicts or {}).items()))).encode())
    return h.hexdigest()[:24]


def _settings_html(prof, metric: str, thresholds: dict) -> str:
    """The values the scores depend on, printed (not only the profile's hash)."""
    c = f"{thresholds[metric]:g}" if metric in thresholds else "-"  # the c that flagged the primary metric
    if prof is None:
        return f"<p class='meta' id='settings'>Settings: metric {_e(metric)}, c = {c} (profile not found).</p>"
    w, sc, d = prof.windowing, prof.scoring, prof.descriptor
    items = [("window", f"{w.window_s:g} s"), ("hop", f"{w.hop_s:g} s"), ("clock", f"{w.rate_hz:g} Hz"),
             ("metric", metric), ("method", sc.method), ("k", sc.k), ("knn_stat", sc.knn_stat),
             ("c", c), ("descriptor", d.kind)]
    return ("<p class='meta' id='settings'>Settings: "
            + ", ".join(f"{_e(k)} <b data-setting='{_e(k)}'>{_e(v)}</b>" for k, v in items) + ".</p>")


def write_report(store: str, run_id: str | None, out: str, as_of: int | None = None, top_n: int = TOP_N,
                 profile: str | None = None) -> str:
    """Write the HTML report of ``run_id`` (default: the latest run at ``as_of``) to ``out``; returns the path.

    ``as_of`` is a `runs` table version (time travel, as `fleetsift history` lists it); ``profile`` overrides the inbox's profile.toml for reading
    thumbnails and traces.
    """
    from fleetsift.errors import InputError

    st = Store(store)
    runs = st.read("runs", version=as_of)
    if runs.empty:
        raise InputError(store, "runs", "a store with committed runs", "none")
    if run_id is None:
        run_id = runs.sort_values("finished_at")["run_id"].iloc[-1]
    sel = runs[runs["run_id"] == run_id]
    if sel.empty:
        raise InputError(store, "--run", "a run id of the store (see `fleetsift history`)", run_id)
    run = sel.iloc[0]
    recs = st.read("recordings", run_id=run_id).sort_values("recording_id")
    w = st.read("windows", run_id=run_id)
    metric = _primary_metric(w)
    prim = w[w["metric"] == metric]
    valid = prim[prim["score"].notna()]
    thresholds = {m: float(g["threshold"].iloc[0]) for m, g in w.groupby("metric") if len(g)}
    fleet_prof, prof_note = _fleet_profile(run, profile)
    verdicts = window_verdicts(st, prim, recs)

    paths = {r.recording_id: (r.path or (str(location(str(run["inbox"])) / r.recording_id) if run["inbox"] else ""))
             for r in recs.itertuples()}
    sources: dict[str, tuple] = {}

    def source(rid):
        if rid not in sources:
            sources[rid] = _source(paths.get(rid, ""), fleet_prof) if fleet_prof is not None else \
                (None, f"no profile to read the recording with ({prof_note})")
        return sources[rid]

    top = pick_top(valid, top_n)
    rank_of = {(r.recording_id, r.window_index): i + 1 for i, r in enumerate(top.itertuples())}

    # --- header and fleet summary
    n_flag = int(valid["flagged"].sum())
    n_q = int((recs["status"] == UNSCORED).sum())
    parts = [
        "<h1>fleetsift screening report</h1>",
        f"<p class='meta'>Run <code>{_e(run_id)}</code> &middot; finished {_e(iso_time(run['finished_at']))} &middot; "
        f"baseline <code>{_e(run['baseline_id'])}</code> &middot; primary metric <b>{_e(metric)}</b> &middot; "
        f"profile <code>{_e(run['profile_hash'])}</code> &middot; fleetsift {_e(run['fleetsift_version'])}"
        + (f" &middot; runs-table version {as_of}" if as_of is not None else "") + "</p>",
        _settings_html(fleet_prof, metric, thresholds),
        f"<p class='safety'><b>Safety note.</b> {_e(SAFETY_NOTE)}</p>",
        "<div class='tiles'>"
        + "".join(f"<div class='tile'><b>{v}</b>{_e(k)}</div>" for k, v in (
            ("recordings", len(recs)), ("scored", int((recs["status"] == SCORED).sum())), ("unscored", n_q),
            ("windows scored", len(valid)), ("windows flagged", n_flag),
            ("flagged spans", sum(len(flagged_spans(g)) for _, g in valid.groupby("recording_id")))))
        + "</div>",
        f"<p class='meta' id='threshold'>{_e(THRESHOLD_TEXT)} This run: c = "
        + (f"{thresholds[metric]:g}" if metric in thresholds else "-") + ".</p>",
        _references_html(st, run),
    ]
    if prof_note:
        parts.append(f"<p class='note'>{_e(prof_note)}</p>")
    rows = []
    for r in recs.itertuples():
        g = valid[valid["recording_id"] == r.recording_id]
        gall = prim[prim["recording_id"] == r.recording_id]
        if len(g):
            best = g.loc[g["score"].idxmax()]
            top_s = f"{best['score']:.3f} at {best['t_start_s']:.1f}&ndash;{best['t_end_s']:.1f} s"
        else:
            top_s = "-"
        name = _e(r.recording_id)
        link = f"<a href='#{_anchor(r.recording_id)}'>{name}</a>" if len(g) else name
        rows.append(
            f"<tr class='{_e(r.status)}' data-recording='{name}'><td>{link}</td><td>{_e(r.status)}</td>"
            f"<td class='n'>{_fmt(r.duration_s, '.1f')}</td><td class='n'>{len(g)}</td>"
            f"<td class='n'>{len(gall) - len(g)}</td><td class='n flagged'>{int(g['flagged'].sum())}</td>"
            f"<td class='n'>{len(flagged_spans(g))}</td><td>{top_s}</td><td>{_e(r.reason or '')}</td></tr>")
    parts.append("<h2>Recordings</h2><table id='fleet'><tr><th>recording</th><th>status</th><th>seconds</th>"
                 "<th>windows</th><th>unscored windows</th><th>flagged</th><th>spans</th><th>highest score</th>"
                 "<th>reason</th></tr>" + "".join(rows) + "</table>")
    quar = recs[recs["status"] == UNSCORED]
    if len(quar):
        parts.append("<h2>Unscored recordings</h2><p>These could not be read or scored (nothing is said about the "
                     "vehicle); fix the input and the next run picks them up."
                     "</p><ul>" + "".join(f"<li><b>{_e(r.recording_id)}</b>: {_e(r.reason)}</li>"
                                          for r in quar.itertuples()) + "</ul>")

    # --- windows worth a look and timelines: the costly part (video thumbnails, plots), cached by what it shows
    body_path = st.cache_path("report", _body_key(w, recs, fleet_prof, prof_note, top_n, verdicts)).with_suffix(".html")
    if body_path.exists():
        parts.append(body_path.read_text(encoding="utf-8"))
    else:
        start = len(parts)
        # --- windows worth a look
        parts.append(f"<h2>Windows worth a look</h2><p>The {len(top)} highest-scoring flagged windows of the primary "
                     "metric, one per flagged span (a window overlapping a higher-ranked one of the same recording is left "
                     "out; all flagged windows are shaded in the timelines below).</p>")
        if not len(top):
            parts.append("<p>No window crossed the threshold in this run.</p>")
        thumbs_by_rec: dict[str, dict] = {}
        for rid, g in top.groupby("recording_id"):
            src, _ = source(rid)
            if src is None or not src.profile.video_streams():
                continue
            targets = []
            for r in g.itertuples():
                span = r.t_end_s - r.t_start_s
                targets += [r.t_start_s + 0.1 * span, (r.t_start_s + r.t_end_s) / 2, r.t_end_s - 0.1 * span]
            try:
                thumbs_by_rec[rid] = {"targets": g["window_index"].tolist(), "frames": src.thumbnails(targets)}
            except Exception as e:  # a damaged video must not cost the report
                thumbs_by_rec[rid] = {"error": f"video unreadable: {e}"}
        for r in top.itertuples():
            rank = rank_of[(r.recording_id, r.window_index)]
            src, note = source(r.recording_id)
            shares = dict(parse_channels(r.top_channels))
            drivers = "".join(f"<div><span class='bar' style='width:{max(2, round(100 * v))}px'></span>"
                              f"{_e(k)} <b>{v:.0%}</b></div>" for k, v in shares.items()) or "<div>-</div>"
            media = []
            tinfo = thumbs_by_rec.get(r.recording_id)
            if tinfo and "error" in tinfo:
                media.append(f"<p class='note'>{_e(tinfo['error'])}</p>")
            elif tinfo:
                j = tinfo["targets"].index(r.window_index)
                for sname, frames in tinfo["frames"].items():
                    figs = []
                    for lab, img in zip(("start", "middle", "end"), frames[3 * j: 3 * j + 3]):
                        if img is None:
                            figs.append(f"<figure><p class='note'>no frame ({lab})</p></figure>")
                        else:
                            figs.append(f"<figure><img alt='{_e(sname)} {lab} of window {rank}' src='{_jpeg(img)}'>"
                                        f"{_e(sname)}, {lab}</figure>")
                    media.append("<div class='thumbs'>" + "".join(figs) + "</div>")
            elif src is not None and not src.profile.video_streams():
                media.append("<p class='note'>no video stream in this recording</p>")
            if src is not None:
                span = r.t_end_s - r.t_start_s
                series = src.traces(r.t_start_s - 0.5 * span, r.t_end_s + 0.5 * span)
                unit_txt = ", ".join(f"{ch} in {u}" for ch, u in src.units.items())
                media.append(f"<img alt='table traces of window {rank}" + (f" ({_e(unit_txt)})" if unit_txt else "")
                             + "' "
                             f"src='{traces_png(series, r.t_start_s, r.t_end_s, shares, units=src.units)}'>")
            else:
                media.append(f"<p class='note'>{_e(note)}</p>")
            vd = verdicts.get((r.recording_id, int(r.window_index)))
            parts.append(
                f"<div class='card' id='window-{rank}' data-recording='{_e(r.recording_id)}'>"
                f"<h3><span class='rank'>{rank}</span><a href='#{_anchor(r.recording_id)}'>{_e(r.recording_id)}</a>, "
                f"{r.t_start_s:.1f}&ndash;{r.t_end_s:.1f} s &middot; window {int(r.window_index)} &middot; score "
                f"{r.score:.2f} (threshold {_fmt(r.threshold, 'g')}) {_verdict_html(vd)}</h3><div class='row'>"
                f"<div class='drivers'><b>Top channels</b> (share of the deviation){drivers}</div>"
                f"<div>{''.join(media)}</div></div></div>")

        # --- timelines
        parts.append("<h2>Score timelines</h2><p>One point per window at its centre; shaded: flagged spans; dashed: "
                     "threshold; numbers: the windows above; ticks at the bottom: windows left unscored because they "
                     "straddle a gap.</p>")
        ylabel = score_axis_label(metric, fleet_prof.scoring if fleet_prof is not None else None)
        for rid, g in prim.groupby("recording_id"):
            g = g.sort_values("window_index")
            if not g["score"].notna().any():
                continue
            marks = {int(widx): rk for (rr, widx), rk in rank_of.items() if rr == rid}
            thr = float(g["threshold"].iloc[0])
            parts.append(f"<h3 id='{_anchor(rid)}'>{_e(rid)}</h3><img alt='score timeline {_e(rid)}' "
                         f"src='{timeline_png(g, thr, marks, ylabel)}'>")

        write_atomic(body_path, "".join(parts[start:]).encode("utf-8"))

    parts.append(
        "<h2>How to read this report</h2><p>Each window of the common clock is described, stream by stream, by an "
        "SPD matrix of its standardised channels and scored by its distance on the SPD manifold to the fleet's "
        "references of normal operation: by default the nearest window of each of the k nearest recordings, so "
        "a behaviour counts as normal only where k recordings show it, and never a neighbour from the window's "
        "own recording within the exclusion zone. From the second night on the references are earlier nights' "
        "windows that were clearly normal, so a fault that recurs tonight is measured against last week's "
        "operation. The score is the largest robust z over the streams; a window is flagged when it exceeds c (its "
        "distance exceeds median + c &times; robust sigma, robust sigma = 1.4826 &times; MAD). The driving "
        "channels split the window's deviation by channel (the energy of each channel's rows of the whitened log "
        "map). A video stream's channels are named after it: <code>camera.pc1</code> .. <code>camera.pcN</code> are "
        "the principal components of the frame embeddings (the PCA basis fitted on the baseline), and "
        "<code>camera.residual</code> is the PCA residual, the part of the embedding the N components leave "
        "unexplained (the log of its squared norm, the Q statistic of Jackson &amp; Mudholkar 1979), so a view unlike any "
        "in the baseline still counts. A high score says <i>unlike the baseline</i>, not <i>faulty</i>. Record a verdict with "
        "<code>fleetsift review --store STORE --run RUN --window RECORDING:INDEX --verdict normal|fault</code>: "
        "a window reviewed normal joins the references and is not flagged again; one reviewed as a fault never "
        "joins them.</p>"
        f"<p class='meta'>Written by fleetsift {_e(__version__)} from the store {_e(st.root)}.</p>")
    doc = ("<!doctype html><html lang='en'><head><meta charset='utf-8'>"
           "<meta name='viewport' content='width=device-width,initial-scale=1'>"
           f"<title>fleetsift report {_e(run_id)}</title><style>{CSS}</style></head><body>{''.join(parts)}"
           "</body></html>")
    write_atomic(location(out), doc.encode("utf-8"))
    return str(out)
