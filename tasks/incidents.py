"""Fleet incidents: events of different series that happen together.

Operators do not triage series one by one: a firmware rollout steps the write
latency of every controller it reaches, a network change lifts the queue depth
of one rack.  This module groups the stored events of a fleet into incidents,
says what the affected series share, and tells a writer which stored incidents
a new computation adds, grows, shrinks or removes.  Everything here is pure
(no database, no Prefect): the persistence step reads the events, calls these
functions and writes what they return.

An incident is, like an event, statistical evidence for a person to judge: it
says that several series changed the same way at about the same time, not why.

Grouping rule
-------------
Each event is given a time interval ``[t - h, t + h]`` with the half-width
``h = TIME_TOLERANCE[event_type] * step`` (``step``: the sampling interval of
its own series), so the window scales with the sampling interval and with how
sure the event's time is for its type (measured; see :data:`TIME_TOLERANCE`).
Two events of different series are *neighbours* when they move the same
quantity (the level for AO, LS, TC and IO; the spread for VC) in the same
direction (sign of ``effect``) and their intervals overlap,
``|t_a - t_b| <= h_a + h_b``.

Plain chaining of neighbours (single linkage) is deterministic but, in a fleet
where events are dense, chains everything: 1,000 random events a day on 10,000
series chained a firmware rollout, a rack spike eight hours later and hundreds
of unrelated events into one incident (tests/benchmarks/bench_incidents.py),
and the span a writer must reread grows without end.  So chains run only
through *core* events, in the manner of density-based clustering (DBSCAN): an
event is core when it has at least ``min_series - 1`` neighbours and that many
would come by chance with probability at most ``CORE_ALPHA`` (Poisson upper
tail) at its local background rate: the median count of events of the same
quantity and direction over the ``BACKGROUND_BINS`` bins of the window of
``BACKGROUND_SAMPLES`` samples either side (a median, so that the burst itself,
filling less than half of the window, does not count as background; bins
outside the observed record, such as the future of the newest scan, are left
out rather than counted as empty).  Core events that
are neighbours are in one group (a chain A-B-C of core events is one incident
even when A and C are far apart: a rollout moves controller after controller);
an event that is not core joins the group of its nearest core neighbour.  In a
quiet fleet two events that coincide are core (nothing else explains them); in
a busy one, coincidences at the background's rate are not, and a burst lasting
longer than half the background window becomes its own background, which
bounds the chains.  Every step depends only on the set of events, never on the order in
which they arrive or are processed.

Within a group each series keeps one member, its event of largest
``|t_stat|`` (then the earliest, then the smaller ``event_time`` text); an
incident needs ``min_series`` distinct series (default 2: a lone event is not
an incident).  Retracted events and events without a date-time (numeric grids)
are never members.

Identity rule
-------------
An incident's id is derived from its *anchor*, its earliest member (by time,
then series id, then event time text), and its quantity and direction: the
anchor's time in readable form followed by a hash (:func:`incident_identity`).
The same events therefore give the same ids in any order and in any split into
partial runs.  Members that join later than the anchor (the usual case: later
scans find later events) keep the id.  A member that joins *before* the anchor
(an overlapping backfill finds an earlier event), or the retraction of the
anchor, gives the incident a new id; :func:`reconcile_incidents` then reports
the new id as ``grown`` (or ``shrunk``/``changed``) with ``supersedes`` naming
the old id, and the old id as ``gone`` with ``superseded_by``, so a writer can
carry notes and notifications over instead of announcing a new incident.

Shared attributes
-----------------
For each label (``rack``, ``firmware``...) and each value carried by at least
``MIN_CARRIERS`` members, the members are taken as a draw without replacement
from the fleet's series whose value of that label is known, and the
probability of at least as many carriers by chance is the hypergeometric upper
tail ``P(X >= k)``, ``X ~ Hypergeometric(N, K, n)`` (``scipy.stats.hypergeom``),
with ``k`` members of ``n`` carrying the value and ``K`` series of ``N`` in the
fleet.  The p-values of all values tested for one incident are adjusted by
Holm's step-down method (family-wise error at most ``alpha``, default 1 %);
a value is *shared* when its adjusted p-value is at most ``alpha`` and at least
half of the members carry it (``MIN_MEMBER_SHARE``: the value describes the
incident, not a small cluster inside it).

Updating
--------
:func:`update_incidents` is the whole protocol after a run, with the reading
of stored events and incidents left to the caller: recompute the incidents of
the span the run's changed events can act on (widened until nothing outside
can change them) and :func:`reconcile_incidents` them with the stored ones.

References
----------
Ester, M., Kriegel, H.-P., Sander, J. and Xu, X. (1996). A density-based
algorithm for discovering clusters in large spatial databases with noise.
Proceedings of KDD-96, 226-231.

Holm, S. (1979). A simple sequentially rejective multiple test procedure.
Scandinavian Journal of Statistics 6, 65-70.
"""

from __future__ import annotations

import hashlib
import math
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError
from changekind.tasks.types import REPORTED_TYPES, round_sig

__all__ = [
    "BACKGROUND_BINS",
    "BACKGROUND_SAMPLES",
    "CHANGE_KINDS",
    "CORE_ALPHA",
    "EVENT_STATUSES",
    "MIN_BACKGROUND_BINS",
    "MIN_CARRIERS",
    "MIN_MEMBER_SHARE",
    "MIN_SERIES",
    "QUANTITY",
    "REQUIRED_COLUMNS",
    "SHARED_ALPHA",
    "TIME_TOLERANCE",
    "FleetLabels",
    "GroupingRule",
    "Incident",
    "IncidentChange",
    "IncidentChanges",
    "IncidentMember",
    "IncidentSet",
    "IncidentUpdate",
    "LabelShare",
    "fleet_labels",
    "group_incidents",
    "incident_identity",
    "label_shares",
    "reconcile_incidents",
    "span_to_load",
    "update_incidents",
]

TIME_TOLERANCE: dict[str, float] = {"AO": 0.5, "IO": 1.5, "TC": 2.5, "LS": 3.5, "VC": 3.5}
"""Half-width of an event's time interval, in samples of its own series, by type.

Each is half a sample (the grids of two series sampled at the same interval
can be offset by up to one sample) plus the whole number of samples within
which nearly all of the engine's events of that type fall from the true time,
measured on simulated series with one injected event each
(``python -m tests.benchmarks.bench_incidents --time-errors``: ar1, arma11,
arima011 and seasonal models, 3, 4 and 5 sigma, 25 replications, 1,200 series,
the detection nearest the injected time within 12 samples).  Default seed, then
``--base-seed 777`` as a check: AO 97.3 / 99.1 % exact; IO 99.2 / 99.6 %
within 1 sample; TC 99.2 / 97.9 % within 2; LS 94.8 / 95.9 % within 3, with
errors up to 8 and 12 samples (with seed 777, 16 of the 17 injected level
shifts found off their time were 3-sigma shifts: a small step in
autocorrelated noise is hard to place).  So, against a first guess that a
level shift's time is the exact one, it is the least precisely placed type
and gets the widest interval.  VC is a step in the window spreads, placed as
an LS is, in windows.  Two LS of equally sampled series link within 7 samples
(35 minutes at 5-minute sampling), two AO within 1."""

QUANTITY: dict[str, str] = {
    "AO": "level",
    "LS": "level",
    "TC": "level",
    "IO": "level",
    "VC": "spread",
}
"""What an event type moves: level events group with level events, variance
changes (windowed mode) with variance changes."""

MIN_SERIES = 2
"""Fewest distinct series an incident needs: a lone event is not an incident."""

MIN_CARRIERS = 2
"""Fewest members that must carry a label value for it to be tested.  One
carrier of a rare value (a host name, say) gives a small hypergeometric tail,
``n / N`` for a value only one series has, without anything being shared."""

SHARED_ALPHA = 0.01
"""Family-wise level (Holm) below which a label value counts as shared."""

MIN_MEMBER_SHARE = 0.5
"""A shared value is carried by at least this share of the members (with a known
value).  The test alone also flags small sub-clusters: in a rack-wide incident,
both series of every host of the rack are members, and each host name is
over-represented (2 of 2 series) without describing the incident."""

CORE_ALPHA = 0.001
"""An event is a core event of a group when as many neighbours as it has (events of
other series whose intervals overlap its own) would come by chance with at most
this probability (Poisson upper tail) under its local background."""

BACKGROUND_SAMPLES = 144.0
"""Half-width of the background window around an event, in samples of its own
series: 12 hours at 5-minute sampling, about 20 times the widest link (7 samples
for two LS), so that a burst is a small part of its own background."""

BACKGROUND_BINS = 24
"""The background window is cut into this many bins (one hour each at 5-minute
sampling); the median count over the bins is the background rate, which a burst
filling less than half of the window does not move."""

MIN_BACKGROUND_BINS = 3
"""Fewest bins of the background window that must lie in the observed record for
a background rate (with fewer the rate is taken as 0: every coincidence counts).
Bins outside the record are left out rather than counted as empty: at the newest
scan the future half of every window is unobserved, and counting it as empty
halved the rate there and made chance coincidences into incidents (a busy fleet
of 2,000 series, cut at 10:00: 13 chance members at 08:55 that way, none with
the bins left out; tests/tasks/test_incidents.py)."""

EVENT_STATUSES: tuple[str, ...] = ("provisional", "confirmed", "retracted")

REQUIRED_COLUMNS: tuple[str, ...] = (
    "series_id",
    "event_time",
    "event_ts",
    "event_type",
    "effect",
    "effect_pct",
    "t_stat",
    "status",
)
"""Columns of ``series_events`` the grouping reads; others are ignored."""

ChangeKind = Literal["new", "grown", "shrunk", "changed", "unchanged", "gone"]
CHANGE_KINDS: tuple[ChangeKind, ...] = ("new", "grown", "shrunk", "changed", "unchanged", "gone")
"""What :func:`reconcile_incidents` says of an incident, in the order it lists them."""

Direction = Literal["up", "down"]
MemberKey = tuple[str, str]
"""An event's key, as in ``series_events``: ``(series_id, event_time)``."""

Span = tuple[pd.Timestamp, pd.Timestamp]

_REL_TOL = 1e-9  # floats that agree to this are the same stored value (see DEVELOPERS.md)


# --------------------------------------------------------------------------- values


@dataclass(frozen=True, slots=True)
class IncidentMember:
    """One event of an incident (at most one per series)."""

    series_id: str
    event_time: str
    event_ts: pd.Timestamp
    event_type: str
    effect: float
    effect_pct: float | None
    t_stat: float
    status: str

    @property
    def key(self) -> MemberKey:
        return (self.series_id, self.event_time)


@dataclass(frozen=True, slots=True)
class LabelShare:
    """How many members carry one label value, against the fleet, and the test.

    ``members_with`` (k) of the ``members_known`` (n) members whose value of
    ``label`` is known carry ``value``; ``fleet_with`` (K) of the
    ``fleet_known`` (N) series of the fleet do.  ``p_value`` is the
    hypergeometric upper tail ``P(X >= k)``; ``p_adjusted`` is Holm's
    adjustment over every value tested for the incident; ``shared`` is
    ``p_adjusted <= alpha`` and ``k >= MIN_MEMBER_SHARE * n``.
    """

    label: str
    value: str
    members_with: int
    members_known: int
    fleet_with: int
    fleet_known: int
    p_value: float
    p_adjusted: float
    shared: bool

    @property
    def member_share(self) -> float:
        """Share of the members (with a known value) that carry the value."""
        return self.members_with / self.members_known

    @property
    def fleet_share(self) -> float:
        """Share of the fleet (with a known value) that carries the value."""
        return self.fleet_with / self.fleet_known

    @property
    def group_share(self) -> float:
        """Share of the series carrying the value that are members (the label group's share)."""
        return self.members_with / self.fleet_with


@dataclass(frozen=True, slots=True)
class Incident:
    """Events of several series that changed the same way at about the same time.

    ``start`` and ``end`` are the earliest and latest member times (UTC).
    ``share_of_fleet`` is ``n_series / fleet_size``.  ``type_counts`` counts
    the members by type; ``dominant_type`` is the most frequent (ties in the
    order of ``REPORTED_TYPES``).  ``median_effect_pct`` is the median of the
    members' ``effect_pct`` (None when no member has one).  ``labels`` holds
    every label value tested (see :class:`LabelShare`), most significant first.
    """

    incident_id: str
    quantity: str
    direction: Direction
    start: pd.Timestamp
    end: pd.Timestamp
    members: tuple[IncidentMember, ...]
    n_series: int
    fleet_size: int
    share_of_fleet: float
    dominant_type: str
    type_counts: tuple[tuple[str, int], ...]
    median_effect_pct: float | None
    n_provisional: int
    labels: tuple[LabelShare, ...] = ()

    @property
    def anchor(self) -> IncidentMember:
        """The member the id is derived from: the earliest (time, series id, event time)."""
        return min(self.members, key=_anchor_order)

    @property
    def member_keys(self) -> frozenset[MemberKey]:
        return frozenset(m.key for m in self.members)

    @property
    def series_ids(self) -> tuple[str, ...]:
        return tuple(m.series_id for m in self.members)

    @property
    def span(self) -> pd.Timedelta:
        return self.end - self.start

    @property
    def shared(self) -> tuple[LabelShare, ...]:
        """The label values found to be shared."""
        return tuple(s for s in self.labels if s.shared)

    @property
    def shared_labels(self) -> dict[str, str]:
        """Label -> value for the shared values (the most significant one per label)."""
        out: dict[str, str] = {}
        for s in self.labels:  # most significant first
            if s.shared and s.label not in out:
                out[s.label] = s.value
        return out

    def to_record(self) -> dict[str, Any]:
        """Plain JSON-ready values (the ``incidents --json`` contract and more)."""
        return {
            "incident_id": self.incident_id,
            "quantity": self.quantity,
            "direction": self.direction,
            "start": self.start.isoformat(),
            "end": self.end.isoformat(),
            "n_series": self.n_series,
            "fleet_size": self.fleet_size,
            "share_of_fleet": self.share_of_fleet,
            "dominant_type": self.dominant_type,
            "type_counts": dict(self.type_counts),
            "median_effect_pct": self.median_effect_pct,
            "n_provisional": self.n_provisional,
            "shared_labels": self.shared_labels,
            "labels": [{**_plain(s), "fleet_share": round_sig(s.fleet_share)} for s in self.labels],
            "members": [_plain(m) for m in self.members],
        }

    @classmethod
    def from_record(cls, data: Mapping[str, Any]) -> Incident:
        """The inverse of :meth:`to_record` (for incidents read back from storage)."""
        try:
            members = tuple(_typed(IncidentMember, m) for m in data["members"])
            labels = tuple(_typed(LabelShare, s) for s in data.get("labels", ()))
            pct = data["median_effect_pct"]
            return cls(
                incident_id=str(data["incident_id"]),
                quantity=str(data["quantity"]),
                direction=data["direction"],
                start=_utc_stamp(data["start"]),
                end=_utc_stamp(data["end"]),
                members=members,
                n_series=int(data["n_series"]),
                fleet_size=int(data["fleet_size"]),
                share_of_fleet=float(data["share_of_fleet"]),
                dominant_type=str(data["dominant_type"]),
                type_counts=tuple((str(k), int(v)) for k, v in dict(data["type_counts"]).items()),
                median_effect_pct=_optional_float(pct),
                n_provisional=int(data["n_provisional"]),
                labels=labels,
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise ConfigError(
                f"stored incident record is malformed ({exc!r}); recompute the incidents "
                "of its time span to replace it"
            ) from exc


@dataclass(frozen=True, slots=True)
class GroupingRule:
    """The knobs of the grouping, one value for the grouping and the span helpers.

    ``tolerance`` gives the half-width of an event's time interval in samples
    of its series, by type (a mapping is accepted and completed from
    :data:`TIME_TOLERANCE`); ``min_series`` the fewest series of an incident;
    ``core_alpha`` the level of the core test (1 turns it off: every event
    with ``min_series - 1`` neighbours is core, plain chaining);
    ``background`` the half-width of the background window in samples;
    ``alpha`` the family-wise level of the shared-attribute test.
    """

    tolerance: tuple[tuple[str, float], ...] = tuple(sorted(TIME_TOLERANCE.items()))
    min_series: int = MIN_SERIES
    core_alpha: float = CORE_ALPHA
    background: float = BACKGROUND_SAMPLES
    alpha: float = SHARED_ALPHA

    def __post_init__(self) -> None:
        given = dict(self.tolerance)
        for key, value in given.items():
            if key not in TIME_TOLERANCE:
                raise ConfigError(
                    f"tolerance names the unknown type {key!r}; use {', '.join(TIME_TOLERANCE)}"
                )
            if isinstance(value, bool) or not (
                isinstance(value, int | float) and math.isfinite(value) and value >= 0
            ):
                raise ConfigError(f"tolerance of {key} is {value!r}; give a number of samples >= 0")
        full = {**TIME_TOLERANCE, **{k: float(v) for k, v in given.items()}}
        object.__setattr__(self, "tolerance", tuple(sorted(full.items())))
        m = self.min_series
        if isinstance(m, bool) or not isinstance(m, int) or m < 2:
            raise ConfigError(
                f"min_series is {m!r}; give a whole number >= 2 (a lone event is not an incident)"
            )
        _check_alpha(self.core_alpha, "core_alpha", one=True)
        _check_alpha(self.alpha, "alpha")
        b = self.background
        widest = 2 * max(full.values())
        if (
            isinstance(b, bool)
            or not (isinstance(b, int | float) and math.isfinite(b))
            or b <= widest
        ):
            raise ConfigError(
                f"background is {b!r}; give a number of samples above the widest link "
                f"({widest:g} samples), e.g. {BACKGROUND_SAMPLES:g}"
            )

    def margin(self, step_ns: float) -> int:
        """How far (ns) events can act on a group: the background plus two links.

        An event acts on another's core test within the background window and
        on its links within two half-widths; a group can take in an event one
        link beyond its own events.  Used to say which span must be read.
        """
        return math.ceil((self.background + 4 * max(v for _, v in self.tolerance)) * step_ns)


@dataclass(frozen=True, slots=True)
class IncidentSet:
    """What :func:`group_incidents` found in a set of events.

    ``n_events`` rows came in; ``n_retracted`` were retracted and
    ``n_untimed`` had no date-time (both never members); ``n_core`` events
    passed the core test; ``n_members`` events are members of an incident.
    ``span`` is the span whose incidents were asked for (None: all);
    ``loaded`` the span the events are complete for, and ``needed`` the span
    that must be loaded for the incidents of ``span`` to be exact (equal to
    ``loaded`` when nothing is missing; see :attr:`complete`).
    """

    incidents: tuple[Incident, ...]
    n_events: int
    n_retracted: int
    n_untimed: int
    n_core: int
    n_members: int
    fleet_size: int
    rule: GroupingRule
    span: Span | None = None
    loaded: Span | None = None
    needed: Span | None = None

    @property
    def complete(self) -> bool:
        """True unless events outside ``loaded`` could still change an incident of ``span``."""
        return self.needed == self.loaded

    def by_id(self) -> dict[str, Incident]:
        return {i.incident_id: i for i in self.incidents}


@dataclass(frozen=True, slots=True)
class IncidentChange:
    """What one recomputation does to one incident.

    ``incident`` is the computed incident (None when ``kind`` is ``gone``);
    ``previous`` the stored incident with the same id (None when there is
    none).  ``added`` members were in no stored predecessor; ``removed`` members
    of the predecessors this incident is heir to are in no computed incident
    any more (retracted, or moved out of every group).  ``supersedes`` lists
    stored ids, other than its own, whose members it took over;
    ``superseded_by`` (for ``gone``) the computed ids its members went to.
    """

    kind: ChangeKind
    incident_id: str
    incident: Incident | None
    previous: Incident | None
    added: tuple[MemberKey, ...] = ()
    removed: tuple[MemberKey, ...] = ()
    supersedes: tuple[str, ...] = ()
    superseded_by: tuple[str, ...] = ()

    @property
    def notify(self) -> bool:
        """True for the changes a notification is due for: new and grown incidents."""
        return self.kind in ("new", "grown")


@dataclass(frozen=True, slots=True)
class IncidentChanges:
    """Every change of one reconciliation, in ``CHANGE_KINDS`` order then by id."""

    changes: tuple[IncidentChange, ...]

    def of_kind(self, kind: ChangeKind) -> tuple[IncidentChange, ...]:
        return tuple(c for c in self.changes if c.kind == kind)

    @property
    def to_write(self) -> tuple[IncidentChange, ...]:
        """Every change except ``unchanged``: what a writer must store or remove."""
        return tuple(c for c in self.changes if c.kind != "unchanged")

    @property
    def to_notify(self) -> tuple[IncidentChange, ...]:
        return tuple(c for c in self.changes if c.notify)

    def counts(self) -> dict[str, int]:
        return {k: sum(c.kind == k for c in self.changes) for k in CHANGE_KINDS}


@dataclass(frozen=True, slots=True, eq=False)
class FleetLabels:
    """The fleet's series and the labels that describe them, validated once.

    ``series_ids`` are sorted; ``values[j][i]`` is the value of label
    ``names[j]`` for series ``series_ids[i]`` (None when unknown); ``counts[j]``
    the fleet's count of each value, ``known[j]`` how many series have one;
    ``index`` maps a series id to its row (read-only by convention).  Built
    by :func:`fleet_labels`; pass it to :func:`group_incidents` again and again.
    """

    series_ids: tuple[str, ...]
    names: tuple[str, ...]
    values: tuple[tuple[str | None, ...], ...]
    counts: tuple[tuple[tuple[str, int], ...], ...] = field(repr=False)
    known: tuple[int, ...] = field(repr=False)
    index: Mapping[str, int] = field(repr=False)

    @property
    def size(self) -> int:
        return len(self.series_ids)


# --------------------------------------------------------------------------- helpers


def _optional_float(value: Any) -> float | None:
    return None if value is None else float(value)


def _utc_stamp(value: Any) -> pd.Timestamp:
    stamp = pd.Timestamp(value)
    if stamp is pd.NaT:
        raise ValueError(f"{value!r} is not a date-time")
    return stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")


_FIELDS: dict[type, dict[str, Callable[[Any], Any]]] = {
    IncidentMember: {
        "series_id": str,
        "event_time": str,
        "event_ts": _utc_stamp,
        "event_type": str,
        "effect": float,
        "effect_pct": _optional_float,
        "t_stat": float,
        "status": str,
    },
    LabelShare: {
        "label": str,
        "value": str,
        "members_with": int,
        "members_known": int,
        "fleet_with": int,
        "fleet_known": int,
        "p_value": float,
        "p_adjusted": float,
        "shared": bool,
    },
}
"""Each record type's fields and how a stored value is read back (one table for both ways)."""


def _plain(value: IncidentMember | LabelShare) -> dict[str, Any]:
    """A member or label share as JSON-ready values (times as ISO text)."""
    out = {}
    for name in _FIELDS[type(value)]:
        v = getattr(value, name)
        out[name] = v.isoformat() if isinstance(v, pd.Timestamp) else v
    return out


def _typed(cls: type, data: Mapping[str, Any]) -> Any:
    """The inverse of :func:`_plain`."""
    return cls(**{name: read(data[name]) for name, read in _FIELDS[cls].items()})


def _anchor_order(m: IncidentMember) -> tuple[pd.Timestamp, str, str]:
    return (m.event_ts, m.series_id, m.event_time)


def _label_text(value: Any) -> str | None:
    """A label value as stored: text, or None when missing."""
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, float) and math.isnan(value):
        return None
    text = str(value)
    return text if text != "" else None


def _first_rows(mask: np.ndarray, series: np.ndarray, times: np.ndarray, limit: int = 3) -> str:
    rows = np.flatnonzero(mask)[:limit]
    where = ", ".join(f"series {series[i]!r} at {times[i]!r}" for i in rows)
    more = int(mask.sum()) - len(rows)
    return where + (f" and {more} more" if more > 0 else "")


def incident_identity(
    series_id: str, event_time: str, event_ts: pd.Timestamp, quantity: str, direction: str
) -> str:
    """The id of an incident anchored at one event.

    ``YYYYmmddTHHMMSSZ-<quantity>-<direction>-<12 hex digits>``: the anchor's
    UTC time, readable and sortable, then the first 12 hex digits of the
    BLAKE2b hash of the anchor's key, quantity and direction (two incidents
    can only share an anchor time and direction when their anchors are
    different events of the same second; 48 bits keep them apart).
    """
    text = "\x1f".join((series_id, event_time, quantity, direction))
    digest = hashlib.blake2b(text.encode("utf-8"), digest_size=6).hexdigest()
    return f"{_utc_stamp(event_ts):%Y%m%dT%H%M%SZ}-{quantity}-{direction}-{digest}"


# --------------------------------------------------------------------------- inputs


def fleet_labels(
    labels: FleetLabels | pd.DataFrame | Mapping[str, Mapping[str, Any]],
) -> FleetLabels:
    """The fleet and its labels, validated.

    Parameters
    ----------
    labels : pandas.DataFrame or mapping
        One row per series of the fleet: a DataFrame indexed by series id (or
        with a ``series_id`` column) whose other columns are labels, or a
        mapping ``series_id -> {label: value}``.  Missing values (None, NaN,
        empty text) mean the label is unknown for that series.  Every series of
        the fleet needs a row, also one without labels: the rows are the fleet
        that shares are taken of.  Values are compared as text.

    Returns
    -------
    FleetLabels

    Raises
    ------
    ConfigError
        Not a DataFrame or mapping, no series, duplicate or empty series ids.
    """
    if isinstance(labels, FleetLabels):
        return labels
    if isinstance(labels, pd.DataFrame):
        frame = labels
        if "series_id" in frame.columns:
            frame = frame.set_index("series_id")
        ids = [_label_text(s) for s in frame.index]
        names = [str(c) for c in frame.columns]
        columns = [[_label_text(v) for v in frame[c].tolist()] for c in frame.columns]
        rows = {}
        for i, sid in enumerate(ids):
            if sid is None:
                raise ConfigError(
                    f"labels row {i} has no series id; give every row the id of its series"
                )
            if sid in rows:
                raise ConfigError(f"labels has two rows for series {sid!r}; keep one per series")
            rows[sid] = {n: col[i] for n, col in zip(names, columns, strict=True)}
    elif isinstance(labels, Mapping):
        rows = {}
        for sid, row in labels.items():
            if _label_text(sid) is None:
                raise ConfigError("labels has an empty series id; give every row its series id")
            if not isinstance(row, Mapping):
                raise ConfigError(
                    f"labels of series {sid!r} is a {type(row).__name__}, not a mapping "
                    "label -> value; give {} for a series without labels"
                )
            rows[str(sid)] = {str(n): _label_text(v) for n, v in row.items()}
        names = sorted({n for row in rows.values() for n in row})
    else:
        raise ConfigError(
            f"labels must be a DataFrame or a mapping series_id -> {{label: value}}, "
            f"got {type(labels).__name__}"
        )
    if not rows:
        raise ConfigError("labels has no series; give one row per series of the fleet")
    series_ids = tuple(sorted(rows))
    names = sorted(names)
    values = tuple(tuple(rows[s].get(n) for s in series_ids) for n in names)
    counts = tuple(
        tuple(sorted(Counter(v for v in col if v is not None).items())) for col in values
    )
    known = tuple(sum(v is not None for v in col) for col in values)
    index = {s: i for i, s in enumerate(series_ids)}  # a dict: it travels between processes
    return FleetLabels(series_ids, tuple(names), values, counts, known, index)


@dataclass(frozen=True, slots=True, eq=False)
class _Rows:
    """The usable event rows as arrays (one entry per event)."""

    series: np.ndarray  # object
    times: np.ndarray  # object: event_time text
    ts: np.ndarray  # int64 ns UTC
    types: np.ndarray  # object
    effect: np.ndarray
    effect_pct: np.ndarray  # NaN where none
    t_stat: np.ndarray
    status: np.ndarray  # object
    n_events: int
    n_retracted: int
    n_untimed: int


def _check_events(events: pd.DataFrame) -> _Rows:
    """Validate the event rows once and keep those that can be members.

    Raises ConfigError naming the column or the first offending rows.
    """
    if not isinstance(events, pd.DataFrame):
        raise ConfigError(
            f"events must be a pandas DataFrame of series_events rows, got {type(events).__name__}"
        )
    missing = [c for c in REQUIRED_COLUMNS if c not in events.columns]
    if missing:
        raise ConfigError(
            f"events lacks the column(s) {', '.join(missing)}; it needs "
            f"{', '.join(REQUIRED_COLUMNS)} (the series_events columns, as "
            "changekind.tasks.persist.read_events(..., include_retracted=True) returns them)"
        )
    n = len(events)
    series = np.array([_label_text(s) for s in events["series_id"].tolist()], dtype=object)
    times = np.array([_label_text(t) for t in events["event_time"].tolist()], dtype=object)
    bad = np.array([s is None for s in series], dtype=bool) | np.array(
        [t is None for t in times], dtype=bool
    )
    if bad.any():
        raise ConfigError(
            f"events has {int(bad.sum())} row(s) without a series_id or event_time "
            f"(first: row {int(np.flatnonzero(bad)[0])}); every event needs both"
        )
    keys = pd.MultiIndex.from_arrays([series, times])
    dup = keys.duplicated()
    if dup.any():
        raise ConfigError(
            f"events has the same (series_id, event_time) more than once: "
            f"{_first_rows(dup, series, times)}; give each event once, as series_events keeps it"
        )
    # event_ts: date-times in UTC; NaT where the event time is not a date-time.
    try:
        stamps = pd.to_datetime(events["event_ts"], utc=True)
    except (ValueError, TypeError, OverflowError) as exc:
        raise ConfigError(
            f"events column event_ts must hold date-times (UTC, NaT where none): {exc}"
        ) from None
    untimed = np.asarray(stamps.isna(), dtype=bool)
    ts = np.asarray(stamps.dt.tz_convert("UTC").astype("datetime64[ns, UTC]").array.asi8)
    types = _one_of(events, "event_type", REPORTED_TYPES, series, times)
    status = _one_of(events, "status", EVENT_STATUSES, series, times)
    numbers = {}
    for name in ("effect", "effect_pct", "t_stat"):
        try:
            numbers[name] = np.array(
                pd.to_numeric(events[name], errors="raise").to_numpy(dtype=float, na_value=np.nan)
            )
        except (ValueError, TypeError) as exc:
            raise ConfigError(f"events column {name} must hold numbers: {exc}") from None
    for name in ("effect", "t_stat"):
        wrong = ~np.isfinite(numbers[name])
        if wrong.any():
            raise ConfigError(
                f"events has a missing or infinite {name} at {_first_rows(wrong, series, times)}; "
                "every event needs a finite number there"
            )
    numbers["effect_pct"][~np.isfinite(numbers["effect_pct"])] = np.nan
    retracted = status == "retracted"
    keep = ~retracted & ~untimed
    return _Rows(
        series=series[keep],
        times=times[keep],
        ts=ts[keep],
        types=types[keep],
        effect=numbers["effect"][keep],
        effect_pct=numbers["effect_pct"][keep],
        t_stat=numbers["t_stat"][keep],
        status=status[keep],
        n_events=n,
        n_retracted=int(retracted.sum()),
        n_untimed=int((untimed & ~retracted).sum()),
    )


def _one_of(
    events: pd.DataFrame, name: str, allowed: Sequence[str], series: np.ndarray, times: np.ndarray
) -> np.ndarray:
    """Column ``name`` as text, every value one of ``allowed``."""
    values = np.array([str(v) for v in events[name].tolist()], dtype=object)
    wrong = ~np.isin(values, allowed)
    if wrong.any():
        raise ConfigError(
            f"events has unknown {name} value(s) {sorted(set(values[wrong]))} at "
            f"{_first_rows(wrong, series, times)}; use one of {', '.join(allowed)}"
        )
    return values


def _step_ns(
    step_seconds: float | pd.Timedelta | Mapping[str, float | pd.Timedelta], series: np.ndarray
) -> tuple[np.ndarray, float]:
    """Each event's sampling interval in ns, and the largest interval given (ns)."""

    def one(value: Any, what: str) -> float:
        seconds = value.total_seconds() if isinstance(value, pd.Timedelta) else value
        try:
            seconds = float(seconds)
        except (TypeError, ValueError):
            seconds = math.nan
        if not (math.isfinite(seconds) and seconds > 0):
            raise ConfigError(
                f"{what} is {value!r}; give the sampling interval in seconds, a positive number"
            )
        return seconds * 1e9

    if isinstance(step_seconds, Mapping):
        steps = {str(k): one(v, f"step_seconds of series {k!r}") for k, v in step_seconds.items()}
        absent = sorted(set(series.tolist()) - set(steps))
        if absent:
            more = f" and {len(absent) - 3} more" if len(absent) > 3 else ""
            raise ConfigError(
                f"step_seconds has no sampling interval for series "
                f"{', '.join(map(repr, absent[:3]))}{more}, which have events; give every "
                "series' interval (the step of its stored model)"
            )
        out = np.array([steps[s] for s in series.tolist()], dtype=float)
        return out, max(steps.values(), default=0.0)
    step = one(step_seconds, "step_seconds")
    return np.full(series.size, step), step


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
          ``BACKGROUND_BINS`` bins of ``t +- B`` that lie in ``observed``, per
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
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    from scipy.special import gammainc

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


def _check_alpha(alpha: Any, what: str = "alpha", *, one: bool = False) -> None:
    top = 1.0 if one else math.nextafter(1.0, 0.0)
    if isinstance(alpha, bool) or not (isinstance(alpha, int | float) and 0 < alpha <= top):
        raise ConfigError(f"{what} is {alpha!r}; give a probability between 0 and 1, e.g. 0.01")


def _check_span(span: Any, what: str) -> Span:
    try:
        start, end = span
        out = (_utc_stamp(start), _utc_stamp(end))
    except (TypeError, ValueError) as exc:
        raise ConfigError(
            f"{what} must be a pair (start, end) of date-times, got {span!r} ({exc})"
        ) from None
    if out[1] < out[0]:
        raise ConfigError(f"{what} ends ({out[1]}) before it starts ({out[0]}); swap them")
    return out


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


# --------------------------------------------------------------------------- shared attributes


def label_shares(
    members: Sequence[str],
    labels: FleetLabels | pd.DataFrame | Mapping[str, Mapping[str, Any]],
    *,
    alpha: float = SHARED_ALPHA,
) -> tuple[LabelShare, ...]:
    """The label values the members carry more often than the fleet does.

    Parameters
    ----------
    members : sequence of str
        Series ids of an incident's members (each once).
    labels : FleetLabels, pandas.DataFrame or mapping
        The fleet and its labels (see :func:`fleet_labels`).
    alpha : float, default=0.01
        Family-wise level: a value is shared when its Holm-adjusted p-value is
        at most ``alpha`` (and :data:`MIN_MEMBER_SHARE` of the members carry it).

    Returns
    -------
    tuple of LabelShare
        Every value tested, most significant first (adjusted p, then p, then
        more carriers, then label and value).

    Notes
    -----
    1. For each label, the members whose value is known (``n``) and the fleet's
       series whose value is known (``N``).
    2. Each value carried by at least :data:`MIN_CARRIERS` members (``k``, of
       ``K`` in the fleet) is tested: ``p = P(X >= k)``, ``X`` hypergeometric
       (population ``N``, ``K`` carriers, ``n`` draws), the chance of at least
       ``k`` carriers among ``n`` series drawn from the fleet at random.
    3. Holm's step-down adjustment over the ``m`` values tested: the ``i``-th
       smallest p (from 1) is multiplied by ``m - i + 1``, then made
       non-decreasing, capped at 1.
    4. Shared: adjusted p at most ``alpha`` and ``k >= MIN_MEMBER_SHARE * n``.

    References
    ----------
    Holm, S. (1979). Scandinavian Journal of Statistics 6, 65-70.
    """
    from scipy.stats import hypergeom  # scipy.stats is not imported with the engine

    _check_alpha(alpha)
    fleet = fleet_labels(labels)
    pos = fleet.index
    ids = list(dict.fromkeys(str(m) for m in members))
    if len(ids) != len(members):
        raise ConfigError("members lists a series more than once; give each series once")
    absent = [s for s in ids if s not in pos]
    if absent:
        raise ConfigError(
            f"labels has no row for member series {', '.join(map(repr, absent[:3]))}; "
            "give every series of the fleet a row"
        )
    rows = [pos[s] for s in ids]
    tested: list[tuple[str, str, int, int, int, int]] = []
    for j, name in enumerate(fleet.names):
        # Step 1
        column = fleet.values[j]
        carried = Counter(v for v in (column[r] for r in rows) if v is not None)
        n = sum(carried.values())
        fleet_counts = dict(fleet.counts[j])
        # Step 2
        for value, k in carried.items():
            if k >= MIN_CARRIERS:
                tested.append((name, value, k, n, fleet_counts[value], fleet.known[j]))
    if not tested:
        return ()
    k_, n_, K_, N_ = (np.array([t[i] for t in tested], dtype=np.int64) for i in (2, 3, 4, 5))
    p = np.clip(hypergeom.sf(k_ - 1, N_, K_, n_), 0.0, 1.0)
    # Step 3
    m = p.size
    order = np.argsort(p, kind="stable")
    stepped = np.minimum(1.0, np.maximum.accumulate(p[order] * (m - np.arange(m))))
    adjusted = np.empty(m)
    adjusted[order] = stepped
    # Step 4
    shares = [
        LabelShare(
            label=name,
            value=value,
            members_with=k,
            members_known=n,
            fleet_with=K,
            fleet_known=N,
            p_value=round_sig(float(p[i])),
            p_adjusted=round_sig(float(adjusted[i])),
            shared=bool(adjusted[i] <= alpha and k >= MIN_MEMBER_SHARE * n),
        )
        for i, (name, value, k, n, K, N) in enumerate(tested)
    ]
    shares.sort(key=lambda s: (s.p_adjusted, s.p_value, -s.members_with, s.label, s.value))
    return tuple(shares)


# --------------------------------------------------------------------------- reconciling


def reconcile_incidents(
    stored: Sequence[Incident],
    computed: Sequence[Incident] | IncidentSet,
    *,
    span: tuple[Any, Any] | None = None,
) -> IncidentChanges:
    """Which incidents a recomputation adds, grows, shrinks, changes or removes.

    Parameters
    ----------
    stored : sequence of Incident
        The incidents currently stored (read back, e.g. with
        :meth:`Incident.from_record`) for the span recomputed.
    computed : sequence of Incident or IncidentSet
        The incidents computed now from every event of that span.
    span : (start, end), optional
        Only incidents that overlap it, and those linked to them by id or a
        shared member, are compared; others are left alone.  None compares all.

    Returns
    -------
    IncidentChanges
        One change per computed incident in scope (``new``, ``grown``,
        ``shrunk``, ``changed`` or ``unchanged``) and one ``gone`` per stored
        incident in scope whose id is not computed any more.

    Notes
    -----
    1. Scope: incidents overlapping ``span``, closed under "same id" and
       "shares a member" between stored and computed.
    2. Predecessors of a computed incident: stored incidents with its id or
       sharing a member.  Each stored incident has one heir: the computed
       incident with its id, else the one that took most of its members (then
       the smaller id).
    3. ``added`` = members in no predecessor; ``removed`` = members of the
       stored incidents it is heir to that are in no computed incident.
    4. Kind: ``new`` without predecessors; else ``grown`` when members were
       added (even if others left), ``shrunk`` when members were removed,
       ``changed`` when anything else differs from the stored incident of the
       same id (or there is none), else ``unchanged``.  Numbers that agree to
       1e-9 relative are the same.
    5. Stored incidents in scope whose id is not computed are ``gone``, with
       the computed ids that took their members as ``superseded_by``.
    """
    if isinstance(computed, IncidentSet):
        computed = computed.incidents
    for what, items in (("stored", stored), ("computed", computed)):
        for inc in items:
            if not isinstance(inc, Incident):
                raise ConfigError(f"{what} must hold Incident values, got {type(inc).__name__}")
    old = _unique(stored, "stored")
    new = _unique(computed, "computed")
    # Step 1
    old_of_member = {k: i for i, inc in old.items() for k in inc.member_keys}
    new_of_member = {k: i for i, inc in new.items() for k in inc.member_keys}
    if span is None:
        old_in, new_in = set(old), set(new)
    else:
        lo, hi = _check_span(span, "span")
        old_in = {i for i, inc in old.items() if inc.start <= hi and inc.end >= lo}
        new_in = {i for i, inc in new.items() if inc.start <= hi and inc.end >= lo}
        while True:
            more_new = {i for i in old_in if i in new} | {
                new_of_member[k] for i in old_in for k in old[i].member_keys if k in new_of_member
            }
            more_old = {i for i in new_in if i in old} | {
                old_of_member[k] for i in new_in for k in new[i].member_keys if k in old_of_member
            }
            if more_new <= new_in and more_old <= old_in:
                break
            new_in |= more_new
            old_in |= more_old
    # Step 2
    preds: dict[str, set[str]] = {i: ({i} & old_in) for i in new_in}
    for k, i in new_of_member.items():
        if i in new_in and k in old_of_member and old_of_member[k] in old_in:
            preds[i].add(old_of_member[k])
    heir: dict[str, str] = {}
    for o in old_in:
        if o in new_in:
            heir[o] = o
            continue
        took = Counter(new_of_member[k] for k in old[o].member_keys if k in new_of_member)
        if took:
            heir[o] = min(took, key=lambda i: (-took[i], i))
    changes: list[IncidentChange] = []
    for i in new_in:
        inc = new[i]
        before = set().union(*(old[o].member_keys for o in preds[i])) if preds[i] else set()
        # Step 3
        added = inc.member_keys - before
        removed = {
            k
            for o in old_in
            if heir.get(o) == i
            for k in old[o].member_keys
            if k not in new_of_member
        }
        # Step 4
        previous = old.get(i) if i in old_in else None
        if not preds[i]:
            kind: ChangeKind = "new"
        elif added:
            kind = "grown"
        elif removed:
            kind = "shrunk"
        elif previous is None or not _same(previous.to_record(), inc.to_record()):
            kind = "changed"
        else:
            kind = "unchanged"
        changes.append(
            IncidentChange(
                kind=kind,
                incident_id=i,
                incident=inc,
                previous=previous,
                added=tuple(sorted(added)),
                removed=tuple(sorted(removed)),
                supersedes=tuple(sorted(preds[i] - {i})),
            )
        )
    # Step 5
    for o in old_in - new_in:
        went = {new_of_member[k] for k in old[o].member_keys if k in new_of_member}
        changes.append(
            IncidentChange(
                kind="gone",
                incident_id=o,
                incident=None,
                previous=old[o],
                removed=tuple(sorted(k for k in old[o].member_keys if k not in new_of_member)),
                superseded_by=tuple(sorted(went)),
            )
        )
    rank = {k: r for r, k in enumerate(CHANGE_KINDS)}
    changes.sort(key=lambda c: (rank[c.kind], c.incident_id))
    return IncidentChanges(tuple(changes))


def _unique(items: Sequence[Incident], what: str) -> dict[str, Incident]:
    out: dict[str, Incident] = {}
    for inc in items:
        if inc.incident_id in out:
            raise ConfigError(
                f"{what} incidents list {inc.incident_id!r} twice; give each incident once"
            )
        out[inc.incident_id] = inc
    return out


def _same(a: Any, b: Any) -> bool:
    """Equal records, floats compared to 1e-9 relative (reruns differ in the last bits)."""
    if isinstance(a, float) and isinstance(b, float):
        if math.isnan(a) or math.isnan(b):
            return math.isnan(a) and math.isnan(b)
        return math.isclose(a, b, rel_tol=_REL_TOL, abs_tol=0.0)
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list | tuple) and isinstance(b, list | tuple):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    return a == b


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
