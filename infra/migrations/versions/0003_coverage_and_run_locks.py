"""Where each series' analysed span begins, abandoned runs, and the run lock.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-04 00:00:00

* ``series_models.analysed_from`` and ``series_models.reanalyse_until``: a
  backfill given a span that starts before what was analysed analyses it
  again (nothing in the span is skipped because a later span was analysed
  first).  Existing rows get NULL: their series count as analysed from the
  start of their data, as scans and refits analyse them.
* ``scan_runs.status`` may be ``abandoned``: a run that ended without
  recording its end, closed by the next run.  SQLite cannot alter a check
  constraint: the table is copied (batch mode), the views dropped and made
  again around it as in 0002.
* ``run_locks``: who holds the database for a fleet run (the lock itself on
  SQLite; on PostgreSQL an advisory lock is, and the row says who holds it).
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0003"
down_revision: str | Sequence[str] | None = "0002"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_NAME = "ck_scan_runs_status"
_WITH = "status IN ('running', 'completed', 'failed', 'abandoned')"
_WITHOUT = "status IN ('running', 'completed', 'failed')"


def _swap(condition: str) -> None:
    bind = op.get_bind()
    if bind.dialect.name != "sqlite":
        op.drop_constraint(op.f(_NAME), "scan_runs", type_="check")
        op.create_check_constraint(op.f(_NAME), "scan_runs", condition)
        return
    views = bind.execute(
        sa.text("SELECT name, sql FROM sqlite_master WHERE type = 'view' ORDER BY name")
    ).all()
    for name, _ in views:
        op.execute(f'DROP VIEW "{name}"')
    with op.batch_alter_table("scan_runs", recreate="always") as batch:
        batch.drop_constraint(op.f(_NAME), type_="check")
        batch.create_check_constraint(op.f(_NAME), condition)
    for _, sql in views:
        op.execute(sql)


def upgrade() -> None:
    op.add_column("series_models", sa.Column("analysed_from", sa.Text, nullable=True))
    op.add_column("series_models", sa.Column("reanalyse_until", sa.Text, nullable=True))
    _swap(_WITH)
    op.create_table(
        "run_locks",
        sa.Column("lock_name", sa.Text, nullable=False),
        sa.Column("run_id", sa.Text, nullable=False),
        sa.Column("kind", sa.Text, nullable=False),
        sa.Column("host", sa.Text, nullable=False),
        sa.Column("pid", sa.Integer, nullable=False),
        sa.Column("acquired_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("heartbeat_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("lock_name", name=op.f("pk_run_locks")),
    )


def downgrade() -> None:
    op.drop_table("run_locks")
    op.execute("UPDATE scan_runs SET status = 'failed' WHERE status = 'abandoned'")
    _swap(_WITHOUT)
    with op.batch_alter_table("series_models") as batch:
        batch.drop_column("reanalyse_until")
        batch.drop_column("analysed_from")
