"""Which database errors are transient, and trying a call again while they last."""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from typing import TypeVar

import sqlalchemy as sa

from changekind.tasks.errors import (
    DatabaseUnavailableError,
)
from changekind.tasks.persist.engines import _first_line

# --------------------------------------------------------------------------- retries

RETRY_DELAYS: tuple[float, ...] = (1.0, 2.0, 4.0, 8.0)
"""Waits between the tries of a database call that failed on a transient error:
five tries over about 15 s, enough for a dropped connection or a server restart
of a few seconds (an outage of 6 s was survived in tests/flows/test_faults.py)."""

_T = TypeVar("_T")


def is_transient(exc: BaseException) -> bool:
    """Whether a database error may pass on retry: a lost or refused connection,
    a lock held by another writer, a server going down (not bad input, not a bug)."""
    if isinstance(exc, DatabaseUnavailableError):
        return True
    if isinstance(exc, sa.exc.DBAPIError):
        if exc.connection_invalidated:
            return True
        return isinstance(exc, sa.exc.OperationalError | sa.exc.InterfaceError)
    return isinstance(exc, ConnectionError | TimeoutError)


def retry_transient(
    call: Callable[[], _T],
    *,
    what: str,
    delays: Sequence[float] | None = None,
    log: Callable[[str], None] | None = None,
    sleep: Callable[[float], None] = time.sleep,
) -> _T:
    """``call()``, tried again after each delay while it fails on a transient error.

    Parameters
    ----------
    call : callable
        One database call; it must be safe to repeat (every writer here runs
        in one transaction and upserts, so a repeat after a lost connection
        writes nothing twice).
    what : str
        What the call does, for the log lines.
    delays : sequence of float, optional
        Seconds to wait before each further try (bounded back-off); default
        :data:`RETRY_DELAYS`.
    log : callable, optional
        Called with one line per retry.

    Raises
    ------
    Exception
        The last error, when it is not transient or the tries are used up.
    """
    delays = RETRY_DELAYS if delays is None else delays
    for attempt, delay in enumerate((*delays, None), start=1):
        try:
            return call()
        except Exception as exc:
            if delay is None or not is_transient(exc):
                raise
            if log is not None:
                log(
                    f"{what}: database error on try {attempt} of {len(delays) + 1} "
                    f"({_first_line(exc)}); trying again in {delay:g} s"
                )
            sleep(delay)
    raise AssertionError("unreachable")  # pragma: no cover
