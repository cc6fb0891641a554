"""Evaluation: ROC AUC and its standard error against outside references, window labels, the descriptors the
comparison detectors read, the parameter sweep; and (slow) `fleetsift evaluate` / `fleetsift sweep` on a demo fleet."""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from inboxes import table_inbox  # tests/ is on sys.path under pytest

from fleetsift.scoring import baseline as scoring
from fleetsift.scoring import fleet
from fleetsift.scoring.evaluation import (hanley_mcneil_se, label_windows, comparison_scores, read_labels,
                                          roc_auc, roc_curve, tangent_vectors)
from fleetsift.errors import InputError
from fleetsift.profile import Descriptor, Profile, Scoring, TableStream, Windowing

ROOT = Path(__file__).resolve().parent.parent


# ------------------------------------------------------------------------------------------------- ROC AUC

@pytest.mark.parametrize("seed", range(6))
def test_auc_matches_sklearn_with_ties(seed):
    from sklearn.metrics import roc_auc_score, roc_curve as sk_roc_curve

    rng = np.random.default_rng(seed)
    n = int(rng.integers(20, 400))
    y = rng.random(n) < rng.uniform(0.05, 0.5)
    y[:2] = [True, False]
    s = rng.integers(0, 6, n).astype(float) + 0.7 * y  # few distinct values: many ties across classes
    assert roc_auc(y, s) == pytest.approx(roc_auc_score(y, s), abs=1e-12)
    fpr, tpr = roc_curve(y, s)
    f2, t2, _ = sk_roc_curve(y, s, drop_intermediate=False)
    np.testing.assert_allclose(fpr, f2, atol=1e-12)
    np.testing.assert_allclose(tpr, t2, atol=1e-12)
    # Ties are diagonal segments of the curve, so the trapezoid area is the AUC with ties counted half.
    assert np.trapezoid(tpr, fpr) == pytest.approx(roc_auc(y, s), abs=1e-12)


def test_auc_one_class_is_none():
    # scikit-learn returns nan with a warning here (DESIGN.md); we return None so JSON says null.
    assert roc_auc(np.zeros(5, bool), np.arange(5.0)) is None
    assert roc_auc(np.ones(5, bool), np.arange(5.0)) is None


def test_hanley_mcneil_worked_example():
    # Hanley & McNeil (1982), Radiology 143:29-36, Table 1: CT images rated on a 5-point scale from "definitely
    # normal" (1) to "definitely abnormal" (5); 58 normal cases rated 33/6/6/11/2, 51 abnormal rated 3/2/2/11/33.
    # The paper gives W = 0.893 and SE(W) = 0.032 (values as quoted in the project brief).
    normal = np.repeat([1, 2, 3, 4, 5], [33, 6, 6, 11, 2])
    abnormal = np.repeat([1, 2, 3, 4, 5], [3, 2, 2, 11, 33])
    y = np.r_[np.zeros(58, bool), np.ones(51, bool)]
    s = np.r_[normal, abnormal].astype(float)
    auc = roc_auc(y, s)
    assert auc == pytest.approx(0.893, abs=5e-4)
    assert hanley_mcneil_se(auc, 51, 58) == pytest.approx(0.032, abs=5e-4)


def test_hanley_mcneil_limits():
    # Var(A) = A(1-A)/(n_pos n_neg) + ...: 0 at a perfect separation; at A = 0.5 the eq. 1-3 value by hand.
    assert hanley_mcneil_se(1.0, 10, 10) == 0.0
    q1, q2 = 0.5 / 1.5, 2 * 0.25 / 1.5
    want = np.sqrt((0.25 + 9 * (q1 - 0.25) + 19 * (q2 - 0.25)) / (10 * 20))
    assert hanley_mcneil_se(0.5, 10, 20) == pytest.approx(want, rel=1e-12)


# ------------------------------------------------------------------------------------------ labels, windows

@pytest.mark.parametrize("header", ["recording_id,t_start_s,t_end_s", "recording,start_s,end_s"])
def test_label_windows_by_centre(tmp_path, header):
    p = tmp_path / "labels.csv"
    p.write_text(header + "\nr1,10,20\nr2,0,1\n")
    if header.startswith("recording,"):  # the pre-0.3 header still reads, with a deprecation message
        with pytest.warns(FutureWarning, match="recording,start_s,end_s are deprecated"):
            labels = read_labels(p)
    else:
        labels = read_labels(p)
    assert list(labels.columns[:3]) == ["recording_id", "t_start_s", "t_end_s"]
    w = pd.DataFrame({"recording_id": ["r1"] * 4 + ["r2", "r3"], "t_start_s": [6, 8, 16, 18, 0, 10],
                      "t_end_s": [10, 12, 24, 26, 4, 20]})
    # centres 8, 10, 20, 22, 2, 15: inside r1's [10, 20] are 10 and 20 (closed interval); r2's [0, 1] misses 2.
    assert label_windows(w, labels).tolist() == [False, True, True, False, False, False]


@pytest.mark.parametrize("text,field", [("recording_id,t_start_s\nr,1\n", "column 't_end_s'"),
                                        ("recording_id,t_start_s,t_end_s\nr,5,1\n", "row 2"),
                                        ("recording_id,t_start_s,t_end_s\nr,a,1\n", "column 't_start_s'")])
def test_read_labels_errors(tmp_path, text, field):
    p = tmp_path / "labels.csv"
    p.write_text(text)
    with pytest.raises(InputError) as e:
        read_labels(p)
    assert field in str(e.value) and str(p) in str(e.value)


# ------------------------------------------------------------------------------------ comparison detectors

def _spd(rng, n, d, scale=1.0):
    A = rng.normal(size=(n, d, 3 * d)) * scale
    return A @ np.swapaxes(A, 1, 2) / (3 * d) + 1e-3 * np.eye(d)


def test_tangent_vectors_match_pyriemann():
    from pyriemann.geometry.distance import distance_riemann
    from pyriemann.geometry.tangentspace import tangent_space

    rng = np.random.default_rng(1)
    X, M = _spd(rng, 30, 5), _spd(rng, 1, 5)[0]
    T = tangent_vectors(X, M)
    np.testing.assert_allclose(T, tangent_space(X, M, metric="riemann"), atol=1e-10)
    # The norm of a tangent vector at M is the affine-invariant distance to M (Barachant et al. 2012).
    np.testing.assert_allclose(np.linalg.norm(T, axis=1), np.ravel(distance_riemann(X, M)), rtol=1e-10)


def test_comparison_scores_find_planted_outliers():
    rng = np.random.default_rng(2)
    X = np.r_[rng.normal(size=(300, 6)), rng.normal(size=(12, 6)) * 0.3 + 6.0]
    y = np.r_[np.zeros(300, bool), np.ones(12, bool)]
    sc = comparison_scores(X)
    assert set(sc) == {"isolation_forest", "local_outlier_factor"}
    for name, s in sc.items():
        assert s.shape == (312,) and roc_auc(y, s) > 0.95, name
    with pytest.raises(ValueError):
        comparison_scores(X[:2])


def _recordings(rng, n_rec=3, seconds=40.0, rate=20.0, burst=None):
    recs = []
    for i in range(n_rec):
        t = np.arange(int(seconds * rate)) / rate
        x = rng.normal(size=(len(t), 4)) * [1.0, 2.0, 0.5, 1.0] + [0.0, 1.0, -1.0, 9.8]
        x[:, 1] += 0.6 * x[:, 0]
        valid = np.ones(len(t), bool)
        if i == 1:
            valid[300:310] = False  # a gap: windows straddling it are invalid
        if burst is not None and i == burst[0]:
            sel = (t >= burst[1]) & (t < burst[2])
            x[sel, 2] += rng.normal(size=sel.sum()) * 4.0
        recs.append(fleet.RecordingFeatures(recording_id=f"r{i}", t=t, table_values=x, table_valid=valid,
                                            table_channels=["a", "b", "c", "d"]))
    return recs


def test_bank_descriptors_are_the_scored_ones():
    # The comparison detectors read the descriptors the score stage kept (its bank): they must be the windows the
    # fleet step scored, in its order, and re-scoring them against the stored baseline gives its scores exactly.
    rng = np.random.default_rng(3)
    recs = _recordings(rng)
    win, desc, sc = Windowing(rate_hz=20.0, window_s=2.0, hop_s=1.0), Descriptor(), Scoring(exclusion_s=5.0)
    res = fleet.score_fleet(recs, windowing=win, descriptor=desc, scoring_cfg=sc, pca_dims={}, video_gaps={})
    bank = res.bank
    for ws in res.windows:
        assert bank.window_index[bank.recording_id == ws.recording_id].tolist() == np.flatnonzero(ws.valid).tolist()
    for m in ("riemann", "logeuclid", "euclid"):
        z = {b: scoring.zscore(scoring.score(bank.descriptors[b], bank.content, bank.t_mid, per[m]), per[m])
             for b, per in res.baseline.per_block.items()}
        again = np.max(np.stack(list(z.values())), axis=0)
        stored = np.concatenate([ws.scores[m][ws.valid] for ws in res.windows])
        np.testing.assert_allclose(again, stored, rtol=1e-10, atol=1e-12)


# ------------------------------------------------------------------------------------------------- sweep

def _profile(**windowing) -> Profile:
    imu = TableStream(name="imu", file="imu.csv", channels=("a", "b", "c", "d"))
    return Profile(path="p.toml", streams={"imu": imu}, windowing=Windowing(**windowing))


def test_default_grid_is_twelve_points_one_at_a_time():
    from fleetsift.flows.sweep import PARAMS, base_values, default_grid, grid_points

    prof = _profile()
    pts = grid_points(default_grid(prof), prof)
    assert len(pts) == 12 and pts[0]["varied"] == "base"
    base = base_values(prof)
    for p in pts[1:]:
        moved = [k for k in PARAMS if p[k] != base[k]]
        assert moved == [p["varied"]]
    assert [p["point"] for p in pts] == list(range(12))


def test_grid_full_design_and_errors(tmp_path):
    from fleetsift.flows.sweep import grid_points, load_grid, point_profile

    prof = _profile(rate_hz=10.0)
    g = tmp_path / "grid.toml"
    g.write_text('design = "full"\nwindow_s = [2.0, 5.0]\nk = [1, 3, 5]\nmetric = ["euclid"]\n')
    pts = grid_points(load_grid(str(g), prof), prof)
    assert len(pts) == 6 and {p["metric"] for p in pts} == {"euclid"}
    p = point_profile(prof, pts[-1])
    assert (p.windowing.window_s, p.scoring.k, p.scoring.metric) == (5.0, 5, "euclid")
    assert p.windowing.rate_hz == 10.0 and p.streams == prof.streams
    for text, key in [("windows = [1]", "windows"), ('kind = ["pca"]', "kind"), ("window_s = [0.2]", "window_s"),
                      ("k = [0]", "k"), ('design = "random"', "design"), ("metric = []", "metric")]:
        g.write_text(text + "\n")
        with pytest.raises(InputError) as e:
            load_grid(str(g), prof)
        assert f"{g}: {key}:" in str(e.value)


def _cached(tmp_path, recs):
    """Stage outputs as the tables stage writes them, for the sweep's plain scoring function."""
    from fleetsift.store import Store

    prepared = []
    for r in recs:
        path = tmp_path / f"{r.recording_id}.npz"
        meta = {"t0": 0.0, "duration_s": float(r.t[-1]), "channels": r.table_channels}
        Store(tmp_path).save_arrays(path, t=r.t, values=r.table_values, valid=r.table_valid,
                                    meta=np.array(json.dumps(meta)))
        prepared.append({"tables": {"recording_id": r.recording_id, "path": str(path), "reused": True},
                         "embed": {"paths": {}, "reused": 0, "computed": 0}})
    return prepared


def test_score_point_detects_a_planted_burst_and_reports_errors(tmp_path):
    from fleetsift.flows.sweep import base_values, score_point

    rng = np.random.default_rng(4)
    prepared = _cached(tmp_path, _recordings(rng, n_rec=4, burst=(2, 20.0, 26.0)))
    labels = tmp_path / "labels.csv"
    labels.write_text("recording_id,t_start_s,t_end_s\nr2,20,26\n")
    prof = _profile(rate_hz=20.0, window_s=2.0, hop_s=1.0)
    prof = Profile(path=prof.path, streams=prof.streams, windowing=prof.windowing, scoring=Scoring(exclusion_s=5.0))
    pt = dict(base_values(prof), point=0, varied="base")
    row = score_point(prepared, prof, pt, str(labels))
    assert row["error"] == "" and row["n_anomalous"] >= 4 and row["auc"] > 0.95
    assert 0 <= row["auc_se"] < 0.1
    bad = score_point(prepared, prof, dict(pt, window_s=10_000.0), str(labels))  # no window fits: an error row
    assert bad["auc"] is None and bad["error"]


# ------------------------------------------------------------------------------------ preparing an inbox

def test_evaluate_leaves_a_too_short_recording_unscored_as_the_night_does(tmp_path):
    # One preparation for both: `fleetsift evaluate` must score exactly the recordings a night scores, or its
    # recomputed baseline would differ from the run's. A 3 s recording is shorter than one 4 s window.
    from fleetsift.flows import evaluate, night
    from fleetsift.tasks import stages

    inbox = table_inbox(tmp_path / "inbox", {"long-a": 30.0, "long-b": 30.0, "short": 3.0})
    steps = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                        write=stages.run_write)
    saved = dict(os.environ)
    try:
        ran = night.run_night(steps, str(inbox), str(tmp_path / "store-run"), progress=False)
        _, prepared, bad = evaluate.prepare(str(inbox), str(tmp_path / "store-eval"))
    finally:  # evaluate.prepare points Prefect's settings at its store
        os.environ.clear()
        os.environ.update(saved)
    run_bad = [{"recording_id": r["recording_id"], "reason": r["reason"]} for r in ran["recordings"]
               if r["status"] == "unscored"]
    assert [b["recording_id"] for b in bad] == ["short"]
    assert bad == run_bad
    assert "windowing.window_s: expected a recording at least one window (4 s) long" in bad[0]["reason"]
    assert sorted(p["tables"]["recording_id"] for p in prepared) == ["long-a", "long-b"]


# -------------------------------------------------------------------------------------- slow: the CLI

def fleetsift(*args, timeout=1500):
    env = dict(os.environ, PREFECT_SERVER_ANALYTICS_ENABLED="false")
    for k in ("PREFECT_HOME", "PREFECT_API_URL", "PREFECT_API_DATABASE_CONNECTION_URL"):
        env.pop(k, None)
    p = subprocess.run([sys.executable, "-m", "fleetsift.flows.cli", *args], capture_output=True, text=True, env=env,
                       cwd=ROOT, timeout=timeout)
    if p.returncode != 0:
        raise AssertionError(f"fleetsift {args} exited {p.returncode}\nstdout:\n{p.stdout}\nstderr:\n{p.stderr}")
    return p


@pytest.fixture(scope="module")
def evaluated(demo_fleet, tmp_path_factory):
    base = tmp_path_factory.mktemp("evaluate")
    inbox, store = demo_fleet.copy(base / "inbox", demo_fleet.names[-3:]), base / "store"
    p = fleetsift("evaluate", "--inbox", str(inbox), "--labels", str(inbox / "labels.csv"), "--store", str(store),
                  "--plot", str(base / "roc.png"), "--json")
    return inbox, store, base, json.loads(p.stdout)


@pytest.mark.slow
@pytest.mark.timeout(1500)
def test_evaluate_cli_contract(evaluated):
    from fleetsift.store import Store

    inbox, store, base, ev = evaluated
    assert set(ev["auc"]) == {"riemann", "logeuclid", "euclid"}
    assert set(ev["comparison_detectors"]) == {"isolation_forest", "local_outlier_factor"}, \
        ev.get("comparison_detectors_reason")
    for v in [*ev["auc"].values(), *ev["comparison_detectors"].values()]:
        assert 0.0 <= v <= 1.0
    # The counts agree with the store's windows and the labels, computed here independently.
    w = Store(store).read("windows", run_id=ev["run_id"])
    w = w[(w["metric"] == "riemann") & w["score"].notna()].sort_values(["recording_id", "window_index"])
    y = label_windows(w, read_labels(inbox / "labels.csv"))
    assert ev["n_windows"] == len(w) and ev["n_anomalous"] == int(y.sum()) > 0
    assert ev["auc"]["riemann"] == pytest.approx(roc_auc(y, w["score"].to_numpy()), abs=1e-12)
    from PIL import Image

    with Image.open(ev["plot"]) as im:
        assert im.size[0] > 300 and im.size[1] > 300


@pytest.mark.slow
@pytest.mark.timeout(1500)
def test_sweep_reuses_the_cache(evaluated):
    inbox, store, base, ev = evaluated
    grid = base / "grid.toml"
    grid.write_text('metric = ["euclid"]\nk = [2]\n')
    p = fleetsift("sweep", "--inbox", str(inbox), "--labels", str(inbox / "labels.csv"), "--store", str(store),
                  "--grid", str(grid), "--out", str(base / "sweep"), "--json")
    out = json.loads(p.stdout)
    # Nothing decoded or embedded again: every stage output came from the cache the evaluate run filled.
    assert out["stages"]["embed"] == {"computed": 0, "reused": 3}
    assert out["stages"]["tables"] == {"computed": 0, "reused": 3}
    pts = {r["varied"]: r for r in out["points"]}
    assert set(pts) == {"base", "metric", "k"}
    # The base point is the profile's own setting: the same scores as the run, so the same AUC.
    assert pts["base"]["auc"] == pytest.approx(ev["auc"]["riemann"], abs=1e-12)
    table = pd.read_csv(out["csv"])
    assert len(table) == 3 and table["auc"].notna().all()
    assert Path(out["plot"]).stat().st_size > 5000
