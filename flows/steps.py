"""The Prefect tasks the flows call: the pure steps of ``tasks/``, named and retried.

``tasks/`` never imports Prefect; this module is where a step becomes a task.
Database calls retry on transient database errors only
(:func:`changekind.tasks.persist.is_transient`): a dropped connection or a
server restart passes on retry, bad input never does.
"""

from __future__ import annotations

from typing import Any

from prefect import task
from prefect.cache_policies import NO_CACHE

from changekind.tasks import batch, persist
from changekind.tasks.report import data as report_data


def _retry_unless_bad_input(task_: Any, task_run: Any, state: Any) -> bool:
    """Retry on transient database errors only (:func:`persist.is_transient`)."""
    try:
        outcome = state.result(raise_on_failure=False)
    except Exception:  # the outcome cannot be read: retrying is the safe default
        return True
    return isinstance(outcome, BaseException) and persist.is_transient(outcome)


def _io_task(name: str, fn: Any) -> Any:
    return task(
        name=name,
        retries=len(persist.RETRY_DELAYS),
        retry_delay_seconds=list(persist.RETRY_DELAYS),
        retry_condition_fn=_retry_unless_bad_input,
        cache_policy=NO_CACHE,
    )(fn)


start_worker_task = task(name="start-worker")(batch.start_worker)
run_batch_task = task(name="analyse-batch", retries=2, retry_delay_seconds=[2, 5])(batch.run_batch)
write_events_task = _io_task("write-events", persist.write_events)
write_batch_task = _io_task("write-batch", persist.write_batch)
read_events_task = _io_task("read-events", persist.read_events)
save_models_task = _io_task("save-models", persist.save_models)
load_models_task = _io_task("load-models", persist.load_models)
load_watermarks_task = _io_task("load-watermarks", persist.load_watermarks)
update_watermarks_task = _io_task("update-watermarks", persist.update_watermarks)
start_run_task = _io_task("start-run", persist.start_run)
finish_run_task = _io_task("finish-run", persist.finish_run)
record_failures_task = _io_task("record-failures", persist.record_failures)
set_triage_task = _io_task("set-triage", persist.set_triage)
migrate_task = _io_task("migrate-db", persist.migrate)
write_stored_report_task = task(name="write-report", retries=1, retry_delay_seconds=5)(
    report_data.write_stored_report
)
