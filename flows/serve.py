"""Serve the nightly run on a cron schedule.

Prefect cannot schedule against its embedded temporary server: point PREFECT_API_URL at a running Prefect server
(a team one, or a local one started with `scripts/prefect-server.sh STORE`, which keeps its state in the store).
"""

from __future__ import annotations

import os
import sys
from pathlib import Path


def serve(inbox: str, store: str, cron: str, profile: str | None = None, name: str = "nightly") -> int:
    if not os.environ.get("PREFECT_API_URL"):
        print("fleetsift serve: PREFECT_API_URL is not set. Scheduling needs a Prefect server: start one with "
              "`scripts/prefect-server.sh STORE` (local, state in the store) and export "
              "PREFECT_API_URL=http://127.0.0.1:4200/api, or point it at your team's server.", file=sys.stderr)
        return 2
    from flows.nightly import scheduled_run

    params = {"inbox": str(Path(inbox).resolve()), "store": str(Path(store).resolve()), "profile_path": profile}
    print(f"serving deployment 'fleetsift-scheduled/{name}' on cron {cron!r}; Ctrl-C stops", file=sys.stderr)
    scheduled_run.serve(name=name, cron=cron, parameters=params)
    return 0
