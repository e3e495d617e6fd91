"""The values of fleet incidents: the constants of the grouping rule (each with the
measurement that chose it), members, incidents, their changes and the fleet's
labels; and the incident identity rule (:func:`incident_identity`).
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError
from changekind.tasks.timeaxis import parse_instant
from changekind.tasks.types import round_sig

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
the bins left out; tests/tasks/incidents/test_incidents.py)."""

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
    """A UTC Timestamp (timeaxis' rule: a naive time is UTC, text is ISO 8601)."""
    stamp = parse_instant(value)
    if not isinstance(stamp, pd.Timestamp):
        raise ValueError(f"{value!r} is not a date-time")
    return stamp


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


def label_text(value: Any) -> str | None:
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
