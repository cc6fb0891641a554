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
