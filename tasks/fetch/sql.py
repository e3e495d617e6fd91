"""SQL sources, read through SQLAlchemy Core."""

from __future__ import annotations

import os
import re
from collections.abc import Sequence
from datetime import date, datetime
from decimal import Decimal
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from changekind.tasks.errors import SourceError, mask_url
from changekind.tasks.fetch.arrow import _stored_bound
from changekind.tasks.fetch.times import _Axis, _Group, _time_kind_of_text
from changekind.tasks.fetch.values import (
    _OPTION,
    CONNECT_TIMEOUT_S,
    LONG_COLUMNS,
    SAMPLE_ROWS,
    SourceSpec,
    TimeKind,
    _is_number,
    missing_column,
)
from changekind.tasks.persist.engines import our_driver

# ---------------------------------------------------------------------------
# SQL through SQLAlchemy Core
# ---------------------------------------------------------------------------


def _make_engine(url: sa.URL) -> sa.Engine:
    url = our_driver(url)
    connect_args: dict[str, Any] = {}
    if url.get_backend_name() == "postgresql":
        connect_args["connect_timeout"] = CONNECT_TIMEOUT_S
    elif url.get_backend_name() == "sqlite":
        connect_args["timeout"] = CONNECT_TIMEOUT_S
    return sa.create_engine(url, poolclass=sa.pool.NullPool, connect_args=connect_args)


def _python_category(values: Sequence[Any]) -> str | None:
    """'datetime', 'integer', 'float', 'text', 'other' from the first non-null value."""
    for v in values:
        if v is None:
            continue
        if isinstance(v, datetime | date):
            return "datetime"
        if isinstance(v, bool):
            return "other"
        if isinstance(v, int):
            return "integer"
        if isinstance(v, float | Decimal):
            return "float"
        if isinstance(v, str):
            return "text"
        return "other"
    return None


class _SqlReader:
    """A table or a query read through SQLAlchemy Core with bound parameters."""

    def __init__(self, spec: SourceSpec, *, check: bool = False) -> None:
        self.spec = spec
        try:
            url = sa.make_url(spec.location)
        except sa.exc.ArgumentError:
            raise SourceError(
                f"{spec.location.split('://', 1)[0]}:// URL could not be parsed; write it as "
                "dialect+driver://user@host:port/database"
            ) from None
        if url.get_backend_name() == "sqlite":
            db = url.database
            if db and db != ":memory:" and not db.startswith("file:") and not os.path.exists(db):
                raise SourceError(
                    f"SQLite database file {db!r} does not exist; check the path in the URL "
                    "(sqlite:///relative.db or sqlite:////absolute/path.db)"
                )
        try:
            self.engine = _make_engine(url)
        except (sa.exc.NoSuchModuleError, ImportError) as exc:
            raise SourceError(
                f"no SQLAlchemy driver for {url.drivername!r} ({exc}); install it or fix the URL"
            ) from None
        try:
            self.conn = self.engine.connect()
        except sa.exc.DBAPIError as exc:
            self.engine.dispose()
            raise SourceError(
                f"cannot connect to {mask_url(spec.location)} ({_db_message(exc)}); check the "
                "URL and that the database server is running"
            ) from exc
        try:
            self.src = self._source()
            self.probe = self._probe(SAMPLE_ROWS if check else 1)
        except BaseException:
            self.close()
            raise

    def _source(self) -> sa.FromClause:
        spec = self.spec
        cols = spec.columns
        if spec.table is not None:
            schema, _, name = spec.table.rpartition(".")
            inspector = sa.inspect(self.conn)
            if not inspector.has_table(name, schema=schema or None):
                tables = inspector.get_table_names(schema=schema or None)
                listed = ", ".join(tables[:20]) + (" ..." if len(tables) > 20 else "")
                raise SourceError(
                    f"{spec.describe} does not exist (tables: {listed or 'none'}); pass --table "
                    "with one of these"
                )
            table = sa.Table(name, sa.MetaData(), schema=schema or None, autoload_with=self.conn)
            available = list(table.c.keys())
        else:
            probe = sa.text(spec.query).columns().subquery("changekind_source")  # type: ignore[arg-type]
            try:
                result = self.conn.execute(
                    sa.select(sa.literal_column("*")).select_from(probe).limit(0)
                )
                available = list(result.keys())
                result.close()
            except sa.exc.DBAPIError as exc:
                self.conn.rollback()
                raise SourceError(
                    f"{spec.describe}: the query failed ({_db_message(exc)}); fix the query"
                ) from exc
            table = (
                sa.text(spec.query)
                .columns(*(sa.column(n) for n in cols.source_names() if n in available))
                .subquery("changekind_source")
            )
        for role in LONG_COLUMNS:
            name = getattr(cols, role)
            if name not in available:
                raise missing_column(spec.describe, name, role, available)
        return table

    def _col(self, role: str) -> sa.ColumnElement[Any]:
        return self.src.c[getattr(self.spec.columns, role)]

    def _probe(self, limit: int) -> dict[str, list[Any]]:
        stmt = (
            sa.select(self._col("series_id"), self._col("timestamp"), self._col("value"))
            .where(self._col("timestamp").is_not(None))
            .limit(limit)
        )
        try:
            rows = self.conn.execute(stmt).all()
        except sa.exc.DBAPIError as exc:
            self.conn.rollback()
            raise SourceError(f"{self.spec.describe} cannot be read ({_db_message(exc)})") from exc
        except (ValueError, TypeError) as exc:  # result processors on malformed stored values
            raise SourceError(
                f"{self.spec.describe}: stored values do not match the column types ({exc}); "
                "fix the data or read it through a query that converts them"
            ) from None
        return {role: [row[i] for row in rows] for i, role in enumerate(LONG_COLUMNS)}

    def _reflected_category(self, role: str) -> str | None:
        sqltype = self._col(role).type
        if isinstance(sqltype, sa.DateTime | sa.Date):
            return "datetime"
        if isinstance(sqltype, sa.Integer):
            return "integer"
        if isinstance(sqltype, sa.Numeric):  # Float is a Numeric
            return "float"
        if isinstance(sqltype, sa.String):
            return "text"
        return None

    def _category(self, role: str) -> str | None:
        found = _python_category(self.probe[role])
        return found if found is not None else self._reflected_category(role)

    def time_kind(self) -> TimeKind:
        spec = self.spec
        value = self._category("value")
        if value not in (None, "integer", "float"):
            example = next((v for v in self.probe["value"] if v is not None), None)
            raise SourceError(
                f"{spec.describe}: value column {spec.columns.value!r} holds {example!r}, not "
                f"numbers; store numbers or pass {_OPTION['value']} to choose the right column"
            )
        category = self._category("timestamp")
        if category == "datetime":
            return "datetime"
        if category in ("integer", "float"):
            return "numeric"
        if category == "text":
            return _time_kind_of_text(pd.Series(self.probe["timestamp"], dtype=object), spec)
        if category is None:
            return "datetime"  # empty source of unknown type: nothing to compare yet
        raise SourceError(
            f"{spec.describe}: timestamp column {spec.columns.timestamp!r} holds neither "
            f"dates/times, numbers nor text; pass {_OPTION['timestamp']} to choose the right column"
        )

    def _ids(self, ids: Sequence[str]) -> list[Any]:
        if self._category("series_id") == "integer":
            return [int(s) for s in ids if re.fullmatch(r"[+-]?\d+", s)]
        return list(ids)

    def _time_value(self, key: Any, axis: _Axis) -> Any:
        """``key`` as a bound parameter of the stored type (see :func:`_stored_bound`)."""
        category = self._category("timestamp")
        if category == "datetime":
            sample = next((v for v in self.probe["timestamp"] if v is not None), None)
            if isinstance(sample, date) and not isinstance(sample, datetime):
                return _stored_bound(key, axis, "date")
            aware = isinstance(sample, datetime) and sample.tzinfo is not None
            stamp = _stored_bound(key, axis, "timestamp", unit="us", tz="UTC" if aware else None)
            return stamp.to_pydatetime()
        if category in ("integer", "float"):
            return _stored_bound(key, axis, category, unit=self.spec.timestamp_unit)
        return None  # text or unknown: filtered in memory

    def scan(self, groups: Sequence[_Group], axis: _Axis) -> pd.DataFrame:
        ts = self._col("timestamp")
        conditions = []
        for group in groups:
            cond = [self._col("series_id").in_(self._ids(group.ids))]
            for key, upper in ((group.start, False), (group.end, True)):
                if key is None:
                    continue
                value = self._time_value(key, axis)
                if value is None:
                    continue
                if upper:
                    cond.append(ts < value)
                else:
                    cond.append(ts >= value)
            conditions.append(sa.and_(*cond))
        stmt = sa.select(
            self._col("series_id").label("series_id"),
            ts.label("timestamp"),
            self._col("value").label("value"),
        ).where(sa.or_(*conditions))
        try:
            rows = self.conn.execute(stmt).all()
        except (ValueError, TypeError) as exc:  # result processors on malformed stored values
            raise SourceError(
                f"{self.spec.describe}: stored values do not match the column types ({exc}); "
                "fix the data or read it through a query that converts them"
            ) from None
        ids = [None if r[0] is None else str(r[0]) for r in rows]
        values = [r[2] for r in rows]
        try:
            numbers = np.array([np.nan if v is None else float(v) for v in values], dtype=float)
        except (TypeError, ValueError):
            bad = next(v for v in values if not _is_number(v) and v is not None)
            raise SourceError(
                f"{self.spec.describe}: value column {self.spec.columns.value!r} holds {bad!r}, "
                "not a number; fix that row"
            ) from None
        return pd.DataFrame(
            {
                "series_id": pd.Series(ids, dtype=object),
                "timestamp": pd.Series([r[1] for r in rows], dtype=object),
                "value": numbers,
            }
        )

    def distinct_ids(self) -> list[str]:
        col = self._col("series_id")
        rows = self.conn.execute(sa.select(col).where(col.is_not(None)).distinct()).all()
        return sorted({str(r[0]) for r in rows})

    def close(self) -> None:
        conn = getattr(self, "conn", None)
        if conn is not None:
            conn.close()
        self.engine.dispose()


def _db_message(exc: sa.exc.DBAPIError) -> str:
    text = str(exc.orig).strip().splitlines()
    return text[0] if text else type(exc.orig).__name__
