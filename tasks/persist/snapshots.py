"""Snapshots of the tables for tests: every row, or the content without bookkeeping."""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa

from changekind.tasks.persist.engines import _engine
from changekind.tasks.persist.schema import Database, metadata

# --------------------------------------------------------------------------- tests


def table_snapshot(db: Database) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every changekind table, sorted: for comparing database states.

    Rows are sorted on their values' text (None last), so two snapshots compare
    equal exactly when the tables hold the same rows.
    """

    def order(row: tuple[Any, ...]) -> tuple[tuple[bool, str], ...]:
        return tuple((value is None, str(value)) for value in row)

    with _engine(db) as engine, engine.connect() as conn:
        inspector = sa.inspect(conn)  # older schemas lack newer tables and columns
        present = set(inspector.get_table_names())
        out = {}
        for table in metadata.sorted_tables:
            if table.name not in present:
                continue
            stored = {c["name"]: c["type"] for c in inspector.get_columns(table.name)}
            query = sa.select(
                *(_as_stored(c, stored[c.name]) for c in table.columns if c.name in stored)
            )
            out[table.name] = sorted((tuple(r) for r in conn.execute(query)), key=order)
        return out


def _as_stored(column: sa.Column[Any], stored: Any) -> Any:
    """A column read as an older revision stores it (a number that was text then: as is)."""
    if isinstance(column.type, sa.Float) and not isinstance(stored, sa.Numeric | sa.Float):
        return sa.column(column.name)
    return column


_RUN_LOGS = ("scan_runs", "series_failures", "source_problems", "run_locks")

BOOKKEEPING_COLUMNS = frozenset(
    {
        "revision_id",
        "run_id",
        "first_run_id",
        "last_run_id",
        "first_seen",
        "last_seen",
        "changed_at",
        "fitted_at",
        "failed_at",
        "found_at",
        "triage_at",
    }
)
"""Columns that record which run wrote a row and when (wall clock), not what."""


def content_snapshot(db: Database) -> dict[str, list[tuple[Any, ...]]]:
    """:func:`table_snapshot` without run bookkeeping, for comparing outcomes.

    Two runs over the same data (a repeated scan, a backfill resumed after a
    crash against one uninterrupted) must agree on what the tables say; they
    differ, by design, in run ids and wall-clock times, which are left out
    here, as are the per-run logs ``scan_runs``, ``series_failures`` and
    ``run_locks`` (a series that fails is tried again, and logged again, by
    every run).
    """

    def order(row: tuple[Any, ...]) -> tuple[tuple[bool, str], ...]:
        return tuple((value is None, str(value)) for value in row)

    out = {}
    with _engine(db) as engine, engine.connect() as conn:
        for table in metadata.sorted_tables:
            if table.name in _RUN_LOGS:
                continue
            cols = [c for c in table.columns if c.name not in BOOKKEEPING_COLUMNS]
            rows = (tuple(r) for r in conn.execute(sa.select(*cols)))
            out[table.name] = sorted(rows, key=order)
    return out
