"""Events may be variance changes (VC), reported by the windowed mode.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02 00:00:00

Only the check constraint on ``series_events.event_type`` changes.  PostgreSQL
swaps the constraint in place.  SQLite cannot alter a constraint: the table is
copied (Alembic's batch mode) with every row, index and the foreign key of
``event_revisions`` kept.  SQLite checks views when a table is renamed, so the
views are dropped first and created again from their stored text, unchanged.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0002"
down_revision: str | Sequence[str] | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_NAME = "ck_series_events_event_type"
_WITH_VC = "event_type IN ('AO', 'LS', 'TC', 'IO', 'VC')"
_WITHOUT_VC = "event_type IN ('AO', 'LS', 'TC', 'IO')"


def _swap(condition: str) -> None:
    bind = op.get_bind()
    if bind.dialect.name != "sqlite":
        op.drop_constraint(op.f(_NAME), "series_events", type_="check")
        op.create_check_constraint(op.f(_NAME), "series_events", condition)
        return
    views = bind.execute(
        sa.text("SELECT name, sql FROM sqlite_master WHERE type = 'view' ORDER BY name")
    ).all()
    for name, _ in views:
        op.execute(f'DROP VIEW "{name}"')
    with op.batch_alter_table("series_events", recreate="always") as batch:
        batch.drop_constraint(op.f(_NAME), type_="check")
        batch.create_check_constraint(op.f(_NAME), condition)
    for _, sql in views:
        op.execute(sql)


def upgrade() -> None:
    _swap(_WITH_VC)


def downgrade() -> None:
    op.execute("DELETE FROM series_events WHERE event_type = 'VC'")
    _swap(_WITHOUT_VC)
