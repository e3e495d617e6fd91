"""The schema: every table on one SQLAlchemy Core ``metadata``, the event columns
and the names of states, kinds and statuses.

The Alembic migrations under ``infra/migrations`` build exactly this schema (a
test checks it on SQLite and PostgreSQL).  Every timestamp column holds UTC.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any, Literal

import sqlalchemy as sa
from sqlalchemy.engine import URL, Connection, Engine

from changekind.tasks.persist.convert import _utc
from changekind.tasks.types import REPORTED_TYPES

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
INCIDENT_STATES: tuple[str, ...] = ("open", "settled")
INCIDENT_CHANGES: tuple[str, ...] = ("new", "grown", "shrunk", "changed", "gone")

RunKind = Literal["scan", "backfill", "refit"]
TriageState = Literal["acknowledged", "dismissed", "explained"]
Database = Engine | Connection | str | URL


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
    sa.Column("effect_sigma", sa.Float, nullable=True),
    sa.Column("t_stat", sa.Float, nullable=False),
    sa.Column("se", sa.Float, nullable=False),
    sa.Column("type_weights", sa.Text, nullable=False),
    sa.Column("status", sa.Text, nullable=False),
    sa.Column("decay", sa.Float, nullable=True),
    sa.Column("half_life", sa.Float, nullable=True),  # seconds, or index units
    sa.Column("duration", sa.Float, nullable=True),  # seconds, or index units
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
    sa.Index("ix_series_events_effect_sigma", "effect_sigma"),
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

triage_history = sa.Table(
    "triage_history",
    metadata,
    sa.Column("verdict_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("series_id", sa.Text, nullable=False),
    sa.Column("event_time", sa.Text, nullable=False),
    sa.Column("state", sa.Text, nullable=True),
    sa.Column("reason", sa.Text, nullable=True),
    sa.Column("decided_by", sa.Text, nullable=True),
    sa.Column("decided_at", UtcDateTime, nullable=False),
    sa.ForeignKeyConstraint(
        ["series_id", "event_time"],
        ["series_events.series_id", "series_events.event_time"],
        ondelete="CASCADE",
    ),
    sa.CheckConstraint("state IS NULL OR " + _in("state", TRIAGE_STATES), name="state"),
    sa.Index("ix_triage_history_event", "series_id", "event_time"),
)
"""Every verdict a person gave an event, oldest first: who, when, which state
(NULL: the verdict was cleared) and why.  ``series_events.triage_*`` holds the
current one; a new verdict adds a row here and never erases an earlier reason."""

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
    # Where the run read its series: a path, or a URL with its password hidden,
    # and the column names given (JSON; NULL: the default names).
    sa.Column("source", sa.Text, nullable=True),
    sa.Column("source_columns", sa.Text, nullable=True),
    sa.Column("message", sa.Text, nullable=True),
    sa.CheckConstraint(_in("kind", RUN_KINDS), name="kind"),
    sa.CheckConstraint(_in("status", RUN_STATUSES), name="status"),
    sa.Index("ix_scan_runs_started_at", "started_at"),
)
"""One row per flow run (and per fleet command refused on its configuration)."""

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


# --------------------------------------------------------------------------- labels, incidents
# (written by changekind.tasks.persist.labels and changekind.tasks.persist.incidents)

series_labels = sa.Table(
    "series_labels",
    metadata,
    sa.Column("series_id", sa.Text, nullable=False),
    sa.Column("label", sa.Text, nullable=False),
    sa.Column("value", sa.Text, nullable=True),
    sa.Column("observed_at", sa.Text, nullable=True),
    sa.Column("last_run_id", sa.Text, nullable=False),
    sa.Column("last_seen", UtcDateTime, nullable=False),
    sa.PrimaryKeyConstraint("series_id", "label"),
    sa.Index("ix_series_labels_label_value", "label", "value"),
)
"""The current value of each label of each series (NULL: the source left it empty).

``observed_at`` is the source time of the row the value was read from (the
series' latest row in the data the run read)."""

series_label_changes = sa.Table(
    "series_label_changes",
    metadata,
    sa.Column("change_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("series_id", sa.Text, nullable=False),
    sa.Column("label", sa.Text, nullable=False),
    sa.Column("old_value", sa.Text, nullable=True),
    sa.Column("new_value", sa.Text, nullable=True),
    sa.Column("observed_at", sa.Text, nullable=True),
    sa.Column("run_id", sa.Text, nullable=False),
    sa.Column("changed_at", UtcDateTime, nullable=False),
    sa.Index("ix_series_label_changes_series", "series_id", "label"),
)
"""Every change of a series' label: one row per run that changed it."""

incidents = sa.Table(
    "incidents",
    metadata,
    sa.Column("incident_id", sa.Text, primary_key=True),
    sa.Column("quantity", sa.Text, nullable=False),
    sa.Column("direction", sa.Text, nullable=False),
    sa.Column("start_ts", UtcDateTime, nullable=False),
    sa.Column("end_ts", UtcDateTime, nullable=False),
    sa.Column("n_series", sa.Integer, nullable=False),
    sa.Column("fleet_size", sa.Integer, nullable=False),
    sa.Column("share_of_fleet", sa.Float, nullable=False),
    sa.Column("dominant_type", sa.Text, nullable=False),
    sa.Column("type_counts", sa.Text, nullable=False),
    sa.Column("median_effect_pct", sa.Float, nullable=True),
    sa.Column("n_provisional", sa.Integer, nullable=False),
    sa.Column("shared_labels", sa.Text, nullable=False),
    sa.Column("state", sa.Text, nullable=False),
    sa.Column("first_run_id", sa.Text, nullable=False),
    sa.Column("last_run_id", sa.Text, nullable=False),
    sa.Column("first_seen", UtcDateTime, nullable=False),
    sa.Column("last_seen", UtcDateTime, nullable=False),
    sa.CheckConstraint("quantity IN ('level', 'spread')", name="quantity"),
    sa.CheckConstraint("direction IN ('up', 'down')", name="direction"),
    sa.CheckConstraint(_in("dominant_type", REPORTED_TYPES), name="dominant_type"),
    sa.CheckConstraint(_in("state", INCIDENT_STATES), name="state"),
    sa.Index("ix_incidents_start_ts", "start_ts"),
    sa.Index("ix_incidents_end_ts", "end_ts"),
)
"""One row per incident: events of several series that changed the same way together.

``type_counts`` is a JSON object (type -> members); ``shared_labels`` a JSON
object (label -> value) of the values found shared (see ``incident_labels``)."""

incident_members = sa.Table(
    "incident_members",
    metadata,
    sa.Column("incident_id", sa.Text, nullable=False),
    sa.Column("series_id", sa.Text, nullable=False),
    sa.Column("event_time", sa.Text, nullable=False),
    sa.Column("event_ts", UtcDateTime, nullable=False),
    sa.Column("event_type", sa.Text, nullable=False),
    sa.Column("effect", sa.Float, nullable=False),
    sa.Column("effect_pct", sa.Float, nullable=True),
    sa.Column("t_stat", sa.Float, nullable=False),
    sa.Column("status", sa.Text, nullable=False),
    sa.PrimaryKeyConstraint("incident_id", "series_id"),
    sa.ForeignKeyConstraint(["incident_id"], ["incidents.incident_id"], ondelete="CASCADE"),
    sa.Index("ix_incident_members_event", "series_id", "event_time"),
)
"""The member events of each incident (one per series)."""

incident_labels = sa.Table(
    "incident_labels",
    metadata,
    sa.Column("incident_id", sa.Text, nullable=False),
    sa.Column("label", sa.Text, nullable=False),
    sa.Column("value", sa.Text, nullable=False),
    sa.Column("members_with", sa.Integer, nullable=False),
    sa.Column("members_known", sa.Integer, nullable=False),
    sa.Column("fleet_with", sa.Integer, nullable=False),
    sa.Column("fleet_known", sa.Integer, nullable=False),
    sa.Column("p_value", sa.Float, nullable=False),
    sa.Column("p_adjusted", sa.Float, nullable=False),
    sa.Column("shared", sa.Boolean, nullable=False),
    sa.PrimaryKeyConstraint("incident_id", "label", "value"),
    sa.ForeignKeyConstraint(["incident_id"], ["incidents.incident_id"], ondelete="CASCADE"),
)
"""Every label value tested for an incident: carriers among members and fleet,
the hypergeometric upper tail ``p_value``, Holm's ``p_adjusted``, ``shared``."""

incident_revisions = sa.Table(
    "incident_revisions",
    metadata,
    sa.Column("revision_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("incident_id", sa.Text, nullable=False),
    sa.Column("run_id", sa.Text, nullable=False),
    sa.Column("change", sa.Text, nullable=False),
    sa.Column("n_series", sa.Integer, nullable=True),
    sa.Column("added", sa.Text, nullable=False),
    sa.Column("removed", sa.Text, nullable=False),
    sa.Column("supersedes", sa.Text, nullable=False),
    sa.Column("superseded_by", sa.Text, nullable=False),
    sa.Column("changed_at", UtcDateTime, nullable=False),
    sa.CheckConstraint(_in("change", INCIDENT_CHANGES), name="change"),
    sa.Index("ix_incident_revisions_incident_id", "incident_id"),
    sa.Index("ix_incident_revisions_run_id", "run_id"),
)
"""Every change of an incident; ``added``/``removed`` JSON lists of [series, time],
``supersedes``/``superseded_by`` JSON lists of incident ids."""

incident_sync = sa.Table(
    "incident_sync",
    metadata,
    sa.Column("name", sa.Text, primary_key=True),
    sa.Column("revision_id", sa.Integer, nullable=False),
    sa.Column("observed_start", UtcDateTime, nullable=True),
    sa.Column("observed_end", UtcDateTime, nullable=True),
)
"""How far the incidents are up to date: the last ``event_revisions`` id taken
into account and the observed record they were computed for."""


EVENT_COLUMNS: tuple[str, ...] = (
    "series_id",
    "event_time",
    "event_type",
    "effect",
    "effect_pct",
    "effect_sigma",
    "t_stat",
    "se",
    "type_weights",
    "status",
    "decay",
    "half_life",
    "duration",
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
    "effect_sigma",  # follow the effect; not compared (sizes in other units of it)
    "duration",  # grows with every scan of a level shift: not a change
    "event_ts",
    "window_start",
    "window_end",
    "last_run_id",
    "last_seen",
)
_FLOAT_EVENT_COLUMNS = (
    "effect",
    "effect_pct",
    "effect_sigma",
    "t_stat",
    "se",
    "decay",
    "half_life",
    "duration",
    "level",
)
