"""Run records name their source: ``scan_runs.source`` and ``scan_runs.source_columns``.

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-05 00:00:03

A scan, backfill or refit records where it read the series from (a path, or
a URL with its password hidden) and the column names it was given
(``series_id``/``timestamp``/``value`` as JSON; NULL: the default names), so
``changekind report`` and ``drill`` can read the same source without being
told again.  Earlier runs keep NULL in both.  Two nullable columns added: no
constraint changes, so SQLite needs no table copy.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0010"
down_revision: str | Sequence[str] | None = "0009"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.add_column("scan_runs", sa.Column("source", sa.Text(), nullable=True))
    op.add_column("scan_runs", sa.Column("source_columns", sa.Text(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("scan_runs") as batch:
        batch.drop_column("source_columns")
        batch.drop_column("source")
