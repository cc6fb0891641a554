"""Convert a demo recording folder (imu.csv + camera.mp4) into a ROS 2 bag, to exercise the bag reader end to end."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd

from fleetsift.errors import InputError

IMU_COLUMNS = ["t", "ax", "ay", "az", "gx", "gy", "gz"]


def _ns(t_s: float) -> int:
    return int(round(float(t_s) * 1e9))


def recording_to_bag(rec_dir: str | Path, out_path: str | Path, storage: str = "mcap", image_hz: float = 5.0,
                     jpeg_quality: int = 90) -> Path:
    """Write `/imu` (sensor_msgs/msg/Imu, header stamps = CSV t) and `/camera/image/compressed`
    (sensor_msgs/msg/CompressedImage, JPEG, header stamps = video pts, at most `image_hz` frames a second)
    into a new bag folder `out_path`. Receive times equal the header stamps. Returns `out_path`.
    """
    import av
    from PIL import Image as PILImage
    from rosbags.rosbag2 import StoragePlugin, Writer
    from rosbags.typesys import Stores, get_typestore

    rec, out = Path(rec_dir), Path(out_path)
    plugins = {"mcap": StoragePlugin.MCAP, "sqlite3": StoragePlugin.SQLITE3}
    if storage not in plugins:
        raise InputError(out, "storage", f"one of {sorted(plugins)}", repr(storage))
    if out.exists():
        raise InputError(out, "out_path", "a path that does not exist yet (the bag writer never overwrites)",
                         "an existing path")
    imu_csv, video = rec / "imu.csv", rec / "camera.mp4"
    for f in (imu_csv, video):
        if not f.is_file():
            raise InputError(f, "file", "a demo recording file", "no such file")
    df = pd.read_csv(imu_csv)
    missing = [c for c in IMU_COLUMNS if c not in df.columns]
    if missing:
        raise InputError(imu_csv, f"column {missing[0]!r}", f"columns {IMU_COLUMNS}", f"columns {list(df.columns)}")
    imu = df[IMU_COLUMNS].to_numpy(np.float64)
    if (imu[:, 0] < 0).any():
        raise InputError(imu_csv, "column 't'", "non-negative seconds (bag times are unsigned)", imu[:, 0].min())

    try:
        container = av.open(str(video))
    except Exception as e:  # noqa: BLE001 -- PyAV raises its own FFmpeg error kinds
        raise InputError(video, "content", "a video FFmpeg can read", f"{type(e).__name__}: {e}") from None

    ts = get_typestore(Stores.ROS2_HUMBLE)
    T = ts.types
    Header, Time = T["std_msgs/msg/Header"], T["builtin_interfaces/msg/Time"]
    Imu, Vector3, Quaternion = T["sensor_msgs/msg/Imu"], T["geometry_msgs/msg/Vector3"], T["geometry_msgs/msg/Quaternion"]
    CompressedImage = T["sensor_msgs/msg/CompressedImage"]

    def header(ns: int, frame: str):
        return Header(stamp=Time(sec=ns // 1_000_000_000, nanosec=ns % 1_000_000_000), frame_id=frame)

    # No orientation estimate: element 0 of its covariance is -1, as the sensor_msgs/Imu definition asks.
    no_orientation = np.zeros(9)
    no_orientation[0] = -1.0
    zeros9 = np.zeros(9)

    with Writer(out, version=9, storage_plugin=plugins[storage]) as writer:
        c_imu = writer.add_connection("/imu", Imu.__msgtype__, typestore=ts)
        c_cam = writer.add_connection("/camera/image/compressed", CompressedImage.__msgtype__, typestore=ts)
        for t, ax, ay, az, gx, gy, gz in imu:
            ns = _ns(t)
            msg = Imu(header=header(ns, "imu"), orientation=Quaternion(x=0.0, y=0.0, z=0.0, w=1.0),
                      orientation_covariance=no_orientation,
                      angular_velocity=Vector3(x=gx, y=gy, z=gz), angular_velocity_covariance=zeros9,
                      linear_acceleration=Vector3(x=ax, y=ay, z=az), linear_acceleration_covariance=zeros9)
            writer.write(c_imu, ns, ts.serialize_cdr(msg, Imu.__msgtype__))

        with container:
            stream = container.streams.video[0]
            t0, used = None, set()
            for frame in container.decode(stream):
                if frame.pts is None:
                    continue
                t = float(frame.pts * stream.time_base)
                t0 = t if t0 is None else t0
                k = int(np.floor((t - t0) * image_hz + 1e-6 * image_hz))  # same grid rule as the bag reader
                if k in used:
                    continue
                used.add(k)
                buf = io.BytesIO()
                PILImage.fromarray(frame.to_ndarray(format="rgb24")).save(buf, format="JPEG", quality=jpeg_quality)
                ns = _ns(max(t, 0.0))
                msg = CompressedImage(header=header(ns, "camera"), format="jpeg",
                                      data=np.frombuffer(buf.getvalue(), np.uint8))
                writer.write(c_cam, ns, ts.serialize_cdr(msg, CompressedImage.__msgtype__))
    return out


BAG_PROFILE = """\
# This recording arrived as a ROS 2 bag (MCAP storage) instead of imu.csv + camera.mp4. Its sections are laid over
# the inbox profile's: they say only how to read the bag. `fields` are the bag's message fields, named in order by
# the fleet's `channels`, so calibration, channel names and video settings stay the fleet's.
[streams.imu]
file = "bag"
topic = "/imu"
stamp = "header"
fields = ["linear_acceleration.x", "linear_acceleration.y", "linear_acceleration.z",
          "angular_velocity.x", "angular_velocity.y", "angular_velocity.z"]

[streams.camera]
file = "bag"
topic = "/camera/image/compressed"
stamp = "header"
"""


def demo_inbox_with_bag(src: str | Path, dst: str | Path, recording: str, storage: str = "mcap") -> Path:
    """Copy the demo fleet `src` to `dst` with `recording` turned into a ROS 2 bag carrying its own profile.

    The copy keeps modification times, so a second call finds every file unchanged and the store's caches hold.
    An existing bag in `dst` is kept as it is.
    """
    import shutil

    from fleetsift.profile import load_profile

    src, dst = Path(src), Path(dst)
    prof = load_profile(src / "profile.toml")
    imu, cam = prof.streams.get("imu"), prof.streams.get("camera")
    if imu is None or cam is None or not (src / recording).is_dir():
        raise InputError(src, "streams / recording", f"a demo fleet with streams imu and camera and a recording "
                         f"{recording!r}", f"streams {sorted(prof.streams)}")
    dst.mkdir(parents=True, exist_ok=True)
    for p in sorted(src.iterdir()):
        if p.name == recording:
            continue
        if p.is_dir():
            shutil.copytree(p, dst / p.name, dirs_exist_ok=True, copy_function=shutil.copy2)
        else:
            shutil.copy2(p, dst / p.name)
    rec = dst / recording
    if not (rec / "bag" / "metadata.yaml").is_file():
        if rec.exists():
            shutil.rmtree(rec)
        rec.mkdir()
        recording_to_bag(src / recording, rec / "bag", storage=storage, image_hz=cam.sample_hz)
    own = rec / "profile.toml"
    if not own.exists() or own.read_text() != BAG_PROFILE:  # rewritten only on change: keeps the cache keys
        own.write_text(BAG_PROFILE)
    return dst
