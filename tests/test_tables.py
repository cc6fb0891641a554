"""Table streams: units, calibration, repairs, resampling onto the common clock, gaps and windows."""

import numpy as np
import pandas as pd
import pytest
from scipy import signal

from fleetsift.errors import InputError
from fleetsift.featurizers.recording import common_clock
from fleetsift.featurizers.tables import (clean_table, cut_windows, gap_mask, place_on_clock, read_table_file,
                                          resample, uniform_clock, window_starts)


def _table(t, x, unit="s", cal=None, offset=0.0, names=("a",)):
    return clean_table("f.csv", t, x, list(names), unit, cal or {}, offset)


def test_units_calibration_offset():
    t_ms = np.array([0.0, 5.0, 10.0, 15.0])
    tb = _table(t_ms, np.array([[1.0], [2.0], [3.0], [4.0]]), unit="ms", cal={"a": (1.0, 2.0)}, offset=0.5)
    np.testing.assert_allclose(tb.t, [0.5, 0.505, 0.51, 0.515])
    np.testing.assert_allclose(tb.values[:, 0], [0.0, 2.0, 4.0, 6.0])  # (raw - bias) * scale


def test_repairs_duplicates_nonfinite_and_order_are_counted():
    t = np.arange(100) * 0.01
    t[50] = t[49]  # duplicate stamp
    t[[10, 11]] = t[[11, 10]]  # swapped pair
    x = np.sin(t)[:, None].copy()
    x[70, 0] = np.nan
    tb = _table(t, x)
    assert tb.repairs == {"nonfinite_rows_dropped": 1, "out_of_order_sorted": 1, "duplicate_stamps_dropped": 1}
    assert np.all(np.diff(tb.t) > 0) and np.isfinite(tb.values).all()


def test_wrong_time_unit_is_refused():
    t = np.arange(1000) * 5000.0  # microsecond values declared as seconds
    with pytest.raises(InputError, match="time_unit"):
        _table(t, np.zeros((1000, 1)), unit="s")


def test_too_many_nonfinite_rows_is_an_error():
    x = np.ones((100, 1))
    x[:20] = np.inf
    with pytest.raises(InputError, match="NaN or inf"):
        _table(np.arange(100) * 0.01, x)


def test_resample_equals_numpy_interp_when_no_lowpass():
    # Outside reference: numpy.interp. A 40 Hz source onto a 50 Hz clock needs no anti-alias filter.
    rng = np.random.default_rng(0)
    t = np.cumsum(rng.uniform(0.02, 0.03, 200))
    x = rng.normal(size=(200, 2))
    tb = _table(t, x, names=("a", "b"))
    clock = uniform_clock(t[0], t[-1], 50.0)
    out, valid = resample(tb, clock, max_gap_s=1.0)
    for j in range(2):
        np.testing.assert_allclose(out[:, j], np.interp(clock, t, x[:, j]))
    assert valid.all()


def test_lowpass_removes_alias_of_fast_vibration():
    # 80 Hz tone sampled at 400 Hz onto a 50 Hz clock: without a low-pass it would alias to 30 Hz at full power.
    t = np.arange(0, 10, 1 / 400)
    tone = np.sin(2 * np.pi * 80 * t)
    slow = np.sin(2 * np.pi * 2 * t)
    tb = _table(t, (tone + slow)[:, None])
    clock = uniform_clock(0.0, 9.99, 50.0)
    out, _ = resample(tb, clock, 1.0)
    naive = np.interp(clock, t, tone + slow)
    f, p_out = signal.welch(out[:, 0] - np.interp(clock, t, slow), fs=50.0)
    f, p_naive = signal.welch(naive - np.interp(clock, t, slow), fs=50.0)
    assert p_out.sum() < 0.01 * p_naive.sum()


def test_gap_mask_marks_long_gaps_only():
    t = np.r_[np.arange(0, 1, 0.01), np.arange(1.5, 2.5, 0.01)]
    clock = uniform_clock(0, 2.4, 50.0)
    m = gap_mask(t, clock, 0.25)
    inside_gap = (clock > 0.99) & (clock < 1.5)
    assert not m[inside_gap].any() and m[~inside_gap].all()


def test_common_clock_overlap_and_first_sample_origin():
    a = _table(np.arange(0, 10, 0.005), np.zeros((2000, 1)), names=("a",))
    b = _table(np.arange(0.3, 9.0, 0.01), np.ones((870, 1)), names=("b",))
    t0, t, x, valid, names = common_clock([a, b], 50.0, 0.25)
    assert t0 == 0.0 and names == ["a", "b"]
    assert t[0] >= 0.3 - 1e-9 and t[-1] <= 8.99 + 1e-9
    np.testing.assert_allclose(np.diff(t), 0.02)


def test_non_overlapping_streams_are_an_error():
    a = _table(np.arange(0, 1, 0.01), np.zeros((100, 1)), names=("a",))
    b = _table(np.arange(5, 6, 0.01), np.zeros((100, 1)), names=("b",))
    with pytest.raises(InputError, match="overlap"):
        common_clock([a, b], 50.0, 0.25)


def test_windows_and_validity():
    starts, w = window_starts(500, 50.0, 4.0, 2.0)
    assert w == 200 and list(starts) == [0, 100, 200, 300]
    x = np.arange(500.0)[:, None]
    valid = np.ones(500, bool)
    valid[250] = False
    wins, ok = cut_windows(x, valid, starts, w)
    assert wins.shape == (4, 200, 1) and wins[1, 0, 0] == 100
    assert list(ok) == [True, False, False, True]


def test_place_on_clock_interpolates_embeddings():
    tf = np.array([0.0, 0.2, 0.4, 0.6])
    z = np.array([[0.0], [1.0], [2.0], [3.0]])
    clock = np.array([0.1, 0.3, 0.5, 0.7])
    out, valid = place_on_clock(tf, z, clock, 0.5)
    np.testing.assert_allclose(out[:3, 0], [0.5, 1.5, 2.5])
    assert list(valid) == [True, True, True, False]


def test_csv_errors_name_file_and_field(tmp_path):
    p = tmp_path / "imu.csv"
    p.write_text("t,ax\n0,1\n0.01,abc\n")
    with pytest.raises(InputError) as e:
        read_table_file(p, "t", ["ax"])
    assert "imu.csv" in str(e.value) and "'ax' row 3" in str(e.value)
    p.write_text("t,ax\n")
    with pytest.raises(InputError, match="header only"):
        read_table_file(p, "t", ["ax"])
    p.write_text("t,ax\n0,1\n")
    with pytest.raises(InputError, match="'gz'"):
        read_table_file(p, "t", ["ax", "gz"])
    p.write_text("")
    with pytest.raises(InputError, match="empty"):
        read_table_file(p, "t", ["ax"])


def test_parquet_reads_like_csv(tmp_path):
    df = pd.DataFrame({"time": [0.0, 0.01, 0.02], "ax": [1.0, 2.0, 3.0]})
    df.to_parquet(tmp_path / "imu.parquet")
    df.to_csv(tmp_path / "imu.csv", index=False)
    a = read_table_file(tmp_path / "imu.parquet", "time", ["ax"])
    b = read_table_file(tmp_path / "imu.csv", "time", ["ax"])
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])


def test_known_data_loss_is_a_gap_even_where_the_stamps_look_dense():
    # A logging dropout (ULog 'O' message) says data was lost; judged by max_gap_s like a gap in the stamps.
    t = np.arange(0, 3, 0.01)
    tb = _table(t, np.sin(t)[:, None])
    clock = uniform_clock(0, 2.9, 50.0)
    tb.gaps = [(1.0, 1.5), (2.0, 2.1)]  # 0.5 s > max_gap_s, 0.1 s <= max_gap_s
    _, valid = resample(tb, clock, 0.25)
    lost = (clock >= 1.0) & (clock <= 1.5)
    assert not valid[lost].any() and valid[~lost].all()
