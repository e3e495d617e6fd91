"""Reading a picture's time axis: timestamps as ticks, an event's tick, grid steps.

A picture places everything by time, not by row: the observations may come in
any order, with gaps and in any time zone.  The rule is
:mod:`changekind.tasks.timeaxis`': a naive time is UTC, so every date-time is
placed in UTC (kept without its zone), and numbers stay numbers.
"""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError, SeriesError, TimestampError
from changekind.tasks.timeaxis import parse_instant, parse_times
from changekind.tasks.types import Event, FittedModel

__all__ = [
    "TimeKind",
    "event_tick",
    "grid_offsets",
    "grid_step",
    "read_axis",
    "time_kind_of",
    "time_tick",
]

TimeKind = Literal["datetime", "numeric"]


def read_axis(timestamps: Any) -> tuple[TimeKind, np.ndarray]:
    """``("datetime", datetime64[ns] UTC-naive)`` or ``("numeric", float64)``.

    Parsed by :func:`~changekind.tasks.timeaxis.parse_times` (a naive time is
    UTC, ISO 8601 text, all-number text is numeric).

    Raises
    ------
    ConfigError
        The timestamps are neither times nor numbers.
    """
    try:
        stamps = parse_times("picture", timestamps)
    except TimestampError as exc:
        raise ConfigError(f"timestamps cannot be read as times or numbers: {exc.problem}") from None
    return stamps.axis.kind, stamps.utc_naive()


def event_tick(event: Event, kind: TimeKind) -> np.datetime64 | float:
    """The event's time on an axis of ``kind`` (see :func:`time_tick`)."""
    return time_tick(event.event_time, kind, event.series_id)


def time_tick(text: str, kind: TimeKind, series_id: str) -> np.datetime64 | float:
    """A stored event time on an axis of ``kind``.

    Raises
    ------
    SeriesError
        The time is not of the axis' kind (the source is not the data the
        events came from).
    """
    if kind == "numeric":
        try:
            return float(text)
        except ValueError:
            raise SeriesError(
                series_id,
                f"event time {text!r} is not a number but the source's "
                "timestamps are; check that --source is the data the events came from",
            ) from None
    try:
        stamp = parse_instant(text)
    except ConfigError:
        stamp = None
    if not isinstance(stamp, pd.Timestamp):
        raise SeriesError(
            series_id,
            f"event time {text!r} is not a date-time but the source's "
            "timestamps are; check that --source is the data the events came from",
        )
    return stamp.tz_localize(None).to_datetime64()


def time_kind_of(text: str) -> TimeKind:
    """``"numeric"`` for a stored event time that is a number, else ``"datetime"``."""
    try:
        return "numeric" if isinstance(parse_instant(text), float) else "datetime"
    except ConfigError:
        return "datetime"


def grid_step(ticks: np.ndarray, kind: TimeKind, model: FittedModel | None) -> float:
    """Grid spacing in seconds (datetime) or index units: the model's, else the data's median."""
    if model is not None and model.step_seconds:
        return float(model.step_seconds)
    values = ticks.astype("datetime64[ns]").view("i8") / 1e9 if kind == "datetime" else ticks
    gaps = np.diff(np.unique(values))
    if gaps.size == 0:
        raise ConfigError("needs at least two distinct timestamps to place an effect")
    return float(np.median(gaps))


def grid_offsets(
    ticks: np.ndarray, at: np.datetime64 | float, kind: TimeKind, step: float
) -> np.ndarray:
    """Grid steps from ``at`` to each tick (negative before it), rounded to whole steps."""
    if kind == "datetime":
        delta = (ticks.astype("datetime64[ns]") - at).astype("timedelta64[ns]")
        seconds = delta.astype(np.int64).astype(float) / 1e9
    else:
        seconds = ticks - float(at)
    return np.rint(seconds / step).astype(np.int64)
