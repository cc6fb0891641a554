"""A recording folder: find its stream files and bring its table streams onto one common clock.

Pure computation. The video branch lives in video.py / embed.py and is kept separate on purpose: a change to a
table stream's profile section never touches decoded frames.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fleetsift.errors import InputError
from fleetsift.location import ObjectPath, resolved
from fleetsift.featurizers.logs import BAG_SUFFIXES, ULOG_SUFFIXES
from fleetsift.featurizers.tables import RawTable, clean_table, read_table_file, resample, uniform_clock


def resolve_stream_file(rec_dir: Path, pattern: str, stream: str) -> Path:
    """The one file in the recording folder that a stream's `file` (name or glob) names."""
    rec_dir = resolved(rec_dir)
    field = f"streams.{stream}.file"
    try:
        found = sorted(rec_dir.glob(pattern))
    except (ValueError, NotImplementedError) as e:  # e.g. an absolute or empty pattern, an embedded NUL
        raise InputError(rec_dir, field, "a file name or glob inside the recording folder",
                         f"{pattern!r} ({e})") from None
    # A symbolic link that leads out of the folder is refused, not silently skipped: say where it leads.
    outside = [p for p in found if not p.resolve().is_relative_to(rec_dir)]
    matches = [p for p in found if p not in outside]
    if not matches and outside:
        raise InputError(outside[0], field, "a file inside the recording folder",
                         f"a link to {outside[0].resolve()}")
    if not matches:
        # glob skips dangling links: name one that matches instead of listing it as if it were there.
        broken = sorted(p for p in rec_dir.iterdir() if p.is_symlink() and not p.exists() and p.match(pattern)) \
            if rec_dir.is_dir() else []
        if broken:
            raise InputError(broken[0], field, "a regular file", f"a broken link to {broken[0].resolve()}")
        have = sorted(p.name for p in rec_dir.iterdir()) if rec_dir.is_dir() else []
        raise InputError(rec_dir, field, f"a file matching {pattern!r}", f"folder holds {have}")
    if len(matches) > 1:
        raise InputError(rec_dir, field, f"exactly one file matching {pattern!r}",
                         f"{[m.name for m in matches]}")
    path = matches[0]
    if not (path.is_file() or (path.is_dir() and (path / "metadata.yaml").exists())):
        if path.is_symlink() and not path.exists():
            got = f"a broken link to {path.resolve()}"
        elif path.is_dir():
            got = "a directory (not a ROS 2 bag: no metadata.yaml)"
        else:
            got = "not a regular file (a device, socket or pipe)"
        raise InputError(path, field, "a regular file", got)
    try:
        if path.is_file() and not isinstance(path, ObjectPath):  # an object's listing proves it readable enough
            with open(path, "rb") as f:
                f.read(1)
    except OSError as e:
        raise InputError(path, field, "a readable file", e.strerror or str(e)) from None
    return path


def read_table_stream(rec_dir: Path, stream) -> RawTable:
    """Read one table stream (CSV, Parquet, ULog topic or ROS 2 bag topic) and clean it.

    The source columns/fields are `stream.fields` when given (then `stream.channels`, if given, renames them in
    order), else `stream.channels`; a log topic with neither gives its default fields under their own names.
    """
    path = resolve_stream_file(rec_dir, stream.file, stream.name)
    source = list(stream.fields) or list(stream.channels)
    gaps: list[tuple[float, float]] = []
    if path.suffix.lower() in ULOG_SUFFIXES + BAG_SUFFIXES or path.is_dir():
        from fleetsift.featurizers import logs

        if isinstance(path, ObjectPath):
            raise InputError(path, f"streams.{stream.name}.file", "a CSV or Parquet table on object storage "
                             "(ULog files and ROS 2 bags are read from local folders only)", "a log")

        kind = logs.log_kind(path)
        if kind == "ulog":
            t, values, names = logs.read_ulog_topic(path, stream.topic, source or None, instance=stream.instance)
            gaps = logs.ulog_dropouts(path)
        elif kind == "rosbag":
            t, values, names = logs.read_bag_topic(path, stream.topic, source or None, stamp=stream.stamp)
        else:
            raise InputError(path, f"streams.{stream.name}.file", "a ULog file or a ROS 2 bag", "unknown log format")
        unit = "s"
    else:
        t, values = read_table_file(path, stream.time_column, source)
        names, unit = source, stream.time_unit
    names = list(names)
    if stream.fields and stream.channels:
        if len(stream.channels) != len(names):
            raise InputError(path, f"streams.{stream.name}.channels",
                             f"one channel name for each of the {len(names)} fields read {names}",
                             f"{len(stream.channels)} names {list(stream.channels)}")
        names = list(stream.channels)
    unknown = sorted(set(stream.calibration) - set(names))
    if unknown:
        raise InputError(path, f"streams.{stream.name}.calibration.{unknown[0]}",
                         f"a calibration for one of the channels {names}", repr(unknown[0]))
    cal = {ch: (c.bias, c.scale) for ch, c in stream.calibration.items()}
    table = clean_table(str(path), t, values, names, unit, cal, stream.clock_offset_s)
    if gaps:
        # A logging dropout lost data on every topic: its span is a gap of this stream whatever the topic's own
        # stamps show, judged by max_gap_s like any gap (ULog 'O' message: last stamp before, duration).
        table.gaps = [(t_s + stream.clock_offset_s, t_s + stream.clock_offset_s + d) for t_s, d in gaps]
        table.repairs["logging_dropouts"] = len(gaps)
    return table


def common_clock(tables: list[RawTable], rate_hz: float, max_gap_s: float
                 ) -> tuple[float, np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Resample every table stream onto one uniform clock spanning their overlap.

    Returns (t0, t (relative to t0), values, valid, channels); t0 is the earliest sample of any table stream, so
    times are "seconds from the recording's first sample".
    """
    t0 = min(float(tb.t[0]) for tb in tables)
    start = max(float(tb.t[0]) for tb in tables)
    end = min(float(tb.t[-1]) for tb in tables)
    if end <= start:
        spans = ", ".join(f"{Path(tb.file).name}: {tb.t[0]:.3f}..{tb.t[-1]:.3f} s" for tb in tables)
        raise InputError(tables[0].file, "time span", "streams whose time spans overlap", spans)
    # Align the clock on multiples of 1/rate from t0 so window times are round numbers.
    first = t0 + np.ceil((start - t0) * rate_hz - 1e-9) / rate_hz
    clock = uniform_clock(first, end, rate_hz)
    cols, valid, names = [], np.ones(len(clock), bool), []
    for tb in tables:
        x, v = resample(tb, clock, max_gap_s)
        if len(clock) and not v.any():
            # Every clock instant falls in a gap of this stream: no window could ever be valid. Usually a wrong
            # time_unit (ms declared as s makes a 100 Hz stream look like 0.1 Hz) or a stream slower than max_gap_s.
            med = float(np.median(np.diff(tb.t)))
            raise InputError(tb.file, "time_unit / windowing.max_gap_s",
                             f"sample intervals of at most max_gap_s = {max_gap_s:g} s",
                             f"a median interval of {med:.3g} s, so every window would straddle a gap")
        cols.append(x)
        valid &= v
        names += tb.channels
    return t0, clock - t0, np.column_stack(cols), valid, names
