"""Crashes and concurrent runs lose nothing: kill -9 a `fleetsift run` mid-stage and mid-write, rerun, and check.

After every crash the store must be readable (every Delta version), every completed run (one with a `runs` row, the
commit marker appended last) must have all its rows exactly once, and the rerun must reuse the stage outputs that
had finished (the `stages` counts of its JSON). A second concurrent run on the same store must refuse with the lock
message and exit code 4. One small generated fleet serves the whole module.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
N_REC = 3
pytestmark = [pytest.mark.slow, pytest.mark.timeout(2400)]

# Runs the CLI in a child process with a fault injected at an exact point: a real SIGKILL of the whole process,
# so nothing (no finally, no atexit, no flush) runs after it.
#   after_append TABLE  -> killed right after the append to TABLE committed
#   mid_commit TABLE    -> frozen (SIGSTOP, all threads at once) as soon as a new data file appears in TABLE; the
#                          test then reads the frozen state (was the log entry written yet?) and sends SIGKILL
#   hold TABLE          -> waits HOLD_S seconds (lock held) before appending to TABLE: a second run surely meets the lock
HOLD_S = 30.0
HARNESS = r"""
import os, signal, sys, threading, time
HOLD_S = %r
from pathlib import Path
mode, table, store = sys.argv[1], sys.argv[2], Path(sys.argv[3])
from fleetsift import store as store_mod
if mode == "after_append":
    orig = store_mod.Store.append
    def append(self, name, df):
        v = orig(self, name, df)
        if name == table:
            os.kill(os.getpid(), signal.SIGKILL)
        return v
    store_mod.Store.append = append
elif mode == "hold":
    orig = store_mod.Store.append
    def append(self, name, df):
        if name == table:
            time.sleep(HOLD_S)
        return orig(self, name, df)
    store_mod.Store.append = append
elif mode == "mid_commit":
    tdir = store / table
    before = set(os.listdir(tdir))
    def watch():
        while True:
            if any(n.endswith(".parquet") and n not in before for n in os.listdir(tdir)):
                os.kill(os.getpid(), signal.SIGSTOP)
            time.sleep(0.0002)
    threading.Thread(target=watch, daemon=True).start()
from fleetsift.flows.cli import main
sys.exit(main(sys.argv[4:]))
""" % HOLD_S


def _env() -> dict:
    env = dict(os.environ, PREFECT_SERVER_ANALYTICS_ENABLED="false",
               PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS="300")
    for k in ("PREFECT_HOME", "PREFECT_API_URL", "PREFECT_API_DATABASE_CONNECTION_URL"):
        env.pop(k, None)
    return env


def _popen(args: list[str], harness: tuple[str, str, Path] | None = None) -> subprocess.Popen:
    if harness:
        cmd = [sys.executable, "-c", HARNESS, harness[0], harness[1], str(harness[2]), *args]
    else:
        cmd = [sys.executable, "-m", "fleetsift.flows.cli", *args]
    # Output to files, not pipes: a killed run's helper (Prefect's temporary server) inherits the descriptors and
    # would hold a pipe open. Own session: the run and its helpers form one group, stopped by its id.
    out = tempfile.TemporaryFile(mode="w+")
    err = tempfile.TemporaryFile(mode="w+")
    p = subprocess.Popen(cmd, cwd=ROOT, env=_env(), stdout=out, stderr=err, text=True, start_new_session=True)
    p.out_file, p.err_file = out, err
    return p


def _read(f) -> str:
    f.seek(0)
    return f.read()


def _stop_group(p: subprocess.Popen) -> None:
    """SIGKILL the process group this test started (the run and its children), then reap the run."""
    try:
        os.killpg(p.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    p.wait(timeout=60)


def _finish(p: subprocess.Popen, timeout: float = 900) -> tuple[int, str, str]:
    try:
        p.wait(timeout=timeout)
    finally:
        _stop_group(p)  # a killed run's helpers are orphaned in its group: stop them too
    return p.returncode, _read(p.out_file), _read(p.err_file)


def run_args(inbox: Path, store: Path, *extra: str) -> list[str]:
    return ["run", "--inbox", str(inbox), "--store", str(store), "--json", *extra]


def run_ok(inbox: Path, store: Path) -> dict:
    rc, out, err = _finish(_popen(run_args(inbox, store)))
    assert rc == 0, f"exit {rc}\nstdout:\n{out}\nstderr:\n{err[-4000:]}"
    return json.loads(out)


def _wait_for(cond, timeout: float, what: str, proc: subprocess.Popen | None = None, poll: float = 0.02):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        v = cond()
        if v:
            return v
        if proc is not None and proc.poll() is not None:
            raise AssertionError(f"run ended (exit {proc.returncode}) before {what}:\n{_read(proc.err_file)[-4000:]}")
        time.sleep(poll)
    raise AssertionError(f"timed out waiting for {what}")


def _proc_state(pid: int) -> str:
    """The one-letter state in /proc/PID/stat (T = stopped), '' once the process is gone."""
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (FileNotFoundError, IndexError):
        return ""


def _lock_text(store: Path) -> str:
    try:
        return (store / ".lock").read_text(errors="replace")
    except FileNotFoundError:
        return ""


def assert_store_consistent(store: Path, n_recordings: int = N_REC) -> dict:
    """Every version of every table reads; each completed run has all its rows exactly once. Returns the tables."""
    from deltalake import DeltaTable

    tables = {}
    for name in ("runs", "recordings", "windows"):
        dt = DeltaTable(str(store / name))
        for v in range(dt.version() + 1):
            DeltaTable(str(store / name), version=v).to_pyarrow_dataset().to_table()  # every version readable
        tables[name] = dt.to_pandas()
    runs, recs, wins = tables["runs"], tables["recordings"], tables["windows"]
    assert runs["run_id"].is_unique
    for run in runs.to_dict("records"):
        rid = run["run_id"]
        r = recs[recs["run_id"] == rid]
        assert len(r) == run["n_recordings"] == n_recordings and r["recording_id"].is_unique, rid
        w = wins[wins["run_id"] == rid]
        assert not w.duplicated(["recording_id", "window_index", "metric"]).any(), rid
        scored = set(r.loc[r["status"] == "scored", "recording_id"])
        assert scored == set(w["recording_id"]), rid
        for (rec, metric), g in w.groupby(["recording_id", "metric"]):
            # No missing window: indices run 0..n-1 and every metric has the same count.
            assert sorted(g["window_index"]) == list(range(len(g))), (rid, rec, metric)
        per_metric = w.groupby("metric").size()
        assert set(per_metric.index) == {"riemann", "logeuclid", "euclid"} and per_metric.nunique() == 1, rid
        prim = w[w["metric"] == "riemann"]
        assert run["n_windows"] == int(prim["score"].notna().sum()) and run["n_flagged"] == int(prim["flagged"].sum())
    return tables


def assert_matches_json(tables: dict, out: dict) -> None:
    """The store's rows of a run say what that run's JSON said."""
    w = tables["windows"]
    w = w[(w["run_id"] == out["run_id"]) & (w["metric"] == out["metric"])]
    for rec in out["recordings"]:
        g = w[w["recording_id"] == rec["recording_id"]]
        assert len(g) == rec["n_windows"] + rec["n_unscored_windows"]
        assert int(g["flagged"].sum()) == rec["n_flagged"]
        assert np.isclose(g["score"].max(), rec["max_score"], rtol=0, atol=1e-6)


def copy_store(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst, symlinks=True)
    return dst


# --- fixtures --------------------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def inbox(demo_fleet, tmp_path_factory) -> Path:
    """Three recordings of the session's demo fleet (tests/conftest.py)."""
    return demo_fleet.copy(tmp_path_factory.mktemp("crash") / "inbox", demo_fleet.names[:N_REC])


@pytest.fixture(scope="module")
def embed_crash(inbox, tmp_path_factory) -> dict:
    """A cold run killed with SIGKILL once the first video embedding is cached, then rerun to completion."""
    store = tmp_path_factory.mktemp("crash") / "store"
    p = _popen(run_args(inbox, store))
    embed_dir = store / "cache" / "embed"
    try:
        _wait_for(lambda: list(embed_dir.glob("*.npz")), 900, "the first embed cache file", proc=p)
    finally:
        _stop_group(p)
    assert p.returncode == -signal.SIGKILL
    cached = sorted(embed_dir.glob("*.npz"))
    tables_cached = sorted((store / "cache" / "tables").glob("*.npz"))
    rerun = run_ok(inbox, store)
    return {"store": store, "embed_cached": cached, "tables_cached": tables_cached, "rerun": rerun}


@pytest.fixture(scope="module")
def complete_store(embed_crash) -> Path:
    return embed_crash["store"]


# --- kill during a stage ---------------------------------------------------------------------------------------------

def test_kill_during_embed_leaves_only_whole_cache_files(embed_crash):
    from fleetsift.store import Store

    assert 1 <= len(embed_crash["embed_cached"]) < N_REC
    assert len(embed_crash["tables_cached"]) == N_REC  # the tables stage runs for every recording before embed
    for f in embed_crash["embed_cached"] + embed_crash["tables_cached"]:
        arrays = Store.load_arrays(f)  # atomic write: a killed writer leaves a whole file or none
        assert all(np.isfinite(a).all() for k, a in arrays.items() if a.dtype.kind == "f")


def test_rerun_after_embed_kill_reuses_finished_stages(embed_crash):
    out = embed_crash["rerun"]
    done = len(embed_crash["embed_cached"])
    assert out["stages"]["tables"] == {"computed": 0, "reused": N_REC}
    assert out["stages"]["embed"] == {"computed": N_REC - done, "reused": done}
    assert out["stages"]["score"] == {"computed": 1, "reused": 0}
    assert [r["status"] for r in out["recordings"]] == ["scored"] * N_REC and out["unscored"] == []
    tables = assert_store_consistent(embed_crash["store"])
    assert list(tables["runs"]["run_id"]) == [out["run_id"]]  # the killed run wrote no rows at all
    assert len(tables["recordings"]) == N_REC
    assert_matches_json(tables, out)


# --- kill during the store write -------------------------------------------------------------------------------------

@pytest.mark.parametrize("table", ["recordings", "windows"])
def test_kill_between_store_appends(complete_store, inbox, tmp_path, table):
    from fleetsift.store import Store

    store = copy_store(complete_store, tmp_path / "store")
    st = Store(store)
    before = {t: st.version(t) for t in ("runs", "recordings", "windows")}
    p = _popen(run_args(inbox, store), harness=("after_append", table, store))
    rc, out, err = _finish(p)
    assert rc == -signal.SIGKILL, err[-3000:]
    # The run's commit marker never landed: `runs` is unchanged, the rows already appended are orphans.
    assert st.version("runs") == before["runs"]
    assert st.version(table) == before[table] + 1
    orphans = st.orphan_runs()
    assert table in orphans and len(orphans[table]) == 1
    orphan = next(iter(orphans[table]))
    tables = assert_store_consistent(store)
    assert orphan not in set(tables["runs"]["run_id"])

    rerun = run_ok(inbox, store)
    # Everything the killed run computed is reused; only the write is done again (under a new run id).
    assert rerun["stages"]["tables"] == {"computed": 0, "reused": N_REC}
    assert rerun["stages"]["embed"] == {"computed": 0, "reused": N_REC}
    assert rerun["stages"]["score"] == {"computed": 0, "reused": 1}
    tables = assert_store_consistent(store)
    assert len(tables["runs"]) == 2 and rerun["run_id"] in set(tables["runs"]["run_id"])
    assert_matches_json(tables, rerun)
    # The rerun removed the orphan rows under its lock before writing, touching no completed run.
    assert st.orphan_runs() == {}
    for t in ("recordings", "windows"):
        assert orphan not in set(tables[t]["run_id"])
    assert len(tables["windows"]) == len(tables["windows"][tables["windows"]["run_id"].isin(tables["runs"]["run_id"])])


def test_kill_in_the_middle_of_a_delta_commit(complete_store, inbox, tmp_path):
    from fleetsift.store import Store

    store = copy_store(complete_store, tmp_path / "store")
    st = Store(store)
    before = {t: st.version(t) for t in ("runs", "recordings", "windows")}
    rows_before = len(st.read("windows"))
    logs_before = set((store / "windows" / "_delta_log").glob("*.json"))
    p = _popen(run_args(inbox, store), harness=("mid_commit", "windows", store))
    try:
        _wait_for(lambda: _proc_state(p.pid) == "T", 900, "the run to stop inside the windows write", proc=p,
                  poll=0.01)
        committed = bool(set((store / "windows" / "_delta_log").glob("*.json")) - logs_before)
    finally:
        _stop_group(p)
    assert p.returncode == -signal.SIGKILL
    # Killed with the data file written: either before its log entry (the table stays at its version; a data
    # file without a log entry is invisible) or, when the commit won the race, after it (the commit is whole).
    # Never a half-readable table, and the run never committed (`runs` unchanged).
    if committed:
        assert st.version("windows") == before["windows"] + 1
        assert "windows" in st.orphan_runs()
    else:
        assert st.version("windows") == before["windows"] and len(st.read("windows")) == rows_before
        assert "windows" not in st.orphan_runs()
    assert st.version("runs") == before["runs"]
    assert_store_consistent(store)
    rerun = run_ok(inbox, store)
    assert rerun["stages"]["score"] == {"computed": 0, "reused": 1}
    tables = assert_store_consistent(store)
    assert_matches_json(tables, rerun)


def test_score_cache_without_its_meta_file_is_recomputed_not_fatal(complete_store, inbox, tmp_path):
    # run_score writes its Parquet, then its .json meta: this is the exact state a SIGKILL between the two leaves
    # (made directly: the window is too short to hit by timing). It once made every later run crash.
    store = copy_store(complete_store, tmp_path / "store")
    metas = list((store / "cache" / "score").glob("*.json"))
    assert len(metas) == 1
    metas[0].unlink()
    out = run_ok(inbox, store)
    assert out["stages"]["score"]["computed"] == 1
    assert_store_consistent(store)


# --- concurrent runs -------------------------------------------------------------------------------------------------

def test_two_concurrent_runs_one_refuses_neither_corrupts(complete_store, inbox, tmp_path):
    store = copy_store(complete_store, tmp_path / "store")
    n_runs = len(assert_store_consistent(store)["runs"])
    # The first run holds the lock HOLD_S seconds before writing (a warm night is otherwise over in a second or two).
    a = _popen(run_args(inbox, store), harness=("hold", "windows", store))
    try:
        _wait_for(lambda: f"pid {a.pid} " in _lock_text(store), 300,
                  "the first run to take the store lock", proc=a)
        b = subprocess.run([sys.executable, "-m", "fleetsift.flows.cli", *run_args(inbox, store)], cwd=ROOT, env=_env(),
                           capture_output=True, text=True, timeout=300)
        a_running = a.poll() is None
    finally:
        rc_a, out_a, err_a = _finish(a)
    assert a_running, "the first run ended before the second tried the lock: the test proved nothing"
    assert b.returncode == 4, b.stderr[-3000:]
    assert f"the store is being written by pid {a.pid} since" in b.stderr
    assert b.stdout == ""
    assert rc_a == 0, err_a[-3000:]
    out = json.loads(out_a)
    tables = assert_store_consistent(store)
    assert len(tables["runs"]) == n_runs + 1 and out["run_id"] in set(tables["runs"]["run_id"])
    assert_matches_json(tables, out)

    # With --wait the second run queues behind the first instead of refusing.
    a = _popen(run_args(inbox, store))
    c = None
    try:
        _wait_for(lambda: f"pid {a.pid} " in _lock_text(store), 300,
                  "the first run to take the store lock", proc=a)
        c = _popen(run_args(inbox, store, "--wait", "600"))
        rc_c, out_c, err_c = _finish(c)
    finally:
        rc_a, out_a, err_a = _finish(a)
    assert rc_a == 0 and rc_c == 0, (err_a[-2000:], err_c[-2000:])
    tables = assert_store_consistent(store)
    assert len(tables["runs"]) == n_runs + 3
    fa, fc = (tables["runs"].set_index("run_id").loc[json.loads(o)["run_id"], ["started_at", "finished_at"]]
              for o in (out_a, out_c))
    assert fc["started_at"] >= fa["finished_at"] - np.timedelta64(1, "s")  # serialised, not interleaved
