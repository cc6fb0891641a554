"""Frame novelty (scoring.novelty): distances checked against scipy, the k-recordings rule, the store round trip,
and a new sight in one recording's video that only the frame novelty finds."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from fleetsift.profile import BaselineSpec, Descriptor, Scoring, Windowing
from fleetsift.scoring import fleet
from fleetsift.scoring import novelty as nov


def _bank(rng, n_rec=5, n=40, d=8):
    embs = [rng.normal(size=(n, d)) + 3.0 for _ in range(n_rec)]
    owners = [f"r{i}" for i in range(n_rec)]
    return embs, owners, nov.fit_frame_bank(embs, owners, dim=d)


@pytest.mark.parametrize("k", [1, 3])
def test_frame_novelty_is_the_kth_recording_nearest_cosine_distance_as_scipy_computes_it(k):
    # Outside reference: scipy.spatial.distance.cdist(metric="cosine") = 1 - u.v / (|u| |v|), on embeddings
    # centred on the reference frames' mean; with all principal directions kept the projection is a rotation.
    rng = np.random.default_rng(0)
    embs, owners, bank = _bank(rng)
    q = rng.normal(size=(30, 8)) + 3.0
    got = nov.frame_novelty(bank, q, "r2", k)
    mean = np.concatenate(embs).mean(axis=0)
    per_rec = np.stack([cdist(q - mean, e - mean, "cosine").min(axis=1) for e, o in zip(embs, owners)
                        if o != "r2"], axis=1)
    want = np.sort(per_rec, axis=1)[:, k - 1]
    np.testing.assert_allclose(got, want, atol=2e-3)  # the reference frames are kept as float16


def test_a_sight_is_normal_only_where_k_other_recordings_show_it():
    rng = np.random.default_rng(1)
    d, sight = 8, np.r_[10.0, np.zeros(7)]
    embs = [rng.normal(size=(40, d)) for _ in range(6)]
    for i in (1, 2, 3):  # the sight in three recordings
        embs[i][:5] = sight + 0.01 * rng.normal(size=(5, d))
    bank = nov.fit_frame_bank(embs, [f"r{i}" for i in range(6)], dim=d)
    q = sight[None, :] + 0.01 * rng.normal(size=(4, d))
    assert nov.frame_novelty(bank, q, "r0", 3).max() < 0.01  # three other recordings show it: normal
    assert nov.frame_novelty(bank, q, "r1", 3).min() > 0.2  # its own frames never count: two others only
    assert np.isnan(nov.frame_novelty(nov.fit_frame_bank(embs[:1], ["r0"], dim=d), q, "r0", 3)).all()


def test_window_novelty_means_the_frames_inside_each_window():
    t = np.arange(0, 10, 0.5)
    v = np.arange(len(t), dtype=float)
    got = nov.window_novelty(t, v, np.array([0.0, 2.0, 20.0]), np.array([4.0, 6.0, 24.0]))
    np.testing.assert_allclose(got[:2], [v[(t >= 0) & (t < 4)].mean(), v[(t >= 2) & (t < 6)].mean()])
    assert np.isnan(got[2])


def test_the_space_keeps_its_reference_frames_through_the_store_arrays():
    rng = np.random.default_rng(2)
    _, _, bank = _bank(rng)
    bank.center, bank.scale = 0.25, 0.05
    sp = fleet.Space(key="k", channels=["a"], center=np.zeros(1), scale=np.ones(1), pca={}, blocks={"t": [0]},
                     ridges={"t": 0.1}, novelty={"camera": bank})
    back = fleet.Space.from_arrays(sp.to_arrays()).novelty["camera"]
    assert (back.center, back.scale) == (0.25, 0.05) and list(back.owner) == list(bank.owner)
    np.testing.assert_array_equal(back.frames, bank.frames)
    np.testing.assert_allclose(back.basis, bank.basis)


def _video_fleet(sight_in: tuple[int, ...], n_rec: int = 6, seconds: float = 40.0, seed: int = 3):
    """Recordings of one route: 3 noise table channels at 50 Hz and a camera embedding (32-d, 5 frames/s) that
    follows where the vehicle is on the route. A new sight -- a small added direction, about 4 % of the
    embedding's norm -- shows from 20 s to 26 s in the recordings ``sight_in``."""
    rng = np.random.default_rng(seed)
    route = rng.normal(size=(9, 32)) * 2.0
    recs = []
    for i in range(n_rec):
        t = np.arange(0, seconds, 0.02)
        tf = np.arange(0, seconds, 0.2)
        pos = (tf / seconds * 8) + rng.uniform(-0.2, 0.2)  # where on the route, each frame
        j = np.clip(pos.astype(int), 0, 7)
        frac = (pos - j)[:, None]
        emb = 20.0 + (1 - frac) * route[j] + frac * route[j + 1] + 0.3 * rng.normal(size=(len(tf), 32))
        if i in sight_in:
            on = (tf >= 20) & (tf < 26)
            emb[on, 31] += 3.0
        recs.append(fleet.RecordingFeatures(recording_id=f"rec-{i}", t=t, table_values=rng.normal(size=(len(t), 3)),
                                            table_valid=np.ones(len(t), bool), table_channels=["a", "b", "c"],
                                            videos=[("camera", tf, emb)]))
    return recs


def _score(recs):
    return fleet.score_fleet(recs, windowing=Windowing(), descriptor=Descriptor(),
                             scoring_cfg=Scoring(exclusion_s=5.0), baseline_cfg=BaselineSpec(source="batch"),
                             pca_dims={"camera": 4}, video_gaps={"camera": 0.5}, metrics=("riemann",))


def _at_sight(res, rec="rec-0"):
    ws = next(w for w in res.windows if w.recording_id == rec)
    mid = (ws.t_start + ws.t_end) / 2
    return ws.scores["riemann"][(mid >= 21) & (mid <= 25)], ws.scores["riemann"][(mid < 16) | (mid > 30)]


def test_a_new_sight_in_one_recording_is_flagged_by_its_frame_novelty(monkeypatch):
    res = _score(_video_fleet(sight_in=(0,)))
    at, away = _at_sight(res)
    c = Scoring().threshold_c
    assert at.min() > c and np.nanmedian(away) < c, (at, away)
    assert res.baseline.info.novelty_frames == {"camera": [6 * 200, 6]}
    ws = next(w for w in res.windows if w.recording_id == "rec-0")
    mid = (ws.t_start + ws.t_end) / 2
    assert "camera." in ws.top_channels[int(np.argmin(np.abs(mid - 23)))].split(",")[0]
    # Without the frame novelty the camera's descriptor block does not see the sight (so this test would fail if
    # the novelty were dropped from the window scores).
    monkeypatch.setattr(nov, "zscore", lambda values, bank: np.full(len(values), -np.inf))
    blind, _ = _at_sight(_score(_video_fleet(sight_in=(0,))))
    assert blind.max() < c, blind


def test_a_sight_that_k_recordings_show_is_normal():
    res = _score(_video_fleet(sight_in=(0, 1, 2, 3)))
    at, _ = _at_sight(res)
    assert at.max() < Scoring().threshold_c, at


def test_tonights_frames_join_a_bank_once_in_its_own_basis_and_the_oldest_go_first():
    rng = np.random.default_rng(4)
    embs, owners, bank = _bank(rng, n_rec=3)
    bank.center, bank.scale = 0.3, 0.1
    new = rng.normal(size=(10, 8)) + 3.0
    ext = nov.extend_frame_bank(bank, [new, embs[0][:25]], ["tonight", "r0"], [np.arange(10.0), np.arange(25.0)])
    assert len(ext.frames) == len(bank.frames) - 40 + 10 + 25 and (ext.center, ext.scale) == (0.3, 0.1)
    # r0 was in already: scored again, its newer frames replace the older ones
    assert list(ext.owner).count("tonight") == 10 and list(ext.owner[-25:]) == ["r0"] * 25
    # tonight's frames now count as references for the other recordings:
    np.testing.assert_allclose(nov.frame_novelty(ext, new[:3], "r1", 1), 0.0, atol=2e-3)
    capped = nov.extend_frame_bank(bank, [new], ["tonight"], [np.arange(10.0)], max_frames=65)
    assert len(capped.frames) == 65 and list(capped.owner[-10:]) == ["tonight"] * 10
    assert "r0" not in set(capped.owner) and list(capped.owner[:55]) == list(bank.owner[-55:])


def test_later_nights_take_the_admitted_frames_and_never_a_reviewed_faults():
    from fleetsift.scoring.history import Reviews

    recs = _video_fleet(sight_in=(0,))
    first = _score(recs)
    kept = first.history_space.novelty["camera"]
    assert len(kept.owner) == 6 * 200  # every frame is kept, marked whether it may be a reference
    hist = kept.select(kept.admitted)
    # The sight's windows were flagged, so their frames (and those within a window of them) are not references.
    at_sight = (hist.owner == "rec-0") & (hist.t >= 20) & (hist.t < 26)
    assert not at_sight.any() and 5 * 150 < len(hist.owner) < 6 * 200
    assert first.baseline.space.novelty["camera"].owner.tolist().count("rec-0") == 200  # tonight: all of them
    # A window of rec-3 reviewed as a fault after that night: its frames leave the references of the next night.
    t_rev = float(np.median(hist.t[hist.owner == "rec-3"]))
    rv = Reviews(content=np.array(["rec-3"]), t_mid=np.array([t_rev]), verdict=np.array(["fault"]))
    night2 = [dataclasses.replace(r, recording_id=f"new-{i}") for i, r in enumerate(_video_fleet(sight_in=())[:2])]
    second = fleet.score_fleet(night2, windowing=Windowing(), descriptor=Descriptor(),
                               scoring_cfg=Scoring(exclusion_s=5.0), baseline_cfg=BaselineSpec(),
                               pca_dims={"camera": 4}, video_gaps={"camera": 0.5}, metrics=("riemann",),
                               parent_space=first.history_space, history=[first.bank], reviews=rv)
    assert second.baseline.info.source == "history" and not second.baseline.info.tonight
    faulty = ((hist.owner == "rec-3") & (np.abs(hist.t - t_rev) <= 2.0)).sum()
    assert faulty >= 15 and second.baseline.info.novelty_frames["camera"] == [len(hist.owner) - faulty, 6]
    # ... and the night after keeps those frames, then tonight's (the newest last).
    nxt = second.history_space.novelty["camera"]
    assert len(nxt.owner) == 8 * 200 and set(nxt.owner[-200:]) == {"new-1"}
    # The sight's windows reviewed as normal: from then on their frames are references, and the sight that only
    # rec-0 showed is no longer novel for new recordings that show it too.
    sight = nov.frame_novelty(nxt.references(np.full(len(nxt.owner), "")), _video_fleet((0,))[0].videos[0][2][105:125],
                              "new-9", 1)
    ok = nov.frame_novelty(nxt.references(np.where((nxt.owner == "rec-0") & (nxt.t >= 20) & (nxt.t < 26),
                                                   "normal", "")), _video_fleet((0,))[0].videos[0][2][105:125],
                           "new-9", 1)
    assert ok.max() < 0.2 * sight.min(), (ok, sight)


def test_k_starts_a_new_history_only_where_a_camera_keeps_a_novelty_scale():
    from fleetsift.profile import parse_profile
    from fleetsift.tasks.stages import space_key

    table = '[streams.imu]\nkind = "table"\nfile = "imu.csv"\nchannels = ["ax"]\n'
    video = table + '[streams.camera]\nkind = "video"\nfile = "camera.mp4"\n'
    for text, differs in ((table, False), (video, True)):
        keys = {space_key(parse_profile(f"[scoring]\nk = {k}\n" + text)) for k in (3, 4)}
        assert (len(keys) == 2) == differs
