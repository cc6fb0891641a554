"""The storage layer on a real S3-compatible server (moto's standalone server in a child process, tests/s3server.py):
objects, the store's Delta tables, the lock object, the [storage] profile section, streaming video reads.

The end-to-end nights against a bucket (scores equal to a local run's, warm nights, two nights at once, kill -9,
a Dask cluster) are in tests/test_bucket_nights.py.
"""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from s3server import start_s3_server

from fleetsift.errors import StoreLockedError
from fleetsift.profile import Storage, parse_profile


@pytest.fixture(scope="module")
def s3(tmp_path_factory):
    server = start_s3_server(tmp_path_factory.mktemp("moto") / "moto.log")
    yield server
    server.stop()


@pytest.fixture
def aws_env(s3, monkeypatch):
    for k, v in s3.env().items():
        monkeypatch.setenv(k, v)
    return s3


_N = 0


@pytest.fixture
def bucket(aws_env):
    global _N
    _N += 1
    return aws_env.bucket(f"fleet-{_N}-{int(time.time() * 1000) % 100000}")


# --- objects ----------------------------------------------------------------------------------------------------------

def test_object_paths_list_read_and_sign(aws_env, bucket):
    from fleetsift.location import ObjectPath, location

    root = location(f"s3://{bucket}/inbox")
    assert isinstance(root, ObjectPath) and str(root) == f"s3://{bucket}/inbox"
    (root / "rec-a" / "imu.csv").write_bytes(b"t,ax\n0,1\n")
    (root / "rec-a" / "cam.mp4").write_bytes(b"x" * 10)
    (root / "rec-b" / "imu.csv").write_bytes(b"t,ax\n0,2\n")
    assert sorted(p.name for p in root.iterdir()) == ["rec-a", "rec-b"]
    assert all(p.is_dir() for p in root.iterdir())
    rec = root / "rec-a"
    assert [p.name for p in rec.glob("*.csv")] == ["imu.csv"]
    assert (rec / "imu.csv").is_file() and not (rec / "gone.csv").exists()
    assert (rec / "imu.csv").read_bytes() == b"t,ax\n0,1\n"
    # The signature (size, ETag) follows the content: re-uploading other bytes changes it, the same bytes do not.
    sig = location(str(rec / "imu.csv")).signature()
    (rec / "imu.csv").write_bytes(b"t,ax\n0,1\n")
    assert location(str(rec / "imu.csv")).signature() == sig
    (rec / "imu.csv").write_bytes(b"t,ax\n0,9\n")
    assert location(str(rec / "imu.csv")).signature() != sig
    # file:// URLs and plain paths stay local paths.
    assert location("file:///tmp/x") == Path("/tmp/x") and location("/tmp/x") == Path("/tmp/x")


def test_store_tables_and_arrays_on_a_bucket(aws_env, bucket, tmp_path):
    """Delta tables through deltalake's object store (conditional-put commits), arrays and content hashes as
    objects; the same content hash as a local copy of the file."""
    from fleetsift.location import delta_options
    from fleetsift.store import Store

    st = Store(f"s3://{bucket}/store").init()
    assert st.remote and delta_options("s3", Storage())["aws_conditional_put"] == "etag"
    rows = pd.DataFrame({"run_id": "r1", "recording_id": ["a", "b"], "content_hash": "h", "duration_s": 1.0,
                         "status": "scored", "reason": ""})
    v = st.append("recordings", rows)
    assert v == 0 and st.append("recordings", rows) is None  # a retried append is a no-op
    assert sorted(st.read("recordings")["recording_id"]) == ["a", "b"]
    assert st.orphan_runs() == {"recordings": {"r1"}}
    assert st.remove_orphans() == {"recordings": 2} and st.read("recordings").empty
    assert st.version("recordings") == 1  # the deletion is one more version: time travel keeps the rows
    assert len(st.read("recordings", version=0)) == 2

    p = st.cache_path("tables", "k1")
    st.save_arrays(p, x=np.arange(5.0))
    assert np.array_equal(Store.load_arrays(str(p))["x"], np.arange(5.0))

    local = tmp_path / "blob.bin"
    local.write_bytes(bytes(range(256)) * 1000)
    (st.root.parent / "blob.bin").write_bytes(local.read_bytes())
    remote_hash = st.file_hash(str(st.root.parent / "blob.bin"))
    assert remote_hash == Store(tmp_path / "local-store").file_hash(local)
    catalog = json.loads((st.root / "catalog.json").read_text())
    assert catalog[str(st.root.parent / "blob.bin")]["sha256"] == remote_hash


def test_video_streams_from_a_bucket_frame_for_frame(aws_env, bucket, tmp_path, monkeypatch):
    """PyAV decodes an object through a file-like object in ranged reads (a read-ahead block far smaller than the
    file here), giving the same frames at the same timestamps as the local file."""
    from fleetsift.demo.video import write_video
    from fleetsift.featurizers import video
    from fleetsift import location as loc

    rng = np.random.default_rng(3)
    frames = [rng.integers(0, 255, (48, 64, 3), dtype=np.uint8) for _ in range(40)]
    src = tmp_path / "cam.mp4"
    write_video(src, frames, fps=15)
    obj = loc.location(f"s3://{bucket}/v/cam.mp4")
    obj.write_bytes(src.read_bytes())
    monkeypatch.setattr(loc, "BLOCK_SIZE", 1024)
    assert src.stat().st_size > 20 * 1024
    here = list(video.iter_frames(src, 5.0))
    there = list(video.iter_frames(str(obj), 5.0))
    assert [t for t, _ in there] == [t for t, _ in here] and len(here) >= 10
    assert all(np.array_equal(a, b) for (_, a), (_, b) in zip(here, there))
    assert video.probe_video(str(obj))["width"] == 64


# --- the lock object ----------------------------------------------------------------------------------------------------

def test_lock_object_refuses_a_second_writer_and_is_released(aws_env, bucket):
    from fleetsift.store import Store

    st = Store(f"s3://{bucket}/store").init()
    with st.lock():
        info = json.loads((st.root / ".lock").read_text())
        assert "pid" in info["holder"] and info["expires_at"] > time.time()
        with pytest.raises(StoreLockedError, match="being written by .*pid"):
            with Store(f"s3://{bucket}/store").lock(wait_s=0.5):
                pass
    assert not (st.root / ".lock").exists()
    with st.lock():  # free again
        pass


def test_a_waiting_writer_gets_the_lock_when_it_is_released(aws_env, bucket):
    from fleetsift.store import Store

    order = []
    st = Store(f"s3://{bucket}/store").init()

    def second():
        with Store(f"s3://{bucket}/store").lock(wait_s=30):
            order.append(("second", time.time()))

    with st.lock():
        t = threading.Thread(target=second)
        t.start()
        time.sleep(1.5)
        order.append(("first releases", time.time()))
    t.join(30)
    assert [o[0] for o in order] == ["first releases", "second"]


def test_stale_lock_is_taken_over_after_expiry_and_the_loser_cannot_write(aws_env, bucket):
    """A killed night's lock (never renewed) expires; the next night takes it over, and a holder that lost its lock
    is refused at its next table write."""
    from fleetsift.location import location
    from fleetsift.objectlock import ObjectLock, _HELD
    from fleetsift.store import Store

    path = location(f"s3://{bucket}/store/.lock")
    dead = ObjectLock(path, ttl_s=1.0)
    dead.acquire(0)  # acquired, then "killed": no renewal, no release
    with pytest.raises(StoreLockedError):
        ObjectLock(path, ttl_s=1.0).acquire(0)
    _HELD[str(path)] = dead  # as if this process were the killed night, still running
    time.sleep(1.2)
    taker = ObjectLock(path, ttl_s=30.0)
    taker.acquire(5)
    assert json.loads(path.read_text())["holder"] == taker.holder
    # The old holder's renewal now fails its If-Match: it marks itself lost, and its writes are refused.
    dead._stop.clear()
    dead.ttl_s = 0.03
    dead._renew()
    assert dead.lost == taker.holder
    st = Store(f"s3://{bucket}/store")
    df = pd.DataFrame({"run_id": "r9", "recording_id": ["a"], "content_hash": "h", "duration_s": 1.0,
                       "status": "scored", "reason": ""})
    with pytest.raises(StoreLockedError, match="taken over"):
        st.append("recordings", df)
    _HELD.pop(str(path))
    taker.release()
    assert not path.exists()


def test_lock_ttl_comes_from_the_storage_section(aws_env, bucket):
    from fleetsift.store import Store

    st = Store(f"s3://{bucket}/ttl", Storage(lock_ttl_s=42.0)).init()
    with st.lock():
        info = json.loads((st.root / ".lock").read_text())
    assert 41.0 < info["expires_at"] - info["acquired_at"] < 43.0


# --- the [storage] section ----------------------------------------------------------------------------------------------

def test_storage_section_parses_and_refuses_bad_values():
    base = '[streams.imu]\nkind = "table"\nfile = "imu.csv"\ntime_column = "t"\nchannels = ["ax"]\n'
    p = parse_profile(base + '[storage]\nendpoint_url = "http://127.0.0.1:9"\nregion = "eu-west-1"\n'
                             'anonymous = true\nlock_ttl_s = 60\n')
    assert p.storage == Storage(endpoint_url="http://127.0.0.1:9", region="eu-west-1", anonymous=True,
                                lock_ttl_s=60.0)
    assert parse_profile(base).storage == Storage()
    assert p.digest() == parse_profile(base).digest()  # where the data lives never changes a score
    from fleetsift.errors import ProfileError

    with pytest.raises(ProfileError, match="storage.endpoint_url"):
        parse_profile(base + '[storage]\nendpoint_url = "127.0.0.1:9000"\n')
    with pytest.raises(ProfileError, match="storage.bucket"):
        parse_profile(base + '[storage]\nbucket = "x"\n')


def test_storage_endpoint_from_the_profile_reaches_every_client(s3, monkeypatch):
    """No AWS_ENDPOINT_URL in the environment: only [storage] endpoint_url points s3fs, deltalake and the lock at
    the server (ignored, they would try AWS itself, which this machine cannot reach)."""
    for k, v in s3.env().items():
        monkeypatch.setenv(k, v)
    monkeypatch.delenv("AWS_ENDPOINT_URL")
    bucket = s3.bucket(f"endpoint-{int(time.time() * 1000) % 100000}")
    from fleetsift.store import Store

    st = Store(f"s3://{bucket}/store", Storage(endpoint_url=s3.endpoint)).init()
    with st.lock(wait_s=5):
        st.append("recordings", pd.DataFrame({"run_id": "r1", "recording_id": ["a"], "content_hash": "h",
                                              "duration_s": 1.0, "status": "scored", "reason": ""}))
        st.save_arrays(st.cache_path("tables", "k"), x=np.zeros(2))
    assert f"store/recordings/_delta_log/00000000000000000000.json" in s3.keys(bucket)
    assert "store/cache/tables/k.npz" in s3.keys(bucket)


def test_storage_anonymous_and_region_reach_the_clients(s3, monkeypatch):
    """anonymous = true sends unsigned requests: with no credentials anywhere, reads still work (ignored, botocore
    would stop at 'Unable to locate credentials'). region reaches s3fs, delta-rs and the lock's client."""
    from fleetsift.location import delta_options, fsspec_options, location

    bucket = s3.bucket(f"public-{int(time.time() * 1000) % 100000}")
    s3.client().put_object(Bucket=bucket, Key="inbox/rec/imu.csv", Body=b"t,ax\n0,1\n", ACL="public-read")
    for k, v in s3.env().items():
        monkeypatch.setenv(k, v)
    for k in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY"):
        monkeypatch.delenv(k)
    monkeypatch.setenv("AWS_SHARED_CREDENTIALS_FILE", "/nonexistent")
    monkeypatch.setenv("AWS_CONFIG_FILE", "/nonexistent")
    signed = location(f"s3://{bucket}/inbox/rec/imu.csv", Storage(region="us-east-1"))
    with pytest.raises(Exception, match="credentials|Credentials"):
        signed.read_bytes()
    rec = location(f"s3://{bucket}/inbox/rec", Storage(anonymous=True))
    assert (rec / "imu.csv").read_bytes() == b"t,ax\n0,1\n"
    assert delta_options("s3", Storage(anonymous=True))["aws_skip_signature"] == "true"
    assert fsspec_options("s3", Storage(region="eu-west-1"))["client_kwargs"] == {"region_name": "eu-west-1"}
    assert delta_options("s3", Storage(region="eu-west-1"))["aws_region"] == "eu-west-1"
    from fleetsift.objectlock import _s3_client

    assert _s3_client(location(f"s3://{bucket}/x", Storage(region="eu-west-1"))).meta.region_name == "eu-west-1"


def test_a_log_on_object_storage_is_refused_by_name(aws_env, bucket):
    """ULog files and ROS 2 bags are read from local folders only: a clear error naming the file and the field."""
    from fleetsift.errors import InputError
    from fleetsift.featurizers import recording
    from fleetsift.location import location

    rec = location(f"s3://{bucket}/inbox/rec")
    (rec / "flight.ulg").write_bytes(b"ULog\x01\x12\x35")
    prof = parse_profile('[streams.imu]\nkind = "table"\nfile = "flight.ulg"\ntopic = "sensor_combined"\n')
    with pytest.raises(InputError, match=r"flight.ulg.*streams.imu.file.*local folders only"):
        recording.read_table_stream(rec, prof.streams["imu"])
