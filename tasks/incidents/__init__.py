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
out rather than counted as empty, and so are the bins that overlap the event's
own reach, where its neighbours are counted: the burst under test is not its
own background).  Core events that
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

Modules
-------
``values`` (constants, incidents and their changes, the identity rule),
``inputs`` (the events and labels, checked), ``grouping``, ``labels`` (shared
attributes), ``reconcile`` and ``update`` (the protocol after a run).
"""

from __future__ import annotations

from changekind.tasks.incidents.grouping import group_incidents, span_to_load
from changekind.tasks.incidents.inputs import fleet_labels
from changekind.tasks.incidents.labels import label_shares
from changekind.tasks.incidents.reconcile import reconcile_incidents
from changekind.tasks.incidents.update import IncidentUpdate, update_incidents
from changekind.tasks.incidents.values import (
    BACKGROUND_BINS,
    BACKGROUND_SAMPLES,
    CHANGE_KINDS,
    CORE_ALPHA,
    EVENT_STATUSES,
    MIN_BACKGROUND_BINS,
    MIN_CARRIERS,
    MIN_MEMBER_SHARE,
    MIN_SERIES,
    QUANTITY,
    REQUIRED_COLUMNS,
    SHARED_ALPHA,
    TIME_TOLERANCE,
    FleetLabels,
    GroupingRule,
    Incident,
    IncidentChange,
    IncidentChanges,
    IncidentMember,
    IncidentSet,
    LabelShare,
    incident_identity,
)

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
