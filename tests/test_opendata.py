"""Open labelled data: recordings built from UEA BasicMotions (Bagnall et al. 2018, the UEA multivariate archive),
and (slow) detection measured through the real pipeline with floors a little below what was measured."""

import itertools
import json
import os
import subprocess
import sys
from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import opendata
from fleetsift.errors import InputError

ROOT = Path(__file__).resolve().parent.parent

try:
    opendata.data_dir()
    HAVE_DATA = True
except InputError:
    HAVE_DATA = False
needs_data = pytest.mark.skipif(not HAVE_DATA, reason="BasicMotions ships in the sktime (or aeon) wheel: "
                                                      "pip install sktime (the test extra has it)")


@needs_data
def test_basicmotions_as_published():
    # The archive's description of BasicMotions (Bagnall et al. 2018; from memory): 40 train + 40 test cases,
    # 6 dimensions, length 100, four balanced classes.
    X, y = opendata.load_basicmotions()
    assert X.shape == (80, 6, 100) and X.dtype == np.float64 and np.isfinite(X).all()
    assert Counter(y) == {"Standing": 20, "Walking": 20, "Running": 20, "Badminton": 20}
    # Running moves the watch far more than standing (a sanity check of the parsed dimensions).
    sd = {c: X[y == c, :3].std(axis=2).mean() for c in ("Standing", "Running")}
    assert sd["Running"] > 5 * sd["Standing"]


def test_read_ts_checks_its_header(tmp_path):
    good = "#c\n@problemName t\n@dimensions 2\n@seriesLength 3\n@classLabel true a b\n@data\n1,2,3:4,5,6:a\n"
    p = tmp_path / "x.ts"
    p.write_text(good)
    X, y = opendata.read_ts(p)
    assert X.tolist() == [[[1, 2, 3], [4, 5, 6]]] and y.tolist() == ["a"]
    for bad, field in [(good.replace("@dimensions 2", "@dimensions 3"), "@dimensions"),
                       (good.replace("@seriesLength 3", "@seriesLength 4"), "@seriesLength"),
                       (good.replace(":a\n", ":c\n"), "@classLabel"),
                       (good.replace("1,2,3", "1,x,3"), "line 7"),
                       (good + "1,2:4,5,6:b\n", "cases")]:
        p.write_text(bad)
        with pytest.raises(InputError) as e:
            opendata.read_ts(p)
        assert f"{p}: {field}" in str(e.value)


@needs_data
def test_built_recordings_hold_the_cases(tmp_path):
    f = opendata.build_fleet(tmp_path / "inbox", seed=1)
    X, y = opendata.load_basicmotions()
    assert f.recordings == ["watch-01", "watch-02", "watch-03", "watch-04"]
    assert (f.inbox / "profile.toml").exists()
    from fleetsift.profile import load_profile

    prof = load_profile(f.inbox / "profile.toml")
    assert prof.windowing.rate_hz == 10.0 and [s.name for s in prof.table_streams()] == ["imu"]
    assert not prof.video_streams()
    labels = pd.read_csv(f.labels)
    assert Counter(labels["kind"]) == {"running": 2, "badminton": 2}
    assert "watch-01" not in set(labels["recording_id"])
    for lab in labels.itertuples():
        df = pd.read_csv(f.inbox / lab.recording_id / "imu.csv")
        t = df["t"].to_numpy() - df["t"].iloc[0]
        dt = np.diff(t)
        assert abs(np.median(dt) - 0.1) < 0.005 and 0.005 < dt.std() < 0.03 and (dt > 0).all()
        # The labelled interval holds exactly one whole abnormal case of the data set, sample for sample.
        inside = df[(t >= lab.t_start_s - 0.05) & (t < lab.t_end_s - 0.05)][list(opendata.CHANNELS)].to_numpy()
        assert inside.shape == (100, 6)
        cls = lab.kind.capitalize()
        match = [np.allclose(inside, X[j].T, atol=1e-6) for j in np.flatnonzero(y == cls)]
        assert sum(match) == 1
    # Normal recordings hold only Standing and Walking cases: 8 of them, 80 s.
    n = len(pd.read_csv(f.inbox / "watch-01" / "imu.csv"))
    assert n == 800


def fleetsift(*args, timeout=900):
    env = dict(os.environ, PREFECT_SERVER_ANALYTICS_ENABLED="false")
    for k in ("PREFECT_HOME", "PREFECT_API_URL", "PREFECT_API_DATABASE_CONNECTION_URL"):
        env.pop(k, None)
    p = subprocess.run([sys.executable, "-m", "fleetsift.flows.cli", *args], capture_output=True, text=True, env=env,
                       cwd=ROOT, timeout=timeout)
    assert p.returncode == 0, f"fleetsift {args} exited {p.returncode}\n{p.stdout}\n{p.stderr}"
    return json.loads(p.stdout)


@needs_data
@pytest.mark.slow
@pytest.mark.timeout(1200)
def test_basicmotions_detection_through_the_pipeline(tmp_path):
    """Through `fleetsift evaluate` and `sweep`: Standing and Walking as normal operation, one Running and one
    Badminton case embedded (seed 0, 4 recordings, 139 windows of 5 s, 16 anomalous). Measured on this machine:
    riemann 0.997, logeuclid 0.996, euclid 0.996, IsolationForest 0.995, LOF 0.493 (before the robust scores
    of issue 11, riemann was 0.726 here and needed a hand-set ridge to reach 0.962). Floors sit a little below."""
    f = opendata.build_fleet(tmp_path / "inbox", seed=0)
    store = tmp_path / "store"
    ev = fleetsift("evaluate", "--inbox", str(f.inbox), "--labels", str(f.labels), "--store", str(store), "--json")
    print("BasicMotions AUC", json.dumps({**ev["auc"], **ev["comparison_detectors"]}))
    assert ev["n_windows"] == 139 and ev["n_anomalous"] == 16
    assert ev["auc"]["riemann"] > 0.97
    assert ev["auc"]["logeuclid"] > 0.97
    assert ev["auc"]["euclid"] > 0.95
    assert ev["comparison_detectors"]["isolation_forest"] > 0.9
    assert 0.0 <= ev["comparison_detectors"]["local_outlier_factor"] <= 1.0  # near chance here (0.49): no floor
    # The automatic noise floor leaves the result insensitive to a hand-set one; the sweep measures it on the cache.
    grid = tmp_path / "grid.toml"
    grid.write_text("ridge = [1e-2]\n")
    sw = fleetsift("sweep", "--inbox", str(f.inbox), "--labels", str(f.labels), "--store", str(store),
                   "--grid", str(grid), "--json")
    pts = {r["varied"]: r for r in sw["points"]}
    print("BasicMotions sweep", json.dumps({k: v["auc"] for k, v in pts.items()}))
    assert sw["stages"]["tables"] == {"computed": 0, "reused": 4}
    assert pts["base"]["auc"] == pytest.approx(ev["auc"]["riemann"], abs=1e-12)
    assert abs(pts["ridge"]["auc"] - pts["base"]["auc"]) < 0.02


@needs_data
def test_pair_nights_hold_the_cases_and_mark_every_junction(tmp_path):
    nights = opendata.build_pair_nights(tmp_path, "Walking", "Standing", seed=2)
    X, y = opendata.load_basicmotions()
    walking = {j for j in np.flatnonzero(y == "Walking")}
    used = []
    for n in nights:
        lab = pd.read_csv(n.labels)
        # Cases per recording 3+1, 3+1, 2+1, 2: junctions 3 + 3 + 2 + 1.
        assert Counter(lab["kind"]) == {"standing": 3, "ignore": 9}
        for rec in n.recordings:
            df = pd.read_csv(n.inbox / rec / "imu.csv")
            data = df[list(opendata.CHANNELS)].to_numpy()
            cases = data.reshape(-1, 100, 6)
            for c in cases:
                j = [k for k in range(len(X)) if np.allclose(c, X[k].T, atol=1e-6)]
                assert len(j) == 1
                used.append(j[0])
            faults = lab[(lab["recording_id"] == rec) & (lab["kind"] == "standing")]
            assert len(faults) == (1 if rec.endswith(("01", "02", "03")) else 0)
    normal_used = [j for j in used if j in walking]
    assert len(normal_used) == len(set(normal_used)) == 20  # no normal case seen twice, over both nights


@needs_data
@pytest.mark.slow
@pytest.mark.timeout(1800)
def test_every_ordered_pair_of_classes_as_a_fleet(tmp_path):
    """Every ordered pair (normal class, anomaly class) of BasicMotions (Bagnall et al. 2018) as two nights of a
    fleet (opendata.build_pair_nights, seed 0): the fault recurs in 3 of 4 recordings each night, and the pairs
    include quiet faults inside active operation (Running -> Standing) and loud ones inside quiet operation
    (Standing -> Running). Default profile; night 1 is a first night (batch), night 2 is scored against the
    history. Windows across the junction of two cases are left out (labels of kind ignore).

    Measured on this machine (seed 0; seeds 0-2 in bench/detection.py): mean riemann 0.997 (night 1), 0.997
    (night 2, every pair >= 0.97), IsolationForest 0.918 / 0.874 on the same windows.
    """
    night1, night2, iso1, iso2 = [], [], [], []
    for normal, anomaly in itertools.permutations(opendata.CLASSES, 2):
        base = tmp_path / f"{normal}-{anomaly}"
        ev1, ev2 = opendata.score_nights(opendata.build_pair_nights(base, normal, anomaly, seed=0), base / "store")
        assert ev1["baseline"]["source"] == "batch" and ev2["baseline"]["source"] == "history"
        assert not ev2["baseline"]["tonight"]  # the fault recurring tonight is not among tonight's references
        night1.append(ev1["auc"]["riemann"])
        night2.append(ev2["auc"]["riemann"])
        iso1.append(ev1["comparison_detectors"]["isolation_forest"])
        iso2.append(ev2["comparison_detectors"]["isolation_forest"])
        print(f"{normal:>9} -> {anomaly:<9} night 1 {night1[-1]:.3f} (IF {iso1[-1]:.3f})  "
              f"night 2 {night2[-1]:.3f} (IF {iso2[-1]:.3f})")
    assert np.mean(night1) >= 0.95
    assert np.mean(night2) >= 0.97
    assert np.mean(night1) >= np.mean(iso1) and np.mean(night2) >= np.mean(iso2)
    assert min(night1) >= 0.85 and min(night2) >= 0.85  # no pair is left blind
