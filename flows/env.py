"""Process environment for a run: Prefect's state, Matplotlib's and Dask's scratch go inside the store folder.

Must run before `prefect` is imported: Prefect reads its settings at import time.
"""

from __future__ import annotations

import os
from pathlib import Path


def local_state(store_root: str | Path) -> Path:
    """The local folder for a run's process state: inside a local store; for a store on object storage, a folder
    of the machine's temporary directory named after the store's URL (Prefect's SQLite database cannot live in a
    bucket, and only the store's data belongs there)."""
    s = str(store_root)
    if "://" in s and not s.startswith("file://"):
        import hashlib
        import tempfile

        return Path(tempfile.gettempdir()) / f"fleetsift-{hashlib.sha256(s.encode()).hexdigest()[:12]}"
    return Path(s.removeprefix("file://")).resolve()


def configure(store_root: str | Path) -> None:
    root = local_state(store_root)
    home = root / "prefect"
    home.mkdir(parents=True, exist_ok=True)
    defaults = {
        "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
        "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "180",
        "PREFECT_LOGGING_LEVEL": "WARNING",
        "PREFECT_RESULTS_PERSIST_BY_DEFAULT": "false",
        "MPLCONFIGDIR": str(root / ".mpl"),
        "DASK_TEMPORARY_DIRECTORY": str(root / ".dask"),
    }
    # Prefect's home (profiles, local result storage) always lives in the store, never in ~/.prefect.
    defaults.update({"PREFECT_HOME": str(home), "PREFECT_LOCAL_STORAGE_PATH": str(home / "storage")})
    if not os.environ.get("PREFECT_API_URL"):
        # No team server: the embedded temporary server keeps its SQLite database in the store too.
        defaults["PREFECT_API_DATABASE_CONNECTION_URL"] = f"sqlite+aiosqlite:///{home / 'prefect.db'}"
    for k, v in defaults.items():
        os.environ.setdefault(k, v)
