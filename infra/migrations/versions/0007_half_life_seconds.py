"""``series_events.half_life`` as a number: seconds (index units on numeric grids).

Revision ID: 0007
Revises: 0005
Create Date: 2026-12-05 00:00:00

Until now the half-life of a temporary change was stored as readable text
(``'17.5 min'``, ``'1.11 h'``, ``'12 index units'``), which BI tools cannot sort
or sum.  Each stored text is read back into its number (seconds for the units
``ms``, ``s``, ``min``, ``h`` and ``d``; the number itself for index units);
a text that is none of these becomes NULL.  The views select from
``series_events`` (PostgreSQL ties them to the column's type, SQLite checks
them when the table is copied), so they are dropped first and created again
from their source text, unchanged (SQLite keeps that text; on PostgreSQL it
is the revisions' that created them).  The downgrade writes the numbers back
as the texts the engine used to write (3 significant digits).
"""

from __future__ import annotations

import importlib.util
import math
import re
from collections.abc import Sequence
from pathlib import Path
from types import ModuleType

import sqlalchemy as sa
from alembic import op

revision: str = "0007"
down_revision: str | Sequence[str] | None = "0006"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

UNIT_SECONDS = {"ms": 0.001, "s": 1.0, "min": 60.0, "h": 3600.0, "d": 86400.0}
"""The units the engine wrote half-lives in (``format_duration``), in seconds."""

_TEXT = re.compile(
    r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?|inf)\s*(ms|s|min|h|d|index units)\s*$"
)


def half_life_seconds(text: str | None) -> float | None:
    """A stored half-life text as a number (None when it cannot be read)."""
    if text is None:
        return None
    match = _TEXT.match(str(text))
    if match is None:
        return None
    value = float(match.group(1))
    unit = match.group(2)
    if not math.isfinite(value):
        return None
    return value if unit == "index units" else value * UNIT_SECONDS[unit]


def half_life_text(value: float | None, timed: bool) -> str | None:
    """The text the engine wrote before this revision (for the downgrade)."""
    if value is None:
        return None
    if not timed:
        return f"{value:.3g} index units"
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0), ("s", 1.0)):
        if abs(value) >= size:
            return f"{value / size:.3g} {unit}"
    return f"{value * 1000:.3g} ms"


def _views() -> list[tuple[str, str]]:
    """The views as (name, CREATE statement), read from the database itself."""
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        rows = bind.execute(
            sa.text("SELECT name, sql FROM sqlite_master WHERE type = 'view' ORDER BY name")
        ).all()
        return [(name, sql) for name, sql in rows]
    # PostgreSQL keeps a view with its '*' expanded: build it again from its source
    # text, so it reads the table as it is now (the revisions that made them hold it).
    names = bind.execute(
        sa.text("SELECT viewname FROM pg_views WHERE schemaname = current_schema()")
    ).scalars()
    source = {
        re.search(r"CREATE VIEW (\w+)", sql).group(1): sql  # type: ignore[union-attr]
        for name in (
            "0001_initial_schema.py",
            "0005_series_labels_and_incidents.py",
            "0006_effect_size_columns.py",
        )
        for sql in _revision(name).view_statements("postgresql")
    }
    return [(name, source[name]) for name in sorted(names)]


def _revision(name: str) -> ModuleType:
    path = Path(__file__).with_name(name)
    spec = importlib.util.spec_from_file_location(f"changekind_migration_{path.stem}", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _convert(new_type: sa.types.TypeEngine, convert) -> None:  # type: ignore[no-untyped-def]
    views = _views()
    for name, _ in views:
        op.execute(f'DROP VIEW "{name}"')
    with op.batch_alter_table("series_events") as batch:
        batch.add_column(sa.Column("half_life_new", new_type, nullable=True))
    bind = op.get_bind()
    table = sa.table(
        "series_events",
        sa.column("series_id", sa.Text),
        sa.column("event_time", sa.Text),
        sa.column("event_ts", sa.Text),  # only whether it is NULL matters
        sa.column("half_life", sa.Text),
        sa.column("half_life_new", new_type),
    )
    rows = bind.execute(
        sa.select(table.c.series_id, table.c.event_time, table.c.event_ts, table.c.half_life).where(
            table.c.half_life.is_not(None)
        )
    ).all()
    updates = [
        {"sid": sid, "etime": etime, "value": convert(value, ets is not None)}
        for sid, etime, ets, value in rows
    ]
    if updates:
        bind.execute(
            sa.update(table)
            .where(
                table.c.series_id == sa.bindparam("sid"),
                table.c.event_time == sa.bindparam("etime"),
            )
            .values(half_life_new=sa.bindparam("value")),
            updates,
        )
    with op.batch_alter_table("series_events", recreate="always" if _sqlite() else "auto") as batch:
        batch.drop_column("half_life")
        batch.alter_column("half_life_new", new_column_name="half_life")
    for _, sql in views:
        op.execute(sql)


def _sqlite() -> bool:
    return op.get_bind().dialect.name == "sqlite"


def upgrade() -> None:
    _convert(sa.Float(), lambda text, timed: half_life_seconds(text))


def downgrade() -> None:
    _convert(sa.Text(), lambda value, timed: half_life_text(float(value), timed))
