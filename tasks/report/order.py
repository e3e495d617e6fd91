"""The report's counts and the order its events are listed in.

Orders (``--sort`` of ``changekind report``):

- ``effect_pct`` (the default): largest |effect| in per cent of the level first.
  Every listed event has already cleared the critical value, so what decides
  whether it matters is its size relative to the series' level; sorting by
  |t| put tiny long-lasting shifts (a few per cent, t about 9) above real
  spikes.  Events without a percentage (level near zero) come after those
  with one.
- ``effect``: largest |effect| in the series' own units first (meaningful
  across series of one unit only).
- ``t``: largest |t| first: the strongest evidence first.
- ``time``: newest first.

Ties are broken by |t| (largest first), then series id, then event time, so
the order never depends on the order the events were read in.  Dismissed
events always come after every other event, whatever the order.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import pandas as pd

from changekind.tasks.errors import ConfigError
from changekind.tasks.report.views import EventKey, Verdict, event_key
from changekind.tasks.types import REPORTED_TYPES, Event

__all__ = [
    "DEFAULT_SORT",
    "SORT_ORDERS",
    "ReportSummary",
    "SortOrder",
    "order_events",
    "series_group",
    "summarize_events",
]


@dataclass(frozen=True, slots=True)
class SortOrder:
    """One way to list events: its words on the page and its key (smaller first)."""

    words: str
    key: Callable[[Event], tuple[float, ...]]


def _magnitude(value: float | None) -> tuple[float, ...]:
    """Largest first; missing or not finite last."""
    if value is None or not math.isfinite(value):
        return (1.0, 0.0)
    return (0.0, -abs(value))


def _newest(event: Event) -> tuple[float, ...]:
    """Newest first by the time itself (numbers as numbers, date-times in UTC)."""
    try:
        value = float(event.event_time)
    except ValueError:
        try:
            stamp = pd.Timestamp(event.event_time)
        except (ValueError, TypeError):
            return (1.0, 0.0)
        stamp = stamp.tz_convert("UTC") if stamp.tz is not None else stamp.tz_localize("UTC")
        value = stamp.value / 1e9
    return (0.0, -value)


SORT_ORDERS: dict[str, SortOrder] = {
    "effect_pct": SortOrder("largest |effect %| first", lambda e: _magnitude(e.effect_pct)),
    "effect": SortOrder("largest |effect| first", lambda e: _magnitude(e.effect)),
    "t": SortOrder("largest |t| first", lambda e: _magnitude(e.t_stat)),
    "time": SortOrder("newest first", _newest),
}
"""The orders a report can list its events in, by name."""

DEFAULT_SORT = "effect_pct"


def order_events(
    events: Sequence[Event],
    *,
    sort: str = DEFAULT_SORT,
    verdicts: Mapping[EventKey, Verdict] | None = None,
) -> tuple[int, ...]:
    """Indices of ``events`` in report order (the module's rules).

    Raises
    ------
    ConfigError
        ``sort`` is not one of :data:`SORT_ORDERS`.
    """
    if sort not in SORT_ORDERS:
        raise ConfigError(f"sort must be one of {', '.join(SORT_ORDERS)}, got {sort!r}")
    verdicts = verdicts or {}
    main = SORT_ORDERS[sort].key

    def key(i: int) -> tuple:
        e = events[i]
        verdict = verdicts.get(event_key(e))
        dismissed = verdict is not None and verdict.dismissed
        return (dismissed, *main(e), *_magnitude(e.t_stat), e.series_id, e.event_time)

    return tuple(sorted(range(len(events)), key=key))


@dataclass(frozen=True, slots=True)
class ReportSummary:
    """Counts shown at the top of a report, and the order of its events.

    ``by_type`` holds ``(type, confirmed, provisional, total)`` per type in
    :data:`~changekind.tasks.types.REPORTED_TYPES` order; ``by_group`` holds
    ``(group, counts per type in the same order, total)`` per series group,
    groups sorted by name; ``order`` the indices of the events in report
    order (:func:`order_events` with ``sort``); ``n_dismissed`` how many of
    them carry a dismissed verdict.
    """

    n_events: int
    n_series: int
    by_type: tuple[tuple[str, int, int, int], ...]
    by_group: tuple[tuple[str, tuple[int, ...], int], ...]
    order: tuple[int, ...]
    sort: str = DEFAULT_SORT
    n_dismissed: int = 0


def series_group(series_id: str) -> str:
    """The group of a series: its id up to the first ``/`` (the whole id without one)."""
    return series_id.split("/", 1)[0]


def summarize_events(
    events: Sequence[Event],
    *,
    sort: str = DEFAULT_SORT,
    verdicts: Mapping[EventKey, Verdict] | None = None,
) -> ReportSummary:
    """Counts by type and status, by series group, and the report order."""
    by_type = []
    for kind in REPORTED_TYPES:
        mine = [e for e in events if e.event_type == kind]
        confirmed = sum(e.status == "confirmed" for e in mine)
        by_type.append((kind, confirmed, len(mine) - confirmed, len(mine)))
    groups: dict[str, list[int]] = {}
    for e in events:
        counts = groups.setdefault(series_group(e.series_id), [0] * len(REPORTED_TYPES))
        if e.event_type in REPORTED_TYPES:
            counts[REPORTED_TYPES.index(e.event_type)] += 1
    by_group = tuple((g, tuple(c), sum(c)) for g, c in sorted(groups.items()))
    verdicts = verdicts or {}
    dismissed = sum(
        1 for e in events if (v := verdicts.get(event_key(e))) is not None and v.dismissed
    )
    return ReportSummary(
        n_events=len(events),
        n_series=len({e.series_id for e in events}),
        by_type=tuple(by_type),
        by_group=by_group,
        order=order_events(events, sort=sort, verdicts=verdicts),
        sort=sort,
        n_dismissed=dismissed,
    )
