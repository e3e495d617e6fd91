"""Initial schema: events, revisions, model cache, runs, failures and the BI views.

Revision ID: 0001
Revises:
Create Date: 2024-06-01 00:00:00

The tables are written out here (not taken from the package's MetaData) so the
migration stays as it was when later code changes; a test checks that the
migrations build exactly the MetaData's schema.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0001"
down_revision: str | Sequence[str] | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_OPEN_LEVEL_SHIFTS = """
CREATE VIEW open_level_shifts AS
SELECT series_id, event_time, event_ts, effect, effect_pct, t_stat, level, model,
       triage_state, triage_reason, first_seen, last_seen
FROM (
    SELECT e.*,
           ROW_NUMBER() OVER (
               PARTITION BY e.series_id
               ORDER BY CASE WHEN e.event_ts IS NULL THEN 1 ELSE 0 END,
                        e.event_ts DESC, e.event_time DESC
           ) AS recency
    FROM series_events e
    WHERE e.event_type = 'LS'
      AND e.status = 'confirmed'
      AND (e.triage_state IS NULL OR e.triage_state <> 'dismissed')
) ranked
WHERE recency = 1
"""

_DAILY_EVENT_COUNTS = """
CREATE VIEW daily_event_counts AS
SELECT {day} AS day,
       event_type,
       COUNT(*) AS n_events,
       SUM(CASE WHEN status = 'confirmed' THEN 1 ELSE 0 END) AS n_confirmed,
       SUM(CASE WHEN status = 'provisional' THEN 1 ELSE 0 END) AS n_provisional
FROM series_events
WHERE status <> 'retracted' AND event_ts IS NOT NULL
GROUP BY {day}, event_type
"""

# The UTC calendar day of event_ts, per dialect.
_DAY = {
    "sqlite": "date(event_ts)",
    "postgresql": "CAST(event_ts AT TIME ZONE 'UTC' AS DATE)",
}

_EVENTS_NEEDING_TRIAGE = """
CREATE VIEW events_needing_triage AS
SELECT series_id, event_time, event_ts, event_type, effect, effect_pct, t_stat,
       level, model, first_seen, last_seen, last_run_id
FROM series_events
WHERE status = 'confirmed' AND triage_state IS NULL
"""

VIEW_NAMES = ("open_level_shifts", "daily_event_counts", "events_needing_triage")


def view_statements(dialect: str) -> list[str]:
    """The CREATE VIEW statements of this revision for ``dialect``."""
    if dialect not in _DAY:
        raise ValueError(f"no view definitions for dialect {dialect!r}; use sqlite or postgresql")
    return [
        _OPEN_LEVEL_SHIFTS.strip(),
        _DAILY_EVENT_COUNTS.format(day=_DAY[dialect]).strip(),
        _EVENTS_NEEDING_TRIAGE.strip(),
    ]


def upgrade() -> None:
    op.create_table(
        "series_events",
        sa.Column("series_id", sa.Text(), nullable=False),
        sa.Column("event_time", sa.Text(), nullable=False),
        sa.Column("event_ts", sa.DateTime(timezone=True), nullable=True),
        sa.Column("event_type", sa.Text(), nullable=False),
        sa.Column("effect", sa.Float(), nullable=False),
        sa.Column("effect_pct", sa.Float(), nullable=True),
        sa.Column("t_stat", sa.Float(), nullable=False),
        sa.Column("se", sa.Float(), nullable=False),
        sa.Column("type_weights", sa.Text(), nullable=False),
        sa.Column("status", sa.Text(), nullable=False),
        sa.Column("decay", sa.Float(), nullable=True),
        sa.Column("half_life", sa.Text(), nullable=True),
        sa.Column("level", sa.Float(), nullable=False),
        sa.Column("model", sa.Text(), nullable=False),
        sa.Column("first_run_id", sa.Text(), nullable=False),
        sa.Column("last_run_id", sa.Text(), nullable=False),
        sa.Column("first_seen", sa.DateTime(timezone=True), nullable=False),
        sa.Column("last_seen", sa.DateTime(timezone=True), nullable=False),
        sa.Column("window_start", sa.Text(), nullable=True),
        sa.Column("window_end", sa.Text(), nullable=True),
        sa.Column("triage_state", sa.Text(), nullable=True),
        sa.Column("triage_reason", sa.Text(), nullable=True),
        sa.Column("triage_at", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("series_id", "event_time", name=op.f("pk_series_events")),
        sa.CheckConstraint(
            "event_type IN ('AO', 'LS', 'TC', 'IO')", name=op.f("ck_series_events_event_type")
        ),
        sa.CheckConstraint(
            "status IN ('provisional', 'confirmed', 'retracted')",
            name=op.f("ck_series_events_status"),
        ),
        sa.CheckConstraint(
            "triage_state IS NULL OR triage_state IN ('acknowledged', 'dismissed', 'explained')",
            name=op.f("ck_series_events_triage_state"),
        ),
    )
    op.create_index("ix_series_events_event_ts", "series_events", ["event_ts"])
    op.create_index("ix_series_events_type_status", "series_events", ["event_type", "status"])

    op.create_table(
        "event_revisions",
        sa.Column("revision_id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("series_id", sa.Text(), nullable=False),
        sa.Column("event_time", sa.Text(), nullable=False),
        sa.Column("run_id", sa.Text(), nullable=False),
        sa.Column("change", sa.Text(), nullable=False),
        sa.Column("old_type", sa.Text(), nullable=True),
        sa.Column("new_type", sa.Text(), nullable=True),
        sa.Column("old_status", sa.Text(), nullable=True),
        sa.Column("new_status", sa.Text(), nullable=True),
        sa.Column("old_effect", sa.Float(), nullable=True),
        sa.Column("new_effect", sa.Float(), nullable=True),
        sa.Column("changed_columns", sa.Text(), nullable=True),
        sa.Column("changed_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("revision_id", name=op.f("pk_event_revisions")),
        sa.ForeignKeyConstraint(
            ["series_id", "event_time"],
            ["series_events.series_id", "series_events.event_time"],
            name=op.f("fk_event_revisions_series_id_series_events"),
            ondelete="CASCADE",
        ),
        sa.CheckConstraint(
            "change IN ('new', 'reclassified', 'retracted', 'updated')",
            name=op.f("ck_event_revisions_change"),
        ),
    )
    op.create_index("ix_event_revisions_event", "event_revisions", ["series_id", "event_time"])
    op.create_index("ix_event_revisions_run_id", "event_revisions", ["run_id"])

    op.create_table(
        "series_models",
        sa.Column("series_id", sa.Text(), nullable=False),
        sa.Column("model_json", sa.Text(), nullable=False),
        sa.Column("arima_order", sa.Text(), nullable=False),
        sa.Column("sigma2", sa.Float(), nullable=False),
        sa.Column("nobs", sa.Integer(), nullable=False),
        sa.Column("fitted_through", sa.Text(), nullable=True),
        sa.Column("fingerprint", sa.Text(), nullable=True),
        sa.Column("fitted_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("watermark", sa.Text(), nullable=True),
        sa.PrimaryKeyConstraint("series_id", name=op.f("pk_series_models")),
    )

    op.create_table(
        "scan_runs",
        sa.Column("run_id", sa.Text(), nullable=False),
        sa.Column("kind", sa.Text(), nullable=False),
        sa.Column("span_start", sa.DateTime(timezone=True), nullable=True),
        sa.Column("span_end", sa.DateTime(timezone=True), nullable=True),
        sa.Column("status", sa.Text(), nullable=False),
        sa.Column("series_total", sa.Integer(), nullable=False),
        sa.Column("series_ok", sa.Integer(), nullable=False),
        sa.Column("series_failed", sa.Integer(), nullable=False),
        sa.Column("events_new", sa.Integer(), nullable=False),
        sa.Column("events_changed", sa.Integer(), nullable=False),
        sa.Column("events_retracted", sa.Integer(), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("finished_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("seconds", sa.Float(), nullable=True),
        sa.Column("message", sa.Text(), nullable=True),
        sa.PrimaryKeyConstraint("run_id", name=op.f("pk_scan_runs")),
        sa.CheckConstraint("kind IN ('scan', 'backfill', 'refit')", name=op.f("ck_scan_runs_kind")),
        sa.CheckConstraint(
            "status IN ('running', 'completed', 'failed')", name=op.f("ck_scan_runs_status")
        ),
    )
    op.create_index("ix_scan_runs_started_at", "scan_runs", ["started_at"])

    op.create_table(
        "series_failures",
        sa.Column("run_id", sa.Text(), nullable=False),
        sa.Column("series_id", sa.Text(), nullable=False),
        sa.Column("stage", sa.Text(), nullable=False),
        sa.Column("message", sa.Text(), nullable=False),
        sa.Column("failed_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("run_id", "series_id", "stage", name=op.f("pk_series_failures")),
    )
    op.create_index("ix_series_failures_series_id", "series_failures", ["series_id"])

    for statement in view_statements(op.get_context().dialect.name):
        op.execute(statement)


def downgrade() -> None:
    for name in reversed(VIEW_NAMES):
        op.execute(f"DROP VIEW IF EXISTS {name}")
    op.drop_index("ix_series_failures_series_id", table_name="series_failures")
    op.drop_table("series_failures")
    op.drop_index("ix_scan_runs_started_at", table_name="scan_runs")
    op.drop_table("scan_runs")
    op.drop_table("series_models")
    op.drop_index("ix_event_revisions_run_id", table_name="event_revisions")
    op.drop_index("ix_event_revisions_event", table_name="event_revisions")
    op.drop_table("event_revisions")
    op.drop_index("ix_series_events_type_status", table_name="series_events")
    op.drop_index("ix_series_events_event_ts", table_name="series_events")
    op.drop_table("series_events")
