"""Nights against a bucket: the demo fleet uploaded to a real S3-compatible server (moto's standalone server in a
child process, tests/s3server.py), inbox and store both on it, every run the `fleetsift` CLI in a child process.

Shown here: the same window scores as a local run (first night and the warm second night that scores against the
history read from the bucket), an IMU profile change re-running only tables and scores, two nights at once never
interleaving (one waits, one refuses with exit 4), a night killed with kill -9 mid-write and rerun (the stale lock
object taken over after its expiry; no duplicate or missing rows), and a Dask LocalCluster of two worker processes
with different temporary folders reading the inbox from the bucket.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from cli_run import ROOT, cli_env
from s3server import start_s3_server

pytestmark = [pytest.mark.slow, pytest.mark.timeout(2400)]
N_REC = 3
TTL_PROFILE = "\n[storage]\nlock_ttl_s = 4.0\n"


@pytest.fixture(scope="module")
def s3(tmp_path_factory):
    server = start_s3_server(tmp_path_factory.mktemp("moto") / "moto.log")
    yield server
    server.stop()


def env_for(s3, **extra) -> dict:
    return cli_env(**s3.env(), **extra)


def cli(s3, *args, ok=(0,), timeout=900):
    p = subprocess.run([sys.executable, "-m", "fleetsift.flows.cli", *args], capture_output=True, text=True,
                       env=env_for(s3), cwd=ROOT, timeout=timeout)
    assert p.returncode in ok, f"exit {p.returncode}\n{p.stdout[-3000:]}\n{p.stderr[-4000:]}"
    # Credentials never reach the output.
    assert "fleetsift-test-secret" not in p.stdout + p.stderr
    return p


def run_json(s3, inbox: str, store: str, *extra) -> dict:
    return json.loads(cli(s3, "run", "--inbox", inbox, "--store", store, "--json", *extra).stdout)


def windows_of(store: str, run_id: str, s3=None) -> pd.DataFrame:
    from fleetsift.store import Store

    w = Store(store).read("windows", run_id=run_id)
    return w.sort_values(["recording_id", "metric", "window_index"]).reset_index(drop=True)


def assert_same_scores(a: pd.DataFrame, b: pd.DataFrame) -> None:
    assert len(a) == len(b) > 0
    for c in ("recording_id", "metric", "window_index", "flagged", "top_channels"):
        assert list(a[c]) == list(b[c]), c
    np.testing.assert_allclose(a["score"].to_numpy(float), b["score"].to_numpy(float), rtol=0, atol=1e-9)
    np.testing.assert_allclose(a["t_start_s"].to_numpy(float), b["t_start_s"].to_numpy(float), rtol=0, atol=1e-9)


@pytest.fixture
def aws(s3, monkeypatch):
    for k, v in s3.env().items():
        monkeypatch.setenv(k, v)
    return s3


@pytest.fixture(scope="module")
def local(demo_fleet, tmp_path_factory):
    """The local reference: two nights on the same three recordings, inbox and store on local disk."""
    from cli_run import run_json as local_run

    base = tmp_path_factory.mktemp("local")
    inbox = demo_fleet.copy(base / "inbox", demo_fleet.names[:N_REC])
    store = base / "store"
    first = local_run(inbox, store)
    second = local_run(inbox, store)
    return inbox, store, first, second


@pytest.fixture(scope="module")
def bucket_nights(s3, local):
    """The same inbox uploaded to a bucket, two nights with inbox and store there."""
    inbox_local = local[0]
    s3.bucket("fleet")
    inbox = s3.upload(inbox_local, "fleet", "inbox")
    store = "s3://fleet/store"
    first = run_json(s3, inbox, store)
    second = run_json(s3, inbox, store)
    return inbox, store, first, second


def test_bucket_night_scores_like_the_local_night(s3, aws, local, bucket_nights):
    _, lstore, lfirst, lsecond = local
    inbox, store, first, second = bucket_nights
    assert first["store"] == store and [r["status"] for r in first["recordings"]] == ["scored"] * N_REC
    assert first["stages"]["tables"]["computed"] == N_REC and first["stages"]["embed"]["computed"] == N_REC
    assert_same_scores(windows_of(str(lstore), lfirst["run_id"]), windows_of(store, first["run_id"]))
    # The recordings' content hashes are those of the local files (sha256 streamed once, kept by ETag).
    from fleetsift.store import Store

    lrec = Store(lstore).read("recordings", run_id=lfirst["run_id"]).sort_values("recording_id")
    rrec = Store(store).read("recordings", run_id=first["run_id"]).sort_values("recording_id")
    assert list(lrec["content_hash"]) == list(rrec["content_hash"])
    assert all(p.startswith(inbox + "/") for p in rrec["path"])
    keys = s3.keys("fleet", "store/")
    assert "store/runs/_delta_log/00000000000000000000.json" in keys
    assert any(k.startswith("store/cache/embed/") and k.endswith(".npz") for k in keys)
    assert any(k.startswith("store/baselines/") for k in keys) and "store/catalog.json" in keys
    assert f"store/reports/{first['run_id']}.html" in keys
    # Nothing of the run's process state (Prefect's database) and no credentials in the bucket.
    assert not any("prefect" in k for k in keys)
    for k in ("store/catalog.json", f"store/reports/{first['run_id']}.html"):
        body = s3.client().get_object(Bucket="fleet", Key=k)["Body"].read().decode()
        assert "fleetsift-test-secret" not in body and "fleetsift-test-key" not in body


def test_second_bucket_night_is_warm_and_scores_against_the_bucket_history(s3, aws, local, bucket_nights):
    _, lstore, lfirst, lsecond = local
    inbox, store, first, second = bucket_nights
    assert second["stages"]["tables"] == {"computed": 0, "reused": N_REC}
    assert second["stages"]["embed"] == {"computed": 0, "reused": N_REC}
    assert second["orchestrator"] == "none"  # nothing to read, decode or embed
    assert second["baseline"]["source"] == "history" and second["baseline"]["reference_runs"] == [first["run_id"]]
    # The history banks and reviews were read from the bucket: the same scores as the local second night.
    assert_same_scores(windows_of(str(lstore), lsecond["run_id"]), windows_of(store, second["run_id"]))


def test_imu_profile_change_reruns_only_tables_and_scores(s3, aws, bucket_nights):
    inbox, store, first, _ = bucket_nights
    c = s3.client()
    prof = c.get_object(Bucket="fleet", Key="inbox/profile.toml")["Body"].read().decode()
    changed = prof.replace("az = { bias = 0.0, scale = 1.0 }", "az = { bias = 0.3, scale = 1.0 }")
    assert changed != prof
    c.put_object(Bucket="fleet", Key="inbox/profile.toml", Body=changed.encode())
    try:
        after = run_json(s3, inbox, store)
    finally:
        c.put_object(Bucket="fleet", Key="inbox/profile.toml", Body=prof.encode())
    assert after["stages"]["embed"] == {"computed": 0, "reused": N_REC}
    assert after["stages"]["tables"] == {"computed": N_REC, "reused": 0}
    assert after["stages"]["score"]["computed"] == 1


# --- one writer ---------------------------------------------------------------------------------------------------------

def _popen(s3, args: list[str], log: Path, harness: str | None = None) -> subprocess.Popen:
    cmd = [sys.executable, "-c", harness, *args] if harness else [sys.executable, "-m", "fleetsift.flows.cli", *args]
    out = open(log, "wb")
    return subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, env=env_for(s3), cwd=ROOT,
                            start_new_session=True)


@pytest.fixture(scope="module")
def ttl_store(s3, bucket_nights):
    """A bucket store with finished nights (a server-side copy of the bucket nights' inbox and store, so its
    first night here is warm), its inbox's profile carrying a 4 s lock time to live."""
    s3.bucket("ttl")
    c = s3.client()
    for key in s3.keys("fleet"):
        c.copy_object(Bucket="ttl", Key=key, CopySource={"Bucket": "fleet", "Key": key})
    inbox = "s3://ttl/inbox"
    prof = c.get_object(Bucket="ttl", Key="inbox/profile.toml")["Body"].read().decode()
    c.put_object(Bucket="ttl", Key="inbox/profile.toml", Body=(prof + TTL_PROFILE).encode())
    store = "s3://ttl/store"
    first = run_json(s3, inbox, store)
    return inbox, store, first


def test_two_nights_at_once_never_interleave(s3, aws, ttl_store, tmp_path):
    from fleetsift.store import Store

    inbox, store, _ = ttl_store
    before = Store(store).read("runs")
    args = ["run", "--inbox", inbox, "--store", store, "--json", "--wait", "120"]
    procs = [_popen(s3, args, tmp_path / f"night{i}.log") for i in range(2)]
    codes = [p.wait(600) for p in procs]
    logs = [(tmp_path / f"night{i}.log").read_text() for i in range(2)]
    assert codes == [0, 0], logs
    runs = Store(store).read("runs")
    new = runs[~runs["run_id"].isin(before["run_id"])].sort_values("started_at")
    assert len(new) == 2
    # Under the lock object the second night started only after the first had finished writing.
    assert new["started_at"].iloc[1] >= new["finished_at"].iloc[0]
    for rid in new["run_id"]:
        w = Store(store).read("windows", run_id=rid)
        assert not w.duplicated(["recording_id", "metric", "window_index"]).any()

    # A night that will not wait is refused with exit 4 while another holds the store.
    from fleetsift.location import location
    from fleetsift.objectlock import ObjectLock

    holder = ObjectLock(location(store) / ".lock", ttl_s=60)
    with holder.held(0):
        p = cli(s3, "run", "--inbox", inbox, "--store", store, "--json", "--wait", "0", ok=(4,))
    assert "being written by" in p.stderr and holder.holder in p.stderr
    assert len(Store(store).read("runs")) == len(runs)


HARNESS = r"""
import os, signal, sys
from fleetsift import store as store_mod
orig = store_mod.Store.append
def append(self, name, df):
    v = orig(self, name, df)
    if name == "windows":
        os.kill(os.getpid(), signal.SIGKILL)
    return v
store_mod.Store.append = append
from fleetsift.flows.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_kill_mid_write_then_rerun_takes_the_stale_lock_over(s3, aws, ttl_store, tmp_path):
    from fleetsift.location import location
    from fleetsift.store import Store

    inbox, store, _ = ttl_store
    st = Store(store)
    runs_before = st.read("runs")
    args = ["run", "--inbox", inbox, "--store", store, "--json", "--wait", "0"]
    p = _popen(s3, args, tmp_path / "killed.log", harness=HARNESS)
    assert p.wait(600) == -signal.SIGKILL, (tmp_path / "killed.log").read_text()[-3000:]
    # Killed between the windows append and the runs append: orphan rows, and the lock object left behind.
    assert "windows" in st.orphan_runs()
    assert (location(store) / ".lock").exists()
    t0 = time.time()
    rerun = run_json(s3, inbox, store, "--wait", "60")
    assert time.time() - t0 < 60
    runs = st.read("runs")
    assert len(runs) == len(runs_before) + 1 and rerun["run_id"] in set(runs["run_id"])
    assert st.orphan_runs() == {}
    assert not runs["run_id"].duplicated().any()
    wins = st.read("windows")
    assert set(wins["run_id"]) == set(runs["run_id"])  # no row of the killed night, none missing
    assert not wins.duplicated(["run_id", "recording_id", "metric", "window_index"]).any()
    for rid in runs["run_id"]:
        per = wins[wins["run_id"] == rid]
        assert len(per) == len(wins[wins["run_id"] == rerun["run_id"]])
    assert not (location(store) / ".lock").exists()


# --- Dask: workers that share no disk -------------------------------------------------------------------------------------

def test_dask_cluster_workers_read_the_inbox_from_the_bucket(s3, aws, local, tmp_path):
    import cloudpickle
    from distributed import Client, LocalCluster

    from fleetsift.store import Store

    _, lstore, lfirst, _ = local
    s3.bucket("dask")
    inbox = s3.upload(local[0], "dask", "inbox")
    store = "s3://dask/store"
    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                           env=s3.env())
    try:
        client = Client(cluster)
        cloudpickle.register_pickle_by_value(sys.modules[__name__])  # the workers cannot import this test module
        workers = sorted(client.scheduler_info()["workers"])
        assert len(workers) == 2
        # Each worker its own temporary folder: nothing a worker writes locally is seen by the other.
        for i, w in enumerate(workers):
            d = tmp_path / f"worker{i}"
            d.mkdir()
            client.run(_set_tmp, str(d), workers=[w])
        tmps = client.run(_tmp)
        assert len(set(tmps.values())) == 2
        out = run_json(s3, inbox, store, "--runner", "dask", "--dask-address", cluster.scheduler_address)
        # The stages ran in the worker processes, which opened the bucket themselves (from the URLs they got).
        opened = client.run(_buckets_opened)
        assert any("s3://dask" in b for b in opened.values()), opened
        client.close()
    finally:
        cluster.close()
    assert out["stages"]["tables"]["computed"] == N_REC and out["stages"]["embed"]["computed"] == N_REC
    assert_same_scores(windows_of(str(lstore), lfirst["run_id"]), windows_of(store, out["run_id"]))
    assert any(k.startswith("store/cache/tables/") for k in s3.keys("dask", "store/"))


def _set_tmp(path: str) -> None:
    import tempfile

    os.environ["TMPDIR"] = path
    tempfile.tempdir = path


def _tmp() -> str:
    import tempfile

    return tempfile.gettempdir()


def _buckets_opened() -> list[str]:
    from fleetsift import location

    return sorted(location._SETTINGS)
