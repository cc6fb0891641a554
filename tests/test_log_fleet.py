"""Log recordings through `fleetsift run`: a fleet of PX4 ULog files, and a fleet where one recording is a ROS 2 bag.

The ULog files are written at test time with tests/ulog_spec.py (the published "ULog File Format" specification);
the bag with rosbags' own writer (fleetsift.demo.bag.recording_to_bag). Every run is the CLI in a child process.
"""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from cli_run import run_json  # tests/ is on sys.path under pytest
from ulog_spec import ULogWriter

pytestmark = [pytest.mark.slow, pytest.mark.timeout(1200)]


def windows(store: Path, run_id: str, metric: str = "riemann") -> pd.DataFrame:
    from fleetsift.store import Store

    w = Store(store).read("windows", run_id=run_id)
    return w[w["metric"] == metric].sort_values(["recording_id", "window_index"]).reset_index(drop=True)


# --------------------------------------------------------------------------------------------- ULog fleet

ULOG_PROFILE = """
[windowing]
rate_hz = 50.0
window_s = 4.0
hop_s = 2.0
max_gap_s = 0.25
[scoring]
k = 2
exclusion_s = 10.0
[streams.imu]
kind = "table"
file = "*.ulg"
topic = "sensor_combined"
fields = ["accelerometer_m_s2", "gyro_rad"]
channels = ["ax", "ay", "az", "gx", "gy", "gz"]
calibration.az = { bias = 0.1, scale = 1.0 }
"""

RATE_HZ, DURATION_S = 200, 40.0
SHAKE = (20.0, 26.0)  # s from the log's first sample: a 15 Hz rattle on the accelerometer, in flight-03 only
DROP = (10.0, 0.6)  # flight-02 loses 0.6 s of data after 10 s (a logging dropout: 'O' message, no samples)


def write_flight(path: Path, seed: int, shake: bool = False, drop: bool = False) -> dict:
    """A 40 s IMU log with PX4's sensor_combined layout (float[3] gyro_rad and accelerometer_m_s2, from memory of
    the PX4 message definition), hovering with turbulence; optional rattle and dropout."""
    rng = np.random.default_rng(seed)
    n = int(DURATION_S * RATE_HZ)
    t_us = 5_000_000 + np.cumsum(rng.integers(4_600, 5_400, n)).astype(np.int64)
    t = (t_us - t_us[0]) / 1e6
    # Turbulence: low-passed noise, so the 4 s windows have structure rather than white noise.
    kern = np.hanning(41) / np.hanning(41).sum()
    smooth = np.column_stack([np.convolve(rng.normal(0, 1, n), kern, "same") for _ in range(6)])
    acc = 0.8 * smooth[:, :3] + rng.normal(0, 0.05, (n, 3)) + [0.0, 0.0, -9.81]
    acc[:, 0] += 0.5 * smooth[:, 4]  # pitch couples into x
    gyr = 0.3 * smooth[:, 3:] + rng.normal(0, 0.01, (n, 3))
    if shake:
        m = (t >= SHAKE[0]) & (t < SHAKE[1])
        acc[m, 0] += 1.5 * np.sin(2 * np.pi * 15 * t[m])
        acc[m, 1] += 1.0 * np.cos(2 * np.pi * 15 * t[m])
    keep = np.ones(n, bool)
    if drop:
        keep = ~((t > DROP[0]) & (t <= DROP[0] + DROP[1]))
    w = ULogWriter(start_us=1_000_000)
    w.format("sensor_combined:uint64_t timestamp;float[3] gyro_rad;uint32_t gyro_integral_dt;"
             "int32_t accelerometer_timestamp_relative;float[3] accelerometer_m_s2;uint32_t accelerometer_integral_dt;")
    w.add_logged(0, 0, "sensor_combined")
    for i in np.flatnonzero(keep):
        w.record(0, struct.pack("<Q3fIi3fI", int(t_us[i]), *gyr[i].astype(np.float32).tolist(), 5000, 0,
                                *acc[i].astype(np.float32).tolist(), 5000))
        if drop and i + 1 < n and not keep[i + 1]:
            w.dropout(int(DROP[1] * 1000))
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(w.bytes())
    return {"t": t[keep], "acc": acc[keep], "gyr": gyr[keep]}


@pytest.fixture(scope="module")
def ulog_fleet(tmp_path_factory):
    base = tmp_path_factory.mktemp("ulog-fleet")
    inbox = base / "inbox"
    inbox.mkdir()
    (inbox / "profile.toml").write_text(ULOG_PROFILE)
    src = {}
    for i, name in enumerate(["flight-01", "flight-02", "flight-03", "flight-04"]):
        src[name] = write_flight(inbox / name / f"{name}.ulg", seed=100 + i, shake=name == "flight-03",
                                 drop=name == "flight-02")
    out = run_json(inbox, base / "store")
    return inbox, base / "store", out, src


def test_ulog_fleet_runs_to_scored_windows(ulog_fleet):
    inbox, store, out, src = ulog_fleet
    assert [r["status"] for r in out["recordings"]] == ["scored"] * 4, out["recordings"]
    assert out["stages"]["tables"]["computed"] == 4
    w = windows(store, out["run_id"])
    assert set(w["recording_id"]) == set(src)
    # (40 s - 4 s) / 2 s + 1 = 19 windows per 40 s log, give or take the clock's alignment.
    assert w.groupby("recording_id").size().between(17, 19).all()


def test_ulog_rattle_scores_highest(ulog_fleet):
    inbox, store, out, src = ulog_fleet
    w = windows(store, out["run_id"]).dropna(subset=["score"])
    hit = (w["recording_id"] == "flight-03") & (w["t_start_s"] < SHAKE[1] - 1.0) & (w["t_end_s"] > SHAKE[0] + 1.0)
    assert hit.any()
    from sklearn.metrics import roc_auc_score  # outside reference for the ranking

    assert roc_auc_score(hit, w["score"]) > 0.95


def test_ulog_dropout_invalidates_the_windows_it_touches(ulog_fleet):
    # Common practice: a window that straddles lost data is not scored. The 0.6 s dropout exceeds max_gap_s.
    inbox, store, out, src = ulog_fleet
    w = windows(store, out["run_id"])
    f2 = w[w["recording_id"] == "flight-02"]
    # Windows are half-open [start, end): one ending at the dropout's start holds only samples before it.
    touches = (f2["t_start_s"] < DROP[0] + DROP[1] - 0.05) & (f2["t_end_s"] > DROP[0] + 0.05)
    assert touches.sum() >= 2
    assert f2.loc[touches, "score"].isna().all()
    assert f2.loc[~touches, "score"].notna().all()


def test_ulog_channels_renamed_and_calibrated_through_the_table_stage(ulog_fleet, tmp_path):
    # Outside reference: numpy.interp of the arrays the file was written from, minus the profile's az bias.
    from fleetsift.profile import load_profile
    from fleetsift.tasks import stages

    inbox, _, _, src = ulog_fleet
    prof = load_profile(inbox / "profile.toml")
    res = stages.run_tables(str(inbox / "flight-01"), prof, str(tmp_path / "store"))
    assert res["status"] == "ok" and res["channels"] == ["ax", "ay", "az", "gx", "gy", "gz"]
    arr = stages.Store.load_arrays(res["path"])
    s = src["flight-01"]
    # The log is 200 Hz and the clock 50 Hz, so the table path low-passes first: compare where the signal is slow.
    want_az = np.interp(arr["t"], s["t"], s["acc"][:, 2]) - 0.1
    assert abs(np.median(arr["values"][:, 2] - want_az)) < 0.02
    assert np.corrcoef(arr["values"][:, 0], np.interp(arr["t"], s["t"], s["acc"][:, 0]))[0, 1] > 0.98


# --------------------------------------------------------------------------------------------- bag in a CSV fleet

@pytest.fixture(scope="module")
def mixed_fleet(demo_fleet, tmp_path_factory):
    from fleetsift.demo import bag as demo_bag

    base = tmp_path_factory.mktemp("mixed")
    names = demo_fleet.names
    demo_fleet.copy(base / "csv")
    demo_bag.demo_inbox_with_bag(base / "csv", base / "mixed", names[1])
    csv_out = run_json(base / "csv", base / "store-csv")
    mixed_out = run_json(base / "mixed", base / "store-mixed")
    return base, names, csv_out, mixed_out


def test_bag_recording_in_a_csv_fleet_scores_like_its_csv_twin(mixed_fleet):
    base, names, csv_out, mixed_out = mixed_fleet
    assert [r["status"] for r in mixed_out["recordings"]] == ["scored"] * 4, mixed_out["recordings"]
    assert (base / "mixed" / names[1] / "bag" / "metadata.yaml").is_file()
    assert not (base / "mixed" / names[1] / "imu.csv").exists()
    a = windows(base / "store-csv", csv_out["run_id"])
    b = windows(base / "store-mixed", mixed_out["run_id"])
    assert len(a) == len(b)
    np.testing.assert_allclose(a["t_start_s"], b["t_start_s"], atol=1e-6)
    both = a["score"].notna() & b["score"].notna()
    assert (a["score"].notna() == b["score"].notna()).all()
    # JPEG frames in the bag vs H.264 in the MP4 move the embeddings a little (cosine > 0.97, test_log_recordings);
    # the scores must follow: same ranking and within a few percent.
    from scipy.stats import spearmanr

    assert spearmanr(a.loc[both, "score"], b.loc[both, "score"]).statistic > 0.95
    rel = np.abs(a.loc[both, "score"] - b.loc[both, "score"]) / a.loc[both, "score"].median()
    assert np.median(rel) < 0.05, np.median(rel)


def test_demo_inbox_with_bag_is_stable_on_a_second_call(mixed_fleet):
    # A second call (as a second `make demo` makes) changes no file, so the store's caches still hold.
    from fleetsift.demo import bag as demo_bag

    base, names, _, _ = mixed_fleet
    before = {p: p.stat().st_mtime_ns for p in (base / "mixed").rglob("*") if p.is_file()}
    demo_bag.demo_inbox_with_bag(base / "csv", base / "mixed", names[1])
    after = {p: p.stat().st_mtime_ns for p in (base / "mixed").rglob("*") if p.is_file()}
    assert after == before
