"""Bad input, one test per kind, at the level where it is handled.

Featurizer functions raise `InputError(file, field, expected, got)`; the plain stage functions
(`stages.run_tables` / `run_embed`) turn that into a `{"status": "unscored", "reason": ...}` dict so a
night goes on without the bad recording. Every check below asserts on all four parts of the message: the file, the
field, what was expected and what was found.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path

import av
import numpy as np
import pandas as pd
import pytest
from inboxes import profile_toml  # tests/ is on sys.path under pytest

from fleetsift.errors import InputError, ProfileError
from fleetsift.profile import Descriptor, Scoring, Windowing, load_profile, parse_profile, profile_for
from fleetsift.demo.video import write_video
from fleetsift.featurizers import descriptors, video
from fleetsift.featurizers.recording import common_clock, read_table_stream, resolve_stream_file
from fleetsift.featurizers.tables import clean_table, cut_windows, read_table_file, window_starts
from fleetsift.scoring import fleet

RATE = 100.0  # Hz of the synthetic IMU tables
CH = ("ax", "ay", "gz")


# --- helpers ---------------------------------------------------------------------------------------------------------

def imu_frame(duration: float = 60.0, rate: float = RATE, seed: int = 0, channels=CH) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    t = np.arange(int(round(duration * rate))) / rate
    data = {"t": t}
    for j, ch in enumerate(channels):
        data[ch] = np.sin(2 * np.pi * (0.3 + 0.2 * j) * t) + 0.1 * rng.normal(size=len(t))
    return pd.DataFrame(data)


def write_rec(root: Path, name: str, df: pd.DataFrame | None = None, text: str | None = None,
              file: str = "imu.csv") -> Path:
    rec = root / name
    rec.mkdir(parents=True, exist_ok=True)
    if text is not None:
        (rec / file).write_text(text)
    else:
        (imu_frame() if df is None else df).to_csv(rec / file, index=False)
    return rec


def profile_text(channels=CH, file="imu.csv", unit="s", more="") -> str:
    """The shared profile (tests/inboxes.py) with its IMU stream only."""
    return profile_toml(imu={"file": file, "time_unit": unit, "channels": list(channels)}, camera=False, more=more)


def profile(**kw):
    return parse_profile(profile_text(**kw), "fleet.toml")


def stream(**kw):
    return profile(**kw).streams["imu"]


def check(err: InputError, file: str, field: str, expected: str, got: str) -> None:
    """The four parts of the message: file (its tail), field (exact), expected and got (substrings)."""
    assert isinstance(err, InputError)
    assert err.file.endswith(file), (err.file, file)
    assert err.field == field, (err.field, field)
    assert expected in err.expected, (err.expected, expected)
    assert got in err.got, (err.got, got)
    assert str(err) == f"{err.file}: {err.field}: expected {err.expected}, got {err.got}"


def read_err(path: Path, channels=CH, time_column="t") -> InputError:
    with pytest.raises(InputError) as e:
        t, x = read_table_file(path, time_column, list(channels))
        clean_table(str(path), t, x, list(channels), "s", {}, 0.0)
    return e.value


@pytest.fixture(scope="module")
def stages():
    from fleetsift.tasks import stages as st  # imports Prefect: once per module

    return st


# --- table content ---------------------------------------------------------------------------------------------------

def test_empty_table(tmp_path):
    p = tmp_path / "imu.csv"
    p.write_text("")
    check(read_err(p), "imu.csv", "content", "a header row and samples", "an empty file")


def test_header_only(tmp_path):
    p = tmp_path / "imu.csv"
    p.write_text("t,ax,ay,gz\n")
    check(read_err(p), "imu.csv", "rows", "at least 2 samples", "a header only")


def test_single_row_is_too_short(tmp_path):
    p = tmp_path / "imu.csv"
    p.write_text("t,ax,ay,gz\n0,1,2,3\n")
    check(read_err(p), "imu.csv", "rows", "at least 2 samples", "1")


def test_non_numeric_cell_names_column_and_row(tmp_path):
    df = imu_frame().astype(object)
    df.loc[41, "ay"] = "n/a?"
    p = tmp_path / "imu.csv"
    df.to_csv(p, index=False)
    # Row 43 of the file: the header is row 1 and data row 0 is row 2.
    check(read_err(p), "imu.csv", "column 'ay' row 43", "a number", "'n/a?'")


def test_non_numeric_time_cell(tmp_path):
    df = imu_frame().astype(object)
    df.loc[0, "t"] = "2024-05-01T02:00:00"
    p = tmp_path / "imu.csv"
    df.to_csv(p, index=False)
    check(read_err(p), "imu.csv", "column 't' row 2", "a number", "'2024-05-01T02:00:00'")


def test_nan_and_inf_in_few_rows_are_repaired_and_counted(tmp_path):
    df = imu_frame().astype(object)
    df.loc[100, "ax"] = "nan"
    df.loc[200, "ay"] = "inf"
    df.loc[300, "gz"] = "-inf"
    df.loc[400, "t"] = "nan"
    p = tmp_path / "imu.csv"
    df.to_csv(p, index=False)
    t, x = read_table_file(p, "t", list(CH))
    assert np.isnan(x[100, 0]) and np.isposinf(x[200, 1]) and np.isneginf(x[300, 2]) and np.isnan(t[400])
    tb = clean_table(str(p), t, x, list(CH), "s", {}, 0.0)
    assert tb.repairs == {"nonfinite_rows_dropped": 4}
    assert len(tb.t) == len(df) - 4 and np.isfinite(tb.values).all()
    for i in (100, 200, 300):
        assert not np.isclose(tb.t, i / RATE).any()  # the whole row goes, not just the cell


def test_nan_in_many_rows_is_refused(tmp_path):
    df = imu_frame()
    df.loc[df.index % 10 == 3, "ay"] = np.nan  # 10 % of rows: above the 5 % repair share
    p = tmp_path / "imu.csv"
    df.to_csv(p, index=False)
    check(read_err(p), "imu.csv", "column 'ay'", "finite numbers", f"{len(df) // 10} of {len(df)} rows with NaN or inf")


def test_inf_in_many_timestamps_is_refused(tmp_path):
    df = imu_frame()
    df.loc[df.index < 700, "t"] = np.inf
    p = tmp_path / "imu.csv"
    df.to_csv(p, index=False)
    check(read_err(p), "imu.csv", "time column", "finite timestamps", f"700 of {len(df)} not finite")


def test_non_monotonic_timestamps_few_are_sorted_and_counted():
    df = imu_frame()
    t = df["t"].to_numpy().copy()
    x = df[list(CH)].to_numpy()
    for i in (500, 1500, 2500):
        t[[i, i + 1]] = t[[i + 1, i]]
    tb = clean_table("imu.csv", t, x, list(CH), "s", {}, 0.0)
    assert tb.repairs == {"out_of_order_sorted": 3}
    np.testing.assert_allclose(tb.t, df["t"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(tb.values, x[np.argsort(t, kind="stable")], rtol=1e-12)  # each value kept with its stamp


def test_non_monotonic_timestamps_many_are_refused():
    df = imu_frame()
    t = df["t"].to_numpy().copy()
    t[1::2], t[::2] = t[::2].copy(), t[1::2].copy()  # every pair swapped: half the steps go backwards
    with pytest.raises(InputError) as e:
        clean_table("imu.csv", t, df[list(CH)].to_numpy(), list(CH), "s", {}, 0.0)
    check(e.value, "imu.csv", "time column", "increasing timestamps", f"{len(t) // 2} of {len(t) - 1} steps going backwards")


def test_duplicate_timestamps_keep_the_first_and_are_counted():
    df = imu_frame()
    t = df["t"].to_numpy().copy()
    x = df[list(CH)].to_numpy().copy()
    t[[11, 12, 600]] = t[[10, 10, 599]]  # a triple and a pair
    tb = clean_table("imu.csv", t, x, list(CH), "s", {}, 0.0)
    assert tb.repairs == {"duplicate_stamps_dropped": 3}
    assert np.all(np.diff(tb.t) > 0)
    i10 = int(np.flatnonzero(tb.t == t[10])[0])
    np.testing.assert_allclose(tb.values[i10], x[10], rtol=1e-12)


def _gap_table(gap_s: float, at: float = 30.0, seed: int = 0) -> pd.DataFrame:
    df = imu_frame(seed=seed)
    keep = ~((df["t"] > at) & (df["t"] < at + gap_s))
    return df[keep].reset_index(drop=True)


def test_gap_longer_than_tolerance_makes_windows_invalid():
    df = _gap_table(1.0)
    tb = clean_table("imu.csv", df["t"].to_numpy(), df[list(CH)].to_numpy(), list(CH), "s", {}, 0.0)
    t0, t, x, valid, names = common_clock([tb], 50.0, 0.25)
    assert not valid[(t > 30.0) & (t < 31.0)].any()
    assert valid[(t < 29.99) | (t > 31.01)].all()
    starts, w = window_starts(len(t), 50.0, 4.0, 2.0)
    _, ok = cut_windows(x, valid, starts, w)
    straddles = (t[starts] < 31.0) & (t[starts] + w / 50.0 > 30.0)
    assert straddles.sum() >= 2
    np.testing.assert_array_equal(ok, ~straddles)


def test_gap_within_tolerance_is_interpolated():
    df = _gap_table(0.2)
    tb = clean_table("imu.csv", df["t"].to_numpy(), df[list(CH)].to_numpy(), list(CH), "s", {}, 0.0)
    _, t, x, valid, _ = common_clock([tb], 50.0, 0.25)
    assert valid.all()


def test_gap_windows_are_never_scored():
    # Three table-only recordings, one with a 1.5 s hole: its straddling windows get no score and no flag.
    recs = []
    for i, gap in enumerate((0.0, 1.5, 0.0)):
        df = _gap_table(gap, seed=i) if gap else imu_frame(seed=i)
        tb = clean_table("imu.csv", df["t"].to_numpy(), df[list(CH)].to_numpy(), list(CH), "s", {}, 0.0)
        _, t, x, valid, names = common_clock([tb], 50.0, 0.25)
        recs.append(fleet.RecordingFeatures(recording_id=f"r{i}", t=t, table_values=x, table_valid=valid,
                                            table_channels=names))
    res = fleet.score_fleet(recs, windowing=Windowing(), descriptor=Descriptor(), scoring_cfg=Scoring(k=3),
                            pca_dims={}, video_gaps={})
    holed = res.windows[1]
    bad = (holed.t_start < 31.5) & (holed.t_end > 30.0)
    assert bad.sum() >= 2
    np.testing.assert_array_equal(holed.valid, ~bad)
    for m in fleet.METRICS:
        assert np.isnan(holed.scores[m][bad]).all() and not holed.flagged[m][bad].any()
        assert np.isfinite(holed.scores[m][~bad]).all()
    assert all(holed.top_channels[j] == "" for j in np.flatnonzero(bad))


def test_missing_channel_named_in_profile(tmp_path):
    p = tmp_path / "imu.csv"
    imu_frame(channels=("ax", "ay")).to_csv(p, index=False)
    check(read_err(p), "imu.csv", "channel 'gz'", "every channel named in the profile", "columns ['t', 'ax', 'ay']")


def test_missing_time_column(tmp_path):
    p = tmp_path / "imu.csv"
    imu_frame().rename(columns={"t": "time"}).to_csv(p, index=False)
    check(read_err(p), "imu.csv", "column 't'", "the time column named in the profile", "'time'")


def test_extra_unknown_channel_is_ignored_not_an_error(tmp_path):
    # A channel the profile does not name (here a motor temperature) is not read and not an error: tables often
    # carry more columns than one screening uses.
    rec = tmp_path / "rec"
    df = imu_frame()
    df["motor_temp"] = 40.0 + np.arange(len(df)) * 1e-3
    write_rec(tmp_path, "rec", df)
    tb = read_table_stream(rec, stream())
    assert tb.channels == list(CH) and tb.values.shape == (len(df), 3) and tb.repairs == {}
    np.testing.assert_allclose(tb.values, df[list(CH)].to_numpy(), rtol=1e-12)  # CSV text round trip: last-digit parsing differs by pandas version


@pytest.mark.parametrize("scale, declared, field, got", [
    (1e6, "s", "time_unit", "median interval 1e+04 s"),  # microseconds declared as seconds
    (1e9, "ms", "time_unit", "median interval 1e+04 s"),  # nanoseconds declared as milliseconds
    (1e3, "s", "time_unit / windowing.max_gap_s", "a median interval of 10 s"),  # ms as s: 0.1 Hz, all gaps
])
def test_wrong_time_unit(tmp_path, scale, declared, field, got):
    rec = tmp_path / "rec"
    df = imu_frame()
    df["t"] = df["t"] * scale
    write_rec(tmp_path, "rec", df)
    with pytest.raises(InputError) as e:
        tb = read_table_stream(rec, stream(unit=declared))
        common_clock([tb], 50.0, 0.25)
    expected = f"timestamps in {declared!r}" if field == "time_unit" else "at most max_gap_s = 0.25 s"
    check(e.value, "rec/imu.csv", field, expected, got)


def test_constant_channel_is_accepted_and_descriptors_stay_positive_definite():
    # A stuck sensor reading one value is data, not an error: shrinkage + ridge keep every descriptor strictly PD,
    # and the fleet standardisation leaves a zero-variance channel at scale 1 instead of dividing by zero.
    df = imu_frame()
    df["ay"] = 9.81
    tb = clean_table("imu.csv", df["t"].to_numpy(), df[list(CH)].to_numpy(), list(CH), "s", {}, 0.0)
    _, t, x, valid, _ = common_clock([tb], 50.0, 0.25)
    center, scale = fleet.fit_standardiser([x], [valid])
    assert scale[1] == 1.0 and np.isfinite(scale).all()
    z = (x - center) / scale
    starts, w = window_starts(len(t), 50.0, 4.0, 2.0)
    wins, ok = cut_windows(z, valid, starts, w)
    for kind, shrinkage in (("covariance", "ledoit_wolf"), ("covariance", "oas"), ("rbf", "oas"), ("lagged", "oas")):
        d, _ = descriptors.describe(wins[ok], kind=kind, include_mean=True, lags=2, ridge=1e-6, shrinkage=shrinkage)
        # Outside reference: numpy.linalg.eigvalsh (LAPACK syevd).
        assert np.isfinite(d).all()
        assert np.linalg.eigvalsh(d).min() >= 1e-6 * (1 - 1e-9), kind


def test_streams_whose_time_spans_do_not_overlap():
    a = imu_frame(duration=20.0)
    b = imu_frame(duration=20.0, channels=("temp",))
    b["t"] += 100.0
    ta = clean_table("rec/imu.csv", a["t"].to_numpy(), a[list(CH)].to_numpy(), list(CH), "s", {}, 0.0)
    tb = clean_table("rec/env.csv", b["t"].to_numpy(), b[["temp"]].to_numpy(), ["temp"], "s", {}, 0.0)
    with pytest.raises(InputError) as e:
        common_clock([ta, tb], 50.0, 0.25)
    check(e.value, "rec/imu.csv", "time span", "streams whose time spans overlap",
          "imu.csv: 0.000..19.990 s, env.csv: 100.000..119.990 s")


def test_first_row_with_an_extra_field_is_refused_not_shifted(tmp_path):
    # Without index_col=False pandas takes the first column as the index and silently shifts every column by one.
    p = tmp_path / "imu.csv"
    p.write_text("t,ax,ay,gz\n0.00,1,2,3,99\n0.01,1,2,3\n0.02,1,2,3\n")
    check(read_err(p), "imu.csv", "content", "as many fields as the header", "more fields than header names")


def test_trailing_delimiters_are_read_correctly(tmp_path):
    p = tmp_path / "imu.csv"
    p.write_text("t,ax,ay,gz\n0.00,1,2,3,\n0.01,4,5,6,\n")
    t, x = read_table_file(p, "t", list(CH))
    np.testing.assert_array_equal(t, [0.0, 0.01])
    np.testing.assert_array_equal(x, [[1, 2, 3], [4, 5, 6]])


def test_duplicate_column_names_are_refused(tmp_path):
    p = tmp_path / "imu.csv"
    p.write_text("t,ax, ax,gz\n0.00,1,2,3\n0.01,1,2,3\n")  # equal once the header's blanks are stripped
    check(read_err(p), "imu.csv", "column 'ax'", "distinct column names", "['t', 'ax', 'ax', 'gz']")


def test_undecodable_bytes(tmp_path):
    p = tmp_path / "imu.csv"
    p.write_bytes(b"t,ax\n\xff\xfe\x00\x81,1\n")
    check(read_err(p, channels=("ax",)), "imu.csv", "content", "a readable table", "UnicodeDecodeError")


def test_unknown_table_file_type(tmp_path):
    p = tmp_path / "imu.xlsx"
    p.write_bytes(b"PK\x03\x04")
    check(read_err(p), "imu.xlsx", "file type", "a .csv or .parquet table", ".xlsx")


# --- profiles --------------------------------------------------------------------------------------------------------

def test_profile_with_bad_toml(tmp_path):
    p = tmp_path / "profile.toml"
    text = profile_text().replace("[streams.imu]", "[streams.imu")
    line = text.splitlines().index("[streams.imu") + 1
    p.write_text(text)
    with pytest.raises(ProfileError) as e:
        load_profile(p)
    check(e.value, "profile.toml", "TOML syntax", "valid TOML", f"(at line {line}, column 13)")


@pytest.mark.parametrize("text, field", [
    (profile_text() + "\n[extras]\nnote = 1\n", "extras"),
    (profile_text().replace("hop_s", "hop_seconds"), "windowing.hop_seconds"),
    (profile_text().replace("time_unit", "timeunit"), "streams.imu.timeunit"),
    (profile_text(more="[streams.imu.calibration]\nax = { bias = 0.1, gain = 2.0 }\n"),
     "streams.imu.calibration.ax.gain"),
    (profile_text(more='\n[streams.cam]\nkind = "video"\nfile = "c.mp4"\nfps = 15\n'), "streams.cam.fps"),
])
def test_profile_with_unknown_keys(text, field):
    with pytest.raises(ProfileError) as e:
        parse_profile(text, "fleet.toml")
    check(e.value, "fleet.toml", field, "one of the known keys", "an unknown key")


@pytest.mark.parametrize("old, new, field, expected, got", [
    ("rate_hz = 50.0", 'rate_hz = "fast"', "windowing.rate_hz", "a number", "str 'fast'"),
    ("rate_hz = 50.0", "rate_hz = true", "windowing.rate_hz", "a number", "bool True"),
    ("rate_hz = 50.0", "rate_hz = 1" + "0" * 400, "windowing.rate_hz", "within the float range", "401 digits"),
    ("max_gap_s = 0.25", "max_gap_s = nan", "windowing.max_gap_s", "a finite number", "nan"),
    ('channels = ["ax", "ay", "gz"]', 'channels = "ax"', "streams.imu.channels", "a list of strings", "str 'ax'"),
    ('channels = ["ax", "ay", "gz"]', 'channels = ["ax", 2]', "streams.imu.channels", "a list of strings",
     "list ['ax', 2]"),
    ('time_unit = "s"', 'time_unit = "sec"', "streams.imu.time_unit", "one of ['s', 'ms', 'us', 'ns']", "'sec'"),
    ('kind = "table"', "kind = 1", "streams.imu.kind", "a string", "int 1"),
    ("[windowing]\nrate_hz = 50.0\nwindow_s = 4.0\nhop_s = 2.0\nmax_gap_s = 0.25\n", "windowing = 3\n",
     "windowing", "a table", "int 3"),
])
def test_profile_with_wrong_types(old, new, field, expected, got):
    text = profile_text()
    assert old in text
    with pytest.raises(ProfileError) as e:
        parse_profile(text.replace(old, new, 1), "fleet.toml")
    check(e.value, "fleet.toml", field, expected, got)


def test_profile_integer_where_a_float_is_fine_and_float_where_an_integer_is_not():
    p = parse_profile(profile_text().replace("rate_hz = 50.0", "rate_hz = 50"), "fleet.toml")
    assert p.windowing.rate_hz == 50.0 and isinstance(p.windowing.rate_hz, float)
    with pytest.raises(ProfileError) as e:
        parse_profile(profile_text(more="[scoring]\nk = 2.5\n").replace("[scoring]", "[scoring]", 1), "fleet.toml")
    check(e.value, "fleet.toml", "scoring.k", "an integer", "float 2.5")


@pytest.mark.parametrize("file", ["/etc/passwd", "../other-rover/imu.csv", "sub/../../imu.csv", " "])
def test_profile_file_outside_the_recording_folder_is_refused(file):
    with pytest.raises(ProfileError) as e:
        parse_profile(profile_text(file=file), "fleet.toml")
    check(e.value, "fleet.toml", "streams.imu.file", "inside the recording folder", repr(file))


def test_recording_without_any_profile(tmp_path):
    rec = write_rec(tmp_path, "rec")
    with pytest.raises(ProfileError) as e:
        profile_for(rec, None)
    check(e.value, "rec", "profile.toml", "a profile.toml in the recording folder", "none found")


# --- files -----------------------------------------------------------------------------------------------------------

def test_symlink_leading_out_of_the_recording_folder_is_refused(tmp_path):
    secret = tmp_path / "elsewhere.csv"
    imu_frame().to_csv(secret, index=False)
    rec = tmp_path / "rec"
    rec.mkdir()
    (rec / "imu.csv").symlink_to(secret)
    with pytest.raises(InputError) as e:
        resolve_stream_file(rec, "imu.csv", "imu")
    check(e.value, "rec/imu.csv", "streams.imu.file", "a file inside the recording folder",
          f"a link to {secret.resolve()}")


def test_directory_where_a_file_is_expected(tmp_path):
    rec = tmp_path / "rec"
    (rec / "imu.csv").mkdir(parents=True)
    with pytest.raises(InputError) as e:
        read_table_stream(rec, stream())
    check(e.value, "rec/imu.csv", "streams.imu.file", "a regular file", "a directory")


def test_broken_symlink(tmp_path):
    rec = tmp_path / "rec"
    rec.mkdir()
    (rec / "imu.csv").symlink_to(rec / "imu-gone.csv")
    with pytest.raises(InputError) as e:
        resolve_stream_file(rec, "imu.csv", "imu")
    check(e.value, "rec/imu.csv", "streams.imu.file", "a regular file", "a broken link")


@pytest.mark.skipif(os.geteuid() == 0, reason="running as root: chmod 000 does not stop root from reading, so the "
                    "unreadable case is covered by the directory and broken-link tests instead")
def test_unreadable_file(tmp_path):
    rec = write_rec(tmp_path, "rec")
    (rec / "imu.csv").chmod(0)
    try:
        with pytest.raises(InputError) as e:
            resolve_stream_file(rec, "imu.csv", "imu")
        check(e.value, "rec/imu.csv", "streams.imu.file", "a readable file", "Permission denied")
    finally:
        (rec / "imu.csv").chmod(0o644)


def test_no_file_and_several_files_for_one_stream(tmp_path):
    rec = write_rec(tmp_path, "rec", file="imu_a.csv")
    with pytest.raises(InputError) as e:
        resolve_stream_file(rec, "imu.csv", "imu")
    check(e.value, "rec", "streams.imu.file", "a file matching 'imu.csv'", "folder holds ['imu_a.csv']")
    write_rec(tmp_path, "rec", file="imu_b.csv")
    with pytest.raises(InputError) as e:
        resolve_stream_file(rec, "imu_*.csv", "imu")
    check(e.value, "rec", "streams.imu.file", "exactly one file matching 'imu_*.csv'", "['imu_a.csv', 'imu_b.csv']")


# --- video -----------------------------------------------------------------------------------------------------------

N_FRAMES, FPS = 40, 10.0


def _frames(n=N_FRAMES, h=64, w=64):
    for i in range(n):
        img = np.zeros((h, w, 3), np.uint8)
        img[:, (3 * i) % w] = 255
        img[(2 * i) % h, :, 1] = 160
        yield img


@pytest.fixture(scope="module")
def videos(tmp_path_factory):
    d = tmp_path_factory.mktemp("videos")
    good = d / "good.mp4"
    write_video(good, _frames(), FPS, codec="mpeg4")  # faststart: the index is at the front
    data = good.read_bytes()
    out = {"good": good}
    for name, blob in {"truncated": data[: len(data) // 2], "header_only": data[: len(data) // 20],
                       "garbage": np.random.default_rng(0).integers(0, 256, 20_000, dtype=np.uint8).tobytes(),
                       "zeroed_middle": data[: len(data) // 3] + bytes(len(data) // 3) + data[2 * len(data) // 3:],
                       "empty": b""}.items():
        out[name] = d / f"{name}.mp4"
        out[name].write_bytes(blob)
    # A container with a video stream and no frame at all (AVI writes its stream header without any packet).
    zero = d / "zero.avi"
    with av.open(str(zero), "w") as c:
        s = c.add_stream("mpeg4", rate=10)
        s.width = s.height = 64
        s.pix_fmt = "yuv420p"
        c.start_encoding()
    out["zero"] = zero
    return out


def test_truncated_video_yields_the_frames_before_the_cut(videos, caplog):
    full = list(video.iter_frames(videos["good"], 5.0))
    st: dict = {}
    with caplog.at_level(logging.WARNING, logger="fleetsift.featurizers.video"):
        part = list(video.iter_frames(videos["truncated"], 5.0, stats=st))
    assert 1 < len(part) < len(full)
    assert st["truncated"] and st["n_expected"] == N_FRAMES and st["n_lost"] == N_FRAMES - st["n_decoded"]
    for (ta, a), (tb, b) in zip(part[:-1], full):
        assert ta == tb and np.array_equal(a, b)  # the frames before the cut are exactly the full file's
    assert any("truncated.mp4" in r.getMessage() and "ends early" in r.getMessage() for r in caplog.records)


def test_truncated_video_yields_no_damaged_frame(videos):
    full = list(video.iter_frames(videos["good"]))
    part = list(video.iter_frames(videos["truncated"]))
    for (ta, a), (tb, b) in zip(part, full):
        assert ta == tb and np.array_equal(a, b), f"frame at {ta} s differs from the intact file's"


def test_video_cut_inside_its_header(videos):
    with pytest.raises(InputError) as e:
        list(video.iter_frames(videos["header_only"], 5.0))
    check(e.value, "header_only.mp4", "video stream", "at least one video stream", "streams")


@pytest.mark.parametrize("name", ["garbage", "empty"])
def test_corrupt_video_bytes(videos, name):
    with pytest.raises(InputError) as e:
        video.iter_frames(videos[name], 5.0)
    check(e.value, f"{name}.mp4", "container", "a video file FFmpeg can read", "InvalidDataError")


def test_damaged_middle_of_a_video_is_an_early_end_not_a_crash(videos):
    st: dict = {}
    frames = list(video.iter_frames(videos["zeroed_middle"], 5.0, stats=st))
    assert st["truncated"] and 0 < st["n_decoded"] < N_FRAMES
    assert all(f.shape == (64, 64, 3) for _, f in frames)


def test_zero_frame_video(videos):
    it = video.iter_frames(videos["zero"], 5.0)  # the header is fine: the error comes when frames are asked for
    with pytest.raises(InputError) as e:
        list(it)
    check(e.value, "zero.avi", "frames", "at least one decodable video frame", "none")


# --- stage level: unscored dicts, never exceptions -----------------------------------------------------------------

def _variant(kind: str) -> tuple[pd.DataFrame | None, str | None]:
    df = imu_frame()
    if kind == "empty":
        return None, ""
    if kind == "header_only":
        return None, "t,ax,ay,gz\n"
    if kind == "non_numeric":
        df = df.astype(object)
        df.loc[5, "gz"] = "ERR"
    elif kind == "many_nan":
        df.loc[df.index % 4 == 0, "ax"] = np.nan
    elif kind == "backwards":
        df["t"] = df["t"].to_numpy()[::-1].copy()
    elif kind == "missing_channel":
        df = df.drop(columns=["gz"])
    elif kind == "us_as_s":
        df["t"] *= 1e6
    return df, None


@pytest.mark.parametrize("kind, field, got", [
    ("empty", "content", "an empty file"),
    ("header_only", "rows", "a header only"),
    ("non_numeric", "column 'gz' row 7", "'ERR'"),
    ("many_nan", "column 'ax'", "1500 of 6000 rows"),
    ("backwards", "time column", "5999 of 5999 steps going backwards"),
    ("missing_channel", "channel 'gz'", "columns ['t', 'ax', 'ay']"),
    ("us_as_s", "time_unit", "median interval"),
])
def test_run_tables_leaves_unscored_with_the_full_message(tmp_path, stages, kind, field, got):
    df, text = _variant(kind)
    rec = write_rec(tmp_path / "inbox", "rover-x", df, text)
    out = stages.run_tables(str(rec), profile(), str(tmp_path / "store"))
    assert out["status"] == "unscored" and out["recording_id"] == "rover-x"
    assert out["reason"].startswith(f"{rec.resolve() / 'imu.csv'}: {field}: expected ")
    assert got in out["reason"]
    assert not list((tmp_path / "store" / "cache").glob("tables/*.npz"))  # nothing cached for a bad recording


def test_run_tables_leaves_unscored_non_overlapping_streams_and_outside_links(tmp_path, stages):
    rec = write_rec(tmp_path / "inbox", "rover-y")
    env = imu_frame(duration=10.0, channels=("temp",))
    env["t"] += 500.0
    env.to_csv(rec / "env.csv", index=False)
    prof = profile(more='\n[streams.env]\nkind = "table"\nfile = "env.csv"\nchannels = ["temp"]\n')
    out = stages.run_tables(str(rec), prof, str(tmp_path / "store"))
    assert out["status"] == "unscored"
    assert ": time span: expected streams whose time spans overlap, got imu.csv: 0.000..59.990 s, env.csv: " \
           "500.000..509.990 s" in out["reason"]

    rec2 = tmp_path / "inbox" / "rover-z"
    rec2.mkdir()
    (rec2 / "imu.csv").symlink_to(rec / "imu.csv")
    out = stages.run_tables(str(rec2), profile(), str(tmp_path / "store"))
    assert out["status"] == "unscored"
    assert out["reason"] == (f"{rec2.resolve() / 'imu.csv'}: streams.imu.file: expected a file inside the recording "
                             f"folder, got a link to {(rec / 'imu.csv').resolve()}")


def test_run_tables_repairs_are_counted_in_its_output(tmp_path, stages):
    df = imu_frame()
    t = df["t"].to_numpy().copy()
    t[[100, 101]] = t[[101, 100]]
    t[2000] = t[1999]
    df["t"] = t
    df.loc[3000, "ay"] = np.inf
    df["unused"] = 1.0
    rec = write_rec(tmp_path / "inbox", "rover-ok", df)
    out = stages.run_tables(str(rec), profile(), str(tmp_path / "store"))
    assert out["status"] == "ok", out
    assert out["repairs"] == {"imu.csv": {"nonfinite_rows_dropped": 1, "out_of_order_sorted": 1,
                                          "duplicate_stamps_dropped": 1}}
    assert out["channels"] == list(CH)  # the unknown column is ignored


@pytest.fixture(scope="module")
def video_profile():
    return parse_profile(profile_text(more='\n[streams.camera]\nkind = "video"\nfile = "camera.*"\n'
                                      'sample_hz = 5.0\nimage_size = 64\nthreads = 1\nbatch_size = 8\n'), "fleet.toml")


@pytest.mark.parametrize("name, field, got", [
    ("garbage", "container", "InvalidDataError"),
    ("header_only", "video stream", "streams"),
    ("zero", "frames", "none"),
])
def test_run_embed_leaves_bad_video_unscored(tmp_path, stages, videos, video_profile, name, field, got):
    rec = write_rec(tmp_path / "inbox", f"rover-{name}")
    src = videos[name]
    (rec / f"camera{src.suffix}").write_bytes(src.read_bytes())
    out = stages.run_embed(str(rec), video_profile, str(tmp_path / "store"), progress=False)
    assert out["status"] == "unscored", out
    assert out["reason"].startswith(f"{rec.resolve() / ('camera' + src.suffix)}: {field}: expected ")
    assert got in out["reason"]
    assert not list((tmp_path / "store").glob("cache/embed/*.npz"))


def test_run_embed_keeps_the_frames_of_a_truncated_video(tmp_path, stages, videos, video_profile):
    from fleetsift.store import Store

    rec = write_rec(tmp_path / "inbox", "rover-cut")
    (rec / "camera.mp4").write_bytes(videos["truncated"].read_bytes())
    out = stages.run_embed(str(rec), video_profile, str(tmp_path / "store"), progress=False)
    assert out["status"] == "ok" and out["computed"] == 1
    arr = Store.load_arrays(out["paths"]["camera"])
    expected_t = [t for t, _ in video.iter_frames(videos["truncated"], 5.0)]
    np.testing.assert_array_equal(arr["t"], expected_t)
    assert np.isfinite(arr["emb"]).all() and len(arr["emb"]) == len(expected_t)
