"""A self-contained HTML report of one run: fleet summary and a score timeline per recording."""

from __future__ import annotations

import base64
import html
import io
from pathlib import Path

import numpy as np
import pandas as pd

from fleetsift.store import Store

SAFETY_NOTE = ("These scores are a screening aid, not a certification. They point an engineer at recordings and "
               "seconds worth a look; decisions to ground or release a vehicle follow the operator's procedures "
               "and local rules.")


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=80)
    import matplotlib.pyplot as plt

    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode()


def _timeline(g: pd.DataFrame, threshold: float, title: str) -> str:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(8, 1.9))
    c = (g["t_start_s"] + g["t_end_s"]) / 2
    ax.plot(c, g["score"], color="#2b6cb0", lw=1.2, marker=".", ms=3)
    ax.axhline(threshold, color="#c05621", ls="--", lw=1, label="threshold")
    for _, row in g[g["flagged"]].iterrows():
        ax.axvspan(row["t_start_s"], row["t_end_s"], color="#f6ad55", alpha=0.25, lw=0)
    ax.set_xlabel("seconds from the recording's first sample")
    ax.set_ylabel("score")
    ax.set_title(title, fontsize=9, loc="left")
    ax.legend(loc="upper right", fontsize=7)
    fig.tight_layout()
    return _png(fig)


def write_report(store: str, run_id: str | None, out: str, as_of: int | None = None) -> str:
    st = Store(store)
    runs = st.read("runs", version=as_of)
    if runs.empty:
        raise ValueError(f"{store}: no runs in the store")
    if run_id is None:
        run_id = runs.sort_values("finished_at")["run_id"].iloc[-1]
    run = runs[runs["run_id"] == run_id]
    if run.empty:
        raise ValueError(f"{store}: no run {run_id!r}")
    run = run.iloc[0]
    recs = st.read("recordings", run_id=run_id)
    w = st.read("windows", run_id=run_id)
    metric = "riemann"
    prim = w[(w["metric"] == metric) & w["score"].notna()]

    parts = [f"<h1>fleetsift night summary</h1><p class='note'>{html.escape(SAFETY_NOTE)}</p>",
             f"<p>Run <code>{html.escape(run_id)}</code>, finished {run['finished_at']}, baseline "
             f"<code>{html.escape(str(run['baseline_id']))}</code>, metric <b>{metric}</b>.</p>"]
    rows = []
    for _, r in recs.sort_values("recording_id").iterrows():
        g = prim[prim["recording_id"] == r["recording_id"]]
        top = f"{g['score'].max():.3f}" if len(g) else "-"
        rows.append(f"<tr><td>{html.escape(r['recording_id'])}</td><td>{r['status']}</td><td>{len(g)}</td>"
                    f"<td>{int(g['flagged'].sum()) if len(g) else 0}</td><td>{top}</td>"
                    f"<td>{html.escape(r['reason'] or '')}</td></tr>")
    parts.append("<h2>Fleet</h2><table><tr><th>recording</th><th>status</th><th>windows</th><th>flagged</th>"
                 "<th>highest score</th><th>reason</th></tr>" + "".join(rows) + "</table>")
    parts.append("<h2>Score timelines</h2>")
    for rid, g in prim.groupby("recording_id"):
        g = g.sort_values("window_index")
        thr = float(g["threshold"].iloc[0])
        parts.append(f"<img alt='score timeline {html.escape(rid)}' src='{_timeline(g, thr, rid)}'>")
    top = prim[prim["flagged"]].sort_values("score", ascending=False).head(10)
    if len(top):
        items = "".join(
            f"<tr><td>{html.escape(r.recording_id)}</td><td>{r.t_start_s:.1f}-{r.t_end_s:.1f} s</td>"
            f"<td>{r.score:.3f}</td><td>{html.escape(r.top_channels)}</td></tr>" for r in top.itertuples())
        parts.append("<h2>Most unusual windows</h2><table><tr><th>recording</th><th>window</th><th>score</th>"
                     "<th>driving channels (share)</th></tr>" + items + "</table>")
    css = ("body{font-family:sans-serif;max-width:60em;margin:1em auto;color:#1a202c}"
           "table{border-collapse:collapse}td,th{border:1px solid #cbd5e0;padding:2px 6px;font-size:90%}"
           ".note{background:#fffbea;border-left:4px solid #d69e2e;padding:6px}img{display:block;max-width:100%}")
    doc = (f"<!doctype html><html><head><meta charset='utf-8'><title>fleetsift {html.escape(run_id)}</title>"
           f"<style>{css}</style></head><body>{''.join(parts)}</body></html>")
    Path(out).parent.mkdir(parents=True, exist_ok=True)
    Path(out).write_text(doc, encoding="utf-8")
    return str(out)
