"""The whole protocol after a run: recompute the incidents of the span a run's
changed events can act on, and reconcile them with the stored ones.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError
from changekind.tasks.incidents.grouping import group_incidents, span_to_load
from changekind.tasks.incidents.inputs import _step_ns, fleet_labels
from changekind.tasks.incidents.reconcile import reconcile_incidents
from changekind.tasks.incidents.values import (
    FleetLabels,
    GroupingRule,
    Incident,
    IncidentChanges,
    IncidentSet,
    Span,
    _check_span,
)

# --------------------------------------------------------------------------- one update


@dataclass(frozen=True, slots=True)
class IncidentUpdate:
    """What :func:`update_incidents` recomputed and what changed.

    ``span`` is the span whose incidents were recomputed (every stored and
    computed incident in it is compared); ``loaded`` the span of events read;
    ``reads`` how many times events were read.
    """

    result: IncidentSet
    changes: IncidentChanges
    span: Span
    loaded: Span
    reads: int


def update_incidents(
    changed: tuple[Any, Any],
    *,
    observed: tuple[Any, Any],
    read_events: Callable[[Span], pd.DataFrame],
    read_incidents: Callable[[Span], Sequence[Incident]],
    labels: FleetLabels | pd.DataFrame | Mapping[str, Mapping[str, Any]],
    step_seconds: float | pd.Timedelta | Mapping[str, float | pd.Timedelta],
    rule: GroupingRule | None = None,
    max_rounds: int = 50,
) -> IncidentUpdate:
    """Recompute the incidents that a run's changed events can affect.

    The protocol a writer follows after each run, with the reading left to
    it: ``read_events(span)`` returns every stored event row (retracted ones
    included) with ``event_ts`` in ``span``, ``read_incidents(span)`` every
    stored incident that overlaps ``span``.  Nothing is written here; the
    writer stores :attr:`IncidentChanges.to_write` and notifies
    :attr:`IncidentChanges.to_notify`.

    Parameters
    ----------
    changed : (start, end)
        What the run changed: the span it scanned (newly observed time) and
        the times of the events it added, changed or retracted.
    observed : (start, end), keyword-only
        The span over which the event record is complete after the run (from
        the start of the scanned history to the latest scan; see
        :func:`group_incidents`).
    read_events, read_incidents : callable, keyword-only
        Readers of stored events and stored incidents (see above).
    labels, step_seconds, rule
        As for :func:`group_incidents`; ``step_seconds`` should cover the
        whole fleet (its largest value sets how far events act).
    max_rounds : int, default=50
        Bound on the widening rounds.

    Returns
    -------
    IncidentUpdate

    Raises
    ------
    ConfigError
        As :func:`group_incidents`; also when the span has not settled after
        ``max_rounds`` rounds (a fleet so dense that incidents chain without
        end: raise ``core_alpha``'s strictness or ``min_series``).

    Notes
    -----
    1. ``span``: ``changed`` widened by the rule's margin (events act that
       far), then to the stored incidents overlapping it (:func:`span_to_load`).
    2. Read the events of ``span`` widened by the margin; group; while the
       result is not complete, read the span it needs and group again.
    3. Widen ``span`` to the computed incidents overlapping it and again to
       the stored ones; if it grew, back to 2.
    4. Reconcile the stored incidents of ``span`` with the computed ones.
    """
    rule = GroupingRule() if rule is None else rule
    fleet = fleet_labels(labels)
    lo, hi = _check_span(changed, "changed")
    margin = pd.Timedelta(rule.margin(_max_step_ns(step_seconds)), unit="ns")
    # Step 1
    span = span_to_load((lo - margin, hi + margin), read_incidents((lo - margin, hi + margin)))
    loaded = (span[0] - margin, span[1] + margin)
    reads = 0
    for _ in range(max_rounds):
        # Step 2
        reads += 1
        result = group_incidents(
            read_events(loaded),
            fleet,
            step_seconds=step_seconds,
            rule=rule,
            span=span,
            loaded=loaded,
            observed=observed,
        )
        if not result.complete:
            loaded = result.needed  # type: ignore[assignment]
            continue
        # Step 3
        reach = (
            min([span[0], *(i.start for i in result.incidents)]),
            max([span[1], *(i.end for i in result.incidents)]),
        )
        wider = span_to_load(reach, read_incidents(reach))
        if wider == span:
            break
        span = wider
        loaded = (min(loaded[0], span[0] - margin), max(loaded[1], span[1] + margin))
    else:
        raise ConfigError(
            f"the incidents around {lo} .. {hi} did not settle after {max_rounds} reads "
            f"(last span {span[0]} .. {span[1]}); events chain without end: make the rule "
            "stricter (smaller core_alpha, larger min_series)"
        )
    # Step 4
    stored = [i for i in read_incidents(span) if i.start <= span[1] and i.end >= span[0]]
    changes = reconcile_incidents(stored, result, span=span)
    return IncidentUpdate(result=result, changes=changes, span=span, loaded=loaded, reads=reads)


def _max_step_ns(step_seconds: float | pd.Timedelta | Mapping[str, float | pd.Timedelta]) -> float:
    """The largest sampling interval given, in ns (validated)."""
    if isinstance(step_seconds, Mapping):
        if not step_seconds:
            raise ConfigError("step_seconds is an empty mapping; give each series' interval")
        series = np.array(list(step_seconds), dtype=object)
        return _step_ns(step_seconds, series)[1]
    return _step_ns(step_seconds, np.array([], dtype=object))[1]
