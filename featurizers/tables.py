"""Table streams: read, convert units, calibrate, shift, repair, and resample onto the common clock.

Pure computation; errors are `InputError`s that name the file, the field and what was expected.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
import io
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import signal

from fleetsift.errors import InputError
from fleetsift.location import ObjectPath, location
from fleetsift.vocabulary import TIME_UNITS

# Share of rows that may be repaired (non-finite cells, out-of-order stamps) before the stream counts as broken.
MAX_REPAIR_SHARE = 0.05


@dataclass
class RawTable:
    """One stream's samples on its own clock, in seconds, before resampling."""

    file: str
    t: np.ndarray  # (n,) float64 seconds, strictly increasing after repair
    values: np.ndarray  # (n, c) float64
    channels: list[str]
    repairs: dict[str, int] = field(default_factory=dict)
    gaps: list[tuple[float, float]] = field(default_factory=list)  # (start, end) s of known data loss


def read_table_file(path: Path, time_column: str, channels: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Read a CSV or Parquet file; return raw time values and the channel matrix (not yet checked)."""
    path = location(path)
    suffix = path.suffix.lower()
    try:
        # A table on object storage is read in one GET (tables are small beside video).
        src = io.BytesIO(path.read_bytes()) if isinstance(path, ObjectPath) else path
        if suffix in (".parquet", ".pq"):
            df = pd.read_parquet(src)
        elif suffix in (".csv", ".txt", ".tsv"):
            with warnings.catch_warnings():
                # index_col=False: without it a first data row with one field more than the header silently turns
                # the time column into the index and shifts every column by one. The warning pandas then gives
                # (extra fields dropped) becomes an error: samples must never be dropped unseen.
                warnings.simplefilter("error", pd.errors.ParserWarning)
                df = pd.read_csv(src, sep="\t" if suffix == ".tsv" else ",", low_memory=False, index_col=False)
        else:
            raise InputError(path, "file type", "a .csv or .parquet table (or a ULog / ROS 2 bag log)", suffix)
    except InputError:
        raise
    except pd.errors.EmptyDataError:
        raise InputError(path, "content", "a header row and samples", "an empty file") from None
    except pd.errors.ParserWarning:
        raise InputError(path, "content", "rows with as many fields as the header",
                         "more fields than header names in the first data row") from None
    except (OSError, ValueError, pd.errors.ParserError) as e:
        raise InputError(path, "content", "a readable table", f"{type(e).__name__}: {e}") from None
    df.columns = [str(c).strip() for c in df.columns]
    dup = sorted({c for c in df.columns if list(df.columns).count(c) > 1})
    if dup:
        raise InputError(path, f"column {dup[0]!r}", "distinct column names", f"columns {list(df.columns)}")
    if time_column not in df.columns:
        raise InputError(path, f"column {time_column!r}", "the time column named in the profile",
                         f"columns {list(df.columns)}")
    missing = [c for c in channels if c not in df.columns]
    if missing:
        raise InputError(path, f"channel {missing[0]!r}", "every channel named in the profile",
                         f"columns {list(df.columns)}")
    if len(df) == 0:
        raise InputError(path, "rows", "at least 2 samples", "a header only")
    t = _numeric(df[time_column], path, time_column)
    values = np.column_stack([_numeric(df[c], path, c) for c in channels]) if channels else np.empty((len(df), 0))
    return t, values


def _numeric(col: pd.Series, path: Path, name: str) -> np.ndarray:
    if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
        return col.to_numpy(dtype=np.float64)
    try:
        conv = pd.to_numeric(col, errors="coerce")
    except (TypeError, ValueError):  # cells holding lists or structs (Parquet): not coercible at all
        raise InputError(path, f"column {name!r}", "a column of numbers", f"cells of type {type(col.iloc[0]).__name__}"
                         ) from None
    bad = conv.isna() & col.notna() & (col.astype(str).str.strip().str.lower() != "nan")
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        raise InputError(path, f"column {name!r} row {row + 2}", "a number", repr(col.iloc[row]))
    return conv.to_numpy(dtype=np.float64)


def clean_table(file: str, t_raw: np.ndarray, values: np.ndarray, channels: list[str], time_unit: str,
                calibration: dict[str, tuple[float, float]], clock_offset_s: float) -> RawTable:
    """Convert to seconds, calibrate, shift, and repair what is repairable (counted in `repairs`)."""
    n = len(t_raw)
    if n < 2:
        raise InputError(file, "rows", "at least 2 samples", f"{n}")
    if time_unit not in TIME_UNITS:
        raise InputError(file, "time_unit", f"one of {list(TIME_UNITS)}", repr(time_unit))
    repairs: dict[str, int] = {}
    # The clock offset goes on first: added after de-duplication it can round two close stamps to one value
    # (found by the fuzz test: 5e-292 and 0.0, plus 0.25 s), and the clock would no longer be increasing.
    t = np.asarray(t_raw, np.float64) * TIME_UNITS[time_unit] + float(clock_offset_s)
    values = np.asarray(values, np.float64).copy()

    bad_t = ~np.isfinite(t)
    if bad_t.mean() > MAX_REPAIR_SHARE:
        raise InputError(file, "time column", "finite timestamps", f"{int(bad_t.sum())} of {n} not finite")
    bad_v = ~np.isfinite(values).all(axis=1) if values.size else np.zeros(n, bool)
    if bad_v.mean() > MAX_REPAIR_SHARE:
        col = channels[int(np.argmax((~np.isfinite(values)).sum(axis=0)))]
        raise InputError(file, f"column {col!r}", "finite numbers (NaN/inf only in a few rows)",
                         f"{int(bad_v.sum())} of {n} rows with NaN or inf")
    drop = bad_t | bad_v
    if drop.any():
        repairs["nonfinite_rows_dropped"] = int(drop.sum())
        t, values = t[~drop], values[~drop]

    dt = np.diff(t)
    backwards = int((dt < 0).sum())
    if backwards:
        if backwards / max(len(dt), 1) > MAX_REPAIR_SHARE:
            raise InputError(file, "time column", "increasing timestamps",
                             f"{backwards} of {len(dt)} steps going backwards")
        order = np.argsort(t, kind="stable")
        t, values = t[order], values[order]
        repairs["out_of_order_sorted"] = backwards
    dup = np.concatenate([[False], np.diff(t) == 0])
    if dup.any():
        # Keep the first of each run of equal stamps: common practice for logger double-writes.
        repairs["duplicate_stamps_dropped"] = int(dup.sum())
        t, values = t[~dup], values[~dup]
    if len(t) < 2:
        raise InputError(file, "rows", "at least 2 distinct timestamps", f"{len(t)}")

    span = t[-1] - t[0]
    med_dt = float(np.median(np.diff(t)))
    # A recording's rate lies between 0.01 Hz and 1 MHz: outside that the unit is almost surely wrong.
    if not (1e-6 <= med_dt <= 100.0) or span > 30 * 86400:
        raise InputError(file, "time_unit", f"timestamps in {time_unit!r} giving a plausible sample interval",
                         f"median interval {med_dt:.3g} s over a span of {span:.3g} s")

    for j, ch in enumerate(channels):
        bias, scale = calibration.get(ch, (0.0, 1.0))
        if bias != 0.0 or scale != 1.0:
            values[:, j] = (values[:, j] - bias) * scale
    return RawTable(file=file, t=t, values=values, channels=list(channels), repairs=repairs)


def uniform_clock(start: float, end: float, rate_hz: float) -> np.ndarray:
    n = int(np.floor((end - start) * rate_hz + 1e-9)) + 1
    if n < 2:
        return np.empty(0)
    return start + np.arange(n) / rate_hz


def gap_mask(t_src: np.ndarray, t_clock: np.ndarray, max_gap_s: float) -> np.ndarray:
    """True where a clock instant lies inside the source's span and not inside a gap longer than max_gap_s."""
    inside = (t_clock >= t_src[0]) & (t_clock <= t_src[-1])
    idx = np.clip(np.searchsorted(t_src, t_clock, side="right"), 1, len(t_src) - 1)
    bracket = t_src[idx] - t_src[idx - 1]
    return inside & (bracket <= max_gap_s)


def resample(table: RawTable, t_clock: np.ndarray, max_gap_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Linear interpolation onto the clock, with a zero-phase low-pass first when the source is faster.

    Returns (values (n_clock, c), valid (n_clock,)).
    """
    t, x = table.t, table.values
    valid = gap_mask(t, t_clock, max_gap_s)
    for g0, g1 in table.gaps:
        if g1 - g0 > max_gap_s:
            valid &= ~((t_clock >= g0) & (t_clock <= g1))
    if len(t_clock) == 0:
        return np.empty((0, x.shape[1])), valid
    rate = 1.0 / float(np.median(np.diff(t)))
    clock_rate = 1.0 / float(np.median(np.diff(t_clock))) if len(t_clock) > 1 else rate
    if rate > 1.5 * clock_rate and len(t) > 30:
        # Anti-alias: put the jittery samples on their own uniform grid, Butterworth low-pass at 0.45 x the
        # clock rate (below its Nyquist), forwards and backwards so no phase lag moves events in time.
        fine = uniform_clock(t[0], t[-1], rate)
        xf = np.column_stack([np.interp(fine, t, x[:, j]) for j in range(x.shape[1])])
        sos = signal.butter(4, 0.45 * clock_rate, btype="low", fs=rate, output="sos")
        if len(fine) > 3 * (2 * sos.shape[0] + 1):
            xf = signal.sosfiltfilt(sos, xf, axis=0)
        t, x = fine, xf
    out = np.column_stack([np.interp(t_clock, t, x[:, j]) for j in range(x.shape[1])])
    return out, valid


def place_on_clock(t_src: np.ndarray, x: np.ndarray, t_clock: np.ndarray, max_gap_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Linear interpolation of sparse samples (e.g. frame embeddings at their pts) onto the clock."""
    if len(t_src) == 0:
        return np.zeros((len(t_clock), x.shape[1])), np.zeros(len(t_clock), bool)
    if len(t_src) == 1:
        valid = np.abs(t_clock - t_src[0]) <= max_gap_s / 2
        return np.repeat(x[:1], len(t_clock), axis=0), valid
    valid = gap_mask(t_src, t_clock, max_gap_s)
    out = np.column_stack([np.interp(t_clock, t_src, x[:, j]) for j in range(x.shape[1])])
    return out, valid


def window_starts(n_samples: int, rate_hz: float, window_s: float, hop_s: float) -> tuple[np.ndarray, int]:
    """Start indices of full windows and the window length in samples."""
    w = int(round(window_s * rate_hz))
    h = max(1, int(round(hop_s * rate_hz)))
    if n_samples < w:
        return np.empty(0, dtype=np.int64), w
    return np.arange(0, n_samples - w + 1, h, dtype=np.int64), w


def cut_windows(x: np.ndarray, valid: np.ndarray, starts: np.ndarray, w: int) -> tuple[np.ndarray, np.ndarray]:
    """(n_windows, w, c) strided view of the clock samples and a per-window validity (every sample valid)."""
    if len(starts) == 0:
        return np.empty((0, w, x.shape[1])), np.empty(0, bool)
    idx = starts[:, None] + np.arange(w)[None, :]
    return x[idx], valid[idx].all(axis=1)
