"""Prefect tasks: thin wrappers around the stage functions of tasks/stages.py.

Our own content-addressed keys do the caching (fleetsift.store.stage_key), so Prefect's cache is off.
"""

from prefect import task
from prefect.cache_policies import NONE

from fleetsift.tasks import stages

tables_task = task(name="tables", cache_policy=NONE, persist_result=False)(stages.run_tables)
embed_task = task(name="embed", cache_policy=NONE, persist_result=False)(stages.run_embed)
score_task = task(name="score", cache_policy=NONE, persist_result=False)(stages.run_score)
write_task = task(name="write-store", cache_policy=NONE, persist_result=False)(stages.run_write)
