"""Property tests: whatever bytes a table file or a profile holds, the readers give a result or an InputError.

Never another exception (a KeyError, TypeError, OverflowError... would stop a night instead of leaving one unscored
recording). Where a result comes back, its invariants hold (strictly increasing finite clock, finite values; a
profile's stream files stay inside the recording folder).
"""

from __future__ import annotations

import itertools
import math
import tempfile
from pathlib import Path, PurePosixPath

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from fleetsift.demo.fleet import PROFILE_TOML
from fleetsift.errors import InputError, ProfileError
from fleetsift.profile import parse_profile
from fleetsift.featurizers.tables import clean_table, read_table_file

FUZZ = settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.too_slow])
_DIR = Path(tempfile.mkdtemp(prefix="fleetsift-fuzz-"))
_COUNTER = itertools.count()


def _file(data: bytes | str, suffix: str = ".csv") -> Path:
    p = _DIR / f"f{next(_COUNTER)}{suffix}"
    if isinstance(data, str):
        p.write_text(data, encoding="utf-8", errors="surrogatepass")
    else:
        p.write_bytes(data)
    return p


def _read_and_clean(path: Path, time_column: str, channels: list[str], unit: str = "s") -> None:
    try:
        t, x = read_table_file(path, time_column, channels)
    except InputError as e:
        assert e.file and e.field and e.expected and e.got is not None
        return
    assert t.dtype == np.float64 and x.dtype == np.float64 and x.shape == (len(t), len(channels))
    try:
        tb = clean_table(str(path), t, x, channels, unit, {channels[0]: (0.5, 2.0)} if channels else {}, 0.25)
    except InputError as e:
        assert e.file == str(path) and e.field and e.expected
        return
    assert len(tb.t) >= 2 and np.all(np.diff(tb.t) > 0) and np.isfinite(tb.t).all()
    assert np.isfinite(tb.values).all() and tb.values.shape == (len(tb.t), len(channels))
    assert all(v > 0 for v in tb.repairs.values())
    dropped = tb.repairs.get("nonfinite_rows_dropped", 0) + tb.repairs.get("duplicate_stamps_dropped", 0)
    assert len(tb.t) == len(t) - dropped


# --- table reader ----------------------------------------------------------------------------------------------------

@FUZZ
@given(st.binary(max_size=600))
def test_arbitrary_bytes_as_csv(data):
    _read_and_clean(_file(data), "t", ["ax"])


NUM = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(min_value=-(10**30), max_value=10**30).map(str),
    st.sampled_from(["nan", "NaN", "inf", "-inf", "1e400", "-0", "0x10", "1,5", "", " ", "NA", "null", "True",
                     '"3"', '"', "1e-320", "٣", "1_000", "+5", ".", "-", "e5"]),
    st.text(max_size=6),
)
_NAMES = st.sampled_from(["t", "ax", "ay", " ax", "ax ", " t", "", "Unnamed: 0", "gz", '"t"', "ä", "1"])
# Mostly the names the reader looks for plus a few more (near-duplicates among them), sometimes anything.
HEADER = st.one_of(
    st.tuples(st.permutations(["t", "ax"]), st.lists(_NAMES, max_size=3)).map(lambda p: list(p[0]) + p[1]),
    st.lists(_NAMES, max_size=5),
)


@st.composite
def csv_text(draw):
    header = draw(HEADER)
    n_rows = draw(st.integers(0, 12))
    rows = []
    for _ in range(n_rows):
        n = max(0, len(header) + draw(st.sampled_from([0, 0, 0, 0, 0, 0, -1, 1])))  # ragged rows now and then
        rows.append(",".join(draw(NUM) for _ in range(n)))
    end = draw(st.sampled_from(["\n", "\r\n", ""]))
    return "\n".join([",".join(header)] + rows) + end


@FUZZ
@given(csv_text(), st.sampled_from(["s", "ms", "us", "ns"]))
@example("t,ax, ax\n0,1,2\n0.01,2,3\n", "s")  # found: duplicate names after stripping made df[col] a DataFrame
@example("t,ax\n0,1,5\n0.01,2\n0.02,3\n", "s")  # found: an extra first-row field shifted every column silently
def test_generated_csv_text(text, unit):
    _read_and_clean(_file(text), "t", ["ax"], unit)


@st.composite
def plausible_table(draw):
    """A mostly well-formed table with a few damaged cells: exercises the repair paths, not just the refusals."""
    n = draw(st.integers(2, 60))
    dt = draw(st.sampled_from([0.005, 0.01, 1.0, 5000.0]))
    t = np.arange(n) * dt + draw(st.floats(-1e3, 1e6))
    x = np.asarray(draw(st.lists(st.floats(-1e6, 1e6), min_size=n, max_size=n)))
    t_cells, x_cells = [repr(float(v)) for v in t], [repr(float(v)) for v in x]
    for _ in range(draw(st.integers(0, 4))):
        i = draw(st.integers(0, n - 1))
        target = draw(st.sampled_from(["t", "x", "swap", "dup"]))
        if target == "t":
            t_cells[i] = draw(NUM)
        elif target == "x":
            x_cells[i] = draw(NUM)
        elif target == "swap" and i + 1 < n:
            t_cells[i], t_cells[i + 1] = t_cells[i + 1], t_cells[i]
        elif target == "dup" and i > 0:
            t_cells[i] = t_cells[i - 1]
    return "t,ax,extra\n" + "".join(f"{a},{b},1\n" for a, b in zip(t_cells, x_cells))


@FUZZ
@given(plausible_table())
# found: the clock offset, added after de-duplication, rounded 5e-292 and 0.0 to one stamp
@example("t,ax,extra\n5.303645704748747e-292,0.0,1\n0.0,0.0,1\n" + "".join(f"{i / 100},0.0,1\n" for i in range(1, 20)))
def test_plausible_tables_with_damaged_cells(text):
    _read_and_clean(_file(text), "t", ["ax"])


def test_parquet_with_awkward_column_types():
    # Not generated: a fixed set of Parquet column types that a CSV cannot express (lists, structs, timestamps,
    # strings, booleans, nulls). Each gives a result or an InputError.
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols = {
        "list": pa.array([[1.0], [2.0, 3.0]]),
        "struct": pa.array([{"a": 1}, {"a": 2}]),
        "timestamp": pa.array([0, 10**9], pa.timestamp("ns")),
        "string": pa.array(["1.5", "x"]),
        "bool": pa.array([True, False]),
        "null": pa.array([None, None], pa.null()),
        "dict": pa.array(["a", "b"]).dictionary_encode(),
        "decimal": pa.array([1, 2], pa.decimal128(10, 2)),
    }
    for name, arr in cols.items():
        for role in ("t", "ax"):
            other = pa.array([0.0, 0.01]) if role == "ax" else pa.array([1.0, 2.0])
            tbl = pa.table({role: arr, ("ax" if role == "t" else "t"): other})
            p = _DIR / f"pq-{name}-{role}.parquet"
            pq.write_table(tbl, p)
            _read_and_clean(p, "t", ["ax"])


@FUZZ
@given(st.binary(max_size=400))
def test_arbitrary_bytes_as_parquet(data):
    _read_and_clean(_file(b"PAR1" + data + b"PAR1", ".parquet"), "t", ["ax"])


# --- profile parser --------------------------------------------------------------------------------------------------

# The demo fleet's own profile, every key spelled out: the base the mutations start from.
VALID = PROFILE_TOML


def _parse(text: str) -> None:
    """A Profile whose every use works, or a ProfileError naming the file."""
    try:
        p = parse_profile(text, "fuzz.toml")
    except ProfileError as e:
        assert e.file == "fuzz.toml" and e.field and e.expected
        return
    p.digest()  # the cache keys are built from every section
    for s in p.streams.values():
        parts = PurePosixPath(s.file).parts
        assert s.file.strip() and not PurePosixPath(s.file).is_absolute() and ".." not in parts, s.file
    w = p.windowing
    assert all(math.isfinite(v) and v > 0 for v in (w.rate_hz, w.window_s, w.hop_s, w.max_gap_s))
    assert p.table_streams()


TOML_ATOMS = st.sampled_from(['[', ']', '[[', ']]', '=', '"', "'", '"""', '.', ',', '{', '}', '#', '\n', ' ',
                              'streams', 'imu', 'kind', 'table', 'video', 'file', 'windowing', 'rate_hz',
                              'channels', 'calibration', '1', '-1', '0.0', 'inf', 'nan', 'true', '1e999', '\\u0000',
                              '..', '/', '1979-05-27T07:32:00Z', '0x7f', '_', 'é'])


@FUZZ
@given(st.one_of(st.text(max_size=200), st.lists(TOML_ATOMS, max_size=60).map("".join)))
def test_toml_ish_text(text):
    _parse(text)


TOML_VALUES = st.one_of(
    st.one_of(st.integers(min_value=-(10**40), max_value=10**40).map(str),
              st.integers(300, 500).map(lambda n: "1" + "0" * n)),  # TOML integers are unbounded, floats are not
    st.floats(allow_nan=True, allow_infinity=True).map(
        lambda v: "nan" if math.isnan(v) else ("inf" if v == math.inf else "-inf" if v == -math.inf else repr(v))),
    st.booleans().map(lambda b: "true" if b else "false"),
    st.sampled_from(['""', '" "', '"../x.csv"', '"/etc/passwd"', '"a/../../b"', '"imu.csv"', '"*.csv"', '"**/*"',
                     '"\\u0000"', '"s"', '"ms"', '"riemann"', '"lagged"', '"table"', '"video"', '"knn"', '"mean"',
                     "[]", '["ax"]', '["ax", "ax"]', "[1, 2]", '["ax", 1]', "{}", "{ bias = 1 }",
                     "{ scale = 0 }", "1979-05-27T07:32:00Z", "07:32:00", '"""multi\nline"""', "[[1], [2]]"]),
)


@st.composite
def mutated_profile(draw):
    lines = VALID.strip("\n").split("\n")
    for _ in range(draw(st.sampled_from([1, 1, 1, 2, 3, 4]))):  # mostly one mutation: it reaches deeper checks
        i = draw(st.integers(0, len(lines) - 1))
        op = draw(st.sampled_from(["value"] * 4 + ["delete", "duplicate", "rename", "insert", "header"]))
        line = lines[i]
        if op == "value" and " = " in line:
            lines[i] = line.split(" = ", 1)[0] + " = " + draw(TOML_VALUES)
        elif op == "delete":
            del lines[i]
        elif op == "duplicate":
            lines.insert(i, line)
        elif op == "rename" and " = " in line:
            key = draw(st.sampled_from(["kind", "file", "channels", "rate_hz", "zzz", "time_unit", "calibration",
                                        "topic", "weights", "k"]))
            lines[i] = key + " = " + line.split(" = ", 1)[1]
        elif op == "insert":
            key = draw(st.sampled_from(["kind", "file", "channels", "extra", "streams", "instance", "stamp"]))
            lines.insert(i, f"{key} = {draw(TOML_VALUES)}")
        elif op == "header":
            lines.insert(i, draw(st.sampled_from(["[streams.gps]", "[streams]", "[streams.imu.calibration.ax]",
                                                  "[x]", "[[streams.imu]]", "[scoring]", "[streams.\"a b\"]"])))
        if not lines:
            break
    return "\n".join(lines) + "\n"


@FUZZ
@given(mutated_profile())
@example(VALID.replace("rate_hz = 50.0", "rate_hz = 1" + "0" * 400))  # found: float(huge int) -> OverflowError
def test_mutated_valid_profiles(text):
    _parse(text)


def test_valid_profile_of_this_file_parses():
    # The mutation base must itself be valid, or the mutations test nothing but the first error.
    p = parse_profile(VALID, "fuzz.toml")
    assert set(p.streams) == {"imu", "camera"}
