"""Prefect events for new and grown incidents and for newly confirmed events.

Notifications go through the orchestrator: each fleet run emits Prefect
events (``prefect.events.emit_event``) that a Prefect automation can filter
and route to a team's channel with Prefect's own notification blocks (see
``infra/automation-incidents.yaml`` and ``infra/PRODUCTION.md``).

Events
------
``changekind.incident.new`` / ``changekind.incident.grown``
    resource ``changekind.incident.<incident_id>`` with labels
    ``changekind.dominant-type`` (AO, LS, TC, IO, VC), ``changekind.direction``
    (up, down), ``changekind.quantity`` (level, spread),
    ``changekind.size`` (the band of the median effect, see :data:`SIZE_BANDS`),
    ``changekind.n-series`` and one ``changekind.label.<name>`` per shared
    attribute (e.g. ``changekind.label.firmware: "9.4"``); one related
    resource ``changekind.series.<series_id>`` (role ``series``) per member,
    at most :data:`MAX_RELATED`; the payload is the incident's record (the
    ``incidents --json`` object) with the members added (``added``).
``changekind.event.confirmed``
    resource ``changekind.series.<series_id>`` with labels
    ``changekind.event-type``, ``changekind.direction``, ``changekind.size``,
    ``changekind.event-time`` and ``changekind.label.<name>`` for each of the
    series' attributes; the payload holds the event's numbers.  Only events
    whose ``|effect_pct|`` is at least the run's ``notify_min_effect_pct``
    (events without a percentage only when that is 0).

Prefect's automations match resource labels by exact value or ``*``
patterns, not by numbers: hence the size bands.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from changekind.tasks.incidents import IncidentChange
from changekind.tasks.persist import ConfirmedEvent, IncidentRefresh

__all__ = [
    "MAX_RELATED",
    "SIZE_BANDS",
    "confirmed_event",
    "emit_run_events",
    "incident_event",
    "run_events",
    "size_band",
]

SIZE_BANDS: tuple[tuple[float, str], ...] = (
    (1.0, "under-1pct"),
    (5.0, "1-5pct"),
    (20.0, "5-20pct"),
    (math.inf, "20pct-plus"),
)
"""Bands of |effect in % of level| used as the ``changekind.size`` label."""

MAX_RELATED = 50
"""Most member series listed as related resources of one incident event."""


def size_band(effect_pct: float | None) -> str:
    """The ``changekind.size`` label of an effect in % of level (``unknown`` without one)."""
    if effect_pct is None or not math.isfinite(effect_pct):
        return "unknown"
    size = abs(effect_pct)
    return next(name for top, name in SIZE_BANDS if size < top)


def incident_event(change: IncidentChange, *, run_id: str | None = None) -> dict[str, Any]:
    """The keyword arguments of ``emit_event`` for a new or grown incident."""
    if change.kind not in ("new", "grown") or change.incident is None:
        raise ValueError(f"only new and grown incidents are announced, not {change.kind!r}")
    inc = change.incident
    resource = {
        "prefect.resource.id": f"changekind.incident.{inc.incident_id}",
        "prefect.resource.name": f"{inc.n_series} series {inc.direction} ({inc.dominant_type})",
        "changekind.dominant-type": inc.dominant_type,
        "changekind.direction": inc.direction,
        "changekind.quantity": inc.quantity,
        "changekind.size": size_band(inc.median_effect_pct),
        "changekind.n-series": str(inc.n_series),
    }
    for name, value in sorted(inc.shared_labels.items()):
        resource[f"changekind.label.{name}"] = str(value)
    related = [
        {
            "prefect.resource.id": f"changekind.series.{m.series_id}",
            "prefect.resource.role": "series",
        }
        for m in inc.members[:MAX_RELATED]
    ]
    payload = inc.to_record()
    payload["added"] = [list(k) for k in change.added]
    payload["supersedes"] = list(change.supersedes)
    if run_id is not None:
        payload["run_id"] = run_id
    return {
        "event": f"changekind.incident.{change.kind}",
        "resource": resource,
        "related": related,
        "payload": payload,
    }


def confirmed_event(event: ConfirmedEvent, *, run_id: str | None = None) -> dict[str, Any]:
    """The keyword arguments of ``emit_event`` for a newly confirmed event."""
    resource = {
        "prefect.resource.id": f"changekind.series.{event.series_id}",
        "prefect.resource.name": event.series_id,
        "changekind.event-type": event.event_type,
        "changekind.direction": "up" if event.effect > 0 else "down",
        "changekind.size": size_band(event.effect_pct),
        "changekind.event-time": event.event_time,
    }
    for name, value in event.labels:
        resource[f"changekind.label.{name}"] = str(value)
    payload: dict[str, Any] = {
        "series_id": event.series_id,
        "event_time": event.event_time,
        "event_type": event.event_type,
        "effect": event.effect,
        "effect_pct": event.effect_pct,
        "t_stat": event.t_stat,
        "labels": dict(event.labels),
    }
    if run_id is not None:
        payload["run_id"] = run_id
    return {"event": "changekind.event.confirmed", "resource": resource, "payload": payload}


def _wanted(event: ConfirmedEvent, min_effect_pct: float) -> bool:
    if event.effect_pct is None or not math.isfinite(event.effect_pct):
        return min_effect_pct <= 0
    return abs(event.effect_pct) >= min_effect_pct


def run_events(
    refresh: IncidentRefresh, *, min_effect_pct: float = 0.0, run_id: str | None = None
) -> list[dict[str, Any]]:
    """Every event a run announces: new and grown incidents, then confirmed events."""
    out = [incident_event(c, run_id=run_id) for c in refresh.to_notify]
    out += [
        confirmed_event(e, run_id=run_id)
        for e in sorted(refresh.confirmed, key=lambda e: (e.series_id, e.event_time))
        if _wanted(e, min_effect_pct)
    ]
    return out


def emit_run_events(
    refresh: IncidentRefresh,
    *,
    min_effect_pct: float = 0.0,
    run_id: str | None = None,
    emit: Any = None,
) -> Sequence[dict[str, Any]]:
    """Emit the run's events through Prefect; returns what was emitted.

    ``emit`` defaults to ``prefect.events.emit_event`` (which does nothing
    outside a Prefect client context with events enabled).
    """
    if emit is None:
        from prefect.events import emit_event as emit
    events = run_events(refresh, min_effect_pct=min_effect_pct, run_id=run_id)
    for kwargs in events:
        emit(**kwargs)
    return events
