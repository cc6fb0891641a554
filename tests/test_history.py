"""The fleet's history: banks, verdicts, reference assembly, and the fleet step scoring a night against earlier
nights (with every [baseline], [scoring] and [descriptor] option that shapes it checked for effect)."""

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import roc_auc_score

from fleetsift.errors import InputError
from fleetsift.profile import BaselineSpec, Descriptor, Scoring, Windowing
from fleetsift.scoring import fleet
from fleetsift.scoring.history import Bank, Reviews, assemble, guard_band, verdicts_for

WIN = Windowing(rate_hz=20.0, window_s=2.0, hop_s=1.0, max_gap_s=0.25)
SC = Scoring(exclusion_s=5.0)


# ----------------------------------------------------------------------------------------------- pieces

def test_guard_band_holds_the_neighbours_of_a_flagged_window_in_its_recording():
    content = np.array(["a"] * 6 + ["b"] * 3)
    t = np.array([1, 2, 3, 4, 5, 6, 1, 2, 3], float)
    flagged = np.zeros(9, bool)
    flagged[2] = True
    held = guard_band(flagged, content, t, 1.5)
    np.testing.assert_array_equal(held, [False, True, True, True, False, False, False, False, False])


def test_verdicts_match_windows_by_content_and_centre():
    rv = Reviews(content=np.array(["a", "b", "a"]), t_mid=np.array([3.0, np.nan, 3.0]),
                 verdict=np.array(["fault", "normal", "normal"]))
    v = verdicts_for(["a", "a", "b", "c"], [3.2, 5.0, 1.0, 3.0], rv, 0.5)
    # The newest verdict on a window wins (normal after fault); a recording verdict covers all its windows.
    assert v.tolist() == ["normal", "", "normal", ""]
    with pytest.raises(InputError, match="verdict"):
        Reviews(content=np.array(["a"]), t_mid=np.array([1.0]), verdict=np.array(["fine"]))


def _bank(run, content, n, admitted=None, d=3, seed=0):
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(n, d, d))
    D = A @ A.transpose(0, 2, 1) + np.eye(d)
    return Bank(content=np.array(content), recording_id=np.array(content), window_index=np.arange(n) % 5,
                t_mid=(np.arange(n) % 5).astype(float), admitted=np.ones(n, bool) if admitted is None else admitted,
                descriptors={"imu": D}, run_id=run)


def test_assemble_counts_each_window_once_applies_verdicts_and_caps_evenly():
    new = _bank("r2", ["x"] * 5 + ["y"] * 5, 10, admitted=np.array([False] + [True] * 8 + [False]), seed=1)
    old = _bank("r1", ["x"] * 5 + ["z"] * 5, 10, seed=2)  # x is scored again on r2: r1's judgement of it stands
    rv = Reviews(content=np.array(["z", "y"]), t_mid=np.array([2.0, 4.0]), verdict=np.array(["fault", "normal"]))
    refs = assemble([new, old], rv, max_references=100, tolerance_s=0.4)
    keys = list(zip(refs.content.tolist(), refs.t_mid.tolist(), refs.run_id.tolist()))
    assert ("x", 0.0, "r1") in keys and ("x", 0.0, "r2") not in keys  # r2 held it back; r1 admitted it first
    assert ("y", 4.0, "r2") in keys  # not admitted by its night, but reviewed normal
    assert ("z", 2.0, "r1") not in keys and ("z", 1.0, "r1") in keys  # reviewed fault: never a reference
    assert len(refs) == 10 + 4 and refs.n_candidates == 14 and refs.runs == ["r1", "r2"]
    np.testing.assert_allclose(refs.approved["imu"], new.descriptors["imu"][[9]])
    np.testing.assert_allclose(refs.descriptors["imu"][(refs.content == "x") & (refs.t_mid == 0.0)],
                               old.descriptors["imu"][[0]])
    capped = assemble([new, old], rv, max_references=7, tolerance_s=0.4)
    assert len(capped) == 7 and set(capped.run_id) == {"r1", "r2"} and capped.n_candidates == 14
    with pytest.raises(InputError):
        assemble([], None, max_references=10, tolerance_s=0.5)


# ------------------------------------------------------------------------------------- the fleet step

def _recs(seed, n_rec=4, fault_in=(), duration=40.0, night=0, stuck=False):
    """Table-only recordings of 3 channels at 20 Hz: slow oscillations of random phase plus noise (stationary,
    like a vehicle going about its work). A fault is 6 s of a 7 Hz rattle on channel 0 (the same in every
    recording it is in); ``stuck`` freezes channel 1 instead, a quiet fault."""
    rng = np.random.default_rng(seed)
    t = np.arange(0, duration, 1 / 20.0)
    recs, labels = [], []
    for i in range(n_rec):
        f, ph = rng.uniform(0.3, 0.7, 3), rng.uniform(0, 2 * np.pi, 3)
        x = np.sin(2 * np.pi * f * t[:, None] + ph) + rng.normal(size=(len(t), 3)) * 0.3
        if i in fault_in:
            a = float(rng.uniform(10, duration - 16))
            sel = (t >= a) & (t < a + 6)
            if stuck:
                x[sel] = rng.normal(size=(int(sel.sum()), 3)) * 1e-3
            else:
                x[sel, 0] += 1.5 * np.sin(2 * np.pi * 7 * t[sel])
            labels.append((f"n{night}-r{i}", a, a + 6))
        recs.append(fleet.RecordingFeatures(recording_id=f"n{night}-r{i}", t=t, table_values=x,
                                            table_valid=np.ones(len(t), bool), table_channels=["a", "b", "c"],
                                            content=f"c{night}-{i}"))
    return recs, labels


def _score(recs, bcfg=BaselineSpec(), sc=SC, desc=Descriptor(), **kw):
    return fleet.score_fleet(recs, windowing=WIN, descriptor=desc, scoring_cfg=sc, baseline_cfg=bcfg, pca_dims={},
                             video_gaps={}, table_streams={"a": "imu", "b": "imu", "c": "imu"}, space_key="s1", **kw)


def _auc(res, labels, metric="riemann"):
    y, s = [], []
    for w in res.windows:
        mid = (w.t_start + w.t_end) / 2
        lab = np.zeros(len(mid), bool)
        for r, a, b in labels:
            if r == w.recording_id:
                lab |= (mid >= a + 1) & (mid <= b - 1)  # windows well inside the fault
        ok = w.valid
        y.append(lab[ok])
        s.append(w.scores[metric][ok])
    return roc_auc_score(np.concatenate(y), np.concatenate(s))


def test_a_fault_recurring_tonight_is_scored_against_earlier_nights():
    night1, _ = _recs(1, n_rec=6)
    first = _score(night1)
    assert first.baseline.info.source == "batch" and first.baseline.info.space_fitted
    # A frozen sensor in 4 of tonight's 6 recordings: tonight's batch alone takes it for normal operation (4
    # recordings show it, more than k = 3), earlier nights know better.
    night2, labels = _recs(2, n_rec=6, fault_in=(0, 1, 2, 3), night=2, stuck=True)
    batch = _score(night2, bcfg=BaselineSpec(source="batch"))
    hist = _score(night2, parent_space=first.baseline.space, history=[dataclasses.replace(first.bank, run_id="r1")])
    assert hist.baseline.info.source == "history" and not hist.baseline.info.tonight
    assert hist.baseline.info.reference_runs == ["r1"] and not hist.baseline.info.space_fitted
    np.testing.assert_array_equal(hist.baseline.space.center, first.baseline.space.center)
    assert _auc(batch, labels) < 0.6
    assert _auc(hist, labels) > 0.97
    # A loud fault (a rattle) recurring in 4 recordings is seen either way.
    night2, labels = _recs(2, n_rec=6, fault_in=(0, 1, 2, 3), night=2)
    assert _auc(_score(night2, parent_space=first.baseline.space, history=[first.bank]), labels) > 0.9


def test_a_night_mostly_unlike_its_history_joins_the_references():
    night1, _ = _recs(11, n_rec=6)
    first = _score(night1)
    h = [dataclasses.replace(first.bank, run_id="r1")]
    # Tonight the fleet works elsewhere (three times the motion everywhere), and one recording rattles: against
    # last week alone every window is unusual, so the history cannot tell the fault from the new operation.
    night2, labels = _recs(12, n_rec=6, fault_in=(0,), night=2)
    night2 = [dataclasses.replace(r, table_values=r.table_values * 3.0) for r in night2]
    res = _score(night2, parent_space=first.baseline.space, history=h)
    info = res.baseline.info
    assert info.source == "history" and info.tonight and info.unlike_history > fleet.UNLIKE_HISTORY_MAX
    assert info.n_reference_recordings == 12 and info.to_dict()["unlike_history"] == info.unlike_history
    assert _auc(res, labels) > 0.9
    # A night like its history keeps the history alone as references.
    night3, _ = _recs(13, n_rec=6, night=3)
    same = _score(night3, parent_space=first.baseline.space, history=h)
    assert not same.baseline.info.tonight and same.baseline.info.unlike_history < 0.2


def test_history_is_used_only_in_the_same_space_and_with_source_history():
    night1, _ = _recs(3)
    first = _score(night1)
    night2, _ = _recs(4, night=2)
    hist = [dataclasses.replace(first.bank, run_id="r1")]
    other = fleet.score_fleet(night2, windowing=WIN, descriptor=Descriptor(), scoring_cfg=SC,
                              baseline_cfg=BaselineSpec(), pca_dims={}, video_gaps={}, space_key="s2",
                              parent_space=first.baseline.space, history=hist)
    assert other.baseline.info.source == "batch" and other.baseline.info.space_fitted  # a profile change
    batch = _score(night2, bcfg=BaselineSpec(source="batch"), parent_space=first.baseline.space, history=hist)
    assert batch.baseline.info.source == "batch"
    rec = _score(night2, bcfg=BaselineSpec(source="recordings", recordings=("n2-r0", "n2-r1")))
    assert rec.baseline.info.source == "recordings" and rec.baseline.info.n_reference_recordings == 2
    with pytest.raises(ValueError, match="none of the baseline recordings"):
        _score(night2, bcfg=BaselineSpec(source="recordings", recordings=("nope",)))


def test_a_thin_history_is_joined_by_tonights_batch():
    night1, _ = _recs(5, n_rec=2)
    first = _score(night1)
    night2, _ = _recs(6, n_rec=4, night=2)
    res = _score(night2, parent_space=first.baseline.space, history=[dataclasses.replace(first.bank, run_id="r1")])
    info = res.baseline.info
    assert info.source == "history" and info.tonight  # 2 recordings < k = 3
    assert info.n_reference_recordings == 6


def test_history_max_score_and_max_references_shape_the_references():
    night1, _ = _recs(7, n_rec=5)
    first = _score(night1)
    strict = _score(night1, bcfg=BaselineSpec(history_max_score=-100.0))
    assert first.bank.admitted.mean() > 0.7 and not strict.bank.admitted.any()
    night2, _ = _recs(8, n_rec=5, night=2)
    h = [dataclasses.replace(strict.bank, run_id="r1")]
    res = _score(night2, parent_space=strict.baseline.space, history=h)
    assert res.baseline.info.source == "batch"  # nothing admitted: scored as a first night
    h = [dataclasses.replace(first.bank, run_id="r1")]
    capped = _score(night2, bcfg=BaselineSpec(max_references=40), parent_space=first.baseline.space, history=h)
    assert capped.baseline.info.n_references == 40
    full = _score(night2, parent_space=first.baseline.space, history=h)
    assert full.baseline.info.n_references == int(first.bank.admitted.sum())


def test_per_stream_blocks_and_the_ridge():
    recs, _ = _recs(9, n_rec=4)
    two = {"a": "imu", "b": "imu", "c": "wheel"}
    split = fleet.score_fleet(recs, windowing=WIN, descriptor=Descriptor(), scoring_cfg=SC, pca_dims={},
                              video_gaps={}, table_streams=two)
    joint = fleet.score_fleet(recs, windowing=WIN, descriptor=Descriptor(per_stream=False), scoring_cfg=SC,
                              pca_dims={}, video_gaps={}, table_streams=two)
    assert split.baseline.space.blocks == {"imu": [0, 1], "wheel": [2]}
    assert joint.baseline.space.blocks == {"all": [0, 1, 2]}
    assert not np.allclose(split.windows[0].scores["riemann"], joint.windows[0].scores["riemann"])
    # "auto": the smallest eigenvalue of the baseline's correlation matrix (numpy's corrcoef), in [0.05, 1].
    x = np.concatenate([r.table_values for r in recs])
    want = float(np.clip(np.linalg.eigvalsh(np.corrcoef(x.T))[0], 0.05, 1.0))
    no_trim = dataclasses.replace(SC, trim_fraction=0.0)
    auto = fleet.score_fleet(recs, windowing=WIN, descriptor=Descriptor(per_stream=False), scoring_cfg=no_trim,
                             pca_dims={}, video_gaps={})
    assert auto.baseline.space.ridges["all"] == pytest.approx(want, rel=1e-9)
    fixed = fleet.score_fleet(recs, windowing=WIN, descriptor=Descriptor(per_stream=False, ridge=0.01),
                              scoring_cfg=no_trim, pca_dims={}, video_gaps={})
    assert fixed.baseline.space.ridges["all"] == 0.01
    assert not np.allclose(auto.windows[0].scores["riemann"], fixed.windows[0].scores["riemann"])
    ev = np.linalg.eigvalsh(fixed.bank.descriptors["all"])
    assert ev.min() > 0.0  # strictly positive definite


def test_scoring_method_and_unit_reach_the_fleet_step():
    recs, _ = _recs(10, n_rec=4, fault_in=(1,))
    out = {}
    for method in ("knn", "density", "frechet_mean"):
        for unit in ("recording", "window"):
            res = _score(recs, sc=dataclasses.replace(SC, method=method, knn_unit=unit))
            out[method, unit] = np.concatenate([w.scores["riemann"][w.valid] for w in res.windows])
    assert not np.allclose(out["frechet_mean", "recording"], out["knn", "recording"])
    assert not np.allclose(out["density", "recording"], out["knn", "recording"])
    assert not np.allclose(out["knn", "window"], out["knn", "recording"])


def test_verdicts_decide_flags_and_admission():
    recs, labels = _recs(11, n_rec=4, fault_in=(2,))
    first = _score(recs)
    w2 = next(w for w in first.windows if w.recording_id == "n0-r2")
    j = int(np.nanargmax(w2.scores["riemann"]))
    assert w2.flagged["riemann"][j]
    mid = (w2.t_start[j] + w2.t_end[j]) / 2
    normal_j = Reviews(content=np.array(["c0-2"]), t_mid=np.array([mid]), verdict=np.array(["normal"]))
    again = _score(recs, reviews=normal_j)
    w2b = next(w for w in again.windows if w.recording_id == "n0-r2")
    assert not w2b.flagged["riemann"][j] and w2b.verdict[j] == "normal"
    pos = np.flatnonzero((again.bank.content == "c0-2") & (again.bank.window_index == j))
    assert again.bank.admitted[pos].all()
    fault_rec = Reviews(content=np.array(["c0-1"]), t_mid=np.array([np.nan]), verdict=np.array(["fault"]))
    f = _score(recs, reviews=fault_rec)
    assert not f.bank.admitted[f.bank.content == "c0-1"].any()
    assert next(w for w in f.windows if w.recording_id == "n0-r1").flagged["riemann"][
        next(w for w in f.windows if w.recording_id == "n0-r1").valid].all()


def test_space_and_bank_round_trip_through_arrays():
    recs, _ = _recs(12, n_rec=3)
    res = _score(recs)
    sp = fleet.Space.from_arrays(res.baseline.space.to_arrays())
    assert sp.key == "s1" and sp.channels == ["a", "b", "c"] and sp.blocks == res.baseline.space.blocks
    np.testing.assert_array_equal(sp.scale, res.baseline.space.scale)
    b = Bank.from_arrays(res.bank.to_arrays(), run_id="r9")
    assert b.run_id == "r9" and list(b.descriptors) == ["imu"]
    np.testing.assert_array_equal(b.descriptors["imu"], res.bank.descriptors["imu"])
    pd.testing.assert_series_equal(pd.Series(b.content), pd.Series(res.bank.content.astype(str)))


def test_the_report_says_why_tonight_joined_the_references(tmp_path):
    from fleetsift.flows.report import _references_html
    from fleetsift.store import Store

    st = Store(str(tmp_path / "store")).init()
    info = {"source": "history", "n_references": 40, "n_reference_recordings": 12, "reference_runs": ["r1"],
            "tonight": True, "n_approved": 0, "ridges": {"imu": 0.1}, "k": 3}
    for bid, unlike, says in (("b-1", 0.8, "80% of them were unlike the history alone"),
                              ("b-2", None, "while the history is thin")):
        (st.root / "baselines").mkdir(exist_ok=True)
        np.savez(st.root / "baselines" / f"{bid}.npz", info=np.array(json.dumps({**info, "unlike_history": unlike})))
        assert says in _references_html(st, {"baseline_id": bid})


def test_descriptor_shrinkage_reaches_the_fleet_step():
    recs, _ = _recs(10, n_rec=4, fault_in=(1,))
    out = {}
    for kind in ("covariance", "lagged"):
        for shrinkage in ("ledoit_wolf", "oas"):
            res = _score(recs, desc=Descriptor(kind=kind, shrinkage=shrinkage, ridge=1e-3))
            out[kind, shrinkage] = np.concatenate([w.scores["riemann"][w.valid] for w in res.windows])
    assert not np.allclose(out["covariance", "ledoit_wolf"], out["covariance", "oas"])
    assert not np.allclose(out["lagged", "ledoit_wolf"], out["lagged", "oas"])
