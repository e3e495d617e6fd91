"""Reading a picture's time axis: timestamps as ticks, an event's tick, grid steps.

A picture places everything by time, not by row: the observations may come in
any order, with gaps and in any time zone.  The rule, the same for the data
and for an event's time: aware date-times are converted to UTC and kept
without their zone, naive ones are kept as they are, and numbers stay numbers.
"""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError, SeriesError
from changekind.tasks.types import Event, FittedModel

__all__ = [
    "TimeKind",
    "event_tick",
    "grid_offsets",
    "grid_step",
    "has_zone",
    "read_axis",
    "time_kind_of",
    "time_tick",
]

TimeKind = Literal["datetime", "numeric"]


def _utc_naive(stamps: pd.DatetimeIndex) -> pd.DatetimeIndex:
    return stamps.tz_convert("UTC").tz_localize(None) if stamps.tz is not None else stamps


def read_axis(timestamps: Any) -> tuple[TimeKind, np.ndarray]:
    """``("datetime", datetime64[ns] UTC-naive)`` or ``("numeric", float64)``.

    Raises
    ------
    ConfigError
        The timestamps are neither times nor numbers.
    """
    raw = pd.Series(timestamps).reset_index(drop=True)
    if raw.dtype.kind in "iuf":
        return "numeric", raw.to_numpy(dtype=float)
    if raw.dtype.kind == "M" or isinstance(raw.dtype, pd.DatetimeTZDtype):
        parsed = pd.DatetimeIndex(raw)
    else:
        text = raw.astype(str)
        numbers = pd.to_numeric(text, errors="coerce")
        if numbers.notna().all():
            return "numeric", numbers.to_numpy(dtype=float)
        try:
            parsed = pd.DatetimeIndex(pd.to_datetime(text, format="ISO8601", utc=False))
        except (ValueError, TypeError):
            try:
                parsed = pd.DatetimeIndex(pd.to_datetime(text, format="mixed", utc=True))
            except (ValueError, TypeError) as exc:
                raise ConfigError(
                    f"timestamps cannot be read as times or numbers ({exc}); "
                    "use ISO 8601 such as 2026-01-31T14:05:00"
                ) from None
    return "datetime", _utc_naive(parsed).to_numpy(dtype="datetime64[ns]")


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
        stamp = pd.Timestamp(text)
    except (ValueError, TypeError):
        raise SeriesError(
            series_id,
            f"event time {text!r} is not a date-time but the source's "
            "timestamps are; check that --source is the data the events came from",
        ) from None
    if stamp.tz is not None:
        stamp = stamp.tz_convert("UTC").tz_localize(None)
    return stamp.to_datetime64().astype("datetime64[ns]")


def time_kind_of(text: str) -> TimeKind:
    """``"numeric"`` for a stored event time that is a number, else ``"datetime"``."""
    try:
        float(text)
    except ValueError:
        return "datetime"
    return "numeric"


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


def has_zone(text: str) -> bool:
    """Whether a time written as text carries a zone or offset."""
    try:
        return pd.Timestamp(text).tz is not None
    except (ValueError, TypeError):
        return False
