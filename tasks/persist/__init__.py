"""Persistence: the event table, its revision log, the model cache, run records,
series labels and fleet incidents.

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

Modules: ``schema`` (the tables), ``convert`` (values in, and the one upsert),
``engines`` (connect, migrate), ``events``,
``models`` (model cache, watermarks, the batch write), ``runs`` (run records),
``labels`` (series attributes and their changes), ``incidents`` (stored
incidents and their update after a run), ``snapshots`` (table contents, for
tests).  Nothing here imports Prefect: the flows wrap these functions in tasks
(``flows/steps.py``).
"""

from __future__ import annotations

from changekind.tasks.persist.engines import connect, init_db, migrate, migrations_dir
from changekind.tasks.persist.events import (
    TRIAGE_NONE,
    WriteSummary,
    count_events,
    load_known_events,
    read_events,
    read_triage_history,
    set_triage,
    write_events,
)
from changekind.tasks.persist.incidents import (
    ConfirmedEvent,
    IncidentRefresh,
    incident_states,
    read_incidents,
    refresh_incidents,
)
from changekind.tasks.persist.labels import read_fleet_labels, read_labels, write_labels
from changekind.tasks.persist.models import (
    Coverage,
    load_coverage,
    load_models,
    load_watermarks,
    save_models,
    set_coverage,
    update_watermarks,
    write_batch,
)
from changekind.tasks.persist.runs import (
    RunSource,
    close_stale_runs,
    finish_run,
    latest_source,
    record_failures,
    record_refused_run,
    record_source_problems,
    start_run,
)
from changekind.tasks.persist.schema import (
    CONNECT_TIMEOUT_SECONDS,
    DEFAULT_URL,
    EVENT_COLUMNS,
    EVENT_EXTRA_COLUMNS,
    EVENT_STATUSES,
    INCIDENT_CHANGES,
    INCIDENT_STATES,
    REVISION_CHANGES,
    RUN_KINDS,
    RUN_STATUSES,
    SQLITE_BUSY_TIMEOUT_SECONDS,
    TRIAGE_STATES,
    VERSION_TABLE,
    Database,
    RunKind,
    TriageState,
    event_revisions,
    metadata,
    run_locks,
    scan_runs,
    series_events,
    series_failures,
    series_models,
    source_problems,
    triage_history,
)
from changekind.tasks.persist.snapshots import BOOKKEEPING_COLUMNS, content_snapshot, table_snapshot

__all__ = [
    "BOOKKEEPING_COLUMNS",
    "CONNECT_TIMEOUT_SECONDS",
    "DEFAULT_URL",
    "EVENT_COLUMNS",
    "EVENT_EXTRA_COLUMNS",
    "EVENT_STATUSES",
    "INCIDENT_CHANGES",
    "INCIDENT_STATES",
    "REVISION_CHANGES",
    "RUN_KINDS",
    "RUN_STATUSES",
    "SQLITE_BUSY_TIMEOUT_SECONDS",
    "TRIAGE_NONE",
    "TRIAGE_STATES",
    "VERSION_TABLE",
    "ConfirmedEvent",
    "Coverage",
    "Database",
    "IncidentRefresh",
    "RunKind",
    "RunSource",
    "TriageState",
    "WriteSummary",
    "close_stale_runs",
    "connect",
    "content_snapshot",
    "count_events",
    "event_revisions",
    "finish_run",
    "incident_states",
    "init_db",
    "latest_source",
    "load_coverage",
    "load_known_events",
    "load_models",
    "load_watermarks",
    "metadata",
    "migrate",
    "migrations_dir",
    "read_events",
    "read_fleet_labels",
    "read_incidents",
    "read_labels",
    "read_triage_history",
    "record_failures",
    "record_refused_run",
    "record_source_problems",
    "refresh_incidents",
    "run_locks",
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
    "triage_history",
    "update_watermarks",
    "write_batch",
    "write_events",
    "write_labels",
]
