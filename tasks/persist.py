"""Persistence: the event table, its revision log, the model cache and run records.

Every table sits on one SQLAlchemy Core :data:`metadata`; the Alembic migrations
under ``infra/migrations`` build exactly that schema (a test checks it on SQLite
and PostgreSQL) plus the BI views of ``infra/views.sql``.

Each public function takes ``db``: either an :class:`~sqlalchemy.engine.Engine`
(used as is, never disposed here) or a database URL, from which an engine is made
with :func:`connect` inside the call and disposed before it returns.  Pass an
Engine when one process makes many calls; pass the URL string across process
boundaries (Prefect/Dask workers), where an Engine cannot travel.

Writes run in one transaction per call (``with engine.begin()``) and are
idempotent upserts (``INSERT ... ON CONFLICT``, see :func:`_upsert`), so a retry
after a lost connection is safe.  Operational errors from the database during a
write are not caught: they propagate so that the Prefect retry can act.

Times
-----
Every timestamp column holds UTC.  Naive ``datetime`` values given to these
functions are taken to be UTC; values read back are timezone-aware UTC.
``event_time`` keeps the text the input gave; ``event_ts`` is that text parsed
(NULL where it is not a date-time, e.g. on numeric grids).
"""

from __future__ import annotations

import json
import math
import re
import threading
import time
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import AbstractContextManager, contextmanager, nullcontext
from dataclasses import dataclass, fields
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Literal, TypeVar

import numpy as np
import pandas as pd
import sqlalchemy as sa
from prefect import task
from prefect.cache_policies import NO_CACHE
from sqlalchemy.dialects import postgresql as pg_dialect
from sqlalchemy.dialects import sqlite as sqlite_dialect
from sqlalchemy.engine import URL, Connection, Engine
from sqlalchemy.exc import ArgumentError, DBAPIError, NoSuchModuleError

from changekind.tasks.errors import (
    ConfigError,
    DatabaseUnavailableError,
    ModelError,
)
from changekind.tasks.types import REPORTED_TYPES, Event, FittedModel

__all__ = [
    "BOOKKEEPING_COLUMNS",
    "DEFAULT_URL",
    "EVENT_COLUMNS",
    "EVENT_EXTRA_COLUMNS",
    "RUN_KINDS",
    "RUN_STATUSES",
    "TRIAGE_STATES",
    "VERSION_TABLE",
    "Coverage",
    "WriteSummary",
    "close_stale_runs",
    "connect",
    "content_snapshot",
    "event_revisions",
    "finish_run",
    "init_db",
    "is_transient",
    "load_coverage",
    "load_known_events",
    "load_models",
    "load_watermarks",
    "metadata",
    "migrate",
    "migrations_dir",
    "read_events",
    "record_failures",
    "record_source_problems",
    "retry_transient",
    "save_models",
    "scan_runs",
    "series_events",
    "series_failures",
    "series_models",
    "set_coverage",
    "set_triage",
    "source_problems",
    "start_run",
    "table_snapshot",
    "update_watermarks",
    "write_batch",
    "write_events",
]

DEFAULT_URL = "sqlite:///changekind.db"
"""The embedded database used when no URL is given (a file in the working folder)."""

VERSION_TABLE = "changekind_schema_version"
"""Alembic's version table; named for the project so a shared database stays readable."""

CONNECT_TIMEOUT_SECONDS = 5
"""How long :func:`connect` waits for a database server before giving up."""

SQLITE_BUSY_TIMEOUT_SECONDS = 30.0
"""How long a SQLite writer waits for another writer's lock."""

EVENT_STATUSES: tuple[str, ...] = ("provisional", "confirmed", "retracted")
TRIAGE_STATES: tuple[str, ...] = ("acknowledged", "dismissed", "explained")
REVISION_CHANGES: tuple[str, ...] = ("new", "reclassified", "retracted", "updated")
RUN_KINDS: tuple[str, ...] = ("scan", "backfill", "refit")
RUN_STATUSES: tuple[str, ...] = ("running", "completed", "failed", "abandoned")
"""``abandoned``: a run that ended without recording its end (killed, or its
database went away), closed by the next run (see :func:`close_stale_runs`)."""

RunKind = Literal["scan", "backfill", "refit"]
TriageState = Literal["acknowledged", "dismissed", "explained"]
Database = Engine | Connection | str | URL

_CHUNK = 500  # rows per IN (...) list when reading back a batch


# --------------------------------------------------------------------------- schema


class UtcDateTime(sa.TypeDecorator[datetime]):
    """A timestamp stored in UTC and always read back timezone-aware.

    PostgreSQL stores ``timestamptz``; SQLite stores the UTC wall time as text
    (``YYYY-MM-DD HH:MM:SS.ffffff``), so text comparison orders it correctly.
    """

    impl = sa.DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: sa.Dialect) -> datetime | None:
        return None if value is None else _utc(value)

    def process_result_value(self, value: Any, dialect: sa.Dialect) -> datetime | None:
        if value is None:
            return None
        if isinstance(value, str):  # SQLite text read through a raw view
            value = datetime.fromisoformat(value)
        return _utc(value)


def _in(column: str, values: Sequence[str]) -> str:
    quoted = ", ".join(f"'{v}'" for v in values)
    return f"{column} IN ({quoted})"


metadata = sa.MetaData(
    naming_convention={
        "ix": "ix_%(table_name)s_%(column_0_name)s",
        "uq": "uq_%(table_name)s_%(column_0_name)s",
        "ck": "ck_%(table_name)s_%(constraint_name)s",
        "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
        "pk": "pk_%(table_name)s",
    }
)
"""The one MetaData every table of changekind lives on."""

series_events = sa.Table(
    "series_events",
    metadata,
    # The detect --json contract.
    sa.Column("series_id", sa.Text, nullable=False),
    sa.Column("event_time", sa.Text, nullable=False),
    sa.Column("event_ts", UtcDateTime, nullable=True),
    sa.Column("event_type", sa.Text, nullable=False),
    sa.Column("effect", sa.Float, nullable=False),
    sa.Column("effect_pct", sa.Float, nullable=True),
    sa.Column("t_stat", sa.Float, nullable=False),
    sa.Column("se", sa.Float, nullable=False),
    sa.Column("type_weights", sa.Text, nullable=False),
    sa.Column("status", sa.Text, nullable=False),
    sa.Column("decay", sa.Float, nullable=True),
    sa.Column("half_life", sa.Text, nullable=True),
    sa.Column("level", sa.Float, nullable=False),
    sa.Column("model", sa.Text, nullable=False),
    # Bookkeeping: which run first wrote the row and which last changed it.
    sa.Column("first_run_id", sa.Text, nullable=False),
    sa.Column("last_run_id", sa.Text, nullable=False),
    sa.Column("first_seen", UtcDateTime, nullable=False),
    sa.Column("last_seen", UtcDateTime, nullable=False),
    sa.Column("window_start", sa.Text, nullable=True),
    sa.Column("window_end", sa.Text, nullable=True),
    # Triage belongs to people; no scan write ever touches these.
    sa.Column("triage_state", sa.Text, nullable=True),
    sa.Column("triage_reason", sa.Text, nullable=True),
    sa.Column("triage_at", UtcDateTime, nullable=True),
    sa.PrimaryKeyConstraint("series_id", "event_time"),
    sa.CheckConstraint(_in("event_type", REPORTED_TYPES), name="event_type"),
    sa.CheckConstraint(_in("status", EVENT_STATUSES), name="status"),
    sa.CheckConstraint(
        "triage_state IS NULL OR " + _in("triage_state", TRIAGE_STATES), name="triage_state"
    ),
    sa.Index("ix_series_events_event_ts", "event_ts"),
    sa.Index("ix_series_events_type_status", "event_type", "status"),
)
"""One row per event (series, time) with its current classification."""

event_revisions = sa.Table(
    "event_revisions",
    metadata,
    sa.Column("revision_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("series_id", sa.Text, nullable=False),
    sa.Column("event_time", sa.Text, nullable=False),
    sa.Column("run_id", sa.Text, nullable=False),
    sa.Column("change", sa.Text, nullable=False),
    sa.Column("old_type", sa.Text, nullable=True),
    sa.Column("new_type", sa.Text, nullable=True),
    sa.Column("old_status", sa.Text, nullable=True),
    sa.Column("new_status", sa.Text, nullable=True),
    sa.Column("old_effect", sa.Float, nullable=True),
    sa.Column("new_effect", sa.Float, nullable=True),
    sa.Column("changed_columns", sa.Text, nullable=True),
    sa.Column("changed_at", UtcDateTime, nullable=False),
    sa.ForeignKeyConstraint(
        ["series_id", "event_time"],
        ["series_events.series_id", "series_events.event_time"],
        ondelete="CASCADE",
    ),
    sa.CheckConstraint(_in("change", REVISION_CHANGES), name="change"),
    sa.Index("ix_event_revisions_event", "series_id", "event_time"),
    sa.Index("ix_event_revisions_run_id", "run_id"),
)
"""Every change of an event: one row per write that changed it."""

series_models = sa.Table(
    "series_models",
    metadata,
    sa.Column("series_id", sa.Text, primary_key=True),
    sa.Column("model_json", sa.Text, nullable=False),
    sa.Column("arima_order", sa.Text, nullable=False),
    sa.Column("sigma2", sa.Float, nullable=False),
    sa.Column("nobs", sa.Integer, nullable=False),
    sa.Column("fitted_through", sa.Text, nullable=True),
    sa.Column("fingerprint", sa.Text, nullable=True),
    sa.Column("fitted_at", UtcDateTime, nullable=False),
    sa.Column("watermark", sa.Text, nullable=True),
    sa.Column("analysed_from", sa.Text, nullable=True),
    sa.Column("reanalyse_until", sa.Text, nullable=True),
)
"""The model cache: one fitted model per series and the scan watermark.

``analysed_from`` is where the series' analysed span begins (a backfill's
start; NULL: the start of its data, as a scan or refit reads it), so the span
analysed is ``analysed_from .. watermark``.  ``reanalyse_until`` is set while a
backfill analyses a series again from an earlier start: the watermark an
earlier run had reached, which the analysis must reach again (a run killed
half-way leaves it for the next run to finish).
"""

source_problems = sa.Table(
    "source_problems",
    metadata,
    sa.Column("problem_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("run_id", sa.Text, nullable=False),
    sa.Column("location", sa.Text, nullable=False),
    sa.Column("row_number", sa.Integer, nullable=True),
    sa.Column("series_id", sa.Text, nullable=True),
    sa.Column("problem", sa.Text, nullable=False),
    sa.Column("found_at", UtcDateTime, nullable=False),
    sa.Index("ix_source_problems_run_id", "run_id"),
)
"""Parts of a source a run could not read: a file skipped (empty, truncated,
corrupt, wrong columns), a row skipped (no series id, wrong number of cells),
or a cell read as missing (not a number).  Everything else was analysed."""

run_locks = sa.Table(
    "run_locks",
    metadata,
    sa.Column("lock_name", sa.Text, primary_key=True),
    sa.Column("run_id", sa.Text, nullable=False),
    sa.Column("kind", sa.Text, nullable=False),
    sa.Column("host", sa.Text, nullable=False),
    sa.Column("pid", sa.Integer, nullable=False),
    sa.Column("acquired_at", UtcDateTime, nullable=False),
    sa.Column("heartbeat_at", UtcDateTime, nullable=False),
)
"""Who holds the database for a fleet run (one row while a run holds it).

On SQLite the row is the lock; on PostgreSQL a session advisory lock is, and
the row only says who holds it.  See :mod:`changekind.tasks.runlock`.
"""

scan_runs = sa.Table(
    "scan_runs",
    metadata,
    sa.Column("run_id", sa.Text, primary_key=True),
    sa.Column("kind", sa.Text, nullable=False),
    sa.Column("span_start", UtcDateTime, nullable=True),
    sa.Column("span_end", UtcDateTime, nullable=True),
    sa.Column("status", sa.Text, nullable=False),
    sa.Column("series_total", sa.Integer, nullable=False),
    sa.Column("series_ok", sa.Integer, nullable=False),
    sa.Column("series_failed", sa.Integer, nullable=False),
    sa.Column("events_new", sa.Integer, nullable=False),
    sa.Column("events_changed", sa.Integer, nullable=False),
    sa.Column("events_retracted", sa.Integer, nullable=False),
    sa.Column("started_at", UtcDateTime, nullable=False),
    sa.Column("finished_at", UtcDateTime, nullable=True),
    sa.Column("seconds", sa.Float, nullable=True),
    sa.Column("message", sa.Text, nullable=True),
    sa.CheckConstraint(_in("kind", RUN_KINDS), name="kind"),
    sa.CheckConstraint(_in("status", RUN_STATUSES), name="status"),
    sa.Index("ix_scan_runs_started_at", "started_at"),
)
"""One row per flow run."""

series_failures = sa.Table(
    "series_failures",
    metadata,
    sa.Column("run_id", sa.Text, nullable=False),
    sa.Column("series_id", sa.Text, nullable=False),
    sa.Column("stage", sa.Text, nullable=False),
    sa.Column("message", sa.Text, nullable=False),
    sa.Column("failed_at", UtcDateTime, nullable=False),
    sa.PrimaryKeyConstraint("run_id", "series_id", "stage"),
    sa.Index("ix_series_failures_series_id", "series_id"),
)
"""Series a run could not analyse, with the stage and the message."""

EVENT_COLUMNS: tuple[str, ...] = (
    "series_id",
    "event_time",
    "event_type",
    "effect",
    "effect_pct",
    "t_stat",
    "se",
    "type_weights",
    "status",
    "decay",
    "half_life",
    "level",
    "model",
    "window_start",
    "window_end",
)
"""The ``detect --json`` contract, in its order (``Event.to_record()`` keys)."""

EVENT_EXTRA_COLUMNS: tuple[str, ...] = (
    "event_ts",
    "first_seen",
    "last_seen",
    "first_run_id",
    "last_run_id",
    "triage_state",
    "triage_reason",
    "triage_at",
)
"""Columns :func:`read_events` returns after the contract's."""

# Columns whose difference makes a write a change of the event.  The window and
# the run bookkeeping are not among them: they are rewritten only with a change.
_COMPARED = (
    "event_type",
    "effect",
    "effect_pct",
    "t_stat",
    "se",
    "type_weights",
    "status",
    "decay",
    "half_life",
    "level",
    "model",
)
_UPDATED_ON_CHANGE = (
    *_COMPARED,
    "event_ts",
    "window_start",
    "window_end",
    "last_run_id",
    "last_seen",
)
_FLOAT_EVENT_COLUMNS = ("effect", "effect_pct", "t_stat", "se", "decay", "level")


# --------------------------------------------------------------------------- values


@dataclass(frozen=True, slots=True)
class WriteSummary:
    """What one :func:`write_events` call did.

    ``new`` rows inserted, ``changed`` rows whose classification or numbers
    changed (including a retracted event coming back), ``unchanged`` rows left
    untouched because the stored row was identical, ``retracted`` rows newly set
    to ``retracted``.  Summaries add up: ``sum(parts, WriteSummary())``.
    """

    new: int = 0
    changed: int = 0
    unchanged: int = 0
    retracted: int = 0

    def __add__(self, other: WriteSummary) -> WriteSummary:
        if not isinstance(other, WriteSummary):
            return NotImplemented
        return WriteSummary(
            *(getattr(self, f.name) + getattr(other, f.name) for f in fields(WriteSummary))
        )

    @property
    def revisions(self) -> int:
        """Revision rows written (one per new, changed or retracted event)."""
        return self.new + self.changed + self.retracted


# --------------------------------------------------------------------------- helpers


def _utc(value: datetime) -> datetime:
    """``value`` as an aware UTC datetime; naive values are taken to be UTC."""
    if not isinstance(value, datetime):
        raise ConfigError(f"expected a datetime, got {value!r}")
    if isinstance(value, pd.Timestamp):
        value = value.to_pydatetime(warn=False)
    if value.tzinfo is None:
        return value.replace(tzinfo=UTC)
    return value.astimezone(UTC)


def _now(at: datetime | None) -> datetime:
    return datetime.now(UTC) if at is None else _utc(at)


def _as_datetime(value: datetime | str | None, what: str) -> datetime | None:
    """A run span bound given as a datetime, an ISO text or a pandas Timestamp."""
    if value is None:
        return None
    if isinstance(value, datetime):  # pd.Timestamp is a datetime too
        return _utc(value)
    if isinstance(value, str):
        parsed = _parse_timestamp(value)
        if parsed is not None:
            return parsed
    raise ConfigError(
        f"{what} {value!r} is not a date-time; give an ISO 8601 time such as '2024-03-01T00:00:00Z'"
    )


_NUMBER = re.compile(r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$")


def _parse_timestamp(text: str) -> datetime | None:
    """Parse an event time as the input gave it; None when it is not a date-time.

    Plain numbers (the labels of numeric grids) are not date-times.  Times
    without a zone are taken to be UTC; others are converted to UTC.
    """
    if not text or _NUMBER.match(text):
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            stamp = pd.Timestamp(text)
    except (ValueError, TypeError, OverflowError):
        return None
    if stamp is pd.NaT:
        return None
    stamp = stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")
    return stamp.to_pydatetime(warn=False)


def _finite_or_none(value: float | None) -> float | None:
    """Floats as stored: NaN becomes NULL (SQLite cannot keep NaN anyway)."""
    if value is None:
        return None
    value = float(value)
    return None if math.isnan(value) else value


def _text(value: object, what: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ConfigError(f"{what} must be a non-empty text, got {value!r}")
    return value


def _count(value: object, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 0:
        raise ConfigError(f"{what} must be a whole number >= 0, got {value!r}")
    return int(value)


def _one_of(value: object, allowed: Sequence[str], what: str) -> str:
    if value not in allowed:
        raise ConfigError(f"{what} {value!r} is not one of {', '.join(allowed)}")
    return str(value)


def _chunks(items: Sequence[Any], size: int = _CHUNK) -> Iterator[Sequence[Any]]:
    for start in range(0, len(items), size):
        yield items[start : start + size]


def _masked(url: URL) -> str:
    return url.render_as_string(hide_password=True)


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


# --------------------------------------------------------------------------- engines


def _parse_url(url: str | URL) -> URL:
    if isinstance(url, URL):
        parsed = url
    else:
        if not isinstance(url, str) or not url.strip():
            raise ConfigError(
                f"database URL {url!r} is empty; give one such as {DEFAULT_URL!r} or "
                "'postgresql+psycopg://user@host:5432/dbname'"
            )
        try:
            parsed = sa.make_url(url.strip())
        except ArgumentError as exc:
            raise ConfigError(
                f"database URL {url!r} cannot be read ({exc}); give one such as "
                f"{DEFAULT_URL!r} or 'postgresql+psycopg://user@host:5432/dbname'"
            ) from None
    backend = parsed.get_backend_name()
    if backend not in _INSERTS:
        raise ConfigError(
            f"database {_masked(parsed)!r} uses {backend!r}; changekind supports "
            "sqlite and postgresql URLs only"
        )
    if parsed.drivername == "postgresql":  # SQLAlchemy's default driver is not ours
        parsed = parsed.set(drivername="postgresql+psycopg")
    return parsed


def _engine_options(url: URL, timeout: float) -> dict[str, Any]:
    if url.get_backend_name() == "sqlite":
        return {"connect_args": {"timeout": SQLITE_BUSY_TIMEOUT_SECONDS}}
    connect_args: dict[str, Any] = {}
    if "connect_timeout" not in url.query:
        connect_args["connect_timeout"] = max(1, math.ceil(timeout))
    return {"connect_args": connect_args, "pool_pre_ping": True}


def _first_line(exc: BaseException) -> str:
    inner = getattr(exc, "orig", None) or exc
    text = " ".join(str(inner).split("\n")[0].split())
    return text or type(inner).__name__


def connect(url: str | URL = DEFAULT_URL, *, timeout: float = CONNECT_TIMEOUT_SECONDS) -> Engine:
    """Make an engine for ``url`` and check that the database answers.

    Parameters
    ----------
    url : str or sqlalchemy.engine.URL, default='sqlite:///changekind.db'
        A SQLite or PostgreSQL URL.  ``postgresql://`` means the psycopg 3 driver.
    timeout : float, default=5
        Seconds to wait for a database server (ignored for SQLite files).

    Returns
    -------
    sqlalchemy.engine.Engine
        The caller owns it and should ``dispose()`` it when done.

    Raises
    ------
    ConfigError
        The URL cannot be read, names another database or a missing driver.
    SourceError
        The database cannot be reached or opened; the message shows the URL
        with its password masked and says what to check.
    """
    parsed = _parse_url(url)
    try:
        engine = sa.create_engine(parsed, **_engine_options(parsed, timeout))
    except (NoSuchModuleError, ImportError) as exc:
        raise ConfigError(
            f"database {_masked(parsed)!r} needs a driver that is not installed ({exc}); "
            "for PostgreSQL install psycopg 3 (pip install 'changekind[postgres]') and "
            "use a postgresql+psycopg:// URL"
        ) from None
    except (ArgumentError, TypeError) as exc:
        raise ConfigError(f"database URL {_masked(parsed)!r} is not usable: {exc}") from None
    try:
        with engine.connect():
            pass
    except (DBAPIError, OSError) as exc:
        engine.dispose()
        if parsed.get_backend_name() == "sqlite":
            hint = "check that its folder exists and is writable, or give another URL"
        else:
            hint = (
                "check that the server is running and reachable, that the database "
                "and user exist, or give another URL"
            )
        raise DatabaseUnavailableError(
            f"cannot open database {_masked(parsed)!r}: {_first_line(exc)}; {hint}"
        ) from None
    return engine


class _InTransaction:
    """A connection already in a transaction, standing in for an engine.

    ``begin()`` and ``connect()`` hand the same connection back, so the public
    writers can run inside one caller's transaction (see :func:`write_batch`).
    """

    def __init__(self, conn: Connection) -> None:
        self._conn = conn

    def begin(self) -> AbstractContextManager[Connection]:
        return nullcontext(self._conn)

    def connect(self) -> AbstractContextManager[Connection]:
        return nullcontext(self._conn)


@contextmanager
def _engine(db: Database) -> Iterator[Engine]:
    """The caller's engine as is, or one made from a URL and disposed afterwards."""
    if isinstance(db, Engine):
        yield db
        return
    if isinstance(db, Connection):
        yield _InTransaction(db)  # type: ignore[misc]
        return
    engine = connect(db)
    try:
        yield engine
    finally:
        engine.dispose()


def migrations_dir() -> Path:
    """The Alembic script folder ``infra/migrations`` beside the package folders.

    Raises
    ------
    ConfigError
        When changekind runs from an installation without the ``infra`` folder.
    """
    path = Path(__file__).resolve().parent.parent / "infra" / "migrations"
    if not (path / "env.py").is_file():
        raise ConfigError(
            f"the database migrations were not found (looked for {path / 'env.py'}); "
            "run changekind from a source checkout or an editable install "
            "(pip install -e .), which keeps the infra/ folder beside tasks/"
        )
    return path


def _alembic_config() -> Any:
    from alembic.config import Config  # imported here: only migrations need Alembic

    config = Config()
    config.set_main_option("script_location", str(migrations_dir()).replace("%", "%%"))
    return config


def migrate(db: Database = DEFAULT_URL, *, revision: str = "head") -> None:
    """Upgrade the database's schema to ``revision`` (default: the newest).

    Parameters
    ----------
    db : Engine or str, default='sqlite:///changekind.db'
        The database (see the module notes).
    revision : str, default='head'
        An Alembic revision identifier.

    Notes
    -----
    Runs Alembic's ``upgrade`` command on one connection in one transaction,
    with the script folder from :func:`migrations_dir` (never the working
    folder).  Upgrading a database that is already at ``revision`` does nothing.
    """
    from alembic import command

    # Two runs may migrate a new database at once: Alembic's context is global
    # to the process (one migration at a time here), PostgreSQL serializes on
    # an advisory lock, and on SQLite the loser of the race tries once more
    # (and then finds the schema up to date).
    for attempt in (1, 2):
        try:
            with _MIGRATING, _engine(db) as engine, engine.begin() as conn:
                if conn.dialect.name == "postgresql":
                    conn.exec_driver_sql(
                        "SELECT pg_advisory_xact_lock("
                        "hashtext('changekind-migrate:' || current_schema()))"
                    )
                config = _alembic_config()
                config.attributes["connection"] = conn
                command.upgrade(config, revision)
            return
        except DBAPIError:
            if attempt == 2:
                raise


_MIGRATING = threading.Lock()


def init_db(url: str | URL = DEFAULT_URL) -> Engine:
    """Connect to ``url``, bring its schema up to date and return the engine.

    The caller owns the engine and should ``dispose()`` it when done.
    """
    engine = connect(url)
    try:
        migrate(engine)
    except BaseException:
        engine.dispose()
        raise
    return engine


# --------------------------------------------------------------------------- upsert

_INSERTS = {"sqlite": sqlite_dialect.insert, "postgresql": pg_dialect.insert}


def _upsert(
    conn: Connection,
    table: sa.Table,
    rows: Sequence[Mapping[str, Any]],
    *,
    keys: Sequence[str],
    update: Sequence[str],
    keep_when_null: Sequence[str] = (),
) -> None:
    """``INSERT ... ON CONFLICT (keys) DO UPDATE`` for a batch: the one dialect switch.

    Parameters
    ----------
    conn : Connection
        Inside the caller's transaction.
    rows : sequence of mappings
        All with the same keys.
    keys : sequence of str
        The primary-key columns the conflict is on.
    update : sequence of str
        Columns a conflicting row gets from the new one; empty means ``DO NOTHING``.
    keep_when_null : sequence of str
        Of ``update``: columns that keep the stored value when the new one is NULL.
    """
    if not rows:
        return
    try:
        insert = _INSERTS[conn.dialect.name]
    except KeyError:
        raise ConfigError(
            f"database dialect {conn.dialect.name!r} is not supported; use sqlite or postgresql"
        ) from None
    stmt = insert(table)
    if update:
        set_ = {
            name: sa.func.coalesce(stmt.excluded[name], table.c[name])
            if name in keep_when_null
            else stmt.excluded[name]
            for name in update
        }
        stmt = stmt.on_conflict_do_update(index_elements=list(keys), set_=set_)
    else:
        stmt = stmt.on_conflict_do_nothing(index_elements=list(keys))
    conn.execute(stmt, [dict(row) for row in rows])


# --------------------------------------------------------------------------- events


def _event_values(event: Event) -> dict[str, Any]:
    """The stored form of an event's contract columns, validated."""
    if not isinstance(event, Event):
        raise ConfigError(f"expected an Event, got {type(event).__name__}")
    where = f"event of series {event.series_id!r} at {event.event_time!r}"
    _text(event.series_id, "series_id")
    _text(event.event_time, f"event_time of series {event.series_id!r}")
    _one_of(event.event_type, REPORTED_TYPES, f"{where}: event_type")
    _one_of(event.status, EVENT_STATUSES[:2], f"{where}: status")
    values: dict[str, Any] = {
        "series_id": event.series_id,
        "event_time": event.event_time,
        "event_ts": _parse_timestamp(event.event_time),
        "event_type": event.event_type,
        "type_weights": json.dumps(
            {str(k): float(v) for k, v in event.type_weights}, separators=(",", ":")
        ),
        "status": event.status,
        "half_life": event.half_life,
        "model": str(event.model),
        "window_start": event.window_start,
        "window_end": event.window_end,
    }
    for name in _FLOAT_EVENT_COLUMNS:
        values[name] = _finite_or_none(getattr(event, name))
    for name in ("effect", "t_stat", "se", "level"):
        if values[name] is None:
            raise ConfigError(f"{where}: {name} is missing or NaN; it must be a number")
    return values


def _stored_events(
    conn: Connection, keys: Sequence[tuple[str, str]]
) -> dict[tuple[str, str], dict[str, Any]]:
    """The stored rows for ``keys`` (those that exist), read in chunks of series."""
    wanted = set(keys)
    series = sorted({series_id for series_id, _ in wanted})
    columns = [series_events.c[name] for name in ("series_id", "event_time", *_COMPARED)]
    found: dict[tuple[str, str], dict[str, Any]] = {}
    for chunk in _chunks(series):
        query = sa.select(*columns).where(series_events.c.series_id.in_(chunk))
        for row in conn.execute(query).mappings():
            key = (row["series_id"], row["event_time"])
            if key in wanted:
                found[key] = dict(row)
    return found


def _differs(a: Any, b: Any) -> bool:
    """A real change: floats that agree to 1e-9 relative are the same value.

    The same analysis run twice can differ in the last bits of a float; that
    is not a change of the event and must not log a revision.
    """
    if isinstance(a, float) and isinstance(b, float):
        if math.isnan(a) or math.isnan(b):
            return not (math.isnan(a) and math.isnan(b))
        return not math.isclose(a, b, rel_tol=1e-9, abs_tol=0.0)
    return a != b


def write_events(
    db: Database,
    run_id: str,
    events: Sequence[Event],
    *,
    retract: Sequence[tuple[str, str]] = (),
    at: datetime | None = None,
) -> WriteSummary:
    """Upsert a batch of events and retractions; log every change as a revision.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    run_id : str
        The run writing (a Prefect flow-run id when there is one).
    events : sequence of Event
        The current classification of each event; one per (series_id, event_time).
    retract : sequence of (series_id, event_time), default=()
        Stored events that the run no longer finds.  Keys not stored, or already
        retracted, are left alone.
    at : datetime, optional
        The time written to ``first_seen``/``last_seen``/``changed_at``; now (UTC)
        by default.

    Returns
    -------
    WriteSummary

    Raises
    ------
    ConfigError
        An invalid event, a key given twice, or a key both written and retracted.

    Notes
    -----
    1. Read the stored rows of the batch's keys.
    2. Compare each event with its row on the contract's columns (exactly: the
       database keeps doubles bit for bit).  Identical -> the row is left
       untouched entirely, bookkeeping included, so writing the same batch again
       changes nothing.  No row -> ``new``.  Another type -> ``reclassified``;
       any other difference (status, effect, t statistic, model, ...) ->
       ``updated``.  The window and ``last_run_id``/``last_seen`` are rewritten
       only with a change; ``last_seen`` is thus the time of the last change.
    3. Upsert the new and changed rows (triage columns are never in the update).
    4. Set ``status = 'retracted'`` on retracted keys and log those.
    5. Insert one ``event_revisions`` row per new, changed or retracted event.
    All in one transaction.
    """
    run_id = _text(run_id, "run_id")
    when = _now(at)
    rows = [_event_values(event) for event in events]
    keys = [(row["series_id"], row["event_time"]) for row in rows]
    if len(set(keys)) != len(keys):
        dup = next(k for k in keys if keys.count(k) > 1)
        raise ConfigError(
            f"the batch holds series {dup[0]!r} at {dup[1]!r} more than once; give each event once"
        )
    retract_keys = sorted({(_text(s, "series_id"), _text(t, "event_time")) for s, t in retract})
    both = set(keys) & set(retract_keys)
    if both:
        s, t = sorted(both)[0]
        raise ConfigError(
            f"series {s!r} at {t!r} is both written and retracted in one batch; give it once"
        )

    with _engine(db) as engine, engine.begin() as conn:
        # Step 1.
        stored = _stored_events(conn, [*keys, *retract_keys])
        # Step 2.
        upserts: list[dict[str, Any]] = []
        revisions: list[dict[str, Any]] = []
        new = changed = unchanged = 0
        for key, row in zip(keys, rows, strict=True):
            old = stored.get(key)
            if old is None:
                change, diff = "new", None
                new += 1
            else:
                diff = [name for name in _COMPARED if _differs(row[name], old[name])]
                if not diff:
                    unchanged += 1
                    continue
                change = "reclassified" if "event_type" in diff else "updated"
                changed += 1
            upserts.append(
                {
                    **row,
                    "first_run_id": run_id,
                    "last_run_id": run_id,
                    "first_seen": when,
                    "last_seen": when,
                }
            )
            revisions.append(_revision(key, run_id, change, old, row, diff, when))
        # Step 3.
        _upsert(
            conn,
            series_events,
            upserts,
            keys=("series_id", "event_time"),
            update=_UPDATED_ON_CHANGE,
        )
        # Step 4.
        retracted = 0
        for key in retract_keys:
            old = stored.get(key)
            if old is None or old["status"] == "retracted":
                continue
            conn.execute(
                sa.update(series_events)
                .where(series_events.c.series_id == key[0], series_events.c.event_time == key[1])
                .values(status="retracted", last_run_id=run_id, last_seen=when)
            )
            revisions.append(
                _revision(
                    key, run_id, "retracted", old, {**old, "status": "retracted"}, ["status"], when
                )
            )
            retracted += 1
        # Step 5.
        if revisions:
            conn.execute(sa.insert(event_revisions), revisions)
    return WriteSummary(new=new, changed=changed, unchanged=unchanged, retracted=retracted)


def _revision(
    key: tuple[str, str],
    run_id: str,
    change: str,
    old: Mapping[str, Any] | None,
    new: Mapping[str, Any],
    diff: Sequence[str] | None,
    when: datetime,
) -> dict[str, Any]:
    return {
        "series_id": key[0],
        "event_time": key[1],
        "run_id": run_id,
        "change": change,
        "old_type": None if old is None else old["event_type"],
        "new_type": new["event_type"],
        "old_status": None if old is None else old["status"],
        "new_status": new["status"],
        "old_effect": None if old is None else old["effect"],
        "new_effect": new["effect"],
        "changed_columns": None if diff is None else ",".join(diff),
        "changed_at": when,
    }


def read_events(
    db: Database,
    *,
    since: datetime | str | None = None,
    series_ids: Sequence[str] | None = None,
    include_retracted: bool = False,
) -> pd.DataFrame:
    """Stored events as a table, oldest first.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    since : datetime or str, optional
        Only events at or after this time (by ``event_ts``; events whose time is
        not a date-time are then left out).  Naive times are UTC.
    series_ids : sequence of str, optional
        Only these series.
    include_retracted : bool, default=False
        Also return events the scans have retracted.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`EVENT_COLUMNS` (the ``detect --json`` contract; numbers
        float64 with NaN for missing, texts object with None, ``type_weights`` a
        dict) then :data:`EVENT_EXTRA_COLUMNS` (times as ``datetime64[ns, UTC]``).
        Sorted by ``event_ts`` (rows without one last), ``series_id``, ``event_time``.
    """
    since_ts = _as_datetime(since, "since")
    conditions = []
    if since_ts is not None:
        conditions.append(series_events.c.event_ts >= since_ts)
    if not include_retracted:
        conditions.append(series_events.c.status != "retracted")
    columns = [series_events.c[name] for name in (*EVENT_COLUMNS, *EVENT_EXTRA_COLUMNS)]
    base = sa.select(*columns).where(*conditions)
    with _engine(db) as engine, engine.connect() as conn:
        if series_ids is None:
            records = [dict(r) for r in conn.execute(base).mappings()]
        else:
            ids = sorted({_text(s, "series_id") for s in series_ids})
            records = []
            for chunk in _chunks(ids):
                query = base.where(series_events.c.series_id.in_(chunk))
                records.extend(dict(r) for r in conn.execute(query).mappings())
    return _events_frame(records)


def load_known_events(
    db: Database, series_ids: Sequence[str] | None = None
) -> dict[str, tuple[Event, ...]]:
    """Stored events that are not retracted, as Event values grouped by series.

    What a scan hands the engine so earlier effects are removed before new
    points are tested and provisional events can be revisited.  ``position``
    is -1 (positions belong to one analysed grid; stored events are placed by
    time).
    """
    frame = read_events(db, series_ids=series_ids)
    out: dict[str, list[Event]] = {}
    for row in frame.itertuples(index=False):
        rec = row._asdict()
        out.setdefault(rec["series_id"], []).append(
            Event(
                series_id=rec["series_id"],
                position=-1,
                event_time=rec["event_time"],
                event_type=rec["event_type"],
                effect=float(rec["effect"]),
                effect_pct=_nan_to_none(rec["effect_pct"]),
                t_stat=float(rec["t_stat"]),
                se=float(rec["se"]),
                type_weights=tuple((k, float(v)) for k, v in rec["type_weights"].items()),
                status=rec["status"],
                decay=_nan_to_none(rec["decay"]),
                half_life=rec["half_life"],
                level=float(rec["level"]),
                model=rec["model"],
                window_start=rec["window_start"],
                window_end=rec["window_end"],
            )
        )
    return {k: tuple(v) for k, v in out.items()}


def _nan_to_none(value: Any) -> float | None:
    return (
        None if value is None or (isinstance(value, float) and math.isnan(value)) else float(value)
    )


def _events_frame(records: list[dict[str, Any]]) -> pd.DataFrame:
    data: dict[str, Any] = {}
    for name in (*EVENT_COLUMNS, *EVENT_EXTRA_COLUMNS):
        values = [r[name] for r in records]
        if name in _FLOAT_EVENT_COLUMNS:
            data[name] = np.array([np.nan if v is None else v for v in values], dtype=np.float64)
        elif name in ("event_ts", "first_seen", "last_seen", "triage_at"):
            data[name] = pd.to_datetime(pd.Series(values, dtype=object), utc=True).astype(
                "datetime64[ns, UTC]"
            )
        elif name == "type_weights":
            data[name] = pd.Series([json.loads(v) for v in values], dtype=object)
        else:
            data[name] = pd.Series(values, dtype=object)
    frame = pd.DataFrame(data)
    frame = frame.sort_values(
        ["event_ts", "series_id", "event_time"], na_position="last", kind="stable"
    )
    return frame.reset_index(drop=True)


def set_triage(
    db: Database,
    series_id: str,
    event_time: str,
    state: TriageState | None,
    reason: str | None = None,
    *,
    at: datetime | None = None,
) -> None:
    """Record a person's verdict on an event; scans never overwrite it.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    series_id, event_time : str
        The event, ``event_time`` exactly as stored.
    state : {'acknowledged', 'dismissed', 'explained'} or None
        The verdict; None clears it (with its reason and time).
    reason : str, optional
        Free text, e.g. the change ticket that explains a level shift.
    at : datetime, optional
        Written to ``triage_at``; now (UTC) by default.

    Raises
    ------
    ConfigError
        ``state`` is not one of the verdicts, or no such event is stored.
    """
    if state is not None:
        _one_of(state, TRIAGE_STATES, "triage state")
    if reason is not None and not isinstance(reason, str):
        raise ConfigError(f"triage reason must be a text, got {reason!r}")
    values = (
        {"triage_state": None, "triage_reason": None, "triage_at": None}
        if state is None
        else {"triage_state": state, "triage_reason": reason, "triage_at": _now(at)}
    )
    with _engine(db) as engine, engine.begin() as conn:
        result = conn.execute(
            sa.update(series_events)
            .where(series_events.c.series_id == series_id, series_events.c.event_time == event_time)
            .values(**values)
        )
        if result.rowcount == 0:
            raise ConfigError(
                f"no stored event for series {series_id!r} at {event_time!r}; list the "
                "stored events (with their event_time as stored) and pick one of them"
            )


# --------------------------------------------------------------------------- models


def _arima_order(model: FittedModel) -> str:
    p, d, q = model.order
    P, D, Q, s = model.seasonal_order
    return f"({p},{d},{q})({P},{D},{Q},{s})"


# Kept by save_models: the key, and the analysed span (written by set_coverage).
_NOT_SAVED = ("series_id", "analysed_from", "reanalyse_until")


def save_models(
    db: Database,
    models: Sequence[FittedModel],
    *,
    watermarks: Mapping[str, str],
    fitted_at: datetime | None = None,
) -> int:
    """Store fitted models (one per series), replacing the series' previous one.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    models : sequence of FittedModel
        At most one per series.
    watermarks : mapping of series_id to str
        The last timestamp tested for each series; a series missing here keeps
        its stored watermark (NULL for a first save).
    fitted_at : datetime, optional
        When the models were fitted; now (UTC) by default.

    Returns
    -------
    int
        The number of models written.
    """
    when = _now(fitted_at)
    seen: set[str] = set()
    rows = []
    for model in models:
        if not isinstance(model, FittedModel):
            raise ConfigError(f"expected a FittedModel, got {type(model).__name__}")
        series_id = _text(model.series_id, "model series_id")
        if series_id in seen:
            raise ConfigError(f"the batch holds two models for series {series_id!r}; give one")
        seen.add(series_id)
        mark = watermarks.get(series_id)
        rows.append(
            {
                "series_id": series_id,
                "model_json": model.to_json(),
                "arima_order": _arima_order(model),
                "sigma2": float(model.sigma2),
                "nobs": int(model.nobs),
                "fitted_through": model.fitted_through,
                "fingerprint": model.fingerprint,
                "fitted_at": when,
                "watermark": None if mark is None else _text(mark, f"watermark of {series_id!r}"),
            }
        )
    with _engine(db) as engine, engine.begin() as conn:
        _upsert(
            conn,
            series_models,
            rows,
            keys=("series_id",),
            update=[c.name for c in series_models.columns if c.name not in _NOT_SAVED],
            keep_when_null=("watermark",),
        )
    return len(rows)


def load_models(db: Database, series_ids: Sequence[str] | None = None) -> dict[str, FittedModel]:
    """The cached models, by series id (series without one are absent).

    Raises
    ------
    ModelError
        A stored model cannot be read; the message names the series to refit.
    """
    query = sa.select(series_models.c.series_id, series_models.c.model_json)
    out: dict[str, FittedModel] = {}
    for series_id, text in _select_by_series(db, query, series_models, series_ids):
        try:
            out[series_id] = FittedModel.from_json(text)
        except ModelError as exc:
            raise ModelError(f"series {series_id!r}: {exc}") from None
    return out


def load_watermarks(db: Database, series_ids: Sequence[str] | None = None) -> dict[str, str]:
    """The scan watermark (last timestamp tested) of each series that has one."""
    query = sa.select(series_models.c.series_id, series_models.c.watermark).where(
        series_models.c.watermark.is_not(None)
    )
    return dict(_select_by_series(db, query, series_models, series_ids))


def _select_by_series(
    db: Database, query: sa.Select[Any], table: sa.Table, series_ids: Sequence[str] | None
) -> list[tuple[Any, ...]]:
    with _engine(db) as engine, engine.connect() as conn:
        if series_ids is None:
            return [tuple(r) for r in conn.execute(query)]
        ids = sorted({_text(s, "series_id") for s in series_ids})
        rows: list[tuple[Any, ...]] = []
        for chunk in _chunks(ids):
            rows.extend(tuple(r) for r in conn.execute(query.where(table.c.series_id.in_(chunk))))
        return rows


def update_watermarks(db: Database, watermarks: Mapping[str, str]) -> int:
    """Move the scan watermark of series that have a cached model.

    Returns the number of series updated; series without a cached model have
    nowhere to keep a watermark and are not counted (save their model first).
    """
    marks = {
        _text(series_id, "series_id"): _text(mark, f"watermark of {series_id!r}")
        for series_id, mark in watermarks.items()
    }
    if not marks:
        return 0
    stmt = (
        sa.update(series_models)
        .where(series_models.c.series_id == sa.bindparam("key"))
        .values(watermark=sa.bindparam("mark"))
    )
    with _engine(db) as engine, engine.begin() as conn:
        cached = [
            series_id
            for chunk in _chunks(sorted(marks))
            for series_id in conn.execute(
                sa.select(series_models.c.series_id).where(series_models.c.series_id.in_(chunk))
            ).scalars()
        ]
        if cached:  # rowcount of an executemany is not reliable on every driver
            conn.execute(stmt, [{"key": s, "mark": marks[s]} for s in sorted(cached)])
    return len(cached)


@dataclass(frozen=True, slots=True)
class Coverage:
    """The span of a series that runs have analysed: ``analysed_from .. watermark``.

    ``analysed_from`` None means from the start of the series' data;
    ``reanalyse_until`` is set while a backfill analyses the series again from
    an earlier start (the watermark it must reach again).
    """

    analysed_from: str | None = None
    watermark: str | None = None
    reanalyse_until: str | None = None


def load_coverage(db: Database, series_ids: Sequence[str] | None = None) -> dict[str, Coverage]:
    """The analysed span of each series that has a cached model."""
    query = sa.select(
        series_models.c.series_id,
        series_models.c.analysed_from,
        series_models.c.watermark,
        series_models.c.reanalyse_until,
    )
    return {
        row[0]: Coverage(row[1], row[2], row[3])
        for row in _select_by_series(db, query, series_models, series_ids)
    }


def set_coverage(
    db: Database,
    *,
    analysed_from: Mapping[str, str | None] | None = None,
    reanalyse_until: Mapping[str, str | None] | None = None,
) -> None:
    """Set ``analysed_from`` / ``reanalyse_until`` of series with a cached model.

    A series present in a mapping gets that value (None writes NULL); absent
    series keep theirs.
    """
    with _engine(db) as engine, engine.begin() as conn:
        for column, values in (
            ("analysed_from", analysed_from),
            ("reanalyse_until", reanalyse_until),
        ):
            if not values:
                continue
            update = (
                sa.update(series_models)
                .where(series_models.c.series_id == sa.bindparam("key"))
                .values({column: sa.bindparam("value")})
            )
            conn.execute(
                update,
                [{"key": _text(k, "series_id"), "value": v} for k, v in sorted(values.items())],
            )


def write_batch(
    db: Database,
    run_id: str,
    *,
    events: Sequence[Event] = (),
    retract: Sequence[tuple[str, str]] = (),
    models: Sequence[FittedModel] = (),
    watermarks: Mapping[str, str] | None = None,
    failures: Sequence[tuple[str, str, str]] = (),
    analysed_from: Mapping[str, str | None] | None = None,
    reanalyse_until: Mapping[str, str | None] | None = None,
    problems: Sequence[tuple[str, int | None, str | None, str]] = (),
    at: datetime | None = None,
) -> WriteSummary:
    """Write everything one batch of series produced, in one transaction.

    Events and retractions (:func:`write_events`), new models with their
    watermarks (:func:`save_models`), watermarks of series whose model is
    kept (:func:`update_watermarks`), the series' analysed spans
    (:func:`set_coverage`) and failures (:func:`record_failures`) commit
    together or not at all, so a run killed mid-way leaves every series either
    before or after its batch: a rerun continues from there and ends with the
    tables an uninterrupted run leaves.
    """
    marks = dict(watermarks or {})
    modelled = {m.series_id for m in models}
    with _engine(db) as engine, engine.begin() as conn:
        summary = write_events(conn, run_id, events, retract=retract, at=at)
        if models:
            save_models(conn, models, watermarks=marks, fitted_at=at)
        rest = {k: v for k, v in marks.items() if k not in modelled}
        if rest:
            update_watermarks(conn, rest)
        if analysed_from or reanalyse_until:
            set_coverage(conn, analysed_from=analysed_from, reanalyse_until=reanalyse_until)
        if failures:
            record_failures(conn, run_id, failures, at=at)
        if problems:
            record_source_problems(conn, run_id, problems, at=at)
    return summary


# --------------------------------------------------------------------------- runs


def start_run(
    db: Database,
    run_id: str,
    kind: RunKind,
    span_start: datetime | str | None,
    span_end: datetime | str | None,
    *,
    at: datetime | None = None,
) -> None:
    """Record that a run started (again, if it is retried under the same id).

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    run_id : str
        The Prefect flow-run id when there is one.
    kind : {'scan', 'backfill', 'refit'}
    span_start, span_end : datetime or ISO text or None
        The time span the run covers.
    at : datetime, optional
        ``started_at``; now (UTC) by default.
    """
    row = {
        "run_id": _text(run_id, "run_id"),
        "kind": _one_of(kind, RUN_KINDS, "run kind"),
        "span_start": _as_datetime(span_start, "span_start"),
        "span_end": _as_datetime(span_end, "span_end"),
        "status": "running",
        "series_total": 0,
        "series_ok": 0,
        "series_failed": 0,
        "events_new": 0,
        "events_changed": 0,
        "events_retracted": 0,
        "started_at": _now(at),
        "finished_at": None,
        "seconds": None,
        "message": None,
    }
    if row["span_start"] and row["span_end"] and row["span_end"] < row["span_start"]:
        raise ConfigError(
            f"run {run_id!r}: span_end {span_end!r} is before span_start {span_start!r}"
        )
    with _engine(db) as engine, engine.begin() as conn:
        _upsert(
            conn,
            scan_runs,
            [row],
            keys=("run_id",),
            update=[name for name in row if name != "run_id"],
        )


def finish_run(
    db: Database,
    run_id: str,
    status: Literal["completed", "failed"],
    *,
    series_total: int = 0,
    series_ok: int = 0,
    series_failed: int = 0,
    events_new: int = 0,
    events_changed: int = 0,
    events_retracted: int = 0,
    message: str | None = None,
    at: datetime | None = None,
) -> float:
    """Record a run's end, its counts and its duration.

    Returns
    -------
    float
        The run's duration in seconds (``finished_at - started_at``).

    Raises
    ------
    ConfigError
        Bad status or counts, or no run ``run_id`` was started.
    """
    _one_of(status, RUN_STATUSES[1:], "final run status")
    counts = {
        name: _count(value, name)
        for name, value in (
            ("series_total", series_total),
            ("series_ok", series_ok),
            ("series_failed", series_failed),
            ("events_new", events_new),
            ("events_changed", events_changed),
            ("events_retracted", events_retracted),
        )
    }
    when = _now(at)
    with _engine(db) as engine, engine.begin() as conn:
        started = conn.execute(
            sa.select(scan_runs.c.started_at).where(scan_runs.c.run_id == run_id)
        ).scalar_one_or_none()
        if started is None:
            raise ConfigError(f"no run {run_id!r} was started; call start_run first")
        seconds = (when - started).total_seconds()
        conn.execute(
            sa.update(scan_runs)
            .where(scan_runs.c.run_id == run_id)
            .values(status=status, finished_at=when, seconds=seconds, message=message, **counts)
        )
    return seconds


def record_source_problems(
    db: Database,
    run_id: str,
    problems: Sequence[tuple[str, int | None, str | None, str]],
    *,
    at: datetime | None = None,
) -> int:
    """Record parts of a source a run could not read.

    Parameters
    ----------
    problems : sequence of (location, row_number, series_id, problem)
        ``row_number`` and ``series_id`` may be None.  The same problem given
        again for the same run is recorded once.
    """
    run_id = _text(run_id, "run_id")
    when = _now(at)
    rows = []
    with _engine(db) as engine, engine.begin() as conn:
        known = {
            tuple(r)
            for r in conn.execute(
                sa.select(
                    source_problems.c.location,
                    source_problems.c.row_number,
                    source_problems.c.series_id,
                    source_problems.c.problem,
                ).where(source_problems.c.run_id == run_id)
            )
        }
        for location, row, series_id, problem in dict.fromkeys(tuple(p) for p in problems):
            if (location, row, series_id, problem) in known:
                continue
            rows.append(
                {
                    "run_id": run_id,
                    "location": _text(location, "problem location"),
                    "row_number": None if row is None else int(row),
                    "series_id": series_id,
                    "problem": str(problem),
                    "found_at": when,
                }
            )
        if rows:
            conn.execute(sa.insert(source_problems), rows)
    return len(rows)


def close_stale_runs(db: Database, run_id: str, *, at: datetime | None = None) -> list[str]:
    """Close every other run still recorded as ``running``: status ``abandoned``.

    Called by a run that holds the run lock (:mod:`changekind.tasks.runlock`):
    no other run can be running then, so a ``running`` row is a run that
    ended without recording its end (killed, or its database went away).

    Returns
    -------
    list of str
        The run ids closed.
    """
    when = _now(at)
    with _engine(db) as engine, engine.begin() as conn:
        stale = conn.execute(
            sa.select(scan_runs.c.run_id, scan_runs.c.started_at).where(
                scan_runs.c.status == "running", scan_runs.c.run_id != run_id
            )
        ).all()
        for stale_id, started in stale:
            conn.execute(
                sa.update(scan_runs)
                .where(scan_runs.c.run_id == stale_id)
                .values(
                    status="abandoned",
                    finished_at=when,
                    seconds=(when - started).total_seconds(),
                    message=(
                        f"closed by run {run_id} at {when.isoformat(timespec='seconds')}: "
                        "this run ended without recording its end (killed, or its database "
                        "went away); what it wrote stays, and a rerun continues from each "
                        "series' watermark"
                    ),
                )
            )
    return [row[0] for row in stale]


def record_failures(
    db: Database,
    run_id: str,
    failures: Sequence[tuple[str, str, str]],
    *,
    at: datetime | None = None,
) -> int:
    """Record series a run could not analyse.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    run_id : str
    failures : sequence of (series_id, stage, message)
        ``stage`` names the step that failed (e.g. ``fetch``, ``fit``).  The same
        (run, series, stage) again replaces its message.
    at : datetime, optional
        ``failed_at``; now (UTC) by default.

    Returns
    -------
    int
        The number of failures written.
    """
    run_id = _text(run_id, "run_id")
    when = _now(at)
    rows: dict[tuple[str, str], dict[str, Any]] = {}
    for item in failures:
        if not isinstance(item, tuple | list) or len(item) != 3:
            raise ConfigError(f"a failure must be (series_id, stage, message), got {item!r}")
        series_id, stage, message = item
        key = (_text(series_id, "failure series_id"), _text(stage, "failure stage"))
        rows[key] = {
            "run_id": run_id,
            "series_id": key[0],
            "stage": key[1],
            "message": str(message),
            "failed_at": when,
        }
    with _engine(db) as engine, engine.begin() as conn:
        _upsert(
            conn,
            series_failures,
            list(rows.values()),
            keys=("run_id", "series_id", "stage"),
            update=("message", "failed_at"),
        )
    return len(rows)


# --------------------------------------------------------------------------- tests


def table_snapshot(db: Database) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every changekind table, sorted: for comparing database states.

    Rows are sorted on their values' text (None last), so two snapshots compare
    equal exactly when the tables hold the same rows.
    """

    def order(row: tuple[Any, ...]) -> tuple[tuple[bool, str], ...]:
        return tuple((value is None, str(value)) for value in row)

    with _engine(db) as engine, engine.connect() as conn:
        inspector = sa.inspect(conn)  # older schemas lack newer tables and columns
        present = set(inspector.get_table_names())
        out = {}
        for table in metadata.sorted_tables:
            if table.name not in present:
                continue
            names = {c["name"] for c in inspector.get_columns(table.name)}
            query = sa.select(*(c for c in table.columns if c.name in names))
            out[table.name] = sorted((tuple(r) for r in conn.execute(query)), key=order)
        return out


_RUN_LOGS = ("scan_runs", "series_failures", "source_problems", "run_locks")

BOOKKEEPING_COLUMNS = frozenset(
    {
        "revision_id",
        "run_id",
        "first_run_id",
        "last_run_id",
        "first_seen",
        "last_seen",
        "changed_at",
        "fitted_at",
        "failed_at",
        "found_at",
        "triage_at",
    }
)
"""Columns that record which run wrote a row and when (wall clock), not what."""


def content_snapshot(db: Database) -> dict[str, list[tuple[Any, ...]]]:
    """:func:`table_snapshot` without run bookkeeping, for comparing outcomes.

    Two runs over the same data (a repeated scan, a backfill resumed after a
    crash against one uninterrupted) must agree on what the tables say; they
    differ, by design, in run ids and wall-clock times, which are left out
    here, as are the per-run logs ``scan_runs``, ``series_failures`` and
    ``run_locks`` (a series that fails is tried again, and logged again, by
    every run).
    """

    def order(row: tuple[Any, ...]) -> tuple[tuple[bool, str], ...]:
        return tuple((value is None, str(value)) for value in row)

    out = {}
    with _engine(db) as engine, engine.connect() as conn:
        for table in metadata.sorted_tables:
            if table.name in _RUN_LOGS:
                continue
            cols = [c for c in table.columns if c.name not in BOOKKEEPING_COLUMNS]
            rows = (tuple(r) for r in conn.execute(sa.select(*cols)))
            out[table.name] = sorted(rows, key=order)
    return out


# --------------------------------------------------------------------------- Prefect


def _retry_unless_bad_input(task_: Any, task_run: Any, state: Any) -> bool:
    """Retry on transient database errors only (:func:`is_transient`)."""
    try:
        outcome = state.result(raise_on_failure=False)
    except Exception:  # the outcome cannot be read: retrying is the safe default
        return True
    return isinstance(outcome, BaseException) and is_transient(outcome)


def _io_task(name: str, fn: Any) -> Any:
    return task(
        name=name,
        retries=len(RETRY_DELAYS),
        retry_delay_seconds=list(RETRY_DELAYS),
        retry_condition_fn=_retry_unless_bad_input,
        cache_policy=NO_CACHE,
    )(fn)


write_events_task = _io_task("write-events", write_events)
write_batch_task = _io_task("write-batch", write_batch)
read_events_task = _io_task("read-events", read_events)
save_models_task = _io_task("save-models", save_models)
load_models_task = _io_task("load-models", load_models)
load_watermarks_task = _io_task("load-watermarks", load_watermarks)
update_watermarks_task = _io_task("update-watermarks", update_watermarks)
start_run_task = _io_task("start-run", start_run)
finish_run_task = _io_task("finish-run", finish_run)
record_failures_task = _io_task("record-failures", record_failures)
set_triage_task = _io_task("set-triage", set_triage)
migrate_task = _io_task("migrate-db", migrate)

# The tables of series attributes and fleet incidents live on the same MetaData
# (changekind.tasks.incident_store); importing it here registers them.
from changekind.tasks import incident_store as _incident_store  # noqa: E402,F401
