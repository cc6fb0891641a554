"""Sensor profile: a TOML file that says how to read a recording's streams and how to window and score them.

Every key is validated; unknown keys are errors (a typo must never be silently ignored). Errors name the file, the
key, what was expected and what was found. The dataclasses' field defaults are the one source of every default:
the Python API functions (descriptors.describe, baseline.fit_baseline, embed.embed_frames, ...) read theirs here.
"""

from __future__ import annotations

import hashlib
import json
import math
import tomllib
import warnings
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from fleetsift.errors import ProfileError
from fleetsift.vocabulary import (BASELINE_SOURCES, DEPRECATED_KEYS, DEPRECATED_VALUES, DESCRIPTOR_KINDS, KNN_STATS,
                                  KNN_UNITS, METRICS, PRECISIONS, RUNTIMES, SCORING_METHODS, SHRINKAGE_ESTIMATORS,
                                  STAMP_SOURCES, STREAM_KINDS, TIME_UNITS)

PROFILE_NAME = "profile.toml"


@dataclass(frozen=True)
class Calibration:
    bias: float = 0.0
    scale: float = 1.0


@dataclass(frozen=True)
class TableStream:
    name: str
    file: str
    time_column: str = "t"
    time_unit: str = "s"
    channels: tuple[str, ...] = ()
    clock_offset_s: float = 0.0
    calibration: dict[str, Calibration] = field(default_factory=dict)
    # Source names (CSV/Parquet columns, log topic fields) when they differ from the channel names: `channels`
    # then names them in order, so a fleet mixing CSV and log recordings shares one set of channel names.
    fields: tuple[str, ...] = ()
    topic: str = ""  # for log files (ULog, ROS 2 bag)
    instance: int = 0  # ULog multi-instance topics
    stamp: str = "header"  # ROS 2: header stamp or receive time
    kind: str = "table"
    # Physical unit of each channel (after calibration), shown on the report's traces; optional per channel.
    units: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class VideoStream:
    name: str
    file: str
    clock_offset_s: float = 0.0
    sample_hz: float = 5.0
    backbone: str = "efficientnet_lite0"
    weights: str = ""
    pca_dim: int = 6  # chosen by measurement on two generated fleets (README, detection)
    image_size: int = 224
    threads: int = 2
    batch_size: int = 8
    # Frames that differ from the last embedded one by less than this (largest pixel difference of a 32 x 32 grey
    # thumbnail, in 0..1 grey levels) reuse its embedding; 0 embeds every sampled frame. Chosen by measurement
    # (bench/embed.py; README, Performance).
    skip_threshold: float = 0.006
    runtime: str = "onnxruntime"  # RUNTIMES: who runs the backbone
    precision: str = "float32"  # PRECISIONS
    topic: str = ""  # for image topics in a ROS 2 bag
    stamp: str = "header"
    kind: str = "video"


@dataclass(frozen=True)
class Windowing:
    rate_hz: float = 50.0
    window_s: float = 4.0
    hop_s: float = 2.0
    max_gap_s: float = 0.25


@dataclass(frozen=True)
class Descriptor:
    kind: str = "covariance"
    shrinkage: str = "ledoit_wolf"  # estimator of the covariance kinds (covariance, lagged)
    include_mean: bool = True
    lags: int = 3
    # A noise floor added to every window covariance, in standardised units, or "auto": the smallest eigenvalue
    # of the baseline's channel correlation matrix (see featurizers.descriptors.baseline_ridge). Without a floor,
    # near-constant channels (a rover standing still) own the smallest eigenvalues, which dominate the
    # affine-invariant distance.
    ridge: float | str = "auto"
    # One descriptor per stream, each scored on its own and combined by the largest robust z, or one descriptor
    # over all channels: a deviation in one stream is then not diluted by the other streams' normal variation.
    per_stream: bool = True


@dataclass(frozen=True)
class Scoring:
    metric: str = "riemann"
    method: str = "knn"
    k: int = 3
    knn_stat: str = "kth"
    knn_unit: str = "recording"
    exclusion_s: float = 30.0
    trim_fraction: float = 0.1
    threshold_c: float = 3.0
    n_top_channels: int = 3  # how many channels each flagged window names (windows.top_channels)


@dataclass(frozen=True)
class BaselineSpec:
    # history: from the second night on, the references are earlier committed nights' unflagged windows
    # (tonight's batch joins while the history holds fewer than k recordings); batch: tonight's batch,
    # robustly trimmed; recordings: the recordings listed in `recordings`.
    source: str = "history"
    recordings: tuple[str, ...] = ()
    history_nights: int = 7  # committed nights the references are drawn from, newest first
    max_references: int = 4000  # cap on reference windows, evenly subsampled in (night, recording, time) order
    # A window joins later nights' references only when its score (a robust z) is at most this, it is not
    # flagged and no flagged window of its recording lies within one window length of it.
    history_max_score: float = 2.0


@dataclass(frozen=True)
class Storage:
    """[storage]: how to reach an inbox or store on object storage (credentials only ever from the environment)."""

    endpoint_url: str = ""  # an S3-compatible server; empty: AWS_ENDPOINT_URL(_S3) or AWS itself
    region: str = ""  # empty: AWS_REGION / AWS_DEFAULT_REGION
    anonymous: bool = False  # unsigned requests (a public bucket)
    # The store's lock object expires this long after its holder last renewed it (renewed every third of it):
    # a night killed with the lock held blocks the store at most this long.
    lock_ttl_s: float = 300.0


@dataclass(frozen=True)
class Profile:
    path: str
    streams: dict[str, TableStream | VideoStream]
    windowing: Windowing = Windowing()
    descriptor: Descriptor = Descriptor()
    scoring: Scoring = Scoring()
    baseline: BaselineSpec = BaselineSpec()
    storage: Storage = Storage()  # not in digest(): where data lives never changes a score
    raw: dict = field(default_factory=dict, compare=False, repr=False)  # the parsed TOML, for recording overlays

    def table_streams(self) -> list[TableStream]:
        return [s for s in self.streams.values() if isinstance(s, TableStream)]

    def video_streams(self) -> list[VideoStream]:
        return [s for s in self.streams.values() if isinstance(s, VideoStream)]

    def section(self, name: str) -> dict[str, Any]:
        """The plain-data content of one section, the unit that cache keys are built from."""
        if name.startswith("streams."):
            sec = _plain(asdict(self.streams[name.split(".", 1)[1]]))
            # Units only label the report's traces: no stage reads them, so they stay out of every cache key
            # (the report's own cache key includes them, flows/report.py).
            sec.pop("units", None)
            return sec
        return _plain(asdict(getattr(self, name)))

    def to_dict(self) -> dict[str, Any]:
        out = {k: self.section(k) for k in ("windowing", "descriptor", "scoring", "baseline")}
        out["streams"] = {n: self.section(f"streams.{n}") for n in self.streams}
        return out

    def digest(self) -> str:
        return section_hash(self.to_dict())


def _plain(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in sorted(obj.items())}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    return obj


def section_hash(section: Any) -> str:
    return hashlib.sha256(json.dumps(_plain(section), sort_keys=True).encode()).hexdigest()[:16]


# --- validation helpers ----------------------------------------------------------------------------------------------

def _type_name(v: Any) -> str:
    return f"{type(v).__name__} {v!r}"


class _Checker:
    def __init__(self, path: str):
        self.path = path

    def fail(self, key: str, expected: str, got: Any) -> None:
        raise ProfileError(self.path, key, expected, got)

    def table(self, data: Any, key: str) -> dict:
        if not isinstance(data, dict):
            self.fail(key, "a table", _type_name(data))
        return data

    def no_unknown(self, data: dict, allowed: set[str], where: str) -> None:
        for k in data:
            if k not in allowed:
                self.fail(f"{where}.{k}" if where else k, f"one of the known keys {sorted(allowed)}",
                          "an unknown key")

    def number(self, data: dict, key: str, where: str, default: float, *, positive=False, nonneg=False,
               finite=True, lo=None, hi=None) -> float:
        v = data.get(key, default)
        full = f"{where}.{key}"
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            self.fail(full, "a number", _type_name(v))
        try:
            v = float(v)
        except OverflowError:  # TOML integers are unbounded; float() is not
            self.fail(full, "a number within the float range", f"int with {len(str(abs(v)))} digits")
        if finite and not math.isfinite(v):
            self.fail(full, "a finite number", v)
        if positive and not v > 0:
            self.fail(full, "a number > 0", v)
        if nonneg and v < 0:
            self.fail(full, "a number >= 0", v)
        if lo is not None and v < lo:
            self.fail(full, f"a number >= {lo}", v)
        if hi is not None and v > hi:
            self.fail(full, f"a number <= {hi}", v)
        return v

    def integer(self, data: dict, key: str, where: str, default: int, *, lo: int | None = None) -> int:
        v = data.get(key, default)
        full = f"{where}.{key}"
        if isinstance(v, bool) or not isinstance(v, int):
            self.fail(full, "an integer", _type_name(v))
        if lo is not None and v < lo:
            self.fail(full, f"an integer >= {lo}", v)
        return int(v)

    def boolean(self, data: dict, key: str, where: str, default: bool) -> bool:
        v = data.get(key, default)
        if not isinstance(v, bool):
            self.fail(f"{where}.{key}", "true or false", _type_name(v))
        return v

    def string(self, data: dict, key: str, where: str, default: str | None, *, choices=None) -> str:
        if key not in data and default is None:
            self.fail(f"{where}.{key}", "a string (required)", "nothing")
        v = data.get(key, default)
        full = f"{where}.{key}"
        if not isinstance(v, str):
            self.fail(full, "a string", _type_name(v))
        if choices is not None and v not in choices:
            self.fail(full, f"one of {list(choices)}", repr(v))
        return v

    def strings(self, data: dict, key: str, where: str, default: tuple[str, ...]) -> tuple[str, ...]:
        v = data.get(key, list(default))
        full = f"{where}.{key}"
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            self.fail(full, "a list of strings", _type_name(v))
        if len(set(v)) != len(v):
            self.fail(full, "distinct names", v)
        return tuple(v)

    def relative_file(self, data: dict, key: str, where: str) -> str:
        v = self.string(data, key, where, None)
        p = Path(v)
        # Refuse paths that could read outside the recording folder.
        if p.is_absolute() or ".." in p.parts or v.strip() == "":
            self.fail(f"{where}.{key}", "a file name or glob inside the recording folder", repr(v))
        return v


def _load_toml(text: str, path: str) -> dict:
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ProfileError(path, "TOML syntax", "valid TOML", str(e)) from None


def parse_profile(text: str, path: str = "<profile>") -> Profile:
    """Parse and validate profile TOML text."""
    return profile_from_dict(_load_toml(text, path), path)


class ProfileDeprecation(FutureWarning):
    """A profile key or value renamed in this release: still read, with this message, for one release."""


def _renamed(data: dict, path: str) -> dict:
    """``data`` with deprecated keys and values under their new names, warning once per use."""
    out = dict(data)
    for (section, old), new in DEPRECATED_KEYS.items():
        sec = out.get(section)
        if isinstance(sec, dict) and old in sec:
            if new in sec:
                raise ProfileError(path, f"{section}.{old}", f"only its new name {section}.{new}", "both names")
            sec = {(new if k == old else k): v for k, v in sec.items()}
            out[section] = sec
            warnings.warn(f"{path}: {section}.{old} is deprecated, call it {section}.{new}", ProfileDeprecation,
                          stacklevel=3)
    for (section, key, old), new in DEPRECATED_VALUES.items():
        sec = out.get(section)
        if isinstance(sec, dict) and sec.get(key) == old:
            clash = [k for k in new if k != key and k in sec and sec[k] != new[k]]
            if clash:
                raise ProfileError(path, f"{section}.{clash[0]}", f'{new[clash[0]]!r} with {key} = "{old}"',
                                   repr(sec[clash[0]]))
            out[section] = {**sec, **new}
            write = ", ".join(f'{k} = "{v}"' for k, v in new.items())
            warnings.warn(f'{path}: {section}.{key} = "{old}" is deprecated, write {write}', ProfileDeprecation,
                          stacklevel=3)
    return out


def profile_from_dict(data: dict, path: str = "<profile>") -> Profile:
    """Validate already-parsed profile data (deprecated names are read under their new ones, with a warning)."""
    data = _renamed(data, path)
    c = _Checker(path)
    c.no_unknown(data, {"windowing", "descriptor", "scoring", "baseline", "streams", "storage"}, "")

    w = c.table(data.get("windowing", {}), "windowing")
    c.no_unknown(w, {f for f in Windowing.__dataclass_fields__}, "windowing")
    windowing = Windowing(
        rate_hz=c.number(w, "rate_hz", "windowing", Windowing.rate_hz, positive=True, hi=10_000),
        window_s=c.number(w, "window_s", "windowing", Windowing.window_s, positive=True),
        hop_s=c.number(w, "hop_s", "windowing", Windowing.hop_s, positive=True),
        max_gap_s=c.number(w, "max_gap_s", "windowing", Windowing.max_gap_s, positive=True),
    )
    if windowing.window_s * windowing.rate_hz < 4:
        c.fail("windowing.window_s", "a window of at least 4 samples at rate_hz", windowing.window_s)

    d = c.table(data.get("descriptor", {}), "descriptor")
    c.no_unknown(d, {f for f in Descriptor.__dataclass_fields__}, "descriptor")
    ridge = d.get("ridge", Descriptor.ridge)
    if ridge != "auto":
        if isinstance(ridge, str):
            c.fail("descriptor.ridge", 'a number > 0 or "auto"', repr(ridge))
        ridge = c.number(d, "ridge", "descriptor", 1.0, positive=True)
    descriptor = Descriptor(
        kind=c.string(d, "kind", "descriptor", Descriptor.kind, choices=DESCRIPTOR_KINDS),
        shrinkage=c.string(d, "shrinkage", "descriptor", Descriptor.shrinkage, choices=SHRINKAGE_ESTIMATORS),
        include_mean=c.boolean(d, "include_mean", "descriptor", Descriptor.include_mean),
        lags=c.integer(d, "lags", "descriptor", Descriptor.lags, lo=1),
        ridge=ridge,
        per_stream=c.boolean(d, "per_stream", "descriptor", Descriptor.per_stream),
    )

    s = c.table(data.get("scoring", {}), "scoring")
    c.no_unknown(s, {f for f in Scoring.__dataclass_fields__}, "scoring")
    scoring = Scoring(
        metric=c.string(s, "metric", "scoring", Scoring.metric, choices=METRICS),
        method=c.string(s, "method", "scoring", Scoring.method, choices=SCORING_METHODS),
        k=c.integer(s, "k", "scoring", Scoring.k, lo=1),
        knn_stat=c.string(s, "knn_stat", "scoring", Scoring.knn_stat, choices=KNN_STATS),
        knn_unit=c.string(s, "knn_unit", "scoring", Scoring.knn_unit, choices=KNN_UNITS),
        exclusion_s=c.number(s, "exclusion_s", "scoring", Scoring.exclusion_s, nonneg=True, finite=False),
        trim_fraction=c.number(s, "trim_fraction", "scoring", Scoring.trim_fraction, lo=0.0, hi=0.5),
        threshold_c=c.number(s, "threshold_c", "scoring", Scoring.threshold_c, positive=True),
        n_top_channels=c.integer(s, "n_top_channels", "scoring", Scoring.n_top_channels, lo=1),
    )

    b = c.table(data.get("baseline", {}), "baseline")
    c.no_unknown(b, {f for f in BaselineSpec.__dataclass_fields__}, "baseline")
    recordings = c.strings(b, "recordings", "baseline", ())
    # Listing recordings without naming a source keeps its old meaning: the baseline is those recordings.
    source = c.string(b, "source", "baseline", "recordings" if recordings else BaselineSpec.source,
                      choices=BASELINE_SOURCES)
    if source == "recordings" and not recordings:
        c.fail("baseline.recordings", 'at least one recording name with source = "recordings"', "none")
    baseline = BaselineSpec(source=source, recordings=recordings,
                            history_nights=c.integer(b, "history_nights", "baseline", BaselineSpec.history_nights,
                                                     lo=1),
                            max_references=c.integer(b, "max_references", "baseline", BaselineSpec.max_references,
                                                     lo=10),
                            history_max_score=c.number(b, "history_max_score", "baseline",
                                                       BaselineSpec.history_max_score))

    so = c.table(data.get("storage", {}), "storage")
    c.no_unknown(so, {f for f in Storage.__dataclass_fields__}, "storage")
    endpoint = c.string(so, "endpoint_url", "storage", Storage.endpoint_url)
    if endpoint and not endpoint.startswith(("http://", "https://")):
        c.fail("storage.endpoint_url", "an http:// or https:// URL", repr(endpoint))
    storage = Storage(endpoint_url=endpoint, region=c.string(so, "region", "storage", Storage.region),
                      anonymous=c.boolean(so, "anonymous", "storage", Storage.anonymous),
                      lock_ttl_s=c.number(so, "lock_ttl_s", "storage", Storage.lock_ttl_s, positive=True))

    raw_streams = c.table(data.get("streams", {}), "streams")
    if not raw_streams:
        c.fail("streams", "at least one [streams.NAME] section", "none")
    streams: dict[str, TableStream | VideoStream] = {}
    for name, st in raw_streams.items():
        where = f"streams.{name}"
        st = c.table(st, where)
        kind = c.string(st, "kind", where, None, choices=STREAM_KINDS)
        if kind == "table":
            streams[name] = _parse_table(c, name, st, where)
        else:
            streams[name] = _parse_video(c, name, st, where)
    channel_owner: dict[str, str] = {}
    for st in streams.values():
        if isinstance(st, TableStream):
            for ch in st.channels or st.fields:
                if ch in channel_owner:
                    c.fail(f"streams.{st.name}.channels", "channel names unique across streams",
                           f"{ch!r} also in streams.{channel_owner[ch]}")
                channel_owner[ch] = st.name
    if not any(isinstance(st, TableStream) for st in streams.values()):
        c.fail("streams", "at least one table stream (it defines the common clock)", "only video streams")
    return Profile(path=path, streams=streams, windowing=windowing, descriptor=descriptor, scoring=scoring,
                   baseline=baseline, storage=storage, raw=data)


def _parse_table(c: _Checker, name: str, st: dict, where: str) -> TableStream:
    allowed = {"kind", "file", "time_column", "time_unit", "channels", "fields", "clock_offset_s", "calibration",
               "topic", "instance", "stamp", "units"}
    c.no_unknown(st, allowed, where)
    channels = c.strings(st, "channels", where, ())
    fields = c.strings(st, "fields", where, ())
    topic = c.string(st, "topic", where, "")
    if not channels and not fields and not topic:
        c.fail(f"{where}.channels", "a non-empty list of channel names", "none")
    # A log field may expand to several channels (an array, a message), so only column sources are counted here;
    # for logs the count is checked against what the file has when it is read.
    if fields and channels and not topic and len(fields) != len(channels):
        c.fail(f"{where}.channels", f"one channel name for each of the {len(fields)} fields {list(fields)}",
               f"{len(channels)} names {list(channels)}")
    cal_raw = c.table(st.get("calibration", {}), f"{where}.calibration")
    cal: dict[str, Calibration] = {}
    for ch, spec in cal_raw.items():
        cw = f"{where}.calibration.{ch}"
        if channels and ch not in channels:
            c.fail(cw, f"a calibration for one of the channels {list(channels)}", repr(ch))
        spec = c.table(spec, cw)
        c.no_unknown(spec, {"bias", "scale"}, cw)
        scale = c.number(spec, "scale", cw, 1.0)
        if scale == 0:
            c.fail(f"{cw}.scale", "a non-zero number", scale)
        cal[ch] = Calibration(bias=c.number(spec, "bias", cw, 0.0), scale=scale)
    units_raw = c.table(st.get("units", {}), f"{where}.units")
    for ch in units_raw:
        if channels and ch not in channels:
            c.fail(f"{where}.units.{ch}", f"a unit for one of the channels {list(channels)}", repr(ch))
        c.string(units_raw, ch, f"{where}.units", None)
    return TableStream(
        name=name,
        file=c.relative_file(st, "file", where),
        time_column=c.string(st, "time_column", where, "t" if not topic else "timestamp"),
        time_unit=c.string(st, "time_unit", where, "s", choices=tuple(TIME_UNITS)),
        channels=channels,
        clock_offset_s=c.number(st, "clock_offset_s", where, 0.0),
        calibration=cal,
        fields=fields,
        topic=topic,
        instance=c.integer(st, "instance", where, 0, lo=0),
        stamp=c.string(st, "stamp", where, "header", choices=STAMP_SOURCES),
        units=dict(units_raw),
    )


def _parse_video(c: _Checker, name: str, st: dict, where: str) -> VideoStream:
    allowed = {f for f in VideoStream.__dataclass_fields__} - {"name"}
    c.no_unknown(st, allowed, where)
    weights = c.string(st, "weights", where, "")
    if st.get("precision") == "int8" and st.get("runtime", VideoStream.runtime) != "onnxruntime":
        c.fail(f"{where}.precision", 'precision = "int8" with runtime = "onnxruntime" (the int8 path is an ONNX '
               'Runtime graph)', f'runtime = {st.get("runtime")!r}')
    return VideoStream(
        name=name,
        file=c.relative_file(st, "file", where),
        clock_offset_s=c.number(st, "clock_offset_s", where, 0.0),
        sample_hz=c.number(st, "sample_hz", where, VideoStream.sample_hz, positive=True, hi=1000),
        backbone=c.string(st, "backbone", where, VideoStream.backbone),
        weights=weights,
        pca_dim=c.integer(st, "pca_dim", where, VideoStream.pca_dim, lo=1),
        image_size=c.integer(st, "image_size", where, VideoStream.image_size, lo=32),
        threads=c.integer(st, "threads", where, VideoStream.threads, lo=1),
        batch_size=c.integer(st, "batch_size", where, VideoStream.batch_size, lo=1),
        skip_threshold=c.number(st, "skip_threshold", where, VideoStream.skip_threshold, nonneg=True, hi=1),
        runtime=c.string(st, "runtime", where, VideoStream.runtime, choices=RUNTIMES),
        precision=c.string(st, "precision", where, VideoStream.precision, choices=PRECISIONS),
        topic=c.string(st, "topic", where, ""),
        stamp=c.string(st, "stamp", where, "header", choices=STAMP_SOURCES),
    )


def _as_path(path: Any) -> Any:
    """A local Path, or an object-storage path (fleetsift.location) for a URL (imported lazily: it imports us)."""
    if isinstance(path, str) and "://" in path:
        from fleetsift.location import location

        return location(path)
    return path if hasattr(path, "read_text") else Path(path)


def load_profile(path: Any) -> Profile:
    path = _as_path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ProfileError(str(path), "file", "an existing profile file", "no such file") from None
    except (OSError, UnicodeDecodeError) as e:
        raise ProfileError(str(path), "file", "a readable UTF-8 text file", str(e)) from None
    return parse_profile(text, str(path))


def overlay_streams(base: dict, own: dict) -> dict:
    """`base` profile data with `own`'s stream sections laid over it key by key (calibration per channel).

    A stream section of another `kind` than the base's, or one the base lacks, is taken as it stands.
    """
    out = {k: v for k, v in base.items()}
    streams = {n: dict(st) if isinstance(st, dict) else st for n, st in base.get("streams", {}).items()}
    own_streams = own.get("streams", {})
    if not isinstance(own_streams, dict):
        return {**out, "streams": own_streams}  # let validation name the bad value
    for name, st in own_streams.items():
        prev = streams.get(name)
        if not isinstance(st, dict) or not isinstance(prev, dict) or st.get("kind", prev.get("kind")) != prev.get("kind"):
            streams[name] = st
            continue
        merged = {**prev, **st}
        if isinstance(prev.get("calibration"), dict) and isinstance(st.get("calibration"), dict):
            merged["calibration"] = {**prev["calibration"], **st["calibration"]}
        streams[name] = merged
    out["streams"] = streams
    return out


def profile_for(recording_dir: Path, inbox_profile: Profile | None) -> Profile:
    """The profile a recording is read with: the inbox-level one, with the recording's own profile.toml (if any)
    laid over its stream sections, so a recording that arrives in another format restates only how to read it
    (file, topic, fields) and keeps the fleet's channel names, calibration and video settings."""
    own = _as_path(recording_dir) / PROFILE_NAME
    if own.exists():
        if inbox_profile is None or not inbox_profile.raw:
            return load_profile(own)
        try:
            text = own.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as e:
            raise ProfileError(str(own), "file", "a readable UTF-8 text file", str(e)) from None
        return profile_from_dict(overlay_streams(inbox_profile.raw, _load_toml(text, str(own))), str(own))
    if inbox_profile is None:
        raise ProfileError(str(recording_dir), PROFILE_NAME,
                           "a profile.toml in the recording folder, in the inbox, or --profile", "none found")
    return inbox_profile
