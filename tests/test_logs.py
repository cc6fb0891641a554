"""Trade log formats: PX4 ULog and ROS 2 bags (sqlite3 and MCAP storage) read through fleetsift.featurizers.logs.

Every log here is written at test time: ROS 2 bags with rosbags' own writer, ULog files with a small writer that
follows the published "ULog File Format" specification (PX4 User Guide, dev_log/ulog_file_format), byte for byte.
pyulog reads the ULog files first as the outside reference; the arrays fleetsift returns must match both it and
the known arrays the files were made from.
"""

from __future__ import annotations

import io
import struct

import numpy as np
import pytest
from PIL import Image as PILImage
from rosbags.rosbag2 import StoragePlugin, Writer
from rosbags.typesys import Stores, get_typestore

from fleetsift.featurizers import logs
from fleetsift.errors import InputError

RNG_SEED = 20240611


from ulog_spec import ULOG_MAGIC, ULogWriter, _msg  # noqa: E402 -- tests/ is on sys.path under pytest


@pytest.fixture(scope="module")
def ulog_case(tmp_path_factory):
    """A small flight log: two instances of sensor_accel (array field + timestamp_sample), a topic with a nested
    type and an int array, a topic with interior padding, a logged string and a 120 ms dropout."""
    rng = np.random.default_rng(RNG_SEED)
    w = ULogWriter(start_us=1_000_000)
    w.info("char[15]", "sys_name", b"inventory_rover")
    w.format("sensor_accel:uint64_t timestamp;uint64_t timestamp_sample;uint32_t device_id;"
             "float[3] accelerometer_m_s2;float temperature;")
    w.format("vec3:float x;float y;float z;")
    w.format("wheel_odom:uint64_t timestamp;vec3 velocity;int32_t[2] ticks;")
    # Interior padding is written in the data; the trailing one is not (the logger strips it, pyulog expects so).
    w.format("battery_status:uint64_t timestamp;float voltage_v;uint8_t cell_count;uint8_t[3] _padding0;"
             "float current_a;uint8_t[4] _padding1;")
    for msg_id, multi_id, name in [(0, 0, "sensor_accel"), (1, 1, "sensor_accel"), (2, 0, "wheel_odom"),
                                   (3, 0, "battery_status")]:
        w.add_logged(multi_id, msg_id, name)

    n0, n1, n_odom, n_bat = 60, 45, 20, 6
    # ~200 Hz with jitter; a 120 ms logging dropout after accel sample 30.
    t0 = 2_000_000 + np.cumsum(rng.integers(4_500, 5_500, n0)).astype(np.uint64)
    t0[31:] += np.uint64(120_000)
    t1 = 2_000_000 + 1_200 + np.cumsum(rng.integers(6_000, 7_000, n1)).astype(np.uint64)
    acc0 = rng.normal(0, 1, (n0, 3)).astype(np.float32) + np.float32([0, 0, -9.81])
    acc1 = rng.normal(0, 1, (n1, 3)).astype(np.float32) + np.float32([0, 0, -9.79])
    temp0 = rng.uniform(30, 40, n0).astype(np.float32)
    t_odom = np.linspace(2_010_000, 2_300_000, n_odom).astype(np.uint64)
    vel = rng.normal(0, 0.5, (n_odom, 3)).astype(np.float32)
    ticks = rng.integers(-100_000, 100_000, (n_odom, 2)).astype(np.int32)
    t_bat = np.linspace(2_000_500, 2_400_000, n_bat).astype(np.uint64)
    volt = rng.uniform(22, 25, n_bat).astype(np.float32)
    cur = rng.uniform(1, 5, n_bat).astype(np.float32)

    events = []  # (t_us, order, writer call) so the data section is in time order, as the logger writes it
    for i in range(n0):
        pay = struct.pack("<QQI3ff", int(t0[i]), int(t0[i]) - 300, 0xA0, *acc0[i].tolist(), float(temp0[i]))
        events.append((int(t0[i]), 0, lambda p=pay: w.record(0, p)))
    for i in range(n1):
        pay = struct.pack("<QQI3ff", int(t1[i]), int(t1[i]) - 250, 0xA1, *acc1[i].tolist(), 33.0)
        events.append((int(t1[i]), 0, lambda p=pay: w.record(1, p)))
    for i in range(n_odom):
        pay = struct.pack("<Q3f2i", int(t_odom[i]), *vel[i].tolist(), *ticks[i].tolist())
        events.append((int(t_odom[i]), 0, lambda p=pay: w.record(2, p)))
    for i in range(n_bat):
        pay = struct.pack("<QfB3xf", int(t_bat[i]), float(volt[i]), 6, float(cur[i]))
        events.append((int(t_bat[i]), 0, lambda p=pay: w.record(3, p)))
    # The dropout message sits right after the last sample before the gap.
    events.append((int(t0[30]), 1, lambda: w.dropout(120)))
    events.append((int(t0[10]), 1, lambda: w.log("6", int(t0[10]), "aisle 4 patrol started")))
    for _, _, call in sorted(events, key=lambda e: (e[0], e[1])):
        call()
    # pyulog stamps a dropout with the newest data timestamp seen before it, over all topics.
    all_t = sorted(e[0] for e in events if e[1] == 0)
    drop_t = max(t for t in all_t if t <= int(t0[30]))

    path = tmp_path_factory.mktemp("ulog") / "flight.ulg"
    path.write_bytes(w.bytes())
    return dict(path=path, t0=t0, t1=t1, acc0=acc0, acc1=acc1, temp0=temp0, t_odom=t_odom, vel=vel, ticks=ticks,
                t_bat=t_bat, volt=volt, cur=cur, drop_t=drop_t)


def test_ulog_file_reads_in_pyulog_as_written(ulog_case):
    """Outside reference: pyulog parses our hand-written file into the arrays we packed."""
    from pyulog import ULog

    c = ulog_case
    u = ULog(str(c["path"]))
    assert not u.file_corruption
    assert u.start_timestamp == 1_000_000
    assert u.msg_info_dict["sys_name"] == "inventory_rover"
    d0 = u.get_dataset("sensor_accel", 0)
    d1 = u.get_dataset("sensor_accel", 1)
    np.testing.assert_array_equal(d0.data["timestamp"], c["t0"])
    np.testing.assert_array_equal(d0.data["timestamp_sample"], c["t0"] - 300)
    for k in range(3):
        np.testing.assert_array_equal(d0.data[f"accelerometer_m_s2[{k}]"], c["acc0"][:, k])
        np.testing.assert_array_equal(d1.data[f"accelerometer_m_s2[{k}]"], c["acc1"][:, k])
    odom = u.get_dataset("wheel_odom")
    np.testing.assert_array_equal(odom.data["velocity.y"], c["vel"][:, 1])
    np.testing.assert_array_equal(odom.data["ticks[1]"], c["ticks"][:, 1])
    bat = u.get_dataset("battery_status")
    np.testing.assert_array_equal(bat.data["current_a"], c["cur"])
    assert [(d.timestamp, d.duration) for d in u.dropouts] == [(c["drop_t"], 120)]
    assert [m.message for m in u.logged_messages] == ["aisle 4 patrol started"]


def test_ulog_topics_listing(ulog_case):
    topics = logs.list_ulog_topics(ulog_case["path"])
    assert set(topics) == {"sensor_accel", "wheel_odom", "battery_status"}
    assert topics["sensor_accel"]["instances"] == [0, 1]
    assert topics["sensor_accel"]["counts"] == {0: 60, 1: 45}
    assert topics["sensor_accel"]["fields"] == ["timestamp_sample", "device_id", "accelerometer_m_s2[0]",
                                                "accelerometer_m_s2[1]", "accelerometer_m_s2[2]", "temperature"]
    assert topics["wheel_odom"]["fields"] == ["velocity.x", "velocity.y", "velocity.z", "ticks[0]", "ticks[1]"]
    # Padding is never a channel.
    assert topics["battery_status"]["fields"] == ["voltage_v", "cell_count", "current_a"]


def test_ulog_array_field_by_base_name_and_element(ulog_case):
    c = ulog_case
    t, v, names = logs.read_ulog_topic(c["path"], "sensor_accel", ["accelerometer_m_s2", "temperature"])
    assert names == ["accelerometer_m_s2[0]", "accelerometer_m_s2[1]", "accelerometer_m_s2[2]", "temperature"]
    assert t.dtype == np.float64 and v.dtype == np.float64 and v.shape == (60, 4)
    np.testing.assert_array_equal(t, c["t0"].astype(np.float64) / 1e6)
    np.testing.assert_array_equal(v[:, :3], c["acc0"].astype(np.float64))
    np.testing.assert_array_equal(v[:, 3], c["temp0"].astype(np.float64))

    # Default channels: the signals, not timestamp_sample or device_id.
    t, v, names = logs.read_ulog_topic(c["path"], "sensor_accel")
    assert names == ["accelerometer_m_s2[0]", "accelerometer_m_s2[1]", "accelerometer_m_s2[2]", "temperature"]
    # Bookkeeping fields still come when asked for by name.
    _, v, names = logs.read_ulog_topic(c["path"], "sensor_accel", ["device_id", "timestamp_sample"])
    np.testing.assert_array_equal(v[:, 0], 0xA0)
    np.testing.assert_array_equal(v[:, 1], (c["t0"] - 300).astype(np.float64))

    t, v, names = logs.read_ulog_topic(c["path"], "sensor_accel", ["accelerometer_m_s2[2]"])
    assert names == ["accelerometer_m_s2[2]"]
    np.testing.assert_array_equal(v[:, 0], c["acc0"][:, 2].astype(np.float64))


def test_ulog_second_instance_and_timestamp_sample(ulog_case):
    c = ulog_case
    t, v, names = logs.read_ulog_topic(c["path"], "sensor_accel", ["accelerometer_m_s2"], instance=1,
                                       time_field="timestamp_sample")
    np.testing.assert_array_equal(t, (c["t1"] - 250).astype(np.float64) / 1e6)
    np.testing.assert_array_equal(v, c["acc1"].astype(np.float64))
    # A topic without timestamp_sample keeps its timestamp.
    t, _, _ = logs.read_ulog_topic(c["path"], "wheel_odom", ["velocity"], time_field="timestamp_sample")
    np.testing.assert_array_equal(t, c["t_odom"].astype(np.float64) / 1e6)


def test_ulog_nested_type_default_fields_and_agreement_with_pyulog(ulog_case):
    from pyulog import ULog

    c = ulog_case
    t, v, names = logs.read_ulog_topic(c["path"], "wheel_odom")
    assert names == ["velocity.x", "velocity.y", "velocity.z", "ticks[0]", "ticks[1]"]
    np.testing.assert_array_equal(v[:, :3], c["vel"].astype(np.float64))
    np.testing.assert_array_equal(v[:, 3:], c["ticks"].astype(np.float64))
    ref = ULog(str(c["path"])).get_dataset("battery_status").data
    t, v, names = logs.read_ulog_topic(c["path"], "battery_status")
    assert names == ["voltage_v", "cell_count", "current_a"]
    np.testing.assert_array_equal(v, np.column_stack([ref[n].astype(np.float64) for n in names]))
    np.testing.assert_array_equal(v[:, 1], 6.0)
    np.testing.assert_array_equal(t, c["t_bat"].astype(np.float64) / 1e6)


def test_ulog_dropout(ulog_case):
    c = ulog_case
    drops = logs.ulog_dropouts(c["path"])
    assert drops == [(c["drop_t"] / 1e6, 0.12)]
    # The gap is really in the data: the accel stamps jump by more than the dropout right after it.
    t, _, _ = logs.read_ulog_topic(c["path"], "sensor_accel", ["temperature"])
    assert np.diff(t)[30] > 0.12


def test_ulog_missing_topic_field_instance_list_what_the_file_has(ulog_case):
    p = ulog_case["path"]
    with pytest.raises(InputError) as e:
        logs.read_ulog_topic(p, "vehicle_gps_position")
    assert "sensor_accel" in str(e.value) and "wheel_odom" in str(e.value) and e.value.file == str(p)
    with pytest.raises(InputError) as e:
        logs.read_ulog_topic(p, "sensor_accel", ["gyro_rad"])
    assert "accelerometer_m_s2[0]" in str(e.value) and "gyro_rad" in e.value.field
    with pytest.raises(InputError) as e:
        logs.read_ulog_topic(p, "sensor_accel", instance=3)
    assert "[0, 1]" in str(e.value)


def test_ulog_corrupt_or_not_a_ulog(tmp_path, ulog_case):
    bad = tmp_path / "bad.ulg"
    bad.write_bytes(b"NotULog" + bytes(40))
    with pytest.raises(InputError, match="ULog"):
        logs.list_ulog_topics(bad)
    short = tmp_path / "short.ulg"
    short.write_bytes(ULOG_MAGIC)
    with pytest.raises(InputError):
        logs.read_ulog_topic(short, "sensor_accel")
    with pytest.raises(InputError, match="no such file"):
        logs.read_ulog_topic(tmp_path / "absent.ulg", "sensor_accel")
    # A data message for a msg_id never added: pyulog flags corruption; strict by default, usable on request.
    corrupt = tmp_path / "corrupt.ulg"
    corrupt.write_bytes(ulog_case["path"].read_bytes() + _msg("D", struct.pack("<H", 77) + bytes(8)))
    with pytest.raises(InputError, match="corrupt"):
        logs.read_ulog_topic(corrupt, "sensor_accel")
    t, _, _ = logs.read_ulog_topic(corrupt, "sensor_accel", ["temperature"], allow_corrupt=True)
    assert len(t) == 60


# =============================================================================================== ROS 2 bags

TS = get_typestore(Stores.ROS2_HUMBLE)
T = TS.types
BASE_NS = 1_700_000_000 * 10**9  # epoch-scale stamps, as a real robot writes them
ZERO_STAMP_INDEX = 17


def _header(ns: int, frame: str = "base_link"):
    return T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](sec=ns // 10**9, nanosec=ns % 10**9),
                                    frame_id=frame)


def _smooth_rgb(h: int, w: int, k: int) -> np.ndarray:
    """A smooth colour field (JPEG-friendly) that differs per frame k."""
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    r = 128 + 100 * np.sin(xx / w * 2 * np.pi + k)
    g = 128 + 100 * np.cos(yy / h * 2 * np.pi - k)
    b = 64 + 2 * xx + k * 5
    return np.clip(np.stack([r, g, b], axis=-1), 0, 255).astype(np.uint8)


@pytest.fixture(scope="module", params=["mcap", "sqlite3"])
def bag_case(request, tmp_path_factory):
    storage = request.param
    rng = np.random.default_rng(RNG_SEED + (storage == "sqlite3"))
    path = tmp_path_factory.mktemp(f"bag_{storage}") / "run01"
    plugin = StoragePlugin.MCAP if storage == "mcap" else StoragePlugin.SQLITE3

    n_imu = 120
    stamp_ns = BASE_NS + np.cumsum(rng.integers(4_000_000, 6_000_000, n_imu))  # jittery ~200 Hz
    recv_ns = stamp_ns + rng.integers(200_000, 3_000_000, n_imu)  # transport latency
    stamp_ns[ZERO_STAMP_INDEX] = 0  # a driver that never set the stamp
    gyro = rng.normal(0, 0.2, (n_imu, 3))
    accel = rng.normal(0, 1.0, (n_imu, 3)) + [0, 0, 9.81]
    quat = rng.normal(0, 1, (n_imu, 4))
    quat /= np.linalg.norm(quat, axis=1, keepdims=True)
    ocov = rng.uniform(0, 1, (n_imu, 9))

    n_bat = 8
    bat_ns = BASE_NS + np.arange(1, n_bat + 1) * 50_000_000
    volt = rng.uniform(22, 25, n_bat).astype(np.float32)
    cur = rng.uniform(-5, 5, n_bat).astype(np.float32)

    n_vec = 10
    vec_ns = BASE_NS + np.arange(1, n_vec + 1) * 30_000_000
    vec = rng.normal(0, 1, (n_vec, 3))

    # 15 fps camera, stamps exactly k/15 s (rounded to ns) after the base, so 5 Hz sampling takes every 3rd frame.
    n_img, h, w = 12, 24, 32
    img_ns = BASE_NS + np.round(np.arange(n_img) * 1e9 / 15).astype(np.int64)
    frames = [_smooth_rgb(h, w, k) for k in range(n_img)]
    jpeg_bytes = []

    with Writer(path, version=9, storage_plugin=plugin) as wr:
        c_imu = wr.add_connection("/imu", "sensor_msgs/msg/Imu", typestore=TS)
        c_bat = wr.add_connection("/battery", "sensor_msgs/msg/BatteryState", typestore=TS)
        c_vec = wr.add_connection("/wheel/velocity", "geometry_msgs/msg/Vector3Stamped", typestore=TS)
        c_rgb = wr.add_connection("/cam/rgb", "sensor_msgs/msg/Image", typestore=TS)
        c_bgr = wr.add_connection("/cam/bgr", "sensor_msgs/msg/Image", typestore=TS)
        c_mono = wr.add_connection("/cam/mono", "sensor_msgs/msg/Image", typestore=TS)
        c_jpg = wr.add_connection("/cam/compressed", "sensor_msgs/msg/CompressedImage", typestore=TS)
        V3, Q = T["geometry_msgs/msg/Vector3"], T["geometry_msgs/msg/Quaternion"]
        for i in range(n_imu):
            m = T["sensor_msgs/msg/Imu"](
                header=_header(int(stamp_ns[i])), orientation=Q(*quat[i]), orientation_covariance=ocov[i],
                angular_velocity=V3(*gyro[i]), angular_velocity_covariance=np.zeros(9),
                linear_acceleration=V3(*accel[i]), linear_acceleration_covariance=np.zeros(9))
            wr.write(c_imu, int(recv_ns[i]), TS.serialize_cdr(m, c_imu.msgtype))
        for i in range(n_bat):
            m = T["sensor_msgs/msg/BatteryState"](
                header=_header(int(bat_ns[i])), voltage=float(volt[i]), temperature=31.5, current=float(cur[i]),
                charge=10.0, capacity=20.0, design_capacity=22.0, percentage=0.5, power_supply_status=2,
                power_supply_health=1, power_supply_technology=3, present=True,
                cell_voltage=np.full(6, volt[i] / 6, np.float32), cell_temperature=np.zeros(6, np.float32),
                location="bay", serial_number="R-17")
            wr.write(c_bat, int(bat_ns[i]) + 1000, TS.serialize_cdr(m, c_bat.msgtype))
        for i in range(n_vec):
            m = T["geometry_msgs/msg/Vector3Stamped"](header=_header(int(vec_ns[i])), vector=V3(*vec[i]))
            wr.write(c_vec, int(vec_ns[i]) + 500, TS.serialize_cdr(m, c_vec.msgtype))
        Image, CImage = T["sensor_msgs/msg/Image"], T["sensor_msgs/msg/CompressedImage"]
        pad = 8  # row padding: step > width * 3, as some drivers align rows
        for k, f in enumerate(frames):
            ns = int(img_ns[k])
            rows = np.zeros((h, w * 3 + pad), np.uint8)
            rows[:, : w * 3] = f.reshape(h, w * 3)
            wr.write(c_rgb, ns, TS.serialize_cdr(Image(header=_header(ns), height=h, width=w, encoding="rgb8",
                                                       is_bigendian=0, step=w * 3 + pad, data=rows.ravel()),
                                                 c_rgb.msgtype))
            bgr = np.ascontiguousarray(f[..., ::-1])
            wr.write(c_bgr, ns, TS.serialize_cdr(Image(header=_header(ns), height=h, width=w, encoding="bgr8",
                                                       is_bigendian=0, step=w * 3, data=bgr.ravel()),
                                                 c_bgr.msgtype))
            gray = f[..., 1]
            wr.write(c_mono, ns, TS.serialize_cdr(Image(header=_header(ns), height=h, width=w, encoding="mono8",
                                                        is_bigendian=0, step=w, data=gray.ravel()),
                                                  c_mono.msgtype))
            buf = io.BytesIO()
            PILImage.fromarray(f).save(buf, format="JPEG", quality=95)
            jpeg_bytes.append(buf.getvalue())
            wr.write(c_jpg, ns, TS.serialize_cdr(CImage(header=_header(ns), format="jpeg",
                                                        data=np.frombuffer(buf.getvalue(), np.uint8)),
                                                 c_jpg.msgtype))
    return dict(storage=storage, path=path, stamp_ns=stamp_ns, recv_ns=recv_ns, gyro=gyro, accel=accel, quat=quat,
                ocov=ocov, bat_ns=bat_ns, volt=volt, cur=cur, vec_ns=vec_ns, vec=vec, img_ns=img_ns, frames=frames,
                jpeg_bytes=jpeg_bytes)


def _secs(ns_values) -> np.ndarray:
    # Python int / int is correctly rounded: the float64 nearest the exact stamp.
    return np.array([int(n) / 10**9 for n in ns_values], np.float64)


def test_bag_discovery_and_topics(bag_case):
    p = bag_case["path"]
    assert logs.log_kind(p) == "rosbag" and logs.is_log_file(p)
    assert logs.find_logs(p) == [p]
    assert logs.find_logs(p.parent) == [p]
    topics = logs.list_bag_topics(p)
    assert topics["/imu"] == {"msgtype": "sensor_msgs/msg/Imu", "count": 120}
    assert topics["/cam/compressed"] == {"msgtype": "sensor_msgs/msg/CompressedImage", "count": 12}
    assert set(topics) == {"/imu", "/battery", "/wheel/velocity", "/cam/rgb", "/cam/bgr", "/cam/mono",
                           "/cam/compressed"}


def test_bag_imu_default_channels_header_stamps_and_zero_stamp_fallback(bag_case):
    c = bag_case
    t, v, names = logs.read_bag_topic(c["path"], "/imu")
    assert names == ["angular_velocity.x", "angular_velocity.y", "angular_velocity.z",
                     "linear_acceleration.x", "linear_acceleration.y", "linear_acceleration.z"]
    assert t.dtype == np.float64 and v.shape == (120, 6)
    expected_ns = c["stamp_ns"].copy()
    expected_ns[ZERO_STAMP_INDEX] = c["recv_ns"][ZERO_STAMP_INDEX]
    np.testing.assert_array_equal(t, _secs(expected_ns))
    np.testing.assert_array_equal(v, np.hstack([c["gyro"], c["accel"]]))
    # Agrees with the brief's sec + nanosec * 1e-9 to within float64 resolution at epoch scale (2**-22 s ~ 0.24 us).
    sec, nsec = expected_ns // 10**9, expected_ns % 10**9
    assert np.max(np.abs(t - (sec + nsec * 1e-9))) <= 2.0**-22


def test_bag_receive_stamps_and_orientation_on_request(bag_case):
    c = bag_case
    t, v, names = logs.read_bag_topic(c["path"], "/imu", ["orientation", "orientation_covariance[4]"],
                                      stamp="receive")
    assert names == ["orientation.x", "orientation.y", "orientation.z", "orientation.w", "orientation_covariance[4]"]
    np.testing.assert_array_equal(t, _secs(c["recv_ns"]))
    np.testing.assert_array_equal(v[:, :4], c["quat"])
    np.testing.assert_array_equal(v[:, 4], c["ocov"][:, 4])


def test_bag_generic_numeric_messages(bag_case):
    c = bag_case
    t, v, names = logs.read_bag_topic(c["path"], "/wheel/velocity")
    assert names == ["vector.x", "vector.y", "vector.z"]
    np.testing.assert_array_equal(t, _secs(c["vec_ns"]))
    np.testing.assert_array_equal(v, c["vec"])

    t, v, names = logs.read_bag_topic(c["path"], "/battery")
    # Strings and variable-length sequences (cell_voltage) are not fixed channels; bool counts as 0/1.
    assert names == ["voltage", "temperature", "current", "charge", "capacity", "design_capacity", "percentage",
                     "power_supply_status", "power_supply_health", "power_supply_technology", "present"]
    np.testing.assert_array_equal(t, _secs(c["bat_ns"]))
    np.testing.assert_array_equal(v[:, 0], c["volt"].astype(np.float64))
    np.testing.assert_array_equal(v[:, 2], c["cur"].astype(np.float64))
    np.testing.assert_array_equal(v[:, 7:], np.tile([2.0, 1.0, 3.0, 1.0], (8, 1)))


def test_bag_single_storage_file(bag_case):
    c = bag_case
    suffix = ".mcap" if c["storage"] == "mcap" else ".db3"
    files = sorted(c["path"].glob(f"*{suffix}"))
    assert len(files) == 1 and logs.log_kind(files[0]) == "rosbag"
    t, v, _ = logs.read_bag_topic(files[0], "/wheel/velocity")
    np.testing.assert_array_equal(t, _secs(c["vec_ns"]))
    np.testing.assert_array_equal(v, c["vec"])


def test_bag_raw_images_exact(bag_case):
    c = bag_case
    for topic in ("/cam/rgb", "/cam/bgr"):
        got = list(logs.iter_bag_images(c["path"], topic, sample_hz=100.0))  # faster than the camera: all frames
        assert [t for t, _ in got] == list(_secs(c["img_ns"]))
        for (_, im), f in zip(got, c["frames"]):
            assert im.dtype == np.uint8 and im.shape == f.shape
            np.testing.assert_array_equal(im, f)
    got = list(logs.iter_bag_images(c["path"], "/cam/mono", sample_hz=100.0))
    for (_, im), f in zip(got, c["frames"]):
        np.testing.assert_array_equal(im, np.repeat(f[..., 1:2], 3, axis=2))


def test_bag_image_sampling_takes_one_frame_per_interval(bag_case):
    c = bag_case
    got = list(logs.iter_bag_images(c["path"], "/cam/rgb", sample_hz=5.0))
    # Stamps k/15 s: the 0.2 s bins start at frames 0, 3, 6, 9 (worked out by hand from the stamps).
    assert [t for t, _ in got] == list(_secs(c["img_ns"][[0, 3, 6, 9]]))
    for (_, im), k in zip(got, [0, 3, 6, 9]):
        np.testing.assert_array_equal(im, c["frames"][k])


def test_bag_compressed_jpeg(bag_case):
    c = bag_case
    got = list(logs.iter_bag_images(c["path"], "/cam/compressed", sample_hz=100.0))
    assert [t for t, _ in got] == list(_secs(c["img_ns"]))
    for (_, im), f, raw in zip(got, c["frames"], c["jpeg_bytes"]):
        # Transport is lossless: identical to decoding the bytes we stored.
        with PILImage.open(io.BytesIO(raw)) as ref:
            np.testing.assert_array_equal(im, np.asarray(ref.convert("RGB")))
        # Against the source frame: JPEG at quality 95 with 4:2:0 chroma subsampling on a smooth field loses
        # little; PSNR above 35 dB is the usual "visually lossless" bar (common practice). A channel swap
        # (BGR vs RGB) would fall far below it.
        mse = np.mean((im.astype(np.float64) - f.astype(np.float64)) ** 2)
        assert 10 * np.log10(255.0**2 / mse) > 35.0


def test_bag_missing_topic_and_field_list_what_the_bag_has(bag_case):
    p = bag_case["path"]
    with pytest.raises(InputError) as e:
        logs.read_bag_topic(p, "/gps/fix")
    assert "/imu" in str(e.value) and "/battery" in str(e.value)
    with pytest.raises(InputError) as e:
        logs.read_bag_topic(p, "/imu", ["magnetic_field"])
    assert "linear_acceleration.z" in str(e.value) and "magnetic_field" in e.value.field
    with pytest.raises(InputError, match="Image"):
        list(logs.iter_bag_images(p, "/imu", 5.0))
    with pytest.raises(InputError, match="stamp"):
        logs.read_bag_topic(p, "/imu", stamp="sensor")


def test_bag_unreadable(tmp_path):
    junk = tmp_path / "junk.mcap"
    junk.write_bytes(b"\x00" * 64)
    with pytest.raises(InputError) as e:
        logs.list_bag_topics(junk)
    assert e.value.file == str(junk)
    folder = tmp_path / "bag"
    folder.mkdir()
    (folder / "metadata.yaml").write_text("rosbag2_bagfile_information: [not, a, bag")
    with pytest.raises(InputError):
        logs.read_bag_topic(folder, "/imu")
    with pytest.raises(InputError):
        logs.list_bag_topics(tmp_path / "nothing_here")
    assert logs.log_kind(tmp_path) is None and not logs.is_log_file(tmp_path / "imu.csv")


def test_bag_truncated_storage_file(bag_case, tmp_path):
    # A storage file cut in half (a recorder killed mid-write): rosbags needs the MCAP footer / an intact sqlite
    # database, so the bag is reported unreadable rather than read partly.
    src = next(p for p in bag_case["path"].iterdir() if p.suffix in (".mcap", ".db3"))
    cut = tmp_path / f"cut{src.suffix}"
    cut.write_bytes(src.read_bytes()[: src.stat().st_size // 2])
    with pytest.raises(InputError, match="readable"):
        logs.read_bag_topic(cut, "/imu")


# =============================================================================================== demo -> bag

@pytest.fixture(scope="module")
def demo_recording(tmp_path_factory):
    import av
    import pandas as pd

    d = tmp_path_factory.mktemp("rec") / "rover_07_aisle4"
    d.mkdir()
    rng = np.random.default_rng(RNG_SEED)
    t = 0.3 + np.cumsum(rng.uniform(0.004, 0.006, 300))
    df = pd.DataFrame({"t": t, "ax": rng.normal(0, 1, 300), "ay": rng.normal(0, 1, 300),
                       "az": 9.81 + rng.normal(0, 1, 300), "gx": rng.normal(0, .1, 300),
                       "gy": rng.normal(0, .1, 300), "gz": rng.normal(0, .1, 300)})
    df.to_csv(d / "imu.csv", index=False)
    with av.open(str(d / "camera.mp4"), "w") as out:
        s = out.add_stream("mpeg4", rate=15)
        s.width, s.height, s.pix_fmt = 64, 48, "yuv420p"
        for k in range(20):
            fr = av.VideoFrame.from_ndarray(_smooth_rgb(48, 64, k), format="rgb24")
            for pkt in s.encode(fr):
                out.mux(pkt)
        for pkt in s.encode():
            out.mux(pkt)
    return d, df


@pytest.mark.parametrize("storage", ["mcap", "sqlite3"])
def test_recording_to_bag_round_trip(demo_recording, tmp_path, storage):
    import av

    from fleetsift.demo.bag import recording_to_bag

    d, df = demo_recording
    bag = recording_to_bag(d, tmp_path / "bag", storage=storage, image_hz=5.0)
    assert logs.log_kind(bag) == "rosbag"
    t, v, names = logs.read_bag_topic(bag, "/imu")
    np.testing.assert_allclose(v, df[["gx", "gy", "gz", "ax", "ay", "az"]].to_numpy(), rtol=1e-12)  # CSV parse: last digit
    # ROS time is integer nanoseconds: the CSV seconds come back within half a nanosecond (plus float rounding).
    np.testing.assert_allclose(t, df["t"].to_numpy(), rtol=0, atol=1e-9)

    with av.open(str(d / "camera.mp4")) as c:
        s = c.streams.video[0]
        decoded = [(float(f.pts * s.time_base), f.to_ndarray(format="rgb24")) for f in c.decode(s)]
    got = list(logs.iter_bag_images(bag, "/camera/image/compressed", sample_hz=100.0))
    # 15 fps written at 5 Hz: every third frame, stamped with its pts.
    want = decoded[::3]
    assert len(got) == len(want) == 7
    for (tg, im), (tw, ref) in zip(got, want):
        assert abs(tg - tw) <= 1e-9
        mse = np.mean((im.astype(np.float64) - ref.astype(np.float64)) ** 2)
        assert 10 * np.log10(255.0**2 / mse) > 30.0  # JPEG q90 of a decoded frame, smooth content (common practice)


def test_ulog_recording_through_the_table_stage(ulog_case, tmp_path):
    # A recording folder holding one ULog file: the table stage reads the topic, and the common clock holds the
    # log's samples (outside reference: numpy.interp on the arrays the file was written from).
    import shutil

    from fleetsift.profile import parse_profile
    from fleetsift.tasks import stages

    rec = tmp_path / "inbox" / "flight-01"
    rec.mkdir(parents=True)
    shutil.copy(ulog_case["path"], rec / "flight.ulg")
    prof = parse_profile('[windowing]\nrate_hz = 200.0\n[streams.accel]\nkind = "table"\nfile = "*.ulg"\n'
                         'topic = "sensor_accel"\nchannels = ["accelerometer_m_s2"]\n')
    out = stages.run_tables(str(rec), prof, str(tmp_path / "store"))
    assert out["status"] == "ok", out
    arr = stages.Store.load_arrays(out["path"])
    assert out["channels"] == ["accelerometer_m_s2[0]", "accelerometer_m_s2[1]", "accelerometer_m_s2[2]"]
    t_src = ulog_case["t0"].astype(float) / 1e6
    t_abs = arr["t"] + out["t0"]
    for j in range(3):
        np.testing.assert_allclose(arr["values"][:, j], np.interp(t_abs, t_src, ulog_case["acc0"][:, j]), atol=1e-5)


def test_ulog_fields_named_by_channels_calibration_checked_dropouts_kept(ulog_case, tmp_path):
    from fleetsift.featurizers.recording import read_table_stream
    from fleetsift.profile import parse_profile

    rec = tmp_path / "rec"
    rec.mkdir()
    (rec / "flight.ulg").write_bytes(ulog_case["path"].read_bytes())

    def stream(extra: str):
        return parse_profile('[streams.accel]\nkind = "table"\nfile = "*.ulg"\ntopic = "sensor_accel"\n'
                             'fields = ["accelerometer_m_s2"]\n' + extra).streams["accel"]

    tb = read_table_stream(rec, stream('channels = ["ax", "ay", "az"]\ncalibration.az = { bias = -9.81 }\n'))
    assert tb.channels == ["ax", "ay", "az"]
    np.testing.assert_allclose(tb.values[:, 2], ulog_case["acc0"][:, 2].astype(np.float64) + 9.81, atol=1e-9)
    # The log's dropout is kept as a gap of the stream (pyulog's reading of the 'O' message) and counted.
    d0 = ulog_case["drop_t"] / 1e6
    assert tb.gaps == [(d0, d0 + 0.12)] and tb.repairs["logging_dropouts"] == 1
    with pytest.raises(InputError) as e:
        read_table_stream(rec, stream('channels = ["ax", "ay"]\n'))
    assert e.value.field == "streams.accel.channels"
    assert "accelerometer_m_s2[2]" in str(e.value) and "['ax', 'ay']" in str(e.value)
    with pytest.raises(InputError) as e:
        read_table_stream(rec, stream('calibration.ax = { bias = 1.0 }\n'))
    assert e.value.field == "streams.accel.calibration.ax" and "accelerometer_m_s2[0]" in str(e.value)
