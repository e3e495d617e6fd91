"""What the report draws for one event: the event, its verdict, its data, its neighbours."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import pandas as pd

from changekind.tasks.types import Event, FittedModel

__all__ = [
    "EventKey",
    "EventView",
    "Verdict",
    "event_from_record",
    "event_key",
    "verdict_from_record",
]

EventKey = tuple[str, str]
"""``(series_id, event_time)``: how the database keys an event."""


@dataclass(frozen=True, slots=True)
class Verdict:
    """A person's verdict on an event: the triage columns of ``series_events``.

    ``state`` is acknowledged, dismissed or explained; ``at`` the time it was
    recorded, as text.
    """

    state: str
    reason: str | None = None
    at: str | None = None

    @property
    def dismissed(self) -> bool:
        return self.state == "dismissed"

    def words(self) -> str:
        """``dismissed: planned maintenance`` (the reason only when there is one)."""
        return f"{self.state}: {self.reason}" if self.reason else self.state


@dataclass(frozen=True, slots=True, eq=False)
class EventView:
    """One event with what its picture needs.

    ``timestamps`` and ``values`` are the observations around the event as the
    source holds them (None when the source has none); ``model`` is the
    series' stored model (None when there is none); ``note`` says why there is
    no data, when there is none; ``neighbours`` are the series' other stored
    events (those in the drawn span are marked); ``unit`` is the series' unit
    when known; ``verdict`` a person's verdict, if any.
    """

    event: Event
    timestamps: Any = None
    values: Any = None
    model: FittedModel | None = None
    note: str | None = None
    neighbours: tuple[Event, ...] = ()
    unit: str | None = None
    verdict: Verdict | None = None

    @property
    def key(self) -> EventKey:
        return event_key(self.event)


def event_key(event: Event) -> EventKey:
    return (event.series_id, event.event_time)


def _missing(value: Any) -> bool:
    """None, NaN or NaT (what a missing cell of read_events holds)."""
    if value is None:
        return True
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):  # a sequence: not a missing scalar
        return False


def event_from_record(record: Mapping[str, Any]) -> Event:
    """An Event from a row of :func:`changekind.tasks.persist.read_events`.

    ``position`` is -1: stored events are placed by time, not by grid index.
    """

    def opt(value: Any) -> float | None:
        return None if _missing(value) else float(value)

    def text(value: Any) -> Any:
        return None if _missing(value) else value

    weights = record["type_weights"]
    if isinstance(weights, Mapping):
        pairs = tuple((str(k), float(v)) for k, v in weights.items())
    else:
        pairs = tuple((str(k), float(v)) for k, v in weights)
    return Event(
        series_id=str(record["series_id"]),
        position=-1,
        event_time=str(record["event_time"]),
        event_type=record["event_type"],
        effect=float(record["effect"]),
        effect_pct=opt(record.get("effect_pct")),
        effect_sigma=opt(record.get("effect_sigma")),
        t_stat=float(record["t_stat"]),
        se=float(record["se"]),
        type_weights=pairs,
        status=record["status"],
        decay=opt(record.get("decay")),
        half_life=opt(record.get("half_life")),
        duration=opt(record.get("duration")),
        level=float(record["level"]),
        model=str(record["model"]),
        window_start=text(record.get("window_start")),
        window_end=text(record.get("window_end")),
    )


def verdict_from_record(record: Mapping[str, Any]) -> Verdict | None:
    """The verdict in a row of ``read_events`` (its triage columns), None without one."""
    state = record.get("triage_state")
    if _missing(state):
        return None
    reason, at = record.get("triage_reason"), record.get("triage_at")
    return Verdict(
        state=str(state),
        reason=None if _missing(reason) else str(reason),
        at=None if _missing(at) else _time_text(at),
    )


def _time_text(value: Any) -> str:
    isoformat = getattr(value, "isoformat", None)
    return isoformat() if callable(isoformat) else str(value)
