"""Grouping the events of a fleet into incidents (core events, as in density-based
clustering), and the span a writer must read to recompute them.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import gammainc

from changekind.tasks.errors import ConfigError
from changekind.tasks.incidents.inputs import _check_events, _Rows, _step_ns, fleet_labels
from changekind.tasks.incidents.labels import label_shares
from changekind.tasks.incidents.values import (
    BACKGROUND_BINS,
    MIN_BACKGROUND_BINS,
    QUANTITY,
    Direction,
    FleetLabels,
    GroupingRule,
    Incident,
    IncidentMember,
    IncidentSet,
    Span,
    _anchor_order,
    _check_span,
    incident_identity,
)
from changekind.tasks.types import REPORTED_TYPES, round_sig

# --------------------------------------------------------------------------- grouping


def group_incidents(
    events: pd.DataFrame,
    labels: FleetLabels | pd.DataFrame | Mapping[str, Mapping[str, Any]],
    *,
    step_seconds: float | pd.Timedelta | Mapping[str, float | pd.Timedelta],
    rule: GroupingRule | None = None,
    span: tuple[Any, Any] | None = None,
    loaded: tuple[Any, Any] | None = None,
    observed: tuple[Any, Any] | None = None,
) -> IncidentSet:
    """Group the events of a fleet into incidents.

    Parameters
    ----------
    events : pandas.DataFrame of shape (n_events, >= 8)
        Event rows with at least :data:`REQUIRED_COLUMNS` (``series_id``,
        ``event_time``, ``event_ts`` as UTC date-times or NaT, ``event_type``,
        ``effect``, ``effect_pct``, ``t_stat``, ``status``), as
        ``persist.read_events(..., include_retracted=True)`` returns them.
        Retracted rows and rows without ``event_ts`` are counted, never members.
    labels : FleetLabels, pandas.DataFrame or mapping
        The fleet: one row per series, with its labels (see :func:`fleet_labels`).
    step_seconds : float, pandas.Timedelta or mapping, keyword-only
        The sampling interval, one for all series or per series id (every
        series with events needs one; for windowed series, the window).
    rule : GroupingRule, optional
        Tolerances, ``min_series``, the core test and the shared-attribute
        level; default ``GroupingRule()``.
    span : (start, end), optional
        Only incidents that overlap this span are returned (default: all).
    loaded : (start, end), optional
        The span the events are complete for (needs ``span``).  ``needed`` on
        the result then says how far to widen it so that every incident
        overlapping ``span`` is exactly what all events would give.  Naive
        times are UTC.
    observed : (start, end), optional
        The span over which the fleet's event record is complete: from the
        start of the scanned history to the latest scan.  Background bins
        outside it are left out (the record says nothing there; counting them
        as empty would make every coincidence at the newest hour look like an
        incident).  Default: from the first to the last event given, which is
        right for a one-off grouping of a whole record, not for partial reads.

    Returns
    -------
    IncidentSet
        Incidents sorted by start, then id; members by time, then series id.

    Raises
    ------
    ConfigError
        Missing columns, unknown types or statuses, non-finite effects or t
        statistics, duplicate events, labels without a row for a series that
        has events, missing or non-positive sampling intervals, bad spans.

    Notes
    -----
    1. Validate; drop retracted and untimed rows.
    2. Each event's interval ``t +- h``, ``h = tolerance[type] * step``, and its
       background window ``t +- B``, ``B = background * step``.
    3. For each quantity (level, spread) and direction (sign of ``effect``),
       in a canonical order (time, series id, event time):
       a. neighbours: events of other series whose intervals overlap;
       b. core events: at least ``min_series - 1`` neighbours, and the Poisson
          upper tail of that count at most ``core_alpha``, its mean
          ``2 (h_i + h_mean) r``: ``r`` the median count over those of the
          ``BACKGROUND_BINS`` bins of ``t +- B`` that lie in ``observed`` and
          do not overlap the event's reach ``t +- (h_i + max h)``, per
          unit time (0 when fewer than ``MIN_BACKGROUND_BINS`` do: a record
          that short says nothing about a background), ``h_mean`` the mean
          half-width of the window's events;
       c. groups: connected components of core events linked to core events;
       d. an event that is not core joins the group of its nearest core
          neighbour (then the earlier, then the first in canonical order).
    4. In each group, one member per series (largest ``|t_stat|``, then the
       earliest, then the smaller ``event_time``); keep groups of at least
       ``min_series`` series.
    5. Summaries and the id from the anchor (:func:`incident_identity`).
    6. Shared attributes (:func:`label_shares`).
    7. With ``loaded``: the span needed (see :meth:`GroupingRule.margin`).
    """
    rule = GroupingRule() if rule is None else rule
    if not isinstance(rule, GroupingRule):
        raise ConfigError(f"rule must be a GroupingRule, got {type(rule).__name__}")
    want = None if span is None else _check_span(span, "span")
    have = None if loaded is None else _check_span(loaded, "loaded")
    if have is not None and want is None:
        raise ConfigError("loaded needs span: say which span's incidents must be complete")
    if have is not None and observed is None:
        raise ConfigError(
            "loaded needs observed: say over which span the event record is complete "
            "(from the start of the scanned history to the latest scan)"
        )
    given = None if observed is None else _check_span(observed, "observed")
    # Step 1
    fleet = fleet_labels(labels)
    rows = _check_events(events)
    absent = sorted(set(rows.series.tolist()) - set(fleet.index))
    if absent:
        more = f" and {len(absent) - 3} more" if len(absent) > 3 else ""
        raise ConfigError(
            f"labels has no row for series {', '.join(map(repr, absent[:3]))}{more}, which "
            "have events; give every series of the fleet a row (without labels if it has none)"
        )
    # Step 2 (integer ns for times and half-widths: exact, order-free comparisons)
    step_ns, max_step_ns = _step_ns(step_seconds, rows.series)
    tol = dict(rule.tolerance)
    half = np.ceil(np.array([tol[t] for t in rows.types.tolist()]) * step_ns).astype(np.int64)
    background = np.ceil(rule.background * step_ns).astype(np.int64)
    if given is not None:
        seen = (given[0].value, given[1].value)
    elif rows.ts.size:
        seen = (int(rows.ts.min()), int(rows.ts.max()))
    else:
        seen = (0, 0)
    # Step 3
    quantity = np.array([QUANTITY[t] for t in rows.types.tolist()], dtype=object)
    sign = np.sign(rows.effect).astype(int)
    codes = pd.factorize(rows.series)[0]
    incidents: list[Incident] = []
    extents: list[tuple[int, int]] = []  # every group's first and last event time (ns)
    n_core = 0
    for qty in ("level", "spread"):
        for direction, s in (("up", 1), ("down", -1)):
            idx = np.flatnonzero((quantity == qty) & (sign == s))
            if idx.size < 2:
                continue
            idx = idx[np.lexsort((rows.times[idx], rows.series[idx], rows.ts[idx]))]
            groups, core = _groups(rows.ts[idx], half[idx], background[idx], codes[idx], rule, seen)
            n_core += int(core.sum())
            for group in groups:
                extents.append((int(rows.ts[idx[group[0]]]), int(rows.ts[idx[group[-1]]])))
                # Step 4
                chosen = _one_per_series(rows, idx[group])
                if len(chosen) < rule.min_series:
                    continue
                # Step 5
                members = tuple(sorted((_member(rows, i) for i in chosen), key=_anchor_order))
                incidents.append(_summarize(members, qty, direction, fleet, rule.alpha))
    if want is not None:
        incidents = [i for i in incidents if i.start <= want[1] and i.end >= want[0]]
    incidents.sort(key=lambda i: (i.start, i.incident_id))
    # Step 7
    needed = None
    if have is not None and want is not None:
        margin = rule.margin(max_step_ns)
        lo, hi = want[0].value - margin, want[1].value + margin
        for first, last in extents:
            if first <= want[1].value and last >= want[0].value:
                lo, hi = min(lo, first - margin), max(hi, last + margin)
        needed = (
            min(have[0], pd.Timestamp(lo, unit="ns", tz="UTC")),
            max(have[1], pd.Timestamp(hi, unit="ns", tz="UTC")),
        )
    return IncidentSet(
        incidents=tuple(incidents),
        n_events=rows.n_events,
        n_retracted=rows.n_retracted,
        n_untimed=rows.n_untimed,
        n_core=n_core,
        n_members=sum(i.n_series for i in incidents),
        fleet_size=fleet.size,
        rule=rule,
        span=want,
        loaded=have,
        needed=needed,
    )


def _groups(
    ts: np.ndarray,
    half: np.ndarray,
    background: np.ndarray,
    codes: np.ndarray,
    rule: GroupingRule,
    observed: tuple[int, int],
) -> tuple[list[np.ndarray], np.ndarray]:
    """Step 3 for one quantity and direction: groups (positions, in order) and the core mask.

    The arrays are in canonical order (time, series id, event time).
    """

    n = ts.size
    # Step 3a: pairs (i, j) of other series whose intervals overlap.
    reach = int(half.max())
    lo = np.searchsorted(ts, ts - half - reach, "left")
    hi = np.searchsorted(ts, ts + half + reach, "right")
    counts = hi - lo
    i = np.repeat(np.arange(n), counts)
    j = np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts, counts)
    j += np.repeat(lo, counts)
    keep = (codes[i] != codes[j]) & (np.abs(ts[i] - ts[j]) <= half[i] + half[j])
    i, j = i[keep], j[keep]
    # Step 3b: core events.  The background rate is the median count over the bins of
    # the window that lie inside the observed span (a burst filling less than half of
    # them does not move it; bins the record says nothing about are left out; with
    # fewer than MIN_BACKGROUND_BINS observed the record is too short to say: rate 0).
    half_s = half / 1e9
    n_near = np.bincount(i, minlength=n)
    k = np.arange(BACKGROUND_BINS + 1)
    edges = (ts - background)[:, None] + (2 * background)[:, None] * k // BACKGROUND_BINS
    pos = np.searchsorted(ts, edges.ravel(), "left").reshape(n, BACKGROUND_BINS + 1)
    counts = np.diff(pos, axis=1).astype(float)
    inside = (edges[:, :-1] >= observed[0]) & (edges[:, 1:] <= observed[1])
    # Bins that overlap the event's own reach (where its neighbours are counted) are
    # not background: with them, a burst filling two of a quiet record's bins lifted
    # the median from 0 to 0.5 an hour and the densest event of a rollout failed the
    # test its sparser neighbours passed (the demo's rollout fell in two incidents).
    own = (edges[:, 1:] > (ts - half - reach)[:, None]) & (
        edges[:, :-1] < (ts + half + reach)[:, None]
    )
    inside &= ~own
    counts[~inside] = np.nan
    rate = np.zeros(n)
    some = inside.sum(axis=1) >= MIN_BACKGROUND_BINS
    rate[some] = np.nanmedian(counts[some], axis=1) / (2 * background[some] / 1e9 / BACKGROUND_BINS)
    csum = np.concatenate(([0.0], np.cumsum(half_s)))
    h_mean = (csum[pos[:, -1]] - csum[pos[:, 0]]) / np.maximum(pos[:, -1] - pos[:, 0], 1)
    mean = rate * 2 * (half_s + h_mean)  # events overlapping i at that rate
    tail = np.where(n_near > 0, gammainc(np.maximum(n_near, 1), mean), 1.0)  # P(N >= n_near)
    core = (n_near >= rule.min_series - 1) & (tail <= rule.core_alpha)
    # Step 3c: components of core events.
    both = core[i] & core[j]
    # Imported here: scipy.sparse is start-up that a run with no events to group skips.
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    graph = coo_matrix((np.ones(int(both.sum())), (i[both], j[both])), shape=(n, n))
    _, component = connected_components(graph, directed=False)
    group = np.where(core, component, -1)
    # Step 3d: other events join their nearest core neighbour's group.
    edge = ~core[i] & core[j]
    if edge.any():
        bi, bj = i[edge], j[edge]
        order = np.lexsort((bj, np.abs(ts[bi] - ts[bj]), bi))
        bi, bj = bi[order], bj[order]
        first = np.concatenate(([True], bi[1:] != bi[:-1]))
        group[bi[first]] = component[bj[first]]
    placed = np.flatnonzero(group >= 0)
    placed = placed[np.argsort(group[placed], kind="stable")]
    cuts = np.flatnonzero(np.diff(group[placed])) + 1
    return [np.sort(g) for g in np.split(placed, cuts) if g.size], core


def _one_per_series(rows: _Rows, idx: np.ndarray) -> list[int]:
    """Of the events ``idx``, each series' event of largest |t| (then earliest, smaller text)."""
    best: dict[str, int] = {}
    for i in idx.tolist():
        sid = rows.series[i]
        j = best.get(sid)
        if j is None or _stronger(rows, i, j):
            best[sid] = i
    return list(best.values())


def _stronger(rows: _Rows, i: int, j: int) -> bool:
    a = (-abs(rows.t_stat[i]), rows.ts[i], rows.times[i])
    b = (-abs(rows.t_stat[j]), rows.ts[j], rows.times[j])
    return a < b


def _member(rows: _Rows, i: int) -> IncidentMember:
    pct = rows.effect_pct[i]
    return IncidentMember(
        series_id=rows.series[i],
        event_time=rows.times[i],
        event_ts=pd.Timestamp(int(rows.ts[i]), unit="ns", tz="UTC"),
        event_type=rows.types[i],
        effect=float(rows.effect[i]),
        effect_pct=None if math.isnan(pct) else float(pct),
        t_stat=float(rows.t_stat[i]),
        status=rows.status[i],
    )


def _summarize(
    members: tuple[IncidentMember, ...],
    quantity: str,
    direction: Direction,
    fleet: FleetLabels,
    alpha: float,
) -> Incident:
    anchor = members[0]  # members are in anchor order
    counts = Counter(m.event_type for m in members)
    type_counts = tuple((t, counts[t]) for t in REPORTED_TYPES if counts[t])
    dominant = max(type_counts, key=lambda tc: tc[1])[0]  # first of the most frequent
    pcts = [m.effect_pct for m in members if m.effect_pct is not None]
    return Incident(
        incident_id=incident_identity(
            anchor.series_id, anchor.event_time, anchor.event_ts, quantity, direction
        ),
        quantity=quantity,
        direction=direction,
        start=members[0].event_ts,
        end=max(m.event_ts for m in members),
        members=members,
        n_series=len(members),
        fleet_size=fleet.size,
        share_of_fleet=round_sig(len(members) / fleet.size),
        dominant_type=dominant,
        type_counts=type_counts,
        median_effect_pct=round_sig(float(np.median(pcts))) if pcts else None,
        n_provisional=sum(m.status == "provisional" for m in members),
        labels=label_shares([m.series_id for m in members], fleet, alpha=alpha),
    )


def span_to_load(span: tuple[Any, Any], stored: Sequence[Incident]) -> Span:
    """``span`` widened to every stored incident that overlaps it (and so on).

    A recomputation must see all members of the stored incidents it may
    change, or it would take a member it did not read for a member that left.
    """
    lo, hi = _check_span(span, "span")
    for _ in range(len(stored) + 1):
        wider_lo, wider_hi = lo, hi
        for inc in stored:
            if inc.start <= hi and inc.end >= lo:
                wider_lo, wider_hi = min(wider_lo, inc.start), max(wider_hi, inc.end)
        if (wider_lo, wider_hi) == (lo, hi):
            break
        lo, hi = wider_lo, wider_hi
    return (lo, hi)
