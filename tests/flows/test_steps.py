"""The Prefect tasks of the flows: which steps retry, and on what.

References: the project's own contract (DEVELOPERS.md, "Prefect tasks"):
database calls retry on transient errors with a bounded back-off, a batch
retries only on transient errors, bad input is never retried.  The errors are
SQLAlchemy's and the standard library's own classes.
"""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from prefect import flow
from prefect.cache_policies import NO_CACHE
from prefect.states import Failed

from changekind.flows import steps
from changekind.tasks import batch, persist
from changekind.tasks.errors import (
    ConfigError,
    DatabaseUnavailableError,
    RunBusyError,
    SeriesError,
    SourceError,
    is_transient,
)
from changekind.tasks.report import data as report_data

LOST = sa.exc.OperationalError("INSERT", {}, Exception("server closed the connection"))


def _wrapped(error: Exception, cause: BaseException) -> Exception:
    try:
        raise error from cause
    except Exception as exc:
        return exc


@pytest.mark.parametrize(
    ("error", "transient"),
    [
        (LOST, True),
        (DatabaseUnavailableError("cannot open database"), True),
        (FileNotFoundError("part-3.parquet"), True),
        (ConnectionResetError("reset by peer"), True),
        (TimeoutError("read timed out"), True),
        (_wrapped(SourceError("cannot connect"), LOST), True),
        (SourceError("no column 'value'"), False),
        (ConfigError("batch size 0"), False),
        (SeriesError("disk-1", "constant"), False),
        (RunBusyError("another run holds the database"), False),
        (_wrapped(ConfigError("bad table"), KeyError("x")), False),
        (sa.exc.IntegrityError("INSERT", {}, Exception("unique constraint")), False),
        (ValueError("a bug"), False),
        (None, False),
    ],
)
def test_one_classifier_says_what_may_pass_on_retry(error, transient):
    assert is_transient(error) is transient
    if error is not None:
        assert steps.retry_if_transient(None, None, Failed(data=error)) is transient


def test_database_tasks_retry_transient_errors_with_a_bounded_back_off():
    database = [
        steps.migrate_task,
        steps.close_stale_runs_task,
        steps.load_coverage_task,
        steps.start_run_task,
        steps.finish_run_task,
        steps.record_source_problems_task,
        steps.stored_state_task,
        steps.take_lock_task,
        steps.write_outcomes_task,
    ]
    for task in database:
        assert task.retries == 4 and task.retry_delay_seconds == [1.0, 2.0, 4.0, 8.0]
        assert task.retry_condition_fn is steps.retry_if_transient
        assert task.cache_policy is NO_CACHE
    assert steps.start_run_task.fn is persist.start_run
    assert steps.finish_run_task.fn is persist.finish_run
    assert steps.run_batch_task.fn is batch.run_batch
    assert (steps.run_batch_task.retries, steps.run_batch_task.retry_delay_seconds) == (2, [2, 5])
    assert steps.run_batch_task.retry_condition_fn is steps.retry_if_transient
    assert steps.write_report_task.fn is report_data.write_stored_report
    assert steps.write_report_task.retry_condition_fn is steps.retry_if_transient


def test_a_database_task_tries_again_only_while_the_error_is_transient(prefect_server):
    calls: list[str] = []

    def flaky(outcomes: list) -> str:
        outcome = outcomes.pop(0)
        calls.append(type(outcome).__name__ if isinstance(outcome, Exception) else outcome)
        if isinstance(outcome, Exception):
            raise outcome
        return outcome

    quick = steps._database("test-call")(flaky).with_options(retry_delay_seconds=0)

    @flow
    def run(outcomes: list) -> str:
        return quick(outcomes)

    assert run([LOST, DatabaseUnavailableError("down"), "written"]) == "written"
    assert calls == ["OperationalError", "DatabaseUnavailableError", "written"]
    calls.clear()
    with pytest.raises(ConfigError):
        run([ConfigError("bad triage state"), "written"])
    assert calls == ["ConfigError"]  # bad input: one try
    calls.clear()
    with pytest.raises(sa.exc.OperationalError):
        run([LOST] * 6)
    assert calls == ["OperationalError"] * 5  # bounded: five tries, then the error
