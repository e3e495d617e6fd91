"""Effects that matter: ``series_events.effect_sigma`` and ``series_events.duration``.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-05 00:00:01

Each event carries its size in the units people decide by: ``effect`` (series
units) and ``effect_pct`` (per cent of the local level) were stored already;
``effect_sigma`` adds |effect| in noise sigma (indexed, for lists sorted by
size), ``duration`` how long a level shift has lasted so far (from the event
to the last analysed point) or a temporary change lasts (until 5 % of its
jump remains).  Nullable columns only: existing rows read NULL for them.  The
views ``events_needing_triage`` and ``open_level_shifts`` gain both columns.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0006"
down_revision: str | Sequence[str] | None = "0005"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_SHIFTS_BODY = """
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

_SHIFTS_OLD = (
    """
CREATE VIEW open_level_shifts AS
SELECT series_id, event_time, event_ts, effect, effect_pct, t_stat, level, model,
       triage_state, triage_reason, first_seen, last_seen"""
    + _SHIFTS_BODY
)

_SHIFTS_NEW = (
    """
CREATE VIEW open_level_shifts AS
SELECT series_id, event_time, event_ts, effect, effect_pct, effect_sigma, t_stat,
       duration, level, model, triage_state, triage_reason, first_seen, last_seen"""
    + _SHIFTS_BODY
)

_TRIAGE_OLD = """
CREATE VIEW events_needing_triage AS
SELECT series_id, event_time, event_ts, event_type, effect, effect_pct, t_stat,
       level, model, first_seen, last_seen, last_run_id
FROM series_events
WHERE status = 'confirmed' AND triage_state IS NULL
"""

_TRIAGE_NEW = """
CREATE VIEW events_needing_triage AS
SELECT series_id, event_time, event_ts, event_type, effect, effect_pct, effect_sigma,
       t_stat, duration, level, model, first_seen, last_seen, last_run_id
FROM series_events
WHERE status = 'confirmed' AND triage_state IS NULL
"""


def view_statements(dialect: str) -> list[str]:
    """The CREATE VIEW statements this revision replaces (the same for both dialects)."""
    return [_SHIFTS_NEW.strip(), _TRIAGE_NEW.strip()]


def upgrade() -> None:
    op.add_column("series_events", sa.Column("effect_sigma", sa.Float, nullable=True))
    op.add_column("series_events", sa.Column("duration", sa.Float, nullable=True))
    op.create_index("ix_series_events_effect_sigma", "series_events", ["effect_sigma"])
    # PostgreSQL expands "e.*" when a view is made: made again, it sees the new columns.
    op.execute("DROP VIEW open_level_shifts")
    op.execute("DROP VIEW events_needing_triage")
    op.execute(_SHIFTS_NEW)
    op.execute(_TRIAGE_NEW)


def downgrade() -> None:
    op.execute("DROP VIEW open_level_shifts")
    op.execute("DROP VIEW events_needing_triage")
    op.drop_index("ix_series_events_effect_sigma", table_name="series_events")
    bind = op.get_bind()
    if bind.dialect.name != "sqlite":
        op.drop_column("series_events", "duration")
        op.drop_column("series_events", "effect_sigma")
        op.execute(_SHIFTS_OLD)
        op.execute(_TRIAGE_OLD)
        return
    # SQLite checks views when batch mode renames the table: drop and recreate them.
    views = bind.execute(
        sa.text("SELECT name, sql FROM sqlite_master WHERE type = 'view' ORDER BY name")
    ).all()
    for name, _ in views:
        op.execute(f'DROP VIEW "{name}"')
    with op.batch_alter_table("series_events", recreate="always") as batch:
        batch.drop_column("duration")
        batch.drop_column("effect_sigma")
    for _, sql in views:
        op.execute(sql)
    op.execute(_SHIFTS_OLD)
    op.execute(_TRIAGE_OLD)
