"""Triage history: every verdict kept (``triage_history``), and ``events_by_verdict``.

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-05 00:00:01

Until now a second verdict on an event overwrote the first one's state and
reason.  The new table keeps each verdict (who, when, state, reason; a cleared
verdict has state NULL); the event's ``triage_*`` columns keep the current
one.  Existing verdicts are copied in as the first row of each event's
history (who unknown; when: their ``triage_at``).  The view
``events_by_verdict`` lists the events that are not retracted by their current
verdict ('none' where nobody has judged them yet).
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0008"
down_revision: str | Sequence[str] | None = "0007"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

VIEW = """CREATE VIEW events_by_verdict AS
SELECT COALESCE(triage_state, 'none') AS verdict,
       series_id, event_time, event_ts, event_type, status, effect, effect_pct, t_stat,
       triage_reason, triage_at, last_seen
FROM series_events
WHERE status <> 'retracted';"""


def upgrade() -> None:
    op.create_table(
        "triage_history",
        sa.Column("verdict_id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("series_id", sa.Text(), nullable=False),
        sa.Column("event_time", sa.Text(), nullable=False),
        sa.Column("state", sa.Text(), nullable=True),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.Column("decided_by", sa.Text(), nullable=True),
        sa.Column("decided_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("verdict_id", name=op.f("pk_triage_history")),
        sa.ForeignKeyConstraint(
            ["series_id", "event_time"],
            ["series_events.series_id", "series_events.event_time"],
            name=op.f("fk_triage_history_series_id_series_events"),
            ondelete="CASCADE",
        ),
        sa.CheckConstraint(
            "state IS NULL OR state IN ('acknowledged', 'dismissed', 'explained')",
            name=op.f("ck_triage_history_state"),
        ),
    )
    op.create_index("ix_triage_history_event", "triage_history", ["series_id", "event_time"])
    op.execute(
        "INSERT INTO triage_history (series_id, event_time, state, reason, decided_by, "
        "decided_at) SELECT series_id, event_time, triage_state, triage_reason, NULL, "
        "COALESCE(triage_at, last_seen) FROM series_events WHERE triage_state IS NOT NULL"
    )
    op.execute(VIEW)


def downgrade() -> None:
    op.execute("DROP VIEW IF EXISTS events_by_verdict")
    op.drop_index("ix_triage_history_event", table_name="triage_history")
    op.drop_table("triage_history")
