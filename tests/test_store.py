"""Results store: Delta tables readable by an outside reader, idempotent appends, time travel, lock, hashes."""

import multiprocessing as mp
import time

import pandas as pd
import pyarrow.parquet as pq
import pytest

from fleetsift.errors import StoreLockedError
from fleetsift.store import Store, stage_key


def _rec_rows(run_id, n=2):
    return pd.DataFrame({"run_id": run_id, "recording_id": [f"r{i}" for i in range(n)], "content_hash": "h",
                         "duration_s": 60.0, "status": "scored", "reason": "", "path": ""})


def test_append_is_idempotent_and_versions_time_travel(tmp_path):
    st = Store(tmp_path).init()
    assert st.append("recordings", _rec_rows("run-a")) == 0
    assert st.append("recordings", _rec_rows("run-a")) is None  # retried write of the same run: no-op
    assert st.append("recordings", _rec_rows("run-b", 3)) == 1
    assert len(st.read("recordings")) == 5
    assert len(st.read("recordings", version=0)) == 2
    assert set(st.read("recordings", run_id="run-b")["recording_id"]) == {"r0", "r1", "r2"}
    # Outside reader: deltalake's own DeltaTable -> pandas, and the Parquet files with pyarrow.
    from deltalake import DeltaTable

    dt = DeltaTable(str(tmp_path / "recordings"))
    assert dt.version() == 1 and len(dt.to_pandas()) == 5
    files = dt.file_uris()
    assert sum(pq.read_table(f).num_rows for f in files) == 5


def _hold_lock(root, seconds):
    with Store(root).lock():
        time.sleep(seconds)


def test_second_writer_is_refused_with_a_clear_message(tmp_path):
    p = mp.get_context("spawn").Process(target=_hold_lock, args=(str(tmp_path), 3.0))
    p.start()
    try:
        # The holder writes its pid once it holds the lock; a loaded machine may take a while to start it.
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and "pid" not in ((tmp_path / ".lock").read_text()
                                                             if (tmp_path / ".lock").exists() else ""):
            time.sleep(0.05)
        with pytest.raises(StoreLockedError, match="being written by pid"):
            with Store(tmp_path).lock(wait_s=0.2):
                pass
    finally:
        p.join()
    with Store(tmp_path).lock():  # free again once the holder is gone
        pass


def test_file_hash_is_remembered_and_follows_content(tmp_path):
    st = Store(tmp_path / "s").init()
    f = tmp_path / "a.bin"
    f.write_bytes(b"x" * 1000)
    h1 = st.file_hash(f)
    assert st.file_hash(f) == h1
    import hashlib

    assert h1 == hashlib.sha256(b"x" * 1000).hexdigest()
    f.write_bytes(b"y" * 1000)
    assert st.file_hash(f) != h1


def test_stage_key_depends_on_each_part():
    base = stage_key("tables", "c1", {"bias": 0.0}, "v1")
    assert base == stage_key("tables", "c1", {"bias": 0.0}, "v1")
    assert base != stage_key("tables", "c2", {"bias": 0.0}, "v1")
    assert base != stage_key("tables", "c1", {"bias": 0.1}, "v1")
    assert base != stage_key("tables", "c1", {"bias": 0.0}, "v2")


def test_maintain_compacts_and_keeps_time_travel_inside_retention(tmp_path):
    st = Store(tmp_path).init()
    for i in range(4):
        st.append("recordings", _rec_rows(f"run-{i}"))
    before = [len(st.read("recordings", version=v)) for v in range(4)]
    out = st.maintain(retention_hours=168)
    assert out["recordings"]["files_removed"] == 4 and out["recordings"]["files_added"] == 1
    assert out["recordings"]["vacuumed"] == 0  # every file is younger than the retention
    assert [len(st.read("recordings", version=v)) for v in range(4)] == before == [2, 4, 6, 8]
    assert len(st.read("recordings")) == 8


def test_maintain_sweeps_old_temporary_files_of_killed_writers(tmp_path, capsys):
    import json
    import os

    from fleetsift.flows.cli import main

    st = Store(tmp_path).init()
    st.append("recordings", _rec_rows("run-a"))
    old = time.time() - 2 * 3600  # older than a 1 h retention
    real = st.cache_path("tables", "k1")
    st.save_arrays(real, x=pd.Series([1.0]).to_numpy())
    leftovers = [tmp_path / "cache" / "tables" / ".k2.npz.a1b2.tmp",  # Store._atomic_write_bytes
                 tmp_path / "cache" / "score" / "k3.tmp",  # the score stage's staging Parquet
                 tmp_path / "cache" / "score" / "k3.json.tmp",
                 tmp_path / "baselines" / ".b-1.npz.x.tmp", tmp_path / ".catalog.json.y.tmp",
                 tmp_path / "reports" / "run-a.html.tmp", tmp_path / "cache" / "report" / "b.html.tmp"]
    for p in leftovers:
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(b"partial")
        os.utime(p, (old, old))
    fresh = tmp_path / "cache" / "embed" / ".k4.npz.c3.tmp"  # a writer may still be at it
    fresh.write_bytes(b"partial")
    os.utime(real, (old, old))  # an old real cache file is a cache file, not a leftover
    inside_table = next((tmp_path / "recordings").glob("*.parquet"))
    assert main(["maintain", "--store", str(tmp_path), "--retention-hours", "1", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["temporary_files"] == {"removed": len(leftovers), "kept_recent": 1}
    assert not any(p.exists() for p in leftovers)
    assert fresh.exists() and real.exists() and inside_table.exists()
    assert len(st.read("recordings")) == 2


def test_row_writer_streams_rows_into_an_npz_numpy_reads(tmp_path):
    import numpy as np

    store = Store(tmp_path / "store")
    out = tmp_path / "store" / "cache" / "embed" / "k.npz"
    rng = np.random.default_rng(0)
    parts = [rng.standard_normal((n, 5)).astype(np.float32) for n in (3, 0, 7, 1)]
    with store.row_writer(out, "emb", 5) as w:
        for p in parts:
            w.append(p)
        assert not out.exists()  # nothing at the path before the commit
        w.commit(t=np.arange(11.0), meta=np.array('{"frames": 11}'))
    got = Store.load_arrays(out)
    np.testing.assert_array_equal(got["emb"], np.concatenate(parts))
    assert got["emb"].dtype == np.float32 and got["emb"].shape == (11, 5)
    np.testing.assert_array_equal(got["t"], np.arange(11.0))
    assert str(got["meta"]) == '{"frames": 11}'
    assert sorted(p.name for p in out.parent.iterdir()) == ["k.npz"]  # no temporary file left

    # An exception inside `with` leaves no output and no temporary file.
    other = out.with_name("j.npz")
    with pytest.raises(RuntimeError):
        with store.row_writer(other, "emb", 5) as w:
            w.append(parts[0])
            raise RuntimeError("decode failed")
    assert sorted(p.name for p in out.parent.iterdir()) == ["k.npz"]
