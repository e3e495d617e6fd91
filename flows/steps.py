"""The Prefect tasks the flows call: the steps of ``tasks/``, named and retried.

``tasks/`` never imports Prefect; this module is where a step becomes a task,
and the one place that says which steps retry and on what.  Every retry is
decided by one classifier, :func:`changekind.tasks.errors.is_transient`: a
dropped connection, a locked database or a file system that did not answer
passes on retry; bad input, bad configuration and bugs never do.

- Database calls (``*_task`` below wrapping ``changekind.tasks.persist`` and
  :mod:`changekind.flows.records`) retry after
  :data:`RETRY_DELAYS` (about 15 s in all, enough
  for a server restart of a few seconds).  Every writer is one transaction of
  idempotent upserts, so a repeat writes nothing twice.
- A batch (read the source, analyse its series) retries twice, on transient
  errors only: a series' bad data is a failure of that series, never a retry.
- The report of a run retries once, on transient errors only.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from prefect import task
from prefect.cache_policies import NO_CACHE

from changekind.flows import records
from changekind.tasks import batch, persist
from changekind.tasks.errors import is_transient
from changekind.tasks.report import data as report_data
from changekind.tasks.runlock import RunLock


def retry_if_transient(task_: Any, task_run: Any, state: Any) -> bool:
    """Prefect's ``retry_condition_fn``: retry a failed run only on a transient error."""
    try:
        outcome = state.result(raise_on_failure=False)
    except Exception:  # the outcome cannot be read: retrying is the safe default
        return True
    return isinstance(outcome, BaseException) and is_transient(outcome)


RETRY_DELAYS: tuple[float, ...] = (1.0, 2.0, 4.0, 8.0)
"""Waits between the tries of a database call that failed on a transient error:
five tries over about 15 s, enough for a dropped connection or a server restart
of a few seconds (an outage of 6 s was survived in tests/flows/test_faults.py)."""


def _database(name: str) -> Callable[[Callable[..., Any]], Any]:
    return task(
        name=name,
        retries=len(RETRY_DELAYS),
        retry_delay_seconds=list(RETRY_DELAYS),
        retry_condition_fn=retry_if_transient,
        cache_policy=NO_CACHE,
    )


# --------------------------------------------------------------------------- analysis

start_worker_task = task(name="start-worker", cache_policy=NO_CACHE)(batch.start_worker)
run_batch_task = task(
    name="analyse-batch",
    retries=2,
    retry_delay_seconds=[2, 5],
    retry_condition_fn=retry_if_transient,
    cache_policy=NO_CACHE,
)(batch.run_batch)
write_report_task = task(
    name="write-report",
    retries=1,
    retry_delay_seconds=5,
    retry_condition_fn=retry_if_transient,
    cache_policy=NO_CACHE,
)(report_data.write_stored_report)


# --------------------------------------------------------------------------- database

migrate_task = _database("migrate-db")(persist.migrate)
close_stale_runs_task = _database("close-abandoned-runs")(persist.close_stale_runs)
load_coverage_task = _database("read-analysed-spans")(persist.load_coverage)
start_run_task = _database("start-run")(persist.start_run)
finish_run_task = _database("finish-run")(persist.finish_run)
record_source_problems_task = _database("record-source-problems")(persist.record_source_problems)
stored_state_task = _database("read-stored-state")(records.stored_state)
write_labels_task = _database("store-labels")(persist.write_labels)
refresh_incidents_task = _database("update-incidents")(persist.refresh_incidents)


@_database("take-run-lock")
def take_lock_task(lock: RunLock) -> None:
    """Take the run lock (waits up to its ``wait_seconds``; a busy database is not retried)."""
    lock.acquire()


@_database("write-batch")
def write_outcomes_task(
    db: str,
    run_id: str,
    outcomes: Sequence[batch.SeriesOutcome],
    *,
    before_write: Callable[[], None] | None = None,
    **keywords: Any,
) -> Any:
    """One batch's outcomes in one transaction, after ``before_write`` (the run lock's check)."""
    if before_write is not None:
        before_write()
    return records.write_outcomes(db, run_id, outcomes, **keywords)
