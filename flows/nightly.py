"""The nightly run as Prefect flows: the wiring lives in flows/night.py; here it is handed the Prefect tasks."""

from __future__ import annotations

from prefect import flow

from fleetsift.store import Store
from fleetsift.flows.night import Steps, discover, fleet_profile, new_run_id, run_night  # noqa: F401 -- re-exported
from fleetsift.tasks import flow_tasks

PREFECT_STEPS = Steps(tables=flow_tasks.tables_task, embed=flow_tasks.embed_task, score=flow_tasks.score_task,
                      write=flow_tasks.write_task)


@flow(name="fleetsift-nightly", log_prints=False)
def nightly_flow(inbox: str, store: str, profile_path: str | None = None, run_id: str | None = None,
                 parallel: bool = False, progress: bool = True, rebuild: list[str] | None = None) -> dict:
    """Score every recording in the inbox against the fleet's baseline and append the run to the store."""
    out = run_night(PREFECT_STEPS, inbox, store, profile_path, run_id, parallel, progress, tuple(rebuild or ()))
    return {**out, "orchestrator": "prefect"}


@flow(name="fleetsift-scheduled", log_prints=True)
def scheduled_run(inbox: str, store: str, profile_path: str | None = None) -> dict:
    """What a scheduled deployment runs: the nightly flow under the store's write lock, plus the report."""
    from fleetsift.flows.cli import storage_settings
    from fleetsift.flows.report import write_report

    st = Store(store, storage_settings(inbox, profile_path)).init()
    with st.lock(wait_s=3600):
        result = nightly_flow(inbox=inbox, store=store, profile_path=profile_path, progress=False)
    out = st.root / "reports" / f"{result['run_id']}.html"
    write_report(str(st.root), result["run_id"], str(out))
    print(f"fleetsift run {result['run_id']}: runs-table version {result['store_version']}, report {out}")
    return {"run_id": result["run_id"], "store_version": result["store_version"], "report": str(out)}
