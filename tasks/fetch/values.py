"""What a source is and what is read from it: column names, windows, the source
spec, problems found while reading, and the constants the readers share.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from decimal import Decimal
from typing import Literal, TypeVar

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError, SourceError, mask_url
from changekind.tasks.timeaxis import ISO_EXAMPLE, parse_instant

SourceKind = Literal["parquet", "csv", "sql"]
TimeKind = Literal["datetime", "numeric", "text"]
Bound = pd.Timestamp | datetime | date | np.datetime64 | str | float | int | None
Span = pd.Timedelta | timedelta | np.timedelta64 | str | float | int

LONG_COLUMNS: tuple[str, str, str] = ("series_id", "timestamp", "value")
PARQUET_SUFFIXES: tuple[str, ...] = (".parquet", ".parq", ".pq")
CSV_SUFFIXES: tuple[str, ...] = (".csv", ".csv.gz")
TIMESTAMP_UNITS: tuple[str, ...] = ("s", "ms", "us", "ns")
SAMPLE_ROWS = 1000
"""Rows looked at when deciding what a text timestamp column holds."""
MAX_FILTER_GROUPS = 1
"""Most distinct (start, end) pairs pushed down as separate OR-ed conditions.

Above this, a batch becomes at most two conditions (windows with an open start,
and the rest from their earliest start), trimmed per series in memory.
Measured with tests/benchmarks/bench_fetch.py (1,000 series x 720 points in
Parquet, batches of 100, windows sorted by start, best of 5 on a loaded 2-core
machine): a different watermark per series took 0.99 s / 0.55 s (two file
layouts) with one condition per series against 0.51 s / 0.25 s with the
earliest start and trim; with 4 distinct watermarks, 0.47 s / 0.33 s against
0.36 s / 0.36 s.  So distinct spans are merged unless they are all equal.
"""
CONNECT_TIMEOUT_S = 10

_T = TypeVar("_T")

_OPTION = {
    "series_id": "--series-column",
    "timestamp": "--timestamp-column",
    "value": "--value-column",
}


def missing_column(describe: str, name: str, role: str, present: Sequence[str]) -> SourceError:
    """The error of a source without the column mapped to ``role`` (every reader's wording)."""
    return SourceError(
        f"{describe} has no column {name!r} (columns: {', '.join(present)}); "
        f"pass {_OPTION[role]} to name the {role.replace('_', ' ')} column"
    )


# ---------------------------------------------------------------------------
# Value types
# ---------------------------------------------------------------------------


def _is_number(value: object) -> bool:
    return isinstance(value, int | float | np.integer | np.floating | Decimal) and not isinstance(
        value, bool
    )


def _to_timestamp(value: object, *, what: str) -> pd.Timestamp:
    """A bound, watermark or event time as a UTC Timestamp: ISO 8601, a naive time is UTC
    (the rule of :mod:`changekind.tasks.timeaxis`)."""
    if not _is_number(value):
        try:
            stamp = parse_instant(value, what=what)
        except ConfigError:
            raise ConfigError(f"{what} {value!r} is not a date/time; give {ISO_EXAMPLE}") from None
        if isinstance(stamp, pd.Timestamp):
            return stamp
    raise ConfigError(
        f"{what} {value!r} is a number but the timestamps are dates/times; "
        "give a date/time such as '2024-05-01T00:00'"
    )


def _to_timedelta(value: object, *, what: str) -> pd.Timedelta:
    if _is_number(value):
        if not math.isfinite(float(value)):  # type: ignore[arg-type]
            raise ConfigError(f"{what} {value!r} is not a finite duration")
        return pd.Timedelta(seconds=float(value))  # type: ignore[arg-type]
    try:
        span = pd.Timedelta(value)  # type: ignore[arg-type]
    except (ValueError, TypeError) as exc:
        raise ConfigError(
            f"{what} {value!r} is not a duration ({exc}); give e.g. '6h' or a number of seconds"
        ) from None
    if span is pd.NaT:
        raise ConfigError(f"{what} {value!r} is not a duration")
    return span


@dataclass(frozen=True, slots=True)
class ColumnMap:
    """Names of the source columns that hold the series id, timestamp and value."""

    series_id: str = "series_id"
    timestamp: str = "timestamp"
    value: str = "value"

    @classmethod
    def coerce(cls, columns: ColumnMap | Mapping[str, str] | None) -> ColumnMap:
        """A ColumnMap from a ColumnMap, a partial mapping or None (identity).

        Raises
        ------
        ConfigError
            For keys other than ``series_id``, ``timestamp``, ``value`` or
            names that are not non-empty strings.
        """
        if columns is None:
            return cls()
        if isinstance(columns, ColumnMap):
            return columns
        unknown = sorted(set(columns) - set(LONG_COLUMNS))
        if unknown:
            raise ConfigError(
                f"column mapping has unknown key(s) {unknown}; use only "
                f"{list(LONG_COLUMNS)} mapped to the source's column names"
            )
        for key, name in columns.items():
            if not isinstance(name, str) or not name:
                raise ConfigError(
                    f"column mapping {key!r} -> {name!r} is not a column name; "
                    "give the source column's name as text"
                )
        mapped = cls(**dict(columns))
        names = [mapped.series_id, mapped.timestamp, mapped.value]
        if len(set(names)) < 3:
            raise ConfigError(
                f"column mapping uses one source column twice ({names}); "
                "series id, timestamp and value must be three different columns"
            )
        return mapped

    def source_names(self) -> tuple[str, str, str]:
        return (self.series_id, self.timestamp, self.value)


@dataclass(frozen=True, slots=True)
class SeriesWindow:
    """The span of one series to read: ``start <= t < end`` (None = open).

    Bounds are date/times (``pd.Timestamp``, ``datetime``, ISO text) for
    date/time sources and numbers for numeric ones.
    """

    series_id: str
    start: Bound = None
    end: Bound = None

    @classmethod
    def after_watermark(
        cls,
        series_id: str,
        watermark: Bound,
        *,
        context_points: int,
        step: Span,
        end: Bound = None,
    ) -> SeriesWindow:
        """The window of a warm scan: new points after ``watermark`` plus context.

        Parameters
        ----------
        series_id : str
        watermark : timestamp or number
            The last point already analysed.
        context_points : int
            Points at or before the watermark the model needs (>= 0); the
            window starts at ``watermark - (context_points - 1) * step``, so it
            holds the watermark and the ``context_points - 1`` points before
            it.  With 0 it starts just after the watermark.
        step : Timedelta, timedelta, duration text or number
            Grid spacing; a number is seconds for date/time watermarks.
        end : timestamp or number, optional
            Exclusive end (default open).
        """
        if isinstance(context_points, bool) or not isinstance(context_points, int | np.integer):
            raise ConfigError(f"context_points={context_points!r} is not a whole number")
        if context_points < 0:
            raise ConfigError(f"context_points={context_points} is negative; give 0 or more")
        if watermark is None:
            return cls(series_id, None, end)
        if _is_number(watermark):
            if not _is_number(step):
                raise ConfigError(
                    f"series {series_id!r}: numeric watermark {watermark!r} needs a numeric step, "
                    f"not {step!r}"
                )
            return cls(series_id, float(watermark) - (context_points - 1) * float(step), end)
        stamp = _to_timestamp(watermark, what="watermark")
        return cls(series_id, stamp - (context_points - 1) * _to_timedelta(step, what="step"), end)


@dataclass(frozen=True, slots=True, repr=False)
class SourceSpec:
    """Where a fleet's series live and how to read them.

    Made by :func:`open_source`, which checks the source; plain data, so it
    can be passed to tasks and across processes.

    Attributes
    ----------
    kind : {"parquet", "csv", "sql"}
    location : str
        Absolute path of the file or directory, or the SQLAlchemy URL.
    columns : ColumnMap
        Source column names of series id, timestamp and value.
    table, query : str or None
        For SQL sources, the table (``schema.table`` allowed) or SELECT read.
    time_kind : {"datetime", "numeric", "text"}
        What the timestamp column holds, as found by :func:`open_source`.
    timestamp_unit : {"s", "ms", "us", "ns"} or None
        Set when numeric timestamps are epoch times in this unit.
    timezone : str
        IANA zone that naive times are in, when compared with aware ones.
    excluded : tuple of (path, reason)
        Files of a directory source that :func:`open_source` found unreadable
        (empty, truncated, corrupt, or without the mapped columns); readers
        skip them, the fleet flows record them.
    """

    kind: SourceKind
    location: str
    columns: ColumnMap = ColumnMap()
    table: str | None = None
    query: str | None = None
    time_kind: TimeKind = "datetime"
    timestamp_unit: str | None = None
    timezone: str = "UTC"
    excluded: tuple[tuple[str, str], ...] = ()

    @property
    def describe(self) -> str:
        """The source in words, for messages (passwords hidden)."""
        if self.kind == "sql":
            where = mask_url(self.location)
            if self.table is not None:
                return f"SQL table {self.table!r} at {where}"
            return f"SQL query at {where}"
        noun = "parquet" if self.kind == "parquet" else "CSV"
        shape = "dataset" if self.kind == "parquet" else "directory"
        if os.path.isdir(self.location):
            return f"{noun} {shape} {self.location + os.sep!r}"
        return f"{noun} file {self.location!r}"

    def __repr__(self) -> str:
        location = mask_url(self.location) if self.kind == "sql" else self.location
        parts = [f"kind={self.kind!r}", f"location={location!r}", f"columns={self.columns!r}"]
        for name in ("table", "query", "timestamp_unit"):
            if getattr(self, name) is not None:
                parts.append(f"{name}={getattr(self, name)!r}")
        parts += [f"time_kind={self.time_kind!r}", f"timezone={self.timezone!r}"]
        return f"SourceSpec({', '.join(parts)})"


@dataclass(frozen=True, slots=True)
class SourceProblem:
    """A part of a source that could not be read: a file, a row or a cell.

    ``location`` is the file (or the source); ``row`` the line of a CSV file
    or the row of a Parquet file (1-based), when known; ``series_id`` the
    series the row belongs to, when known.
    """

    location: str
    problem: str
    row: int | None = None
    series_id: str | None = None
    skip_series: bool = False
    """The series is not analysed in this run (its rows may be in a damaged file)."""

    def describe(self) -> str:
        where = self.location if self.row is None else f"{self.location}, row {self.row}"
        who = "" if self.series_id is None else f" (series {self.series_id!r})"
        return f"{where}{who}: {self.problem}"


@dataclass(frozen=True, slots=True)
class SourceSurvey:
    """The series ids of a source and the parts of it that could not be read."""

    series_ids: list[str]
    problems: tuple[SourceProblem, ...] = ()


MAX_ROWS_NAMED = 10
"""Most row numbers one problem lists (the count says how many there are)."""
