"""fleetsift.demo.fleet: determinism, IMU timing, camera clock offset, labels, and a planted bearing fault.

Plus checks on the committed sample_raw/ (every anomaly kind planted, enough normal recordings, small enough).
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import signal

from fleetsift.featurizers import video
from fleetsift.demo import fleet as demo_fleet

ROOT = Path(__file__).resolve().parent.parent
SIZE = (96, 72)
SECONDS = 10.0


@pytest.fixture(scope="module")
def fleets(tmp_path_factory):
    base = tmp_path_factory.mktemp("fleet")
    names = demo_fleet.make_fleet(base / "a", n_recordings=2, duration_s=SECONDS, seed=11, size=SIZE)
    names_b = demo_fleet.make_fleet(base / "b", n_recordings=2, duration_s=SECONDS, seed=11, size=SIZE)
    assert names == names_b
    return base / "a", base / "b", names


def test_same_seed_same_bytes(fleets):
    a, b, names = fleets
    assert (a / "labels.csv").read_bytes() == (b / "labels.csv").read_bytes()
    assert (a / "profile.toml").read_bytes() == (b / "profile.toml").read_bytes()
    for n in names:
        assert (a / n / "imu.csv").read_bytes() == (b / n / "imu.csv").read_bytes()
        fa = list(video.iter_frames(a / n / "camera.mp4"))
        fb = list(video.iter_frames(b / n / "camera.mp4"))
        assert len(fa) == len(fb) > 0
        assert all(ta == tb and np.array_equal(ia, ib) for (ta, ia), (tb, ib) in zip(fa, fb))


def test_other_seed_other_data(fleets, tmp_path):
    a, _, names = fleets
    other = demo_fleet.make_fleet(tmp_path, n_recordings=1, duration_s=8.0, seed=12, size=(32, 24))
    assert (tmp_path / other[0] / "imu.csv").read_bytes() != (a / names[0] / "imu.csv").read_bytes()


def test_layout_and_names(fleets):
    a, _, names = fleets
    assert sorted(d.name for d in a.iterdir() if d.is_dir()) == sorted(names)
    for n in names:
        assert n.startswith("rover-") and {p.name for p in (a / n).iterdir()} == {"imu.csv", "camera.mp4"}


def test_imu_sampling_statistics(fleets):
    a, _, names = fleets
    for n in names:
        d = pd.read_csv(a / n / "imu.csv")
        assert list(d.columns) == ["t", "ax", "ay", "az", "gx", "gy", "gz"]
        t = d["t"].to_numpy()
        assert t[0] == 0.0 and t[-1] <= SECONDS
        dt = np.diff(t)
        assert np.median(dt) == pytest.approx(0.005, abs=5e-5)
        regular = dt[dt < 0.0075]
        # uniform +-0.6 ms jitter has standard deviation 0.6/sqrt(3) = 0.35 ms (then rounded to 0.1 ms)
        assert 0.25e-3 < regular.std() < 0.45e-3
        assert dt.min() >= 0.0043
        drops = dt[dt >= 0.0075]
        assert len(drops) >= 2 and drops.max() < 0.1  # singles and short runs, all under 0.1 s
        assert d["az"].median() == pytest.approx(9.81, abs=0.1)  # gravity on +z
        assert abs(d["ax"].median()) < 0.3 and abs(d["ay"].median()) < 0.3


def test_camera_pts_start_at_clock_offset(fleets):
    a, _, names = fleets
    for n in names:
        info = video.probe_video(a / n / "camera.mp4")
        assert (info["width"], info["height"]) == SIZE
        times = np.array([t for t, _ in video.iter_frames(a / n / "camera.mp4")])
        assert times[0] == demo_fleet.CAMERA_OFFSET_S  # first frame at true time 0
        assert np.median(np.diff(times)) == pytest.approx(1 / 15, abs=0.002)
        assert len(times) == int(SECONDS * 15)
        assert times[-1] - demo_fleet.CAMERA_OFFSET_S <= SECONDS


def test_profile_parses_with_the_schema(fleets):
    from fleetsift.profile import load_profile

    a, _, _ = fleets
    p = load_profile(a / "profile.toml")
    assert p.streams["camera"].clock_offset_s == -demo_fleet.CAMERA_OFFSET_S
    assert p.streams["imu"].channels == ("ax", "ay", "az", "gx", "gy", "gz")
    assert (p.windowing.rate_hz, p.windowing.window_s, p.windowing.hop_s) == (50.0, 4.0, 2.0)


def _labels_ok(labels: pd.DataFrame, durations: dict):
    assert list(labels.columns) == ["recording_id", "t_start_s", "t_end_s", "kind"]
    assert set(labels["kind"]) <= set(demo_fleet.KINDS)
    for r in labels.itertuples():
        assert 0 <= r.t_start_s < r.t_end_s <= durations[r.recording_id] + 1e-9
        if r.kind != "bump":
            assert r.t_end_s - r.t_start_s >= 6.0 - 1e-9


def test_labels_inside_durations(fleets):
    a, _, names = fleets
    labels = pd.read_csv(a / "labels.csv")
    durations = {n: pd.read_csv(a / n / "imu.csv")["t"].iloc[-1] for n in names}
    _labels_ok(labels, durations)
    assert len(labels) >= 1


def _uniform(d: pd.DataFrame, fs=200.0):
    """The IMU clock is jittery: Welch needs uniform samples, so interpolate onto a 200 Hz grid first."""
    t = np.arange(d["t"].iloc[0], d["t"].iloc[-1], 1 / fs)
    return t, {c: np.interp(t, d["t"], d[c]) for c in ("ax", "ay", "az")}


def _band_power(x, fs=200.0, lo=12.0, hi=20.0):
    # Outside reference: scipy.signal.welch (Welch 1967) power spectral density, integrated over the band.
    f, p = signal.welch(x - x.mean(), fs=fs, nperseg=256)
    m = (f >= lo) & (f <= hi)
    return np.trapezoid(p[m], f[m])


def test_planted_bearing_has_more_12_20_hz_power(fleets):
    a, _, names = fleets
    labels = pd.read_csv(a / "labels.csv")
    bearing = labels[labels["kind"] == "bearing"]
    assert len(bearing) == 1, "the 2-recording plan plants a bearing fault"
    rec, s, e = bearing.iloc[0][["recording_id", "t_start_s", "t_end_s"]]
    mid = (s + e) / 2
    t, ch = _uniform(pd.read_csv(a / rec / "imu.csv"))
    faulty = (t >= mid - 2) & (t < mid + 2)
    normal_rec = [n for n in names if n != rec][0]
    tn, chn = _uniform(pd.read_csv(a / normal_rec / "imu.csv"))
    normal = (tn >= mid - 2) & (tn < mid + 2)
    for c in ("ax", "ay", "az"):
        assert _band_power(ch[c][faulty]) > 5 * _band_power(chn[c][normal]), c


def test_main_cli(tmp_path, capsys):
    assert demo_fleet.main(["--out", str(tmp_path), "--recordings", "1", "--seconds", "8", "--seed", "2",
                            "--size", "32x24"]) == 0
    assert "wrote 1 recordings" in capsys.readouterr().out
    assert (tmp_path / "labels.csv").exists() and (tmp_path / "profile.toml").exists()


def test_default_plan_covers_every_kind():
    plan = demo_fleet.plan_fleet(8, 60.0, 7)
    kinds = [k for _, ks in plan for k in ks]
    assert set(kinds) == set(demo_fleet.KINDS)
    assert sum(1 for _, ks in plan if not ks) >= 3
    assert all(1 <= len(ks) <= 2 for _, ks in plan if ks)
    assert len({name for name, _ in plan}) == 8


def test_bad_arguments(tmp_path):
    with pytest.raises(ValueError):
        demo_fleet.make_fleet(tmp_path, size=(33, 24))
    with pytest.raises(ValueError):
        demo_fleet.make_fleet(tmp_path, duration_s=3.0)


# --- the committed demo fleet ---------------------------------------------------------------------------------

SAMPLE = ROOT / "sample_raw"


@pytest.mark.skipif(not (SAMPLE / "labels.csv").exists(), reason="sample_raw/ not generated")
def test_committed_sample():
    labels = pd.read_csv(SAMPLE / "labels.csv")
    recs = sorted(d.name for d in SAMPLE.iterdir() if d.is_dir() and d.name.startswith("rover-"))
    assert len(recs) == 8
    durations = {}
    for n in recs:
        t = pd.read_csv(SAMPLE / n / "imu.csv", usecols=["t"])["t"]
        durations[n] = t.iloc[-1]
    _labels_ok(labels, durations)
    assert set(labels["kind"]) == set(demo_fleet.KINDS)  # every planted kind really made it into the data
    assert len(set(recs) - set(labels["recording_id"])) >= 3  # fully normal recordings
    assert labels.groupby("recording_id").size().max() <= 2
    size = sum(p.stat().st_size for p in SAMPLE.rglob("*") if p.is_file())
    assert size < 12e6
