"""Read metric series in long form from Parquet, CSV or SQL sources.

Every source is read as three columns, ``series_id``, ``timestamp`` and
``value`` (the source's own column names are mapped onto them by a
:class:`ColumnMap`).  A run reads only what it needs: the series it asks for,
and for each the span it asks for, with the filters pushed down to the storage
where the storage can apply them:

==========  ==============================  ===================================
source      series filter                   time filter
==========  ==============================  ===================================
Parquet     pyarrow.dataset expression;     pyarrow.dataset expression on
            prunes hive partitions and      date/time or numeric columns
            row groups by statistics
CSV         applied while streaming (CSV    applied while streaming for numeric
            has no index: every read scans  timestamps, in memory for text
            the files)
SQL         ``WHERE ... IN`` with bound     ``WHERE`` with bound parameters on
            parameters                      date/time or numeric columns
==========  ==============================  ===================================

Timestamps stored as text (always the case in CSV) cannot be compared in the
storage; they are filtered in memory after the series filter.  For large
fleets keep the data in Parquet (sorted by series id, or partitioned by it) or
in a SQL table with a date/time column and an index on (series id, time).

Timestamps are handed on as the source typed them: a date/time column stays
date/time (naive or time-zone aware, as stored), text stays the exact text, so
the engine can quote an event's time as the input gave it.  Two conversions
are made because the source carries no type of its own: text that is all
numbers (a CSV column of epoch seconds or sample numbers) becomes numbers, and
numbers declared as epoch times with ``timestamp_unit`` become UTC date/times.
Naive times are read in ``timezone`` (default UTC) whenever they are compared
with aware ones; rows without a series id or a timestamp cannot be placed and
are skipped.  Bounds are ``start <= t < end``.
"""

from __future__ import annotations

import math
import os
import re
import zoneinfo
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import date, datetime, timedelta
from decimal import Decimal
from pathlib import Path
from typing import Any, Literal, Protocol, TypeVar

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import sqlalchemy as sa

from changekind.tasks.errors import ConfigError, SourceError
from changekind.tasks.wrappers import TaskSpec, lazy_task

SourceKind = Literal["parquet", "csv", "sql"]
TimeKind = Literal["datetime", "numeric", "text"]
Bound = pd.Timestamp | datetime | date | np.datetime64 | str | float | int | None
Span = pd.Timedelta | timedelta | np.timedelta64 | str | float | int

LONG_COLUMNS: tuple[str, str, str] = ("series_id", "timestamp", "value")
PARQUET_SUFFIXES: tuple[str, ...] = (".parquet", ".parq", ".pq")
CSV_SUFFIXES: tuple[str, ...] = (".csv",)
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


# ---------------------------------------------------------------------------
# Value types
# ---------------------------------------------------------------------------


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
            where = _safe_url(self.location)
            if self.table is not None:
                return f"SQL table {self.table!r} at {where}"
            return f"SQL query at {where}"
        noun = "parquet" if self.kind == "parquet" else "CSV"
        shape = "dataset" if self.kind == "parquet" else "directory"
        if os.path.isdir(self.location):
            return f"{noun} {shape} {self.location + os.sep!r}"
        return f"{noun} file {self.location!r}"

    def __repr__(self) -> str:
        location = _safe_url(self.location) if self.kind == "sql" else self.location
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


# ---------------------------------------------------------------------------
# Public functions
# ---------------------------------------------------------------------------


def open_source(
    location: str | os.PathLike[str],
    *,
    columns: ColumnMap | Mapping[str, str] | None = None,
    table: str | None = None,
    query: str | None = None,
    timestamp_unit: str | None = None,
    timezone: str = "UTC",
) -> SourceSpec:
    """Recognise and check a source of series in long form.

    Parameters
    ----------
    location : str or path
        A ``.parquet`` file, a directory of Parquet files (hive partitions such
        as ``series_id=web-01/`` allowed), a ``.csv`` file, a directory of CSV
        files, or a SQLAlchemy URL (``sqlite:///metrics.db``,
        ``postgresql+psycopg://user@host/db``).
    columns : ColumnMap or mapping, optional
        Source column names for ``series_id``, ``timestamp``, ``value``;
        unmapped ones keep those names.
    table : str, optional
        SQL sources: the table to read (``schema.table`` allowed).
    query : str, optional
        SQL sources: a SELECT to read instead of a table.
    timestamp_unit : {"s", "ms", "us", "ns"}, optional
        Numeric timestamps are epoch times in this unit (they are handed on as
        UTC date/times).
    timezone : str, default="UTC"
        IANA zone of naive timestamps, used when they meet aware ones.

    Returns
    -------
    SourceSpec

    Raises
    ------
    SourceError
        The path or database is missing, holds no files or tables, or lacks a
        column; the value column is not numeric; the timestamp column holds
        neither dates/times nor numbers.
    ConfigError
        Inconsistent options (a table for a file source, an unknown unit...).

    Notes
    -----
    1. Infer the kind from the location.  2. Check the options.  3. Open the
    source and check its columns and their types, deciding what the
    timestamp column holds (from up to ``SAMPLE_ROWS`` values for text).
    """
    cols = ColumnMap.coerce(columns)
    if timestamp_unit is not None and timestamp_unit not in TIMESTAMP_UNITS:
        raise ConfigError(
            f"timestamp unit {timestamp_unit!r} is not one of {list(TIMESTAMP_UNITS)}"
        )
    try:
        zoneinfo.ZoneInfo(timezone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError, TypeError):
        raise ConfigError(
            f"time zone {timezone!r} is unknown; give an IANA name such as 'UTC' or 'Europe/Paris'"
        ) from None

    # Step 1: the kind.
    text = os.fspath(location)
    kind = _infer_kind(text)

    # Step 2: options that depend on the kind.
    if kind == "sql":
        if table is not None and query is not None:
            raise ConfigError("give a SQL table or a query, not both")
        if table is None and query is None:
            raise SourceError(
                f"SQL source {_safe_url(text)} needs a table or a query; pass --table NAME "
                "or --query 'SELECT ...'"
            )
        if query is not None:
            query = query.strip().rstrip(";").strip()
            if not query:
                raise ConfigError("the SQL query is empty; give a SELECT statement")
    else:
        if table is not None or query is not None:
            raise ConfigError(
                f"a table or query applies to SQL sources only, and {text!r} is a {kind} path"
            )
        text = os.path.abspath(text)
    spec = SourceSpec(
        kind=kind,
        location=text,
        columns=cols,
        table=table,
        query=query,
        timestamp_unit=timestamp_unit,
        timezone=timezone,
    )

    # Step 3: open and check.
    reader = _READERS[kind](spec, check=True)
    try:
        time_kind = reader.time_kind()
        excluded = tuple(getattr(reader, "excluded", ()))
    finally:
        reader.close()
    if time_kind == "datetime" and timestamp_unit is not None:
        raise ConfigError(
            f"{spec.describe}: timestamp column {cols.timestamp!r} already holds date/times; "
            "drop the timestamp unit"
        )
    return replace(spec, time_kind=time_kind, excluded=excluded)


def list_series(spec: SourceSpec) -> list[str]:
    """The distinct series ids in a source, sorted.

    Reads the id column only (Parquet/CSV: a projected scan; SQL:
    ``SELECT DISTINCT``).  Rows without a series id (null or blank) name no
    series; :func:`survey_source` reports them.
    """
    return survey_source(spec).series_ids


def survey_source(spec: SourceSpec) -> SourceSurvey:
    """The series ids of a source and what of it could not be read.

    Problems: the files :func:`open_source` excluded, rows without a series
    id (file and row), and CSV rows with the wrong number of cells (file and
    line); none of them stops the others from being read.
    """
    reader = _READERS[spec.kind](spec)
    try:
        ids = reader.distinct_ids()
        found = list(getattr(reader, "problems", ()))
    finally:
        reader.close()
    excluded = [SourceProblem(path, why) for path, why in spec.excluded]
    return SourceSurvey(ids, tuple(excluded + found))


def read_series(
    spec: SourceSpec,
    series_ids: Sequence[str] | None,
    *,
    start: Bound = None,
    end: Bound = None,
    context: Span | Mapping[str, Span] | None = None,
) -> pd.DataFrame:
    """Read some series over one span.

    Parameters
    ----------
    spec : SourceSpec
    series_ids : sequence of str or None
        The series to read; None reads every series.
    start, end : timestamp or number, optional
        Read ``start <= t < end``; None leaves that side open.
    context : span or mapping of series id to span, optional
        Warm-up read before ``start`` (one span for all, or per series): a
        Timedelta, ``timedelta``, duration text such as ``"6h"``, or a number
        (seconds for date/time sources, index units for numeric ones).

    Returns
    -------
    pandas.DataFrame
        Columns ``series_id``, ``timestamp``, ``value``, sorted by series id
        and time.  Series with no rows in the span are absent.
    """
    ids = _check_ids(series_ids) if series_ids is not None else None
    reader = _READERS[spec.kind](spec)
    try:
        if ids is None:
            ids = reader.distinct_ids()
        windows = _span_windows(ids, start, end, context)
        return _read(reader, spec, windows)
    finally:
        reader.close()


def read_windows(
    spec: SourceSpec,
    windows: Sequence[SeriesWindow],
    *,
    problems: list[SourceProblem] | None = None,
) -> pd.DataFrame:
    """Read each series over its own window (a warm scan's new points + context).

    The windows become one pushed-down condition (series ids, earliest start,
    latest end), or two when some windows have an open start; each series is
    then trimmed to its own window in memory.  Reading a little more and
    trimming measured faster than one condition per window (see
    ``MAX_FILTER_GROUPS``).

    Parameters
    ----------
    problems : list, optional
        Cells that are not numbers (CSV) are appended here as
        :class:`SourceProblem` values and read as missing; without the list
        such a cell raises SourceError.

    Returns
    -------
    pandas.DataFrame
        Columns ``series_id``, ``timestamp``, ``value``, sorted by series id
        and time.
    """
    wins = _check_windows(windows)
    reader = _READERS[spec.kind](spec)
    try:
        frame = _read(reader, spec, wins, problems=problems)
        found = getattr(reader, "problems", [])
        if found and problems is None:
            raise SourceError(f"{spec.describe}: {found[0].describe()}")
        if problems is not None:
            problems.extend(found)
        return frame
    finally:
        reader.close()


def iter_batches(
    spec: SourceSpec,
    series_ids: Sequence[str] | None,
    *,
    batch_size: int,
    start: Bound = None,
    end: Bound = None,
    context: Span | Mapping[str, Span] | None = None,
) -> Iterator[list[tuple[str, pd.DataFrame]]]:
    """Read series a batch at a time, so memory holds one batch only.

    Parameters are those of :func:`read_series`, plus ``batch_size`` (series
    per batch, >= 1).  Each batch is read by one pushed-down query when the
    iterator reaches it.  (A CSV source is scanned again for every batch, as
    CSV has no index: convert large fleets to Parquet.)

    Yields
    ------
    list of (series_id, DataFrame)
        One entry per requested series, in request order; each frame has
        columns ``timestamp``, ``value`` (empty when the series has no rows in
        the span).
    """
    size = _check_batch_size(batch_size)
    ids = _check_ids(series_ids) if series_ids is not None else None
    return _iterate(spec, ids, size, lambda chunk: _span_windows(chunk, start, end, context))


def iter_window_batches(
    spec: SourceSpec, windows: Sequence[SeriesWindow], *, batch_size: int
) -> Iterator[list[tuple[str, pd.DataFrame]]]:
    """:func:`read_windows` a batch at a time; yields as :func:`iter_batches`.

    The windows are sorted by start (open starts first) before they are cut
    into batches, so the series of one batch have close starts and its
    pushed-down condition stays tight; entries come in that order.
    """
    size = _check_batch_size(batch_size)
    wins = _check_windows(windows)
    axis = _Axis.of(spec)
    keys = {w.series_id: axis.bound(w.start, what="start") for w in wins}
    for w in wins:  # bad bounds fail here, before any reading
        axis.bound(w.end, what="end")
    wins.sort(key=lambda w: (0, 0) if keys[w.series_id] is None else (1, keys[w.series_id]))
    by_id = {w.series_id: w for w in wins}
    return _iterate(spec, list(by_id), size, lambda chunk: [by_id[s] for s in chunk])


def split_batches(items: Sequence[_T], batch_size: int) -> list[list[_T]]:
    """Cut ``items`` into consecutive lists of at most ``batch_size``."""
    size = _check_batch_size(batch_size)
    return [list(items[i : i + size]) for i in range(0, len(items), size)]


# ---------------------------------------------------------------------------
# Reading, shared by every kind
# ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Group:
    """Series read under one time condition; keys are comparable time keys."""

    ids: tuple[str, ...]
    start: Any  # pd.Timestamp (UTC) or float; None = open
    end: Any


class _Reader(Protocol):
    def time_kind(self) -> TimeKind: ...
    def distinct_ids(self) -> list[str]: ...
    def scan(self, groups: Sequence[_Group], axis: _Axis) -> pd.DataFrame: ...
    def close(self) -> None: ...


def _iterate(
    spec: SourceSpec,
    ids: list[str] | None,
    size: int,
    windows_for: Callable[[list[str]], list[SeriesWindow]],
) -> Iterator[list[tuple[str, pd.DataFrame]]]:
    reader = _READERS[spec.kind](spec)
    try:
        todo = reader.distinct_ids() if ids is None else ids
        for i in range(0, len(todo), size):
            chunk = todo[i : i + size]
            frame = _read(reader, spec, windows_for(chunk))
            yield _split(frame, chunk)
    finally:
        reader.close()


def _split(frame: pd.DataFrame, ids: Sequence[str]) -> list[tuple[str, pd.DataFrame]]:
    """Per-series frames of a frame sorted by series id (contiguous slices)."""
    body = frame[["timestamp", "value"]]
    sid = frame["series_id"].to_numpy()
    cuts = np.flatnonzero(sid[1:] != sid[:-1]) + 1
    starts = np.concatenate([[0], cuts]) if len(sid) else np.array([], dtype=int)
    ends = np.concatenate([cuts, [len(sid)]]) if len(sid) else np.array([], dtype=int)
    spans = {sid[a]: (a, b) for a, b in zip(starts.tolist(), ends.tolist(), strict=True)}
    out = []
    for series_id in ids:
        a, b = spans.get(series_id, (0, 0))
        out.append((series_id, body.iloc[a:b].reset_index(drop=True)))
    return out


def _read(
    reader: _Reader,
    spec: SourceSpec,
    windows: Sequence[SeriesWindow],
    *,
    problems: list[SourceProblem] | None = None,
) -> pd.DataFrame:
    """Normalise the windows, scan with pushdown, trim exactly, sort."""
    axis = _Axis.of(spec)
    keyed = [
        (w.series_id, axis.bound(w.start, what="start"), axis.bound(w.end, what="end"))
        for w in windows
    ]
    if not keyed:
        return _finish(_empty_frame(), axis, spec, [])
    frame = reader.scan(_groups(keyed), axis)
    return _finish(frame, axis, spec, keyed, problems=problems)


def _groups(keyed: Sequence[tuple[str, Any, Any]]) -> list[_Group]:
    """Time conditions for a batch (see ``MAX_FILTER_GROUPS``)."""
    by_span: dict[tuple[Any, Any], list[str]] = {}
    for sid, start, end in keyed:
        by_span.setdefault((start, end), []).append(sid)
    if len(by_span) <= MAX_FILTER_GROUPS:
        return [_Group(tuple(ids), s, e) for (s, e), ids in by_span.items()]
    groups = []
    for open_start in (True, False):
        part = [k for k in keyed if (k[1] is None) == open_start]
        if not part:
            continue
        start = None if open_start else min(k[1] for k in part)
        end = None if any(k[2] is None for k in part) else max(k[2] for k in part)
        groups.append(_Group(tuple(k[0] for k in part), start, end))
    return groups


def _finish(
    frame: pd.DataFrame,
    axis: _Axis,
    spec: SourceSpec,
    keyed: Sequence[tuple[str, Any, Any]],
    *,
    problems: list[SourceProblem] | None = None,
) -> pd.DataFrame:
    # Rows that cannot be placed.
    frame = frame[frame["series_id"].notna() & frame["timestamp"].notna()]
    if not pd.api.types.is_numeric_dtype(frame["value"].dtype):  # CSV cells, read as text
        frame = frame.assign(value=_numbers(frame, spec, problems))
    ts = axis.output(frame["timestamp"], spec)
    keys = axis.keys(ts, spec)
    # Exact per-series trim (the pushdown may have read a superset).
    if keyed:
        sid = frame["series_id"]
        keep = np.array(sid.isin([k[0] for k in keyed]), dtype=bool)
        starts = {k[0]: k[1] for k in keyed if k[1] is not None}
        ends = {k[0]: k[2] for k in keyed if k[2] is not None}
        if starts:
            lo = axis.key_series(sid.map(starts))
            keep = keep & (lo.isna() | (keys >= lo)).to_numpy()
        if ends:
            hi = axis.key_series(sid.map(ends))
            keep = keep & (hi.isna() | (keys < hi)).to_numpy()
    else:
        keep = np.zeros(len(frame), dtype=bool)
    out = pd.DataFrame(
        {
            "series_id": frame["series_id"].astype(str).to_numpy()[keep],
            "timestamp": ts[keep].to_numpy() if ts.dtype == object else ts[keep].array,
            "value": frame["value"].astype("float64").to_numpy()[keep],
            "_key": keys[keep].array,
        }
    )
    out = out.sort_values(["series_id", "_key"], kind="mergesort")
    return out.drop(columns="_key").reset_index(drop=True)


def _numbers(
    frame: pd.DataFrame, spec: SourceSpec, problems: list[SourceProblem] | None
) -> np.ndarray:
    """The value cells as numbers; cells that are not numbers become missing and problems."""
    raw = frame["value"].astype(object)
    numbers = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad = np.flatnonzero(raw.notna().to_numpy() & np.isnan(numbers))
    if bad.size == 0:
        return numbers
    rows = frame.iloc[bad]
    found = [
        SourceProblem(
            spec.location,
            f"value {text!r} at {stamp} is not a number; fix that cell (or leave it empty "
            "for a missing value)",
            series_id=str(sid),
        )
        for sid, stamp, text in zip(
            rows["series_id"], rows["timestamp"], rows["value"], strict=True
        )
    ]
    if problems is None:
        raise SourceError(
            f"{spec.describe}: value column {spec.columns.value!r}: {found[0].problem}"
        )
    problems.extend(found)
    return numbers


def _empty_frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "series_id": pd.Series([], dtype=str),
            "timestamp": pd.Series([], dtype="datetime64[us]"),
            "value": pd.Series([], dtype="float64"),
        }
    )


def _span_windows(
    ids: Sequence[str], start: Bound, end: Bound, context: Span | Mapping[str, Span] | None
) -> list[SeriesWindow]:
    if context is None or start is None:
        return [SeriesWindow(sid, start, end) for sid in ids]
    spans = context if isinstance(context, Mapping) else None
    out = []
    for sid in ids:
        span = context if spans is None else spans.get(sid)
        out.append(SeriesWindow(sid, start if span is None else _shift(start, span), end))
    return out


def _shift(start: Bound, span: Span) -> Bound:
    if _is_number(start):
        if not _is_number(span):
            raise ConfigError(f"numeric start {start!r} needs a numeric context span, not {span!r}")
        return float(start) - float(span)  # type: ignore[arg-type]
    return _to_timestamp(start, what="start") - _to_timedelta(span, what="context")


def _check_ids(series_ids: Sequence[str]) -> list[str]:
    if isinstance(series_ids, str | bytes):
        raise ConfigError(
            f"series ids must be a list of ids, not the single text {series_ids!r}; "
            f"wrap it in a list"
        )
    seen: dict[str, None] = {}
    for sid in series_ids:
        if not isinstance(sid, str):
            raise ConfigError(f"series id {sid!r} is not text; give ids as strings")
        seen[sid] = None
    return list(seen)


def _check_windows(windows: Sequence[SeriesWindow]) -> list[SeriesWindow]:
    out: dict[str, SeriesWindow] = {}
    for w in windows:
        if not isinstance(w, SeriesWindow):
            raise ConfigError(f"{w!r} is not a SeriesWindow")
        if not isinstance(w.series_id, str):
            raise ConfigError(f"series id {w.series_id!r} is not text; give ids as strings")
        if w.series_id in out:
            raise ConfigError(f"series {w.series_id!r} has two windows; give one window per series")
        out[w.series_id] = w
    return list(out.values())


def _check_batch_size(batch_size: int) -> int:
    if isinstance(batch_size, bool) or not isinstance(batch_size, int | np.integer):
        raise ConfigError(f"batch size {batch_size!r} is not a whole number")
    if batch_size < 1:
        raise ConfigError(f"batch size {batch_size} must be at least 1")
    return int(batch_size)


# ---------------------------------------------------------------------------
# Time: bounds, keys and the representation handed on
# ---------------------------------------------------------------------------


def _is_number(value: object) -> bool:
    return isinstance(value, int | float | np.integer | np.floating | Decimal) and not isinstance(
        value, bool
    )


def _to_timestamp(value: object, *, what: str) -> pd.Timestamp:
    if _is_number(value):
        raise ConfigError(
            f"{what} {value!r} is a number but the timestamps are dates/times; "
            "give a date/time such as '2024-05-01T00:00'"
        )
    try:
        stamp = pd.Timestamp(value)  # type: ignore[arg-type]
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"{what} {value!r} is not a date/time ({exc})") from None
    if stamp is pd.NaT:
        raise ConfigError(f"{what} {value!r} is not a date/time")
    return stamp


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


def _parse_text_times(text: pd.Series) -> pd.Series:
    """Parse date/time text; naive results stay naive, aware ones become UTC.

    ISO 8601 first (fast, unambiguous), then element-wise parsing.  Raises
    ValueError naming the first value that is not a date/time.
    """
    for fmt in ("ISO8601", "mixed"):
        for utc in (False, True):
            try:
                parsed = pd.to_datetime(text, format=fmt, utc=utc)
            except (ValueError, TypeError, OverflowError):
                continue
            if parsed.dt.tz is not None:
                parsed = parsed.dt.tz_convert("UTC")
            return parsed
    coerced = pd.to_datetime(text, format="mixed", utc=True, errors="coerce")
    bad = text[coerced.isna() & text.notna()]
    raise ValueError(f"{(bad.iloc[0] if len(bad) else text.iloc[0])!r} is not a date/time")


def numeric_text(text: pd.Series) -> bool:
    """Whether text cells are all numbers (epoch seconds, sample numbers): one rule for
    every reader (detect's INPUT files too)."""
    return bool(pd.to_numeric(text, errors="coerce").notna().all())


_numeric_text = numeric_text


@dataclass(frozen=True, slots=True)
class _Axis:
    """How times of one source are compared.

    Keys are UTC-aware ``datetime64`` for date/time data (naive values read in
    ``tz``) and float64 for plain numbers.
    """

    temporal: bool
    tz: str

    @classmethod
    def of(cls, spec: SourceSpec) -> _Axis:
        temporal = spec.time_kind != "numeric" or spec.timestamp_unit is not None
        return cls(temporal, spec.timezone)

    def bound(self, value: Bound, *, what: str) -> Any:
        if value is None:
            return None
        if not self.temporal:
            if not _is_number(value):
                raise ConfigError(
                    f"{what} {value!r} is not a number but the source's timestamps are numbers; "
                    "give a number (or set a timestamp unit if they are epoch times)"
                )
            number = float(value)  # type: ignore[arg-type]
            if math.isnan(number):
                raise ConfigError(f"{what} is NaN; give a number or leave it open")
            return number
        stamp = _to_timestamp(value, what=what)
        if stamp.tzinfo is None:
            stamp = stamp.tz_localize(self.tz, ambiguous=True, nonexistent="shift_forward")
        return stamp.tz_convert("UTC").as_unit("ns")

    def key_series(self, mapped: pd.Series) -> pd.Series:
        """Per-row bounds (a Series of keys or missing) in a comparable dtype."""
        if self.temporal:
            return pd.to_datetime(mapped, utc=True)
        return pd.to_numeric(mapped).astype("float64")

    def output(self, ts: pd.Series, spec: SourceSpec) -> pd.Series:
        """The timestamp column as handed on (see the module notes)."""
        if spec.time_kind == "numeric":
            if not pd.api.types.is_numeric_dtype(ts.dtype):
                try:
                    ts = pd.to_numeric(ts)
                except (ValueError, TypeError):
                    bad = ts[pd.to_numeric(ts, errors="coerce").isna()]
                    raise SourceError(
                        f"{spec.describe}: timestamp column {spec.columns.timestamp!r} holds "
                        f"{bad.iloc[0]!r} among numbers; fix that row or choose the right column"
                    ) from None
            if spec.timestamp_unit is not None:
                try:
                    ts = pd.to_datetime(ts, unit=spec.timestamp_unit, utc=True)
                except (ValueError, OverflowError, pd.errors.OutOfBoundsDatetime) as exc:
                    raise SourceError(
                        f"{spec.describe}: timestamps are not epoch times in unit "
                        f"{spec.timestamp_unit!r} ({exc}); check the timestamp unit"
                    ) from None
            return ts
        if spec.time_kind == "datetime" and ts.dtype == object:
            try:
                return pd.to_datetime(ts)
            except (ValueError, TypeError):
                return pd.to_datetime(ts, utc=True)
        if spec.time_kind == "text" and ts.dtype == object:
            return ts.astype(str)
        return ts

    def keys(self, ts: pd.Series, spec: SourceSpec) -> pd.Series:
        """Comparable keys of the handed-on timestamp column."""
        if not self.temporal:
            return ts.astype("float64")
        if pd.api.types.is_datetime64_any_dtype(ts.dtype):
            parsed = ts
        else:
            try:
                parsed = _parse_text_times(ts)
            except ValueError as exc:
                raise SourceError(
                    f"{spec.describe}: timestamp column {spec.columns.timestamp!r}: {exc}; "
                    "fix that row or choose the right column"
                ) from None
        if parsed.dt.tz is None:
            parsed = parsed.dt.tz_localize(
                self.tz, ambiguous=np.ones(len(parsed), dtype=bool), nonexistent="shift_forward"
            )
        return parsed.dt.tz_convert("UTC")


def _time_kind_of_text(sample: pd.Series, spec: SourceSpec) -> TimeKind:
    sample = sample.dropna()
    if len(sample) == 0:
        return "text"
    if _numeric_text(sample):
        return "numeric"
    try:
        _parse_text_times(sample)
    except ValueError as exc:
        raise SourceError(
            f"{spec.describe}: timestamp column {spec.columns.timestamp!r} holds values that are "
            f"neither dates/times nor numbers: {exc}; choose the right column "
            f"({_OPTION['timestamp']}) or fix the data"
        ) from None
    return "text"


# ---------------------------------------------------------------------------
# Kind inference
# ---------------------------------------------------------------------------

_URL = re.compile(r"^[A-Za-z][A-Za-z0-9+.\-]*://")


def _infer_kind(location: str) -> SourceKind:
    if _URL.match(location):
        return "sql"
    path = Path(location)
    if not path.exists():
        raise SourceError(
            f"source {location!r} does not exist; give a .parquet or .csv file, a directory "
            "of them, or a database URL such as sqlite:///metrics.db"
        )
    if path.is_file():
        name = path.name.lower()
        if name.endswith(PARQUET_SUFFIXES):
            return "parquet"
        if name.endswith(CSV_SUFFIXES):
            return "csv"
        raise SourceError(
            f"source file {location!r} is neither .parquet nor .csv; convert it or rename it "
            "after its format"
        )
    names = [f.lower() for f in _data_files(path, PARQUET_SUFFIXES + CSV_SUFFIXES)]
    has_parquet = any(f.endswith(PARQUET_SUFFIXES) for f in names)
    has_csv = any(f.endswith(CSV_SUFFIXES) for f in names)
    if has_parquet and has_csv:
        raise SourceError(
            f"directory {location + os.sep!r} holds both .parquet and .csv files; point at a "
            "directory of one format"
        )
    if has_parquet:
        return "parquet"
    if has_csv:
        return "csv"
    raise SourceError(
        f"directory {location + os.sep!r} holds no .parquet or .csv files; point at the "
        "directory the data was written to"
    )


def _data_files(root: Path, suffixes: tuple[str, ...]) -> list[str]:
    """Data files under ``root``, skipping names starting with '.' or '_'."""
    found = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = sorted(d for d in dirnames if not d.startswith((".", "_")))
        for name in sorted(filenames):
            if not name.startswith((".", "_")) and name.lower().endswith(suffixes):
                found.append(os.path.join(dirpath, name))
    return found


# ---------------------------------------------------------------------------
# Parquet and CSV through pyarrow.dataset
# ---------------------------------------------------------------------------


def _arrow_category(dtype: pa.DataType) -> str:
    if pa.types.is_dictionary(dtype):
        dtype = dtype.value_type
    if pa.types.is_timestamp(dtype) or pa.types.is_date(dtype):
        return "datetime"
    if pa.types.is_integer(dtype):
        return "integer"
    if pa.types.is_floating(dtype) or pa.types.is_decimal(dtype):
        return "float"
    if pa.types.is_string(dtype) or pa.types.is_large_string(dtype):
        return "text"
    if pa.types.is_null(dtype):
        return "null"
    return "other"


class _ArrowReader:
    """Parquet files or CSV files read through one ``pyarrow.dataset``."""

    def __init__(self, spec: SourceSpec, *, check: bool = False) -> None:
        self.spec = spec
        cols = spec.columns
        self.problems: list[SourceProblem] = []
        self.excluded: list[tuple[str, str]] = list(spec.excluded)
        self._file: str | None = None  # the CSV file being surveyed (for ragged rows)
        self._ragged: dict[tuple[str, int], str] = {}
        self.dataset, self.files = self._open(check=check)
        names = self.dataset.schema.names
        for role in LONG_COLUMNS:
            name = getattr(cols, role)
            if name not in names:
                raise SourceError(
                    f"{spec.describe} has no column {name!r} (columns: {', '.join(names)}); "
                    f"pass {_OPTION[role]} to name the {role.replace('_', ' ')} column"
                )
        self.types = {
            role: self.dataset.schema.field(getattr(cols, role)).type for role in LONG_COLUMNS
        }
        self._check_types()
        if check:
            self._check_files()

    def _format(self) -> ds.FileFormat:
        spec = self.spec
        if spec.kind == "parquet":
            return ds.ParquetFileFormat()
        # Every cell as text: values are made numbers in _finish, so one cell
        # that is not a number fails its series, not the source; a row with
        # the wrong number of cells is skipped and reported (_ragged_row).
        return ds.CsvFileFormat(
            parse_options=pacsv.ParseOptions(invalid_row_handler=self._ragged_row),
            convert_options=pacsv.ConvertOptions(
                column_types={
                    spec.columns.series_id: pa.string(),
                    spec.columns.timestamp: pa.string(),
                    spec.columns.value: pa.string(),
                },
                strings_can_be_null=True,
            ),
        )

    def _ragged_row(self, row: Any) -> str:
        if self._file is not None:
            self._ragged.setdefault((self._file, int(row.number)), str(row.text))
        return "skip"

    def _file_problem(self, path: str) -> str | None:
        """Why one file of a directory cannot be read as part of the source, or None."""
        spec = self.spec
        try:
            if spec.kind == "parquet":
                schema = pq.read_schema(path)
            else:
                with pacsv.open_csv(
                    path,
                    parse_options=pacsv.ParseOptions(invalid_row_handler=_skip_row),
                    convert_options=pacsv.ConvertOptions(
                        column_types=dict.fromkeys(spec.columns.source_names(), pa.string())
                    ),
                ) as stream:
                    schema = stream.schema
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError, OSError) as exc:
            kind = "Parquet" if spec.kind == "parquet" else "CSV"
            return f"not readable as {kind} ({_arrow_message(exc)}); the file is skipped"
        partition_keys = {part.split("=", 1)[0] for part in Path(path).parts[:-1] if "=" in part}
        missing = [
            name
            for name in spec.columns.source_names()
            if name not in schema.names and name not in partition_keys
        ]
        if missing:
            return (
                f"wrong columns: no {', '.join(repr(m) for m in missing)} (columns: "
                f"{', '.join(schema.names)}); the file is skipped"
            )
        if spec.kind == "parquet":
            value_type = schema.field(spec.columns.value).type
            if _arrow_category(value_type) not in ("integer", "float", "null"):
                return f"value column has type {value_type}, not numbers; the file is skipped"
        return None

    def _open(self, *, check: bool = False) -> tuple[ds.Dataset, list[str]]:
        spec = self.spec
        suffixes = PARQUET_SUFFIXES if spec.kind == "parquet" else CSV_SUFFIXES
        fmt = self._format()
        root = Path(spec.location)
        if not root.exists():
            raise SourceError(f"{spec.describe} does not exist (any more); check the path")
        try:
            if root.is_dir():
                skip = {path for path, _ in self.excluded}
                files = [f for f in _data_files(root, suffixes) if f not in skip]
                if check:
                    good = []
                    for path in files:
                        why = self._file_problem(path)
                        if why is None:
                            good.append(path)
                        else:
                            self.excluded.append((path, why))
                    if files and not good:
                        reasons = "; ".join(f"{p}: {w}" for p, w in self.excluded[:3])
                        raise SourceError(
                            f"{spec.describe}: no file can be read ({reasons}); fix or "
                            "replace the files"
                        )
                    files = good
                if not files:
                    raise SourceError(
                        f"{spec.describe} holds no {'/'.join(suffixes)} files; point at the "
                        "directory the data was written to"
                    )
                keys = sorted(
                    {
                        part.split("=", 1)[0]
                        for f in files
                        for part in Path(f).relative_to(root).parts[:-1]
                        if "=" in part
                    }
                )
                partitioning = (
                    ds.partitioning(pa.schema([(k, pa.string()) for k in keys]), flavor="hive")
                    if keys
                    else None
                )
                dataset = ds.dataset(
                    files, format=fmt, partitioning=partitioning, partition_base_dir=str(root)
                )
            else:
                files = [str(root)]
                dataset = ds.dataset(str(root), format=fmt)
        except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError) as exc:
            raise self._unreadable(exc) from None
        return dataset, files

    def _unreadable(self, exc: Exception) -> SourceError:
        spec = self.spec
        message = _arrow_message(exc)
        if "conversion error to double" in message:
            detail = (
                message[message.find("In CSV column") :] if "In CSV column" in message else message
            )
            return SourceError(
                f"{spec.describe}: value column {spec.columns.value!r} holds something that is not "
                f"a number ({detail}); fix those rows or pass {_OPTION['value']} to choose the "
                "right column"
            )
        return SourceError(
            f"{spec.describe} cannot be read as {spec.kind}: {message}; check that the files "
            "are complete and of that format"
        )

    def _check_files(self) -> None:
        """Every file must hold the mapped columns (a file without one reads as nulls)."""
        spec = self.spec
        dataset = self.dataset
        partition_names = set(dataset.partitioning.schema.names) if dataset.partitioning else set()
        try:
            fragments = list(dataset.get_fragments())
            schemas = [(f.path, f.physical_schema) for f in fragments]
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            raise self._unreadable(exc) from None
        for path, schema in schemas:
            present = set(schema.names) | partition_names
            for role in LONG_COLUMNS:
                name = getattr(spec.columns, role)
                if name not in present:
                    raise SourceError(
                        f"{spec.describe}: file {path!r} has no column {name!r} "
                        f"(columns: {', '.join(schema.names)}); rewrite the "
                        f"file or pass {_OPTION[role]} if the column is named differently"
                    )
            if spec.columns.value not in schema.names:
                continue  # a partition field: typed by the partitioning
            value_type = schema.field(spec.columns.value).type
            if spec.kind == "csv":
                continue  # text, made numbers cell by cell (_finish)
            if _arrow_category(value_type) not in ("integer", "float", "null"):
                raise SourceError(
                    f"{spec.describe}: value column {spec.columns.value!r} in file "
                    f"{path!r} has type {value_type}, not numbers; store numbers or "
                    f"pass {_OPTION['value']} to choose the right column"
                )

    def _check_types(self) -> None:
        spec = self.spec
        cols = spec.columns
        numeric = ("integer", "float", "null") + (("text",) if spec.kind == "csv" else ())
        if _arrow_category(self.types["value"]) not in numeric:
            raise SourceError(
                f"{spec.describe}: value column {cols.value!r} has type {self.types['value']}, "
                f"not numbers; store numbers or pass {_OPTION['value']} to choose the right column"
            )
        if _arrow_category(self.types["timestamp"]) in ("other", "null"):
            raise SourceError(
                f"{spec.describe}: timestamp column {cols.timestamp!r} has type "
                f"{self.types['timestamp']}, not dates/times, numbers or text; pass "
                f"{_OPTION['timestamp']} to choose the right column"
            )
        if _arrow_category(self.types["series_id"]) not in ("text", "integer"):
            raise SourceError(
                f"{spec.describe}: series id column {cols.series_id!r} has type "
                f"{self.types['series_id']}; ids must be text or whole numbers (pass "
                f"{_OPTION['series_id']} to choose the right column)"
            )

    def time_kind(self) -> TimeKind:
        category = _arrow_category(self.types["timestamp"])
        if category == "datetime":
            return "datetime"
        if category in ("integer", "float"):
            return "numeric"
        name = self.spec.columns.timestamp
        try:
            sample = self.dataset.head(
                SAMPLE_ROWS, columns=[name], filter=ds.field(name).is_valid()
            ).column(0)
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            raise self._unreadable(exc) from None
        return _time_kind_of_text(pd.Series(sample.to_pylist(), dtype=object), self.spec)

    def _id_expr(self) -> ds.Expression:
        field = ds.field(self.spec.columns.series_id)
        dtype = self.types["series_id"]
        if pa.types.is_string(dtype) or pa.types.is_large_string(dtype):
            return field
        return field.cast(pa.string())

    def _id_filter(self, ids: Sequence[str]) -> ds.Expression:
        dtype = self.types["series_id"]
        field = ds.field(self.spec.columns.series_id)
        # The range guard beside isin lets Parquet min/max statistics skip files
        # and row groups (isin alone did not: 56 ms vs 11 ms for 100 of 1,000
        # series in 10 files, tests/benchmarks/bench_fetch.py layout by-series).
        if _arrow_category(dtype) == "integer":
            numbers = [int(s) for s in ids if re.fullmatch(r"[+-]?\d+", s)]
            if not numbers:
                return ds.scalar(False)
            guard = (field >= min(numbers)) & (field <= max(numbers))
            return guard & field.isin(pa.array(numbers, type=pa.int64()))
        if pa.types.is_string(dtype) or pa.types.is_large_string(dtype):
            guard = (field >= min(ids)) & (field <= max(ids))
            return guard & field.isin(pa.array(list(ids), type=dtype))
        return self._id_expr().isin(pa.array(list(ids), type=pa.string()))

    def _time_scalar(self, key: Any, axis: _Axis) -> pa.Scalar | None:
        """``key`` as a scalar of the stored type (see :func:`_stored_bound`)."""
        dtype = self.types["timestamp"]
        if pa.types.is_timestamp(dtype):
            # A scalar in the column's own unit: a finer one makes Arrow cast
            # every stored value (30 ms vs 5 ms per batch in bench_fetch.py).
            stamp = _stored_bound(key, axis, "timestamp", unit=dtype.unit, tz=dtype.tz)
            return pa.scalar(stamp.as_unit(dtype.unit), type=dtype)
        if pa.types.is_date(dtype):
            return pa.scalar(_stored_bound(key, axis, "date"), type=dtype)
        category = _arrow_category(dtype)
        if category == "integer":
            number = _stored_bound(key, axis, "integer", unit=self.spec.timestamp_unit)
            return pa.scalar(number, type=pa.int64())
        if category == "float":
            number = _stored_bound(key, axis, "float", unit=self.spec.timestamp_unit)
            return pa.scalar(number, type=pa.float64())
        return None  # text: filtered in memory

    def _filter(self, groups: Sequence[_Group], axis: _Axis) -> ds.Expression:
        field = ds.field(self.spec.columns.timestamp)
        expr: ds.Expression | None = None
        for group in groups:
            cond = self._id_filter(group.ids)
            if group.start is not None:
                lo = self._time_scalar(group.start, axis)
                if lo is not None:
                    cond = cond & (field >= lo)
            if group.end is not None:
                hi = self._time_scalar(group.end, axis)
                if hi is not None:
                    cond = cond & (field < hi)
            expr = cond if expr is None else expr | cond
        assert expr is not None
        return expr

    def scan(self, groups: Sequence[_Group], axis: _Axis) -> pd.DataFrame:
        cols = self.spec.columns
        value = ds.field(cols.value)
        projection = {
            "series_id": self._id_expr(),
            "timestamp": ds.field(cols.timestamp),
            "value": value if self.spec.kind == "csv" else value.cast(pa.float64()),
        }
        condition = self._filter(groups, axis)
        try:
            table = self.dataset.to_table(columns=projection, filter=condition)
        except (pa.ArrowInvalid, pa.ArrowTypeError, OSError) as exc:
            if len(self.files) < 2:
                raise self._unreadable(exc) from None
            # One file is damaged beyond its footer (found only when its pages
            # are read): read file by file, and leave out the series it may hold.
            table = self._scan_by_file(projection, condition, groups)
        return table.to_pandas(date_as_object=False)

    def _scan_by_file(
        self, projection: dict[str, ds.Expression], condition: ds.Expression, groups
    ) -> pa.Table:
        parts = []
        wanted = sorted({sid for g in groups for sid in g.ids})
        for fragment in self.dataset.get_fragments():
            try:
                parts.append(
                    fragment.to_table(
                        schema=self.dataset.schema, columns=projection, filter=condition
                    )
                )
            except (pa.ArrowInvalid, pa.ArrowTypeError, OSError) as exc:
                held = self._ids_in_file(fragment.path, wanted)
                self.problems.append(
                    SourceProblem(
                        fragment.path,
                        f"could not be read ({_arrow_message(exc)}); the file is skipped",
                    )
                )
                self.problems.extend(
                    SourceProblem(
                        fragment.path,
                        "some of its rows may be in a file that could not be read; not "
                        "analysed in this run (fix or replace the file)",
                        series_id=sid,
                        skip_series=True,
                    )
                    for sid in held
                )
        if not parts:
            raise SourceError(f"{self.spec.describe}: no file of this read can be read")
        return pa.concat_tables(parts)

    def _ids_in_file(self, path: str, wanted: Sequence[str]) -> list[str]:
        """Of ``wanted``, the ids a damaged Parquet file may hold (its footer's statistics)."""
        if self.spec.kind != "parquet":
            return list(wanted)
        try:
            meta = pq.ParquetFile(path).metadata
            index = meta.schema.to_arrow_schema().get_field_index(self.spec.columns.series_id)
            ranges = []
            for g in range(meta.num_row_groups):
                stats = meta.row_group(g).column(index).statistics
                if stats is None or not stats.has_min_max:
                    return list(wanted)
                ranges.append((str(stats.min), str(stats.max)))
        except (pa.ArrowInvalid, OSError, ValueError, IndexError):
            return list(wanted)
        if _arrow_category(self.types["series_id"]) == "integer":
            return [
                s
                for s in wanted
                if re.fullmatch(r"[+-]?\d+", s)
                and any(int(lo) <= int(s) <= int(hi) for lo, hi in ranges)
            ]
        return [s for s in wanted if any(lo <= s <= hi for lo, hi in ranges)]

    def distinct_ids(self) -> list[str]:
        """The series ids, file by file; rows without an id and ragged rows become problems."""
        seen: set[str] = set()
        self._ragged.clear()
        try:
            for fragment in self.dataset.get_fragments():
                path = fragment.path
                self._file = path
                blank: list[int] = []
                offset = 0
                scanner = fragment.scanner(
                    schema=self.dataset.schema, columns={"series_id": self._id_expr()}
                )
                for batch in scanner.to_batches():
                    ids = batch.column(0)
                    empty = pc.or_kleene(
                        pc.is_null(ids), pc.equal(pc.utf8_trim_whitespace(ids), "")
                    ).fill_null(True)
                    if pc.any(empty).as_py():
                        blank.extend(offset + int(i) for i in np.flatnonzero(empty))
                    seen.update(pc.unique(pc.filter(ids, pc.invert(empty))).to_pylist())
                    offset += batch.num_rows
                if blank:
                    self.problems.append(self._blank_problem(path, blank))
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            raise self._unreadable(exc) from None
        finally:
            self._file = None
        for (path, line), text in sorted(self._ragged.items()):
            self.problems.append(
                SourceProblem(
                    path,
                    f"wrong number of cells ({text[:80]!r}); the row is skipped: give it "
                    f"the {len(self.dataset.schema.names)} columns of the header",
                    row=line if line > 0 else None,
                )
            )
        return sorted(seen)

    def _blank_problem(self, path: str, positions: list[int]) -> SourceProblem:
        """Rows without a series id, named by their line (CSV: header is line 1) or row."""
        csv = self.spec.kind == "csv"
        skipped = sorted(line for p, line in self._ragged if p == path and line > 0)
        rows = []
        for position in positions:
            row = position + (2 if csv else 1)  # a CSV's line 1 is its header
            for line in skipped:  # ragged lines were skipped before this row was counted
                if line <= row:
                    row += 1
            rows.append(row)
        shown = ", ".join(str(r) for r in rows[:MAX_ROWS_NAMED])
        more = f" and {len(rows) - MAX_ROWS_NAMED} more" if len(rows) > MAX_ROWS_NAMED else ""
        where = f"{'line' if csv else 'row'}s {shown}{more}"
        return SourceProblem(
            path,
            f"{len(rows)} row(s) without a series id ({where}); they are skipped: fill in "
            f"the {self.spec.columns.series_id!r} column or drop them",
            row=rows[0],
        )

    def close(self) -> None:
        pass


def _skip_row(row: Any) -> str:
    return "skip"


def _arrow_message(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


_NS_PER_UNIT = {"s": 1_000_000_000, "ms": 1_000_000, "us": 1_000, "ns": 1}


def _stored_bound(
    key: Any, axis: _Axis, stored: str, *, unit: str | None = None, tz: str | None = None
) -> Any:
    """The least value of a stored type that is >= ``key``.

    Stored values are whole units (of a timestamp unit, a day, an integer), so
    for that bound ``b``, ``v >= key`` iff ``v >= b`` and ``v < key`` iff
    ``v < b``: the pushed-down filter is exact.

    Parameters
    ----------
    key : pandas.Timestamp (UTC) or float
        A time key from :meth:`_Axis.bound`.
    stored : {"timestamp", "date", "integer", "float"}
    unit : str, optional
        Timestamp unit of the column, or epoch unit of numbers (temporal axis).
    tz : str, optional
        Zone of an aware timestamp column; None for naive columns (read in
        ``axis.tz``).
    """
    if stored == "timestamp":
        stamp = key if unit in (None, "ns") else key.ceil(unit)
        return stamp.tz_convert(tz) if tz else stamp.tz_convert(axis.tz).tz_localize(None)
    if stored == "date":
        return key.tz_convert(axis.tz).tz_localize(None).ceil("D").date()
    per = _NS_PER_UNIT[unit or "s"]
    if stored == "integer":
        return -(-key.value // per) if axis.temporal else math.ceil(key)
    return key.value / per if axis.temporal else float(key)


# ---------------------------------------------------------------------------
# SQL through SQLAlchemy Core
# ---------------------------------------------------------------------------


def _safe_url(url: str) -> str:
    try:
        return sa.make_url(url).render_as_string(hide_password=True)
    except (sa.exc.ArgumentError, ValueError):
        return "<unparseable URL>"


def _make_engine(url: sa.URL) -> sa.Engine:
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
                f"cannot connect to {_safe_url(spec.location)} ({_db_message(exc)}); check the "
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
                raise SourceError(
                    f"{spec.describe} has no column {name!r} (columns: {', '.join(available)}); "
                    f"pass {_OPTION[role]} to name the {role.replace('_', ' ')} column"
                )
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


_READERS: dict[str, Callable[..., _Reader]] = {
    "parquet": _ArrowReader,
    "csv": _ArrowReader,
    "sql": _SqlReader,
}


# ---------------------------------------------------------------------------
# Prefect tasks
# ---------------------------------------------------------------------------

_TRANSIENT = (OSError, TimeoutError, sa.exc.OperationalError, sa.exc.InterfaceError)


def is_transient(exc: BaseException | None) -> bool:
    """Whether a failure may pass on retry (I/O and connection errors, not bad input)."""
    if exc is None:
        return False
    if isinstance(exc, SourceError | ConfigError):
        return isinstance(exc.__cause__, _TRANSIENT)
    return isinstance(exc, _TRANSIENT)


def _retry_transient(task_: Any, task_run: Any, state: Any) -> bool:
    try:
        exc = state.result(raise_on_failure=False)
    except Exception:  # the result cannot be loaded: retrying is the safe default
        return True
    return is_transient(exc) if isinstance(exc, BaseException) else True


_IO = {
    "retries": 3,
    "retry_delay_seconds": [1, 2, 4],
    "retry_condition_fn": _retry_transient,
    # Cannot interrupt a blocking read in a worker thread; the database
    # connection timeout (CONNECT_TIMEOUT_S) is the real guard.
    "timeout_seconds": 900,
}

_TASKS: dict[str, TaskSpec] = {
    "open_source_task": (open_source, {"name": "open-source", **_IO}),
    "list_series_task": (list_series, {"name": "list-series", **_IO}),
    "read_series_task": (read_series, {"name": "read-series", **_IO}),
    "read_windows_task": (read_windows, {"name": "read-windows", **_IO}),
}


def __getattr__(name: str):
    return lazy_task(__name__, name, _TASKS)
