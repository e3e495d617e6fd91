"""Checking and converting values on their way into the tables, and the one
dialect-specific upsert (``INSERT ... ON CONFLICT``) every write uses.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.dialects import postgresql as pg_dialect
from sqlalchemy.dialects import sqlite as sqlite_dialect
from sqlalchemy.engine import Connection

from changekind.tasks.errors import ConfigError
from changekind.tasks.timeaxis import utc_datetime

_CHUNK = 500  # rows per IN (...) list when reading back a batch


# --------------------------------------------------------------------------- helpers


def _utc(value: datetime) -> datetime:
    """``value`` as an aware UTC datetime; naive values are taken to be UTC."""
    if not isinstance(value, datetime):
        raise ConfigError(f"expected a datetime, got {value!r}")
    if isinstance(value, pd.Timestamp):
        value = value.to_pydatetime(warn=False)
    if value.tzinfo is None:
        return value.replace(tzinfo=UTC)
    return value.astimezone(UTC)


def _now(at: datetime | None) -> datetime:
    return datetime.now(UTC) if at is None else _utc(at)


def _as_datetime(value: datetime | str | None, what: str) -> datetime | None:
    """A run span bound given as a datetime, an ISO text or a pandas Timestamp."""
    if value is None:
        return None
    if isinstance(value, datetime):  # pd.Timestamp is a datetime too
        return _utc(value)
    if isinstance(value, str):
        parsed = _parse_timestamp(value)
        if parsed is not None:
            return parsed
    raise ConfigError(
        f"{what} {value!r} is not a date-time; give an ISO 8601 time such as '2024-03-01T00:00:00Z'"
    )


def _parse_timestamp(text: str) -> datetime | None:
    """The UTC instant of an event time as the input gave it; None when it is not a
    date-time (plain numbers, the labels of numeric grids, are not).

    The rule of :mod:`changekind.tasks.timeaxis`: a time without a zone is UTC,
    others are converted to UTC; text is ISO 8601.
    """
    try:
        return utc_datetime(text)
    except ConfigError:
        return None


def _finite_or_none(value: float | None) -> float | None:
    """Floats as stored: NaN becomes NULL (SQLite cannot keep NaN anyway)."""
    if value is None:
        return None
    value = float(value)
    return None if math.isnan(value) else value


def _text(value: object, what: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ConfigError(f"{what} must be a non-empty text, got {value!r}")
    return value


def _count(value: object, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 0:
        raise ConfigError(f"{what} must be a whole number >= 0, got {value!r}")
    return int(value)


def _one_of(value: object, allowed: Sequence[str], what: str) -> str:
    if value not in allowed:
        raise ConfigError(f"{what} {value!r} is not one of {', '.join(allowed)}")
    return str(value)


def _chunks(items: Sequence[Any], size: int = _CHUNK) -> Iterator[Sequence[Any]]:
    for start in range(0, len(items), size):
        yield items[start : start + size]


# --------------------------------------------------------------------------- upsert

_INSERTS = {"sqlite": sqlite_dialect.insert, "postgresql": pg_dialect.insert}


def _upsert(
    conn: Connection,
    table: sa.Table,
    rows: Sequence[Mapping[str, Any]],
    *,
    keys: Sequence[str],
    update: Sequence[str],
    keep_when_null: Sequence[str] = (),
) -> None:
    """``INSERT ... ON CONFLICT (keys) DO UPDATE`` for a batch: the one dialect switch.

    Parameters
    ----------
    conn : Connection
        Inside the caller's transaction.
    rows : sequence of mappings
        All with the same keys.
    keys : sequence of str
        The primary-key columns the conflict is on.
    update : sequence of str
        Columns a conflicting row gets from the new one; empty means ``DO NOTHING``.
    keep_when_null : sequence of str
        Of ``update``: columns that keep the stored value when the new one is NULL.
    """
    if not rows:
        return
    try:
        insert = _INSERTS[conn.dialect.name]
    except KeyError:
        raise ConfigError(
            f"database dialect {conn.dialect.name!r} is not supported; use sqlite or postgresql"
        ) from None
    stmt = insert(table)
    if update:
        set_ = {
            name: sa.func.coalesce(stmt.excluded[name], table.c[name])
            if name in keep_when_null
            else stmt.excluded[name]
            for name in update
        }
        stmt = stmt.on_conflict_do_update(index_elements=list(keys), set_=set_)
    else:
        stmt = stmt.on_conflict_do_nothing(index_elements=list(keys))
    conn.execute(stmt, [dict(row) for row in rows])
