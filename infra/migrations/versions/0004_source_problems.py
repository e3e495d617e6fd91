"""Parts of a source a run could not read: ``source_problems``.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-04 00:00:01

A file skipped (empty, truncated, corrupt, wrong columns), a row skipped (no
series id, wrong number of cells) or a cell read as missing (not a number) is
recorded per run, with its file, row and series where known; the rest of the
source is analysed.  A new table only: existing rows are untouched.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0004"
down_revision: str | Sequence[str] | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "source_problems",
        sa.Column("problem_id", sa.Integer, autoincrement=True, nullable=False),
        sa.Column("run_id", sa.Text, nullable=False),
        sa.Column("location", sa.Text, nullable=False),
        sa.Column("row_number", sa.Integer, nullable=True),
        sa.Column("series_id", sa.Text, nullable=True),
        sa.Column("problem", sa.Text, nullable=False),
        sa.Column("found_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("problem_id", name=op.f("pk_source_problems")),
    )
    op.create_index("ix_source_problems_run_id", "source_problems", ["run_id"])


def downgrade() -> None:
    op.drop_index("ix_source_problems_run_id", table_name="source_problems")
    op.drop_table("source_problems")
