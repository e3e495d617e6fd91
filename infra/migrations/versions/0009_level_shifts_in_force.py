"""View ``level_shifts_in_force``: all level shifts still in force per series, netted.

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-05 00:00:02

``open_level_shifts`` shows each series' latest level shift only, so a series
that shifted by -1.4 and later by +1.4 looks shifted by +1.4.  This view adds
up every confirmed level shift nobody dismissed: the net level change since
the level before the first of them (the reference), with the latest shift
beside it.  A view only: no table changes.
"""

from __future__ import annotations

from collections.abc import Sequence

from alembic import op

revision: str = "0009"
down_revision: str | Sequence[str] | None = "0008"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

VIEW = """CREATE VIEW level_shifts_in_force AS
WITH shifts AS (
    SELECT series_id, event_time, event_ts, effect, level,
           ROW_NUMBER() OVER (
               PARTITION BY series_id
               ORDER BY CASE WHEN event_ts IS NULL THEN 1 ELSE 0 END, event_ts, event_time
           ) AS oldest,
           ROW_NUMBER() OVER (
               PARTITION BY series_id
               ORDER BY CASE WHEN event_ts IS NULL THEN 1 ELSE 0 END,
                        event_ts DESC, event_time DESC
           ) AS newest,
           COUNT(*) OVER (PARTITION BY series_id) AS n_shifts,
           SUM(effect) OVER (PARTITION BY series_id) AS net_effect
    FROM series_events
    WHERE event_type = 'LS'
      AND status = 'confirmed'
      AND (triage_state IS NULL OR triage_state <> 'dismissed')
)
SELECT f.series_id,
       f.n_shifts,
       f.net_effect,
       CASE WHEN f.level <> 0 THEN 100.0 * f.net_effect / f.level END AS net_pct,
       f.level AS reference_level,
       f.event_time AS since_time,
       f.event_ts AS since_ts,
       l.event_time AS latest_time,
       l.event_ts AS latest_ts,
       l.effect AS latest_effect
FROM shifts f
JOIN shifts l ON l.series_id = f.series_id AND l.newest = 1
WHERE f.oldest = 1;"""


def upgrade() -> None:
    op.execute(VIEW)


def downgrade() -> None:
    op.execute("DROP VIEW IF EXISTS level_shifts_in_force")
