"""Reconciling new incidents with stored ones: new, grown, shrunk, changed,
unchanged and gone, with the ids a new anchor supersedes.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

from changekind.tasks.errors import ConfigError
from changekind.tasks.incidents.values import (
    _REL_TOL,
    CHANGE_KINDS,
    ChangeKind,
    Incident,
    IncidentChange,
    IncidentChanges,
    IncidentSet,
    _check_span,
)

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
