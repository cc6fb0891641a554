"""The `fleetsift` CLI in a child process, as an operator or a scheduler starts it, for the end-to-end tests."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

# Prefect settings of whoever runs the tests must not leak into the runs (each store keeps its own Prefect state).
_PREFECT_VARS = ("PREFECT_HOME", "PREFECT_API_URL", "PREFECT_API_DATABASE_CONNECTION_URL",
                 "PREFECT_LOCAL_STORAGE_PATH", "PREFECT_PROFILE")


def cli_env(**extra: str) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in _PREFECT_VARS}
    env.update(PREFECT_SERVER_ANALYTICS_ENABLED="false", PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS="180",
               PYTHONUNBUFFERED="1", **extra)
    return env


def fleetsift(*args: str, ok=(0,), timeout: float = 900, env: dict | None = None) -> subprocess.CompletedProcess:
    p = subprocess.run([sys.executable, "-m", "fleetsift.flows.cli", *args], capture_output=True, text=True,
                       env=env or cli_env(), cwd=ROOT, timeout=timeout)
    if p.returncode not in ok:
        raise AssertionError(f"fleetsift {' '.join(args)} exited {p.returncode}\nstdout:\n{p.stdout[-4000:]}\n"
                             f"stderr:\n{p.stderr[-4000:]}")
    return p


def run_json(inbox: Path, store: Path, *extra: str) -> dict:
    p = fleetsift("run", "--inbox", str(inbox), "--store", str(store), "--json", *extra)
    return json.loads(p.stdout)
