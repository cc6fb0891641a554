"""Engineers' verdicts: `fleetsift review` validates what it records, a false alarm marked normal stops recurring,
a window marked fault never becomes a reference, and `evaluate --reviews-from` takes the verdicts as labels."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from cli_run import fleetsift, run_json  # tests/ is on sys.path under pytest

from fleetsift.errors import InputError
from fleetsift.flows import night
from fleetsift.flows.review import parse_window, record_review
from fleetsift.store import Store
from fleetsift.tasks import stages

PLAIN = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score, write=stages.run_write)


def _fleet(root: Path, n: int = 5, seed: int = 3) -> Path:
    """Table-only recordings (30 s at 50 Hz, 3 channels of slow oscillation and noise); in rec-01 an 8 s rattle
    on ax, the one thing a night should flag."""
    rng = np.random.default_rng(seed)
    root.mkdir(parents=True)
    (root / "profile.toml").write_text('[scoring]\nexclusion_s = 5.0\n[streams.imu]\nkind = "table"\n'
                                       'file = "imu.csv"\nchannels = ["ax", "ay", "gz"]\n')
    t = np.arange(0, 30, 0.02)
    for i in range(n):
        f, ph = rng.uniform(0.2, 0.5, 3), rng.uniform(0, 6.3, 3)
        x = np.sin(2 * np.pi * f * t[:, None] + ph) + rng.normal(0, 0.3, (len(t), 3))
        if i == 1:
            sel = (t >= 12) & (t < 20)
            x[sel, 0] += 2.0 * np.sin(2 * np.pi * 9 * t[sel])
        (root / f"rec-{i:02d}").mkdir()
        pd.DataFrame({"t": t, "ax": x[:, 0], "ay": x[:, 1], "gz": x[:, 2]}).to_csv(root / f"rec-{i:02d}" / "imu.csv",
                                                                                 index=False)
    return root


def test_parse_window():
    assert parse_window("rover-01-zone-s:12") == ("rover-01-zone-s", 12)
    assert parse_window("a:b:3") == ("a:b", 3)
    for bad in ("rover", "rover:", ":3", "rover:x", "rover:-1"):
        with pytest.raises(InputError, match="--window"):
            parse_window(bad)


def test_record_review_checks_run_recording_window_and_verdict(tmp_path):
    inbox, store = _fleet(tmp_path / "inbox"), str(tmp_path / "store")
    run = night.run_night(PLAIN, str(inbox), store, progress=False)
    rid = run["run_id"]
    with pytest.raises(InputError, match="--run"):
        record_review(store, "no-such-run", "normal", windows=["rec-01:3"])
    with pytest.raises(InputError, match="--recording"):
        record_review(store, rid, "normal", recordings=["rec-99"])
    with pytest.raises(InputError, match="--window"):
        record_review(store, rid, "normal", windows=["rec-01:999"])
    with pytest.raises(InputError, match="--verdict"):
        record_review(store, rid, "fine", windows=["rec-01:3"])
    with pytest.raises(InputError, match="at least one window"):
        record_review(store, rid, "normal")
    assert Store(store).read("reviews").empty  # nothing written by a refused review
    rows = record_review(store, rid, "fault", windows=["rec-01:6", "rec-01:7"], recordings=["rec-04"], note="rattle",
                         reviewer="tester")
    got = Store(store).read("reviews")
    assert len(got) == 3 and set(got["verdict"]) == {"fault"} and set(got["reviewer"]) == {"tester"}
    assert got["review_id"].nunique() == 1 and (got["window_index"] == -1).sum() == 1
    w = Store(store).read("windows", run_id=rid)
    w6 = w[(w["recording_id"] == "rec-01") & (w["window_index"] == 6)].iloc[0]
    r6 = got[got["window_index"] == 6].iloc[0]
    assert (r6["t_start_s"], r6["t_end_s"]) == (w6["t_start_s"], w6["t_end_s"])
    content = Store(store).read("recordings", run_id=rid).set_index("recording_id")["content_hash"]
    assert set(got["content_hash"]) == {content["rec-01"], content["rec-04"]}
    assert len(rows) == 3


@pytest.mark.slow
@pytest.mark.timeout(900)
def test_review_round_trip_through_the_cli(tmp_path):
    inbox, store = _fleet(tmp_path / "inbox"), tmp_path / "store"
    first = run_json(inbox, store)
    assert first["baseline"]["source"] == "batch"
    w = Store(store).read("windows", run_id=first["run_id"])
    w = w[w["metric"] == "riemann"]
    flagged = w[w["flagged"]].sort_values("score", ascending=False)
    assert len(flagged) >= 2 and set(flagged["recording_id"]) == {"rec-01"}  # the rattle, nothing else
    # The engineer calls the top window a fault and the next one normal (a rattle they know to be harmless, say).
    fault, alarm = flagged.iloc[0], flagged.iloc[1]
    p = fleetsift("review", "--store", str(store), "--run", first["run_id"], "--verdict", "fault",
                  "--window", f"rec-01:{int(fault.window_index)}", "--json")
    assert json.loads(p.stdout)["windows"] == [{"recording_id": "rec-01", "window_index": int(fault.window_index)}]
    fleetsift("review", "--store", str(store), "--run", first["run_id"], "--verdict", "normal",
              "--window", f"rec-01:{int(alarm.window_index)}", "--note", "known rattle", "--json")
    bad = fleetsift("review", "--store", str(store), "--run", first["run_id"], "--verdict", "normal",
                    "--window", "rec-01:9999", ok=(1,))
    assert "--window" in bad.stderr
    # The window marked normal is not flagged the next night; the fault window stays flagged and never becomes
    # a reference.
    second = run_json(inbox, store)
    assert second["orchestrator"] == "none" and second["stages"]["tables"]["computed"] == 0
    assert second["baseline"]["source"] == "history" and second["baseline"]["reference_runs"] == [first["run_id"]]
    assert second["baseline"]["n_approved"] == 1
    w2 = Store(store).read("windows", run_id=second["run_id"])
    w2 = w2[w2["metric"] == "riemann"].set_index(["recording_id", "window_index"])
    assert not w2.loc[("rec-01", int(alarm.window_index)), "flagged"]
    assert w2.loc[("rec-01", int(fault.window_index)), "flagged"]
    base = Store.load_arrays(store / "baselines" / f"{second['baseline_id']}.npz")
    content = Store(store).read("recordings", run_id=first["run_id"]).set_index("recording_id")["content_hash"]
    refs = set(base["imu.reference_recordings"].astype(str))
    assert content["rec-01"] in refs  # the recording is a reference elsewhere, but not at the fault window:
    bank = Store.load_arrays(store / Store(store).read("runs", run_id=second["run_id"])["score_output"].iloc[0])
    at = (bank["bank.content"] == content["rec-01"]) & (bank["bank.window_index"] == int(fault.window_index))
    assert at.sum() == 1 and not bank["bank.admitted"][at].any()
    # The report shows the verdicts next to the windows.
    out = tmp_path / "report.html"
    fleetsift("report", "--store", str(store), "--run", first["run_id"], "--out", str(out))
    html = out.read_text()
    assert "reviewed fault" in html and "reviewed normal" in html and "known rattle" in html and "References:" in html
    # evaluate takes the verdicts as labels: only the two reviewed windows count.
    ev = json.loads(fleetsift("evaluate", "--inbox", str(inbox), "--reviews-from", str(store), "--json",
                              "--no-comparison-detectors").stdout)
    assert ev["labels"] == "reviews" and ev["n_windows"] == 2 and ev["n_anomalous"] == 1
