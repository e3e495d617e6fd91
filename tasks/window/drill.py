"""Drill: the raw rows of one window and of the windows around it, read back from the source
with the time filter pushed down to the storage.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from changekind.tasks.errors import (
    ConfigError,
    SourceError,
)
from changekind.tasks.fetch import SourceSpec
from changekind.tasks.fetch.times import _Axis
from changekind.tasks.timeaxis import parse_instant
from changekind.tasks.types import format_duration
from changekind.tasks.window.summary import _NUMBER, parse_window

MAX_AROUND = 1000
"""Most windows a drill reads either side of the window asked for."""


def drill(
    spec: SourceSpec,
    series_id: str,
    event_time: str | pd.Timestamp,
    window: str | pd.Timedelta,
    *,
    around: int = 2,
) -> pd.DataFrame:
    """The raw rows of one window and of ``around`` windows either side.

    Parameters
    ----------
    spec : SourceSpec
        From :func:`changekind.tasks.fetch.open_source`.
    series_id : str
    event_time : str or pandas.Timestamp
        Any time inside the window (an event's ``event_time`` or
        ``window_start``); ISO 8601 text.
    window : str or pandas.Timedelta
        Window width, as used for detection.
    around : int, default=2
        Windows read either side (0 to ``MAX_AROUND``).

    Returns
    -------
    pandas.DataFrame
        The source's rows with ``window_start - around * window <= t <
        window_start + (around + 1) * window``, sorted by time: columns
        ``series_id``, ``timestamp`` and ``value`` as the source gives them,
        ``window_start`` (the start of each row's window, as a Timestamp) and
        ``window_offset`` (windows from the one asked for: 0 for it, -1 before,
        +1 after) and ``extreme`` (True at each window's point farthest from
        its median: the point a windowed AO names).

    Raises
    ------
    ConfigError
        A bad window, ``around`` or time; no point of the series in the window
        asked for (the message gives the series' span).
    SourceError
        The series is not in the source; the source is unreadable; its
        timestamps are plain numbers.

    Notes
    -----
    1. Floor the time to its window (UTC for a time with a zone).
    2. Read the span with :func:`~changekind.tasks.fetch.read_series`, which
       pushes the series and time filters down to the storage.
    3. Offsets of the rows from the window, compared exactly as the read
       compared them (naive times in the source's time zone).
    """
    from changekind.tasks.fetch import read_series  # looked up per call: tests spy on it

    width = parse_window(window)
    if isinstance(around, bool) or not isinstance(around, int | np.integer):
        raise ConfigError(f"around={around!r} is not a whole number of windows")
    if not 0 <= around <= MAX_AROUND:
        raise ConfigError(f"around={around} must be between 0 and {MAX_AROUND} windows")
    if not isinstance(series_id, str) or not series_id:
        raise ConfigError(f"series id {series_id!r} is not a name; give the series id as text")
    if spec.time_kind == "numeric" and spec.timestamp_unit is None:
        raise SourceError(
            f"{spec.describe}: timestamps are plain numbers, so there are no windows of time; "
            "if they are epoch times, give their unit (--timestamp-unit s)"
        )

    # Step 1: the window asked for.
    focus = _floor(_event_timestamp(event_time), width)
    start, end = focus - around * width, focus + (around + 1) * width

    # Step 2: read with pushdown.
    rows = read_series(spec, [series_id], start=start, end=end)

    # Step 3: offsets.
    axis = _Axis.of(spec)
    keys = axis.keys(rows["timestamp"], spec)
    focus_key = axis.bound(focus, what="event time")
    offset = np.floor_divide(
        (keys - focus_key).to_numpy().astype("timedelta64[ns]").view("i8"), int(width.value)
    )
    if not (offset == 0).any():
        raise _absent(spec, series_id, focus, width, event_time)
    offset = offset.astype(np.int64)
    return rows.assign(
        window_start=focus + pd.to_timedelta(offset * int(width.value), unit="ns"),
        window_offset=offset,
        extreme=_extreme_rows(rows["value"].to_numpy(dtype=float), offset),
    ).reset_index(drop=True)


def _extreme_rows(values: np.ndarray, offset: np.ndarray) -> np.ndarray:
    """True at each window's point farthest from the window's median (its extreme)."""
    out = np.zeros(values.size, dtype=bool)
    for key in np.unique(offset):
        idx = np.flatnonzero((offset == key) & ~np.isnan(values))
        if idx.size:
            dev = np.abs(values[idx] - np.median(values[idx]))
            out[idx[int(np.argmax(dev))]] = True
    return out


def _event_timestamp(value: str | pd.Timestamp) -> pd.Timestamp:
    example = "give ISO 8601 such as 2026-03-02T08:00:00 (an event's event_time or window_start)"
    if isinstance(value, pd.Timestamp):
        stamp = value
    else:
        if not isinstance(value, str) or not value.strip():
            raise ConfigError(f"event time {value!r} is not a date/time; {example}")
        if _NUMBER.match(value):
            raise ConfigError(f"event time {value!r} is a number, not a date/time; {example}")
        try:
            parse_instant(value)  # ISO 8601 only (timeaxis); the stamp keeps its own zone
            stamp = pd.Timestamp(value.strip())
        except (ConfigError, ValueError, TypeError, OverflowError):
            raise ConfigError(f"event time {value!r} is not a date/time; {example}") from None
    if stamp is pd.NaT:
        raise ConfigError(f"event time {value!r} is not a date/time; {example}")
    return stamp.as_unit("ns")


def _floor(stamp: pd.Timestamp, width: pd.Timedelta) -> pd.Timestamp:
    """Start of the window holding ``stamp``: epoch-aligned, in UTC for aware times."""
    w = int(width.value)
    floored = (int(stamp.value) // w) * w
    if stamp.tzinfo is None:
        return pd.Timestamp(floored, unit="ns")
    return pd.Timestamp(floored, unit="ns", tz="UTC").tz_convert(stamp.tzinfo)


def _absent(
    spec: SourceSpec,
    series_id: str,
    focus: pd.Timestamp,
    width: pd.Timedelta,
    asked: object,
) -> SourceError | ConfigError:
    """The error for a drill that finds no point: no such series, or no such time."""
    from changekind.tasks.fetch import list_series, read_series  # looked up per call

    ids = list_series(spec)
    if series_id not in ids:
        shown = ", ".join(repr(s) for s in ids[:5]) + (", ..." if len(ids) > 5 else "")
        return SourceError(
            f"series {series_id!r} is not in {spec.describe}; it holds {len(ids)} series "
            f"({shown or 'none'}); check the id"
        )
    rows = read_series(spec, [series_id])
    window_text = (
        f"series {series_id!r} has no points in the window {focus.isoformat()} to "
        f"{(focus + width).isoformat()} (the {format_duration(width.total_seconds())} window of "
        f"{asked!s})"
    )
    if len(rows) == 0:  # listed but no rows (ids only): say so
        return ConfigError(f"{window_text}; the series has no rows")
    axis = _Axis.of(spec)
    keys = axis.keys(rows["timestamp"], spec).to_numpy()
    lo = axis.bound(focus, what="event time")
    hi = axis.bound(focus + width, what="event time")
    before, after = keys < lo, keys >= hi
    if before.any() and after.any():
        last = rows["timestamp"].iloc[int(np.flatnonzero(before)[-1])]
        nxt = rows["timestamp"].iloc[int(np.flatnonzero(after)[0])]
        return ConfigError(
            f"{window_text}: it falls in a gap of the series, between points at {last} and "
            f"{nxt}; give a time with data"
        )
    span = f"{rows['timestamp'].iloc[0]} to {rows['timestamp'].iloc[-1]}"
    return ConfigError(f"{window_text}; its points run from {span}: give a time in that span")
