"""Open a source and read series or windows of series from it.

Every kind of source is read the same way: normalise the windows to keys,
scan with the time condition pushed down (see ``MAX_FILTER_GROUPS``), trim
exactly, sort by series and time.
"""

from __future__ import annotations

import os
import zoneinfo
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError, SourceError, mask_url
from changekind.tasks.fetch.arrow import _ArrowReader
from changekind.tasks.fetch.files import _infer_kind
from changekind.tasks.fetch.sql import _SqlReader
from changekind.tasks.fetch.times import _Axis, _Group, _Reader
from changekind.tasks.fetch.values import (
    MAX_FILTER_GROUPS,
    TIMESTAMP_UNITS,
    Bound,
    ColumnMap,
    SeriesWindow,
    SourceProblem,
    SourceSpec,
    SourceSurvey,
    Span,
    _is_number,
    _to_timedelta,
    _to_timestamp,
)

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
                f"SQL source {mask_url(text)} needs a table or a query; pass --table NAME "
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


_READERS: dict[str, Callable[..., _Reader]] = {
    "parquet": _ArrowReader,
    "csv": _ArrowReader,
    "sql": _SqlReader,
}
