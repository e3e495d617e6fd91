"""Which stretch of a series an event's picture shows.

The rule (also in the README):

1. **The event's own reach.**  The number of grid steps until the fitted
   effect has faded below 5 % of its largest value
   (:func:`~changekind.tasks.report.curve.effect_reach`): 0 for an AO,
   ln 0.05 / ln delta (about 4.3 half-lives) for a TC, the psi weights' fade
   for an IO.  Twice the reach is shown on each side (the fade, and as much
   series again without it), at least :data:`MIN_SIDE_POINTS` and at most
   :data:`MAX_OWN_SIDE_POINTS`; an effect that does not fade within that
   (an LS, a VC, an IO of a differenced model, a very slow TC) gets
   :data:`MAX_OWN_SIDE_POINTS` on each side, enough to read both levels.
2. **The series' other events nearby.**  Every other stored event of the same
   series within :data:`NEIGHBOUR_POINTS` grid steps, or within a day on a
   date-time axis when a day holds more steps, is brought into view with
   :data:`MIN_SIDE_POINTS` more beyond it: a compensating shift nine hours
   earlier in 5-minute data (108 steps) is in the picture, marked.

Spans count grid steps of the series (the model's spacing, else the median
gap of the data), not rows, so gaps in the data do not narrow a picture.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError, SeriesError
from changekind.tasks.report.axis import (
    event_tick,
    grid_offsets,
    grid_step,
    read_axis,
    time_kind_of,
    time_tick,
)
from changekind.tasks.report.curve import effect_reach
from changekind.tasks.types import Event, FittedModel

__all__ = [
    "MAX_OWN_SIDE_POINTS",
    "MIN_SIDE_POINTS",
    "NEIGHBOUR_POINTS",
    "Span",
    "shown_span",
    "slice_window",
    "window_bounds",
]

MIN_SIDE_POINTS = 24
"""Fewest grid steps shown on each side of an event (two hours of 5-minute data)."""

MAX_OWN_SIDE_POINTS = 96
"""Most grid steps an event's own reach asks for on each side (eight hours of 5-minute
data, four days of hourly data): a TC whose effect lasts up to 48 steps (decay
factor up to 0.94) is shown fading out completely."""

NEIGHBOUR_POINTS = 288
"""Other events of the series this many grid steps away (a day of 5-minute data, twelve
days of hourly data), or a day away when a day holds more steps, are brought into view."""

_DAY_SECONDS = 86_400.0


@dataclass(frozen=True, slots=True)
class Span:
    """Grid steps shown before and after an event (the event's own point is shown too)."""

    before: int
    after: int


def _steps_between(event: Event, other: Event, step: float) -> int:
    """Grid steps from ``event`` to ``other`` of the same series (negative when earlier)."""
    kind = time_kind_of(event.event_time)
    there = time_tick(other.event_time, kind, event.series_id)
    return int(grid_offsets(np.asarray([there]), event_tick(event, kind), kind, step)[0])


def shown_span(
    event: Event,
    neighbours: Sequence[Event] = (),
    *,
    step_seconds: float,
    model: FittedModel | None = None,
) -> Span:
    """The span an event's picture shows (the module's rule).

    Parameters
    ----------
    event : Event
    neighbours : sequence of Event
        Other stored events of the same series (the event itself, if among
        them, is skipped).
    step_seconds : float
        Grid spacing: seconds on a date-time axis, index units on a numeric one.
    model : FittedModel, optional
        The series' model: an IO's reach follows its psi weights.

    Returns
    -------
    Span

    Notes
    -----
    1. The event's own reach, twice, on each side (between :data:`MIN_SIDE_POINTS`
       and :data:`MAX_OWN_SIDE_POINTS`).
    2. Each side stretched to :data:`MIN_SIDE_POINTS` beyond the series' other
       events within :data:`NEIGHBOUR_POINTS` steps or a day.
    """
    if not (math.isfinite(step_seconds) and step_seconds > 0):
        raise ConfigError(f"step_seconds must be positive, got {step_seconds!r}")
    # Step 1: the event's own reach.
    reach = effect_reach(event, model, horizon=MAX_OWN_SIDE_POINTS // 2)
    own = MAX_OWN_SIDE_POINTS if reach is None else 2 * reach
    own = min(MAX_OWN_SIDE_POINTS, max(MIN_SIDE_POINTS, own))
    before = after = own
    # Step 2: other events of the series nearby.
    horizon = float(NEIGHBOUR_POINTS)
    if time_kind_of(event.event_time) == "datetime":
        horizon = max(horizon, _DAY_SECONDS / step_seconds)
    for other in neighbours:
        if other.event_time == event.event_time:
            continue
        steps = _steps_between(event, other, step_seconds)
        if steps == 0 or abs(steps) > horizon:
            continue
        reach_to = abs(steps) + MIN_SIDE_POINTS
        if steps < 0:
            before = max(before, reach_to)
        else:
            after = max(after, reach_to)
    return Span(before, after)


def _as_span(
    event: Event,
    points: int | Span | None,
    neighbours: Sequence[Event],
    step: float,
    model: FittedModel | None,
) -> Span:
    if points is None:
        return shown_span(event, neighbours, step_seconds=step, model=model)
    if isinstance(points, Span):
        return points
    return Span(int(points), int(points))


def window_bounds(
    event: Event,
    *,
    step_seconds: float,
    time_kind: str,
    points: int | Span | None = None,
    neighbours: Sequence[Event] = (),
    model: FittedModel | None = None,
) -> tuple[Any, Any]:
    """``(start, end)`` of the span to read around an event, ``start <= t < end``.

    Parameters
    ----------
    event : Event
    step_seconds : float
        Grid spacing: seconds for date/time series, index units for numeric ones.
    time_kind : {"datetime", "text", "numeric"}
        What the source's timestamps hold (``SourceSpec.time_kind``).
    points : int or Span, optional
        Steps on each side; default :func:`shown_span` with ``neighbours``.
    neighbours : sequence of Event
        The series' other stored events.
    model : FittedModel, optional

    Returns
    -------
    tuple
        ``pd.Timestamp`` bounds (in the event's own zone, if it has one) or floats.
    """
    if not step_seconds > 0:
        raise ConfigError(f"step_seconds must be positive, got {step_seconds!r}")
    span = _as_span(event, points, neighbours, step_seconds, model)
    if time_kind == "numeric":
        at = float(event_tick(event, "numeric"))
        return at - span.before * step_seconds, at + (span.after + 1) * step_seconds
    stamp = pd.Timestamp(event.event_time)
    return (
        stamp - pd.Timedelta(seconds=span.before * step_seconds),
        stamp + pd.Timedelta(seconds=(span.after + 1) * step_seconds),
    )


def slice_window(
    event: Event,
    timestamps: Any,
    values: Any,
    *,
    model: FittedModel | None = None,
    points: int | Span | None = None,
    neighbours: Sequence[Event] = (),
) -> tuple[np.ndarray, np.ndarray]:
    """The observations within the shown span of an event, sorted by time.

    Parameters
    ----------
    event : Event
    timestamps, values : array-like of shape (n,)
        Observations of the event's series (any span, any order).
    model : FittedModel, optional
        Its spacing places the points; default the median gap of ``timestamps``.
    points : int or Span, optional
        Steps on each side; default :func:`shown_span` with ``neighbours``.
    neighbours : sequence of Event
        The series' other stored events.

    Returns
    -------
    (timestamps, values) : tuple of numpy.ndarray
        The timestamps as given (same dtype) and the values as float64.
    """
    stamps = pd.Series(timestamps).reset_index(drop=True)
    vals = pd.to_numeric(pd.Series(values).reset_index(drop=True), errors="coerce")
    if len(stamps) != len(vals):
        raise SeriesError(event.series_id, "timestamps and values have different lengths")
    if len(stamps) == 0:
        return stamps.to_numpy(), vals.to_numpy(dtype=float)
    kind, ticks = read_axis(stamps)
    step = grid_step(ticks, kind, model) if len(stamps) > 1 else 1.0
    span = _as_span(event, points, neighbours, step, model)
    k = grid_offsets(ticks, event_tick(event, kind), kind, step)
    keep = np.flatnonzero((k >= -span.before) & (k <= span.after))
    keep = keep[np.argsort(ticks[keep], kind="stable")]
    return stamps.to_numpy()[keep], vals.to_numpy(dtype=float)[keep]
