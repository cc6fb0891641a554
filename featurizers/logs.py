"""Trade log formats as table and image streams: PX4 ULog (via pyulog) and ROS 2 bags (via rosbags).

Pure computation, no Prefect. A table stream comes back as ``(t_s, values, names)``: ``t_s`` float64 (n,) seconds
on the log's own clock (no offset, calibration or resampling: the caller applies those), ``values`` float64 (n, c),
``names`` the c channel names. Rows are in the log's own order; sorting and de-duplication happen downstream.

Field selection is the same for both formats: a requested name matches a flattened field exactly, or expands to
every flattened field below it (``accelerometer_m_s2`` -> ``accelerometer_m_s2[0..2]``, ``orientation`` ->
``orientation.x/y/z/w``).
"""

from __future__ import annotations

import contextlib
import io
import operator
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path

import numpy as np

from fleetsift.errors import InputError
from fleetsift.vocabulary import STAMP_SOURCES

ULOG_SUFFIXES = (".ulg",)
BAG_SUFFIXES = (".mcap", ".db3")
ULOG_TIME_FIELDS = ("timestamp", "timestamp_sample")
IMU_TYPE = "sensor_msgs/msg/Imu"
IMU_DEFAULT = ["angular_velocity", "linear_acceleration"]
IMAGE_TYPES = ("sensor_msgs/msg/Image", "sensor_msgs/msg/CompressedImage")
# ROS 2 numeric base types (rosidl); strings and unbounded sequences are not fixed channels.
_ROS_NUMERIC = {"bool", "byte", "char", "octet", "int8", "uint8", "int16", "uint16", "int32", "uint32", "int64",
                "uint64", "float32", "float64"}
_SAMPLE_EPS_S = 1e-6  # stamps within 1 us of a bin edge count as on it (float rounding of pts/stamps)


# --------------------------------------------------------------------------------------------- discovery

def log_kind(path: str | Path) -> str | None:
    """``"ulog"`` for a .ulg file, ``"rosbag"`` for a bag folder (metadata.yaml) or a .mcap/.db3 file, else None."""
    p = Path(path)
    if p.is_dir():
        return "rosbag" if (p / "metadata.yaml").is_file() else None
    if p.is_file():
        suffix = p.suffix.lower()
        if suffix in ULOG_SUFFIXES:
            return "ulog"
        if suffix in BAG_SUFFIXES:
            return "rosbag"
    return None


def is_log_file(path: str | Path) -> bool:
    """True when `path` is a ULog file or a ROS 2 bag (folder or single storage file)."""
    return log_kind(path) is not None


def find_logs(rec_dir: str | Path) -> list[Path]:
    """The logs inside a recording folder: the folder itself when it is a bag, else its .ulg/.mcap/.db3 files
    and bag sub-folders (a bag's own storage files are not listed separately)."""
    d = Path(rec_dir)
    if log_kind(d) == "rosbag":
        return [d]
    if not d.is_dir():
        return []
    return sorted(p for p in d.iterdir() if log_kind(p) is not None)


# --------------------------------------------------------------------------------------------- shared

def _select(file: Path, where: str, available: Sequence[str], requested: Sequence[str]) -> list[int]:
    """Indices of the requested fields in `available`; a base name expands to all elements/children."""
    out: list[int] = []
    for req in requested:
        hits = [i for i, a in enumerate(available)
                if a == req or a.startswith(req + "[") or a.startswith(req + ".")]
        if not hits:
            raise InputError(file, f"field {req!r} of {where}", "a field the log has", f"fields {list(available)}")
        out.extend(i for i in hits if i not in out)
    return out


# --------------------------------------------------------------------------------------------- ULog

def _load_ulog(path: str | Path, topics: list[str] | None, allow_corrupt: bool):
    """Parse with pyulog; its warnings go to stdout, so they are captured and reported in the error instead."""
    from pyulog import ULog
    from pyulog.exceptions import ULogException

    p = Path(path)
    if not p.is_file():
        raise InputError(p, "file", "an existing ULog file", "no such file")
    buf = io.StringIO()
    try:
        with contextlib.redirect_stdout(buf):
            ulog = ULog(str(p), message_name_filter_list=topics)
    except ULogException as e:
        raise InputError(p, "content", "a ULog file (magic 'ULog' 01 12 35)", str(e)) from None
    except (OSError, ValueError, KeyError, IndexError, EOFError) as e:
        raise InputError(p, "content", "a readable ULog file", f"{type(e).__name__}: {e}") from None
    if ulog.file_corruption and not allow_corrupt:
        said = " ".join(buf.getvalue().split())[:300] or "corrupt messages skipped"
        raise InputError(p, "content", "an uncorrupted ULog file (pass allow_corrupt=True to use what parses)",
                         f"corruption detected: {said}")
    return ulog


def _ulog_fields(data) -> list[str]:
    return [f.field_name for f in data.field_data
            if f.field_name != "timestamp" and not f.field_name.startswith("_padding")]


def _ulog_bookkeeping(name: str) -> bool:
    # PX4 topics carry relative timestamps and bus device ids beside the signals: not channels (common practice).
    leaf = name.rsplit(".", 1)[-1]
    return "timestamp" in leaf or leaf.startswith("device_id")


def list_ulog_topics(path: str | Path, *, allow_corrupt: bool = False) -> dict[str, dict]:
    """Topics of a ULog file: ``{topic: {"instances": [multi_id, ...], "fields": [...], "counts": {id: n}}}``.

    `fields` are the flattened data fields (arrays as ``name[i]``, nested as ``a.b``), without ``timestamp``
    and padding.
    """
    ulog = _load_ulog(path, None, allow_corrupt)
    out: dict[str, dict] = {}
    for d in ulog.data_list:
        entry = out.setdefault(d.name, {"instances": [], "fields": _ulog_fields(d), "counts": {}})
        entry["instances"].append(int(d.multi_id))
        entry["counts"][int(d.multi_id)] = int(len(d.data["timestamp"]))
    for entry in out.values():
        entry["instances"].sort()
    return out


def read_ulog_topic(path: str | Path, topic: str, fields: Sequence[str] | None = None, instance: int = 0, *,
                    time_field: str = "timestamp", allow_corrupt: bool = False):
    """One ULog topic instance (``multi_id``) as ``(t_s, values, names)``.

    Time comes from the microsecond ``timestamp`` field, or from ``timestamp_sample`` when asked for and the
    topic has it (otherwise ``timestamp``: PX4 logs that field only on some sensor topics). `fields` None = every
    data field except bookkeeping (time fields such as ``timestamp_sample`` or
    ``accelerometer_timestamp_relative``, and ``device_id``).
    """
    p = Path(path)
    if time_field not in ULOG_TIME_FIELDS:
        raise InputError(p, "time_field", f"one of {ULOG_TIME_FIELDS}", repr(time_field))
    ulog = _load_ulog(p, [topic], allow_corrupt)
    by_id = {int(d.multi_id): d for d in ulog.data_list if d.name == topic}
    if not by_id:
        have = sorted(list_ulog_topics(p, allow_corrupt=True))
        raise InputError(p, f"topic {topic!r}", "a topic the log has", f"topics {have}")
    if instance not in by_id:
        raise InputError(p, f"topic {topic!r} instance", f"one of the logged instances {sorted(by_id)}", instance)
    d = by_id[instance]
    available = _ulog_fields(d)
    if fields is None:
        names = [f for f in available if not _ulog_bookkeeping(f)]
    else:
        names = [available[i] for i in _select(p, f"topic {topic!r}", available, list(fields))]
    tf = time_field if time_field in d.data else "timestamp"
    # uint64 microseconds since boot stay below 2**53, so the float conversion is exact; one rounding in / 1e6.
    t_s = d.data[tf].astype(np.float64) / 1e6
    values = np.empty((len(t_s), len(names)), np.float64)
    for j, n in enumerate(names):
        values[:, j] = d.data[n]
    return t_s, values, names


def ulog_dropouts(path: str | Path, *, allow_corrupt: bool = False) -> list[tuple[float, float]]:
    """Logging dropouts as ``(t_s, duration_s)``: the logger lost data for ``duration_s`` after ``t_s``.

    ``t_s`` is the last logged timestamp before the dropout message (pyulog's reading of the 'O' message, which
    carries only a uint16 duration in milliseconds).
    """
    ulog = _load_ulog(path, None, allow_corrupt)  # no topic filter: pyulog tracks the clock from parsed data
    return [(int(d.timestamp) / 1e6, int(d.duration) / 1e3) for d in ulog.dropouts]


# --------------------------------------------------------------------------------------------- ROS 2 bags

@contextlib.contextmanager
def _open_bag(path: str | Path):
    """An open rosbags AnyReader; anything that stops it from opening becomes an InputError."""
    from rosbags.highlevel import AnyReader
    from rosbags.typesys import Stores, get_typestore

    p = Path(path)
    if log_kind(p) != "rosbag":
        raise InputError(p, "file", "a ROS 2 bag folder (metadata.yaml) or a .mcap/.db3 file",
                         "no such file" if not p.exists() else "something else")
    try:
        # Older bags carry no message definitions: fall back to the stock ROS 2 types.
        reader = AnyReader([p], default_typestore=get_typestore(Stores.LATEST))
        reader.open()
    except Exception as e:  # noqa: BLE001 -- sqlite, mcap, yaml and rosbags all raise their own kinds
        raise InputError(p, "content", "a readable ROS 2 bag", f"{type(e).__name__}: {e}") from None
    try:
        yield reader
    finally:
        reader.close()


def _connections(reader, p: Path, topic: str, allowed_types: Sequence[str] | None = None):
    conns = [c for c in reader.connections if c.topic == topic]
    if not conns:
        have = {c.topic: c.msgtype for c in reader.connections}
        raise InputError(p, f"topic {topic!r}", "a topic the bag has", f"topics {dict(sorted(have.items()))}")
    msgtype = conns[0].msgtype
    if allowed_types is not None and msgtype not in allowed_types:
        raise InputError(p, f"topic {topic!r}", f"a topic of type {' or '.join(allowed_types)}", msgtype)
    return conns, msgtype


def list_bag_topics(path: str | Path) -> dict[str, dict]:
    """Topics of a ROS 2 bag: ``{topic: {"msgtype": str, "count": int}}``."""
    with _open_bag(path) as reader:
        return {name: {"msgtype": info.msgtype, "count": int(info.msgcount)}
                for name, info in reader.topics.items()}


def _flatten_ros(fielddefs: dict, msgtype: str, prefix: str = "", path: tuple = ()) -> list[tuple[str, tuple]]:
    """Flattened numeric fields of a message type: (dotted name, access path of attribute names and indices).

    Nested messages recurse, fixed arrays are indexed ``name[i]``; strings and variable-length sequences are
    skipped (not a fixed set of channels).
    """
    out: list[tuple[str, tuple]] = []
    for fname, (node, sub) in fielddefs[msgtype][1]:
        name, fpath = prefix + fname, path + (fname,)
        out.extend(_flatten_node(fielddefs, int(node), sub, name, fpath))
    return out


def _flatten_node(fielddefs, node: int, sub, name: str, fpath: tuple) -> list[tuple[str, tuple]]:
    # Node kinds as rosbags.interfaces.Nodetype: 1 BASE, 2 NAME (nested message), 3 ARRAY (fixed), 4 SEQUENCE.
    if node == 1:
        return [(name, fpath)] if sub[0] in _ROS_NUMERIC else []
    if node == 2:
        return _flatten_ros(fielddefs, sub, name + ".", fpath)
    if node == 3:
        (inode, isub), count = sub
        out = []
        for i in range(count):
            out.extend(_flatten_node(fielddefs, int(inode), isub, f"{name}[{i}]", fpath + (i,)))
        return out
    return []


def _getter(fpath: tuple) -> Callable:
    if all(isinstance(s, str) for s in fpath):
        return operator.attrgetter(".".join(fpath))

    def get(msg, fpath=fpath):
        for s in fpath:
            msg = msg[s] if isinstance(s, int) else getattr(msg, s)
        return msg
    return get


def _has_header(fielddefs: dict, msgtype: str) -> bool:
    return any(f == "header" and sub == "std_msgs/msg/Header" for f, (_, sub) in fielddefs[msgtype][1])


def _stamp_s(msg, receive_ns: int, use_header: bool) -> float:
    """Header stamp in seconds, or the bag's receive time when asked for, absent or zero."""
    if use_header:
        st = msg.header.stamp
        ns = int(st.sec) * 1_000_000_000 + int(st.nanosec)
        if ns != 0:
            return ns / 1_000_000_000  # int / int: the correctly rounded float of the exact stamp
    return receive_ns / 1_000_000_000


def _check_stamp(p: Path, stamp: str) -> None:
    if stamp not in STAMP_SOURCES:
        raise InputError(p, "stamp", f"one of {STAMP_SOURCES}", repr(stamp))


def read_bag_topic(path: str | Path, topic: str, fields: Sequence[str] | None = None, stamp: str = "header"):
    """One ROS 2 bag topic as ``(t_s, values, names)``.

    Channels: `fields` None gives angular_velocity.x/y/z and linear_acceleration.x/y/z for sensor_msgs/msg/Imu,
    and every numeric field outside the header for any other type (dotted names, fixed arrays ``name[i]``).
    `stamp` "header" uses header.stamp (receive time where the stamp is zero or the type has no header);
    "receive" uses the bag's receive time.
    """
    p = Path(path)
    _check_stamp(p, stamp)
    with _open_bag(p) as reader:
        conns, msgtype = _connections(reader, p, topic)
        fielddefs = reader.typestore.fielddefs
        flat = _flatten_ros(fielddefs, msgtype)
        available = [n for n, _ in flat]
        if fields is None:
            if msgtype == IMU_TYPE:
                fields = IMU_DEFAULT
            else:
                fields = [n for n in available if not n.startswith("header.")]
                if not fields:
                    raise InputError(p, f"topic {topic!r}", "a message type with numeric fields",
                                     f"{msgtype} with fields {available}")
        idx = _select(p, f"topic {topic!r} ({msgtype})", available, list(fields))
        names = [available[i] for i in idx]
        getters = [_getter(flat[i][1]) for i in idx]
        use_header = stamp == "header" and _has_header(fielddefs, msgtype)
        t_list: list[float] = []
        rows: list[list] = []
        try:
            for conn, ts_ns, raw in reader.messages(connections=conns):
                msg = reader.deserialize(raw, conn.msgtype)
                t_list.append(_stamp_s(msg, ts_ns, use_header))
                rows.append([g(msg) for g in getters])
        except InputError:
            raise
        except Exception as e:  # noqa: BLE001 -- truncated chunks, bad CDR
            raise InputError(p, f"topic {topic!r} message {len(t_list)}", "a readable message",
                             f"{type(e).__name__}: {e}") from None
    t_s = np.asarray(t_list, np.float64)
    values = np.asarray(rows, np.float64).reshape(len(t_list), len(names))
    return t_s, values, names


def _decode_image(msg, msgtype: str, p: Path, topic: str) -> np.ndarray:
    """sensor_msgs Image (rgb8, bgr8, rgba8, bgra8, mono8, mono16) or CompressedImage (anything PIL reads)
    -> RGB uint8 (H, W, 3)."""
    if msgtype.endswith("CompressedImage"):
        from PIL import Image as PILImage
        try:
            with PILImage.open(io.BytesIO(bytes(msg.data))) as im:
                return np.asarray(im.convert("RGB"), dtype=np.uint8)
        except Exception as e:  # noqa: BLE001 -- PIL raises several kinds for bad data
            raise InputError(p, f"topic {topic!r} image", f"a decodable {msg.format!r} image",
                             f"{type(e).__name__}: {e}") from None
    enc = msg.encoding.lower()
    h, w, step = int(msg.height), int(msg.width), int(msg.step)
    channels = {"rgb8": 3, "bgr8": 3, "rgba8": 4, "bgra8": 4, "mono8": 1, "8uc1": 1, "mono16": 2, "16uc1": 2}
    if enc not in channels:
        raise InputError(p, f"topic {topic!r} encoding", f"one of {sorted(channels)}", msg.encoding)
    data = np.asarray(msg.data, dtype=np.uint8)
    if data.size < h * step or step < w * channels[enc]:
        raise InputError(p, f"topic {topic!r} image", f"{h} rows of {step} bytes ({enc}, width {w})",
                         f"{data.size} bytes")
    rows = data[: h * step].reshape(h, step)[:, : w * channels[enc]]
    if enc in ("mono16", "16uc1"):
        px = rows.reshape(h, w, 2).view(">u2" if msg.is_bigendian else "<u2")[..., 0]
        gray = (px >> 8).astype(np.uint8)  # keep the high byte: a display conversion, common practice
        return np.repeat(gray[..., None], 3, axis=2)
    if channels[enc] == 1:
        return np.repeat(rows.reshape(h, w, 1), 3, axis=2)
    px = rows.reshape(h, w, channels[enc])[..., :3]
    return np.ascontiguousarray(px[..., ::-1] if enc.startswith("bgr") else px)


def iter_bag_images(path: str | Path, topic: str, sample_hz: float, stamp: str = "header"
                    ) -> Iterator[tuple[float, np.ndarray]]:
    """Yield ``(t_s, rgb uint8 HxWx3)`` from a sensor_msgs Image or CompressedImage topic, at most one frame
    per 1/sample_hz interval by stamp.

    Intervals are a grid from the first frame's stamp, bin k = floor((t - t0) * sample_hz); the first frame
    falling into a bin not yet used is taken, so the mean rate is sample_hz with no drift from frame jitter.
    """
    p = Path(path)
    _check_stamp(p, stamp)
    if not (sample_hz > 0 and np.isfinite(sample_hz)):
        raise InputError(p, "sample_hz", "a positive number", sample_hz)
    with _open_bag(p) as reader:
        conns, msgtype = _connections(reader, p, topic, IMAGE_TYPES)
        use_header = stamp == "header"
        t0: float | None = None
        used: set[int] = set()
        n = 0
        try:
            for conn, ts_ns, raw in reader.messages(connections=conns):
                msg = reader.deserialize(raw, conn.msgtype)
                n += 1
                t = _stamp_s(msg, ts_ns, use_header)
                t0 = t if t0 is None else t0
                k = int(np.floor((t - t0) * sample_hz + _SAMPLE_EPS_S * sample_hz))
                if k in used:
                    continue
                used.add(k)
                yield t, _decode_image(msg, msgtype, p, topic)
        except InputError:
            raise
        except Exception as e:  # noqa: BLE001 -- truncated chunks, bad CDR
            raise InputError(p, f"topic {topic!r} message {n}", "a readable message",
                             f"{type(e).__name__}: {e}") from None
