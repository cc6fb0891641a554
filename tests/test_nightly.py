"""Nightly operation: incremental runs, the Dask runner, serving on a cron schedule, history and time travel.

The session's demo fleet (4 recordings x 20 s, tests/conftest.py) serves the whole module: the first three make the
first night, the fourth is dropped into the inbox for the second. Every end-to-end test drives the `fleetsift` CLI
in a child process, as an operator or a scheduler would.
"""

from __future__ import annotations

import json
import re
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from cli_run import cli_env, fleetsift, run_json  # tests/ is on sys.path under pytest
from inboxes import table_inbox

from fleetsift.errors import InputError

ROOT = Path(__file__).resolve().parent.parent
BIN = Path(sys.executable).parent
N_FIRST = 3  # recordings of the first night; one more arrives for the second


def last_run_windows(store: Path) -> pd.DataFrame:
    """The windows rows of the store's latest run, in a canonical order."""
    from fleetsift.store import Store

    st = Store(store)
    runs = st.read("runs")
    rid = runs.sort_values("finished_at")["run_id"].iloc[-1]
    w = st.read("windows", run_id=rid)
    return w.sort_values(["recording_id", "metric", "window_index"]).reset_index(drop=True)


# --- fixtures -------------------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def pool(demo_fleet):
    """The session's demo fleet (tests/conftest.py: 4 recordings x 20 s), never run on directly."""
    assert len(demo_fleet.names) == N_FIRST + 1
    return demo_fleet


@pytest.fixture(scope="module")
def two_nights(pool, tmp_path_factory):
    """Night 1 on three recordings, then a fourth arrives and night 2 runs: (inbox, store, json1, json2)."""
    names = pool.names
    base = tmp_path_factory.mktemp("local")
    inbox = pool.copy(base / "inbox", names[:N_FIRST])
    store = base / "store"
    first = run_json(inbox, store)
    shutil.copytree(pool.root / names[N_FIRST], inbox / names[N_FIRST])
    second = run_json(inbox, store)
    return inbox, store, first, second


# --- 1. incremental night -------------------------------------------------------------------------------------------

@pytest.mark.slow
@pytest.mark.timeout(1200)
def test_new_recording_is_the_only_one_computed(two_nights, pool):
    inbox, store, first, second = two_nights
    names = pool.names
    assert first["stages"]["embed"] == {"computed": N_FIRST, "reused": 0}
    assert first["stages"]["tables"] == {"computed": N_FIRST, "reused": 0}
    # Night 2: only the new recording is decoded, embedded and resampled; the fleet step re-runs because the
    # batch (and so the robust baseline) changed.
    assert second["stages"]["embed"] == {"computed": 1, "reused": N_FIRST}
    assert second["stages"]["tables"] == {"computed": 1, "reused": N_FIRST}
    assert second["stages"]["score"] == {"computed": 1, "reused": 0}
    assert [r["recording_id"] for r in second["recordings"]] == sorted(names)
    assert all(r["status"] == "scored" and r["n_windows"] > 0 for r in second["recordings"])
    assert second["store_version"] == first["store_version"] + 1
    assert second["run_id"] != first["run_id"]


@pytest.mark.slow
@pytest.mark.timeout(1200)
def test_warm_night_skips_the_orchestrator_and_rebuilds_recompute_on_purpose(two_nights, tmp_path):
    inbox, src, _, second = two_nights
    store = tmp_path / "store"
    shutil.copytree(src, store)  # the shared store stays as the other tests found it
    n = N_FIRST + 1
    reused_all = {"tables": {"computed": 0, "reused": n}, "embed": {"computed": 0, "reused": n},
                  "score": {"computed": 0, "reused": 1}}

    warm = run_json(inbox, store)
    # Nothing to read, decode or embed: recorded without starting Prefect. The fleet step may re-score once, when
    # night 2 admitted windows of the recording that arrived that night (they join the references now).
    assert {k: warm["stages"][k] for k in ("tables", "embed")} == {k: reused_all[k] for k in ("tables", "embed")}
    assert warm["orchestrator"] == "none"
    assert warm["store_version"] == second["store_version"] + 1
    assert Path(warm["report"]).is_file()
    # From then on the same inbox has the same references (the first night to score a window judged it): the
    # scores come from the cache.
    always = run_json(inbox, store, "--orchestrate", "always")
    assert always["stages"] == reused_all and always["orchestrator"] == "prefect"
    a = last_run_windows(store)

    imu = run_json(inbox, store, "--rebuild", "imu")
    assert imu["orchestrator"] == "prefect"
    assert imu["stages"] == {"tables": {"computed": n, "reused": 0}, "embed": {"computed": 0, "reused": n},
                             "score": {"computed": 1, "reused": 0}}
    b = last_run_windows(store)
    # Recomputed from the same inputs: the same scores (the rebuild overwrote its cache entries with equal ones).
    np.testing.assert_allclose(b["score"].to_numpy(), a["score"].to_numpy(), rtol=0, atol=1e-9, equal_nan=True)

    cam = run_json(inbox, store, "--rebuild", "camera")
    assert cam["stages"]["embed"] == {"computed": n, "reused": 0} and cam["stages"]["tables"]["computed"] == 0

    p = fleetsift("run", "--inbox", str(inbox), "--store", str(store), "--rebuild", "gps", ok=(1,))
    assert "--rebuild" in p.stderr and "'gps'" in p.stderr and "imu" in p.stderr


# --- 2. Dask runner -------------------------------------------------------------------------------------------------

@pytest.mark.slow
@pytest.mark.timeout(1500)
def test_dask_runner_gives_the_local_scores(two_nights, tmp_path):
    inbox, local_store, _, second = two_nights
    store = tmp_path / "dask-store"
    # --runner dask without an address starts a 2-worker LocalCluster (one thread each, processes).
    out = run_json(inbox, store, "--runner", "dask")
    # The cluster really did the per-recording work: a fresh store computes every stage.
    assert out["stages"]["embed"] == {"computed": N_FIRST + 1, "reused": 0}
    assert out["stages"]["tables"] == {"computed": N_FIRST + 1, "reused": 0}
    # The same night scored locally: a fresh store (a first night, like the Dask one) holding the local stage
    # outputs, so only the fleet step runs.
    local = tmp_path / "local-store"
    shutil.copytree(local_store / "cache", local / "cache", ignore=shutil.ignore_patterns("score", "report"))
    here = run_json(inbox, local)
    assert here["stages"]["tables"]["computed"] == 0 and here["stages"]["embed"]["computed"] == 0
    assert out["baseline_id"] == here["baseline_id"] and out["baseline"]["source"] == "batch"

    a, b = last_run_windows(local), last_run_windows(store)
    key = ["recording_id", "metric", "window_index"]
    assert len(a) == len(b) > 0
    pd.testing.assert_frame_equal(a[key], b[key])
    assert set(a["recording_id"]) == {r["recording_id"] for r in second["recordings"]}
    np.testing.assert_allclose(b["t_start_s"], a["t_start_s"], rtol=0, atol=1e-9)
    np.testing.assert_array_equal(a["score"].isna(), b["score"].isna())
    ok = a["score"].notna()
    assert ok.sum() > 0
    np.testing.assert_allclose(b.loc[ok, "score"], a.loc[ok, "score"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(b["threshold"], a["threshold"], rtol=0, atol=1e-9)
    np.testing.assert_array_equal(a["flagged"], b["flagged"])


# --- 3. serve on a cron schedule, trigger, run --------------------------------------------------------------------

def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get_json(url: str):
    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return json.loads(r.read().decode())
    except (urllib.error.URLError, ConnectionError, TimeoutError, json.JSONDecodeError):
        return None


def _wait_for(cond, timeout: float, what: str, procs: dict[str, tuple[subprocess.Popen, Path]], poll=1.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = cond()
        if value:
            return value
        for name, (p, log) in procs.items():
            if p.poll() is not None:
                raise AssertionError(f"{name} exited {p.returncode} while waiting for {what}:\n"
                                     f"{log.read_text()[-4000:]}")
        time.sleep(poll)
    logs = "\n".join(f"--- {n}:\n{log.read_text()[-3000:]}" for n, (_, log) in procs.items())
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}\n{logs}")


def _stop(p: subprocess.Popen, sig: int, timeout: float) -> int | None:
    """Send sig, wait; kill only if it does not stop. Returns the exit code seen after sig (None if it was killed)."""
    if p.poll() is not None:
        return p.returncode
    p.send_signal(sig)
    try:
        return p.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        p.kill()
        p.wait(timeout=30)
        return None


@pytest.mark.slow
@pytest.mark.timeout(1500)
def test_serve_schedules_and_a_triggered_run_lands_in_the_store(pool, tmp_path):
    names = pool.names
    inbox = pool.copy(tmp_path / "inbox", names[:N_FIRST])
    store = tmp_path / "store"  # the Prefect server keeps its state here too (store/prefect/server.db)
    port = _free_port()
    api = f"http://127.0.0.1:{port}/api"
    env = cli_env(PREFECT_API_URL=api, PREFECT=str(BIN / "prefect"))
    server_log, serve_log = tmp_path / "server.log", tmp_path / "serve.log"
    procs: dict[str, tuple[subprocess.Popen, Path]] = {}
    with open(server_log, "w") as so, open(serve_log, "w") as se:
        server = subprocess.Popen(["bash", str(ROOT / "scripts" / "prefect-server.sh"), str(store), str(port)],
                                  stdout=so, stderr=subprocess.STDOUT, env=cli_env(PREFECT=str(BIN / "prefect")),
                                  cwd=tmp_path)
        procs["prefect server"] = (server, server_log)
        try:
            _wait_for(lambda: _get_json(f"{api}/health") is True, 180, "the server's /api/health", procs)
            assert (store / "prefect" / "server.db").exists()

            serve = subprocess.Popen([sys.executable, "-m", "fleetsift.flows.cli", "serve", "--cron", "0 2 * * *",
                                      "--inbox", str(inbox), "--store", str(store)],
                                     stdout=se, stderr=subprocess.STDOUT, env=env, cwd=ROOT)
            procs["fleetsift serve"] = (serve, serve_log)
            dep = _wait_for(lambda: _get_json(f"{api}/deployments/name/fleetsift-scheduled/nightly"), 300,
                            "the deployment", procs)
            # The cron schedule is registered with the deployment, not only the name.
            scheds = [s["schedule"].get("cron") for s in dep.get("schedules", [])]
            assert "0 2 * * *" in scheds, dep.get("schedules")
            assert dep["parameters"]["inbox"] == str(inbox.resolve())

            trig = subprocess.run([str(BIN / "prefect"), "deployment", "run", "fleetsift-scheduled/nightly"],
                                  capture_output=True, text=True, env=env, cwd=tmp_path, timeout=120)
            assert trig.returncode == 0, trig.stdout + trig.stderr
            m = re.search(r"UUID:\s*([0-9a-f-]{36})", trig.stdout + trig.stderr)
            assert m, trig.stdout + trig.stderr
            run_url = f"{api}/flow_runs/{m.group(1)}"

            def finished():
                fr = _get_json(run_url)
                if fr and fr.get("state_type") in ("COMPLETED", "FAILED", "CRASHED", "CANCELLED"):
                    return fr
                return None

            fr = _wait_for(finished, 900, "the triggered flow run to finish", procs, poll=2.0)
            assert fr["state_type"] == "COMPLETED", (fr.get("state"), serve_log.read_text()[-4000:])

            from fleetsift.store import Store

            runs = Store(store).read("runs")
            assert len(runs) == 1
            run_id = runs["run_id"].iloc[0]
            assert runs["n_scored"].iloc[0] == N_FIRST and runs["status"].iloc[0] == "ok"
            assert len(Store(store).read("windows", run_id=run_id)) > 0
            report = store / "reports" / f"{run_id}.html"
            assert report.exists() and run_id in report.read_text()

            # Ctrl-C is how an operator stops serving and the server; both must end promptly and cleanly.
            assert _stop(serve, signal.SIGINT, 60) == 0, serve_log.read_text()[-3000:]
            assert _stop(server, signal.SIGINT, 60) == 0, server_log.read_text()[-3000:]
        finally:
            for name in ("fleetsift serve", "prefect server"):
                if name in procs:
                    _stop(procs[name][0], signal.SIGINT, 60)


# --- 4. history, time travel, maintenance ---------------------------------------------------------------------------

def _history(store: Path) -> list[dict]:
    return json.loads(fleetsift("history", "--store", str(store), "--json").stdout)


def _report_run_ids(store: Path, out: Path, *extra: str) -> set[str]:
    fleetsift("report", "--store", str(store), "--out", str(out), *extra)
    # The run the report is about (its header); the references line may name earlier runs too.
    return set(re.findall(r"Run <code>(\d{8}T\d{6}Z-[0-9a-f]{6})</code>", out.read_text()))


@pytest.mark.slow
@pytest.mark.timeout(600)
def test_history_time_travel_and_maintain(two_nights, tmp_path):
    from deltalake import DeltaTable

    _, src, first, second = two_nights
    store = tmp_path / "store"
    shutil.copytree(src, store)  # maintain rewrites files: keep the shared store as the other tests found it

    hist = _history(store)
    assert [h["run_id"] for h in hist] == [first["run_id"], second["run_id"]]
    assert [h["version"] for h in hist] == [first["store_version"], second["store_version"]]
    assert [h["n_recordings"] for h in hist] == [N_FIRST, N_FIRST + 1]
    text = fleetsift("history", "--store", str(store)).stdout
    assert first["run_id"] in text and second["run_id"] in text

    v0, v1 = hist[0]["version"], hist[1]["version"]
    assert _report_run_ids(store, tmp_path / "v0.html", "--as-of", str(v0)) == {first["run_id"]}
    assert _report_run_ids(store, tmp_path / "v1.html", "--as-of", str(v1)) == {second["run_id"]}
    assert _report_run_ids(store, tmp_path / "now.html") == {second["run_id"]}

    before = {t: {v: DeltaTable(str(store / t), version=v).to_pandas() for v in (0, 1)}
              for t in ("runs", "recordings", "windows")}
    out = json.loads(fleetsift("maintain", "--store", str(store), "--json").stdout)
    for t in ("runs", "recordings", "windows"):
        assert out[t]["files_removed"] >= 2 and out[t]["files_added"] >= 1, out  # two appends compacted
        assert out[t]["version"] == 2
        # Time travel after compaction + vacuum: every version inside the retention reads back unchanged.
        for v in (0, 1):
            after = DeltaTable(str(store / t), version=v).to_pandas()
            pd.testing.assert_frame_equal(after.sort_values(list(after.columns)).reset_index(drop=True),
                                          before[t][v].sort_values(list(after.columns)).reset_index(drop=True))
    assert _history(store) == hist
    assert _report_run_ids(store, tmp_path / "v0-after.html", "--as-of", str(v0)) == {first["run_id"]}
    # The compacted current version still holds both runs' windows exactly once.
    w = DeltaTable(str(store / "windows")).to_pandas()
    assert len(w) == len(before["windows"][1])
    assert not w.duplicated(["run_id", "recording_id", "metric", "window_index"]).any()


# --- fast checks ----------------------------------------------------------------------------------------------------

def test_discover_skips_a_store_inside_the_inbox(tmp_path):
    from fleetsift.store import Store
    from fleetsift.flows.nightly import discover

    for n in ("rover-01", "rover-02", ".hidden", "_scratch"):
        (tmp_path / n).mkdir()
    Store(tmp_path / "results").init()  # a fresh store: no Delta table yet, only its folders
    assert [p.name for p in discover(tmp_path)] == ["rover-01", "rover-02"]


def test_serve_without_a_server_explains_what_to_do(tmp_path):
    inbox = _table_fleet(tmp_path / "inbox", 1)
    p = fleetsift("serve", "--inbox", str(inbox), "--store", str(tmp_path / "store"), ok=(5,), timeout=120)
    assert "PREFECT_API_URL" in p.stderr and "prefect-server.sh" in p.stderr
    assert not (tmp_path / "store").exists()


def _table_fleet(root: Path, n: int = 4) -> Path:
    """A video-free inbox of n IMU-like CSV recordings (30 s at 100 Hz), for in-process nights."""
    return table_inbox(root, {f"rec-{i:02d}": 30.0 for i in range(n)})


def test_cached_only_night_writes_nothing_until_all_is_cached_and_follows_renames(tmp_path):
    from fleetsift.store import Store
    from fleetsift.flows import night
    from fleetsift.tasks import stages

    inbox, store = _table_fleet(tmp_path / "inbox"), str(tmp_path / "store")
    # A batch baseline: a warm night has the same references, hence the same cached scores.
    with open(inbox / "profile.toml", "a") as f:
        f.write('[baseline]\nsource = "batch"\n')
    direct = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                         write=stages.run_write)
    with pytest.raises(night.NotCached):
        night.run_night(night.CACHED_ONLY, str(inbox), store)
    assert Store(store).version("runs") is None  # refused before any write
    first = night.run_night(direct, str(inbox), store)
    again = night.run_night(night.CACHED_ONLY, str(inbox), store)
    assert again["stages"] == {"tables": {"computed": 0, "reused": 4}, "embed": {"computed": 0, "reused": 0},
                               "score": {"computed": 0, "reused": 1}}
    assert again["store_version"] == first["store_version"] + 1
    w1 = Store(store).read("windows", run_id=first["run_id"]).drop(columns="run_id")
    w2 = Store(store).read("windows", run_id=again["run_id"]).drop(columns="run_id")
    pd.testing.assert_frame_equal(w1.sort_values(list(w1.columns[:4])).reset_index(drop=True),
                                  w2.sort_values(list(w2.columns[:4])).reset_index(drop=True))
    # A renamed recording keeps its cached tables (same content) but its scores must carry the new name: the
    # direct path re-scores it (the fleet step runs there) without reading any recording again.
    (inbox / "rec-02").rename(inbox / "rec-20")
    renamed = night.run_night(night.CACHED_ONLY, str(inbox), store)
    assert renamed["stages"]["tables"] == {"computed": 0, "reused": 4}
    assert renamed["stages"]["score"] == {"computed": 1, "reused": 0}
    ids = set(Store(store).read("windows", run_id=renamed["run_id"])["recording_id"])
    assert ids == {"rec-00", "rec-01", "rec-20", "rec-03"}
    with pytest.raises(InputError, match="--rebuild"):
        night.run_night(direct, str(inbox), store, rebuild=("camera",))
