"""Serve the nightly run on a cron schedule.

Prefect cannot schedule against its embedded temporary server: point PREFECT_API_URL at a running Prefect server
(a team one, or a local one started with `scripts/prefect-server.sh STORE`, which keeps its state in the store).
"""

from __future__ import annotations

import sys
from pathlib import Path


NO_SERVER = ("fleetsift serve: PREFECT_API_URL is not set. Scheduling needs a Prefect server: start one with "
             "`scripts/prefect-server.sh STORE` (local, state in the store) and export "
             "PREFECT_API_URL=http://127.0.0.1:4200/api, or point it at your team's server.")


def serve(inbox: str, store: str, cron: str, profile: str | None = None, name: str = "nightly") -> int:
    """Register deployment 'fleetsift-scheduled/NAME' on the cron schedule and run its flow runs until Ctrl-C.

    The caller checks PREFECT_API_URL first (flows/cli.py: exit 5 with NO_SERVER); returns 0 after Ctrl-C.
    """
    from fleetsift.flows.nightly import scheduled_run

    # Absolute paths: the deployment's runs may start in another working directory than this command.
    params = {"inbox": str(Path(inbox).resolve()), "store": str(Path(store).resolve()),
              "profile_path": str(Path(profile).resolve()) if profile else None}
    print(f"serving deployment 'fleetsift-scheduled/{name}' on cron {cron!r}; Ctrl-C stops", file=sys.stderr)
    try:
        scheduled_run.serve(name=name, cron=cron, parameters=params)
    except KeyboardInterrupt:  # Ctrl-C is the way to stop serving, also while the deployment is being registered
        print("fleetsift serve: stopped", file=sys.stderr)
    return 0
