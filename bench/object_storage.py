"""Local folders against a bucket, side by side in one run: cold and warm nights on one demo fleet.

    python bench/object_storage.py            # 4 recordings x 30 s
    python bench/object_storage.py --recordings 6 --seconds 60

The bucket is moto's standalone S3 server on this machine (tests/s3server.py, needs the test extra), so the ratio
measures the storage layer's own cost (HTTP round trips, Delta commits through object_store, streaming video
reads), not a network's. Each night is a fresh `fleetsift run --json` process; "wall" includes Python and Prefect
start-up. The machine's load average is printed because the cores are shared.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from cli_run import cli_env  # noqa: E402
from s3server import start_s3_server  # noqa: E402


def night(inbox: str, store: str, env: dict) -> tuple[dict, float]:
    t0 = time.perf_counter()
    p = subprocess.run([sys.executable, "-m", "fleetsift.flows.cli", "run", "--inbox", inbox, "--store", store,
                        "--json"], capture_output=True, text=True, env=env, cwd=ROOT)
    wall = time.perf_counter() - t0
    if p.returncode != 0:
        raise SystemExit(f"fleetsift run failed ({p.returncode}): {p.stderr[-3000:]}")
    return json.loads(p.stdout), wall


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--recordings", type=int, default=4)
    ap.add_argument("--seconds", type=float, default=30.0)
    a = ap.parse_args()
    from fleetsift.demo.fleet import make_fleet

    work = Path(tempfile.mkdtemp(prefix="bench-objstore-"))
    make_fleet(work / "inbox", n_recordings=a.recordings, duration_s=a.seconds, seed=7)
    server = start_s3_server(work / "moto.log")
    try:
        server.bucket("bench")
        url = server.upload(work / "inbox", "bench", "inbox")
        env_local = cli_env()
        env_s3 = cli_env(**server.env())
        rows = {}
        for name, inbox, store, env in (("local", str(work / "inbox"), str(work / "store"), env_local),
                                        ("bucket", url, "s3://bench/store", env_s3)):
            cold, t_cold = night(inbox, store, env)
            warm, t_warm = night(inbox, store, env)
            rows[name] = {"cold": (t_cold, cold["elapsed_s"]), "warm": (t_warm, warm["elapsed_s"]),
                          "warm_stages": warm["stages"]}
        print(f"{a.recordings} recordings x {a.seconds:g} s; load average {os.getloadavg()[0]:.2f}")
        print(f"{'night':<8} {'local wall':>11} {'bucket wall':>12} {'ratio':>6}   {'local flow':>10} "
              f"{'bucket flow':>11} {'ratio':>6}")
        for k in ("cold", "warm"):
            (lw, lf), (bw, bf) = rows["local"][k], rows["bucket"][k]
            print(f"{k:<8} {lw:>10.1f}s {bw:>11.1f}s {bw / lw:>6.2f}   {lf:>9.1f}s {bf:>10.1f}s {bf / max(lf, 1e-9):>6.2f}")
        print(f"warm stages (bucket): {rows['bucket']['warm_stages']}")
    finally:
        server.stop()


if __name__ == "__main__":
    main()
