"""Fleet incidents in the database: reading them back, and the update after a run.

``incidents`` holds one row per incident (the summary of
:class:`~changekind.tasks.incidents.Incident`), ``incident_members`` its
member events, ``incident_labels`` every label value tested with its
hypergeometric tail and Holm-adjusted p-value (``shared`` marks the shared
ones), ``incident_revisions`` every change an update made (new, grown,
shrunk, changed, gone, with the members added or removed and the ids
superseded); the tables are in :mod:`changekind.tasks.persist.schema`.
:func:`refresh_incidents` is the update after a run: it finds
what the runs changed since the last update from ``event_revisions`` (every
revision with a larger id than the last one processed, kept in
``incident_sync``) and from the growth of the observed record, recomputes the
incidents that those changes can act on
(:func:`changekind.tasks.incidents.update_incidents`) and writes the
differences in one transaction, with the new position in ``event_revisions``.
So a run killed after its event writes leaves its changes to the next
update, a rerun that changes no event writes nothing, and overlapping
backfills end with the incidents that one backfill of the union gives.

An incident is *open* while it can still change on its own: a member is
provisional, or its end lies within the grouping margin of the newest
observed time (later scans may add members); otherwise it is *settled*.

Top to bottom: reading stored incidents; the values an update returns; what
an update reads (sampling intervals, the observed record, events); writing
one incident; :func:`refresh_incidents`.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from changekind.tasks.incidents import (
    REQUIRED_COLUMNS,
    GroupingRule,
    Incident,
    IncidentChange,
    IncidentMember,
    LabelShare,
    update_incidents,
)
from changekind.tasks.persist.convert import _as_datetime, _chunks, _now, _upsert
from changekind.tasks.persist.engines import _engine
from changekind.tasks.persist.labels import read_fleet_labels, read_labels
from changekind.tasks.persist.schema import (
    INCIDENT_CHANGES,
    Database,
    event_revisions,
    incident_labels,
    incident_members,
    incident_revisions,
    incident_sync,
    incidents,
    series_events,
    series_models,
)
from changekind.tasks.types import REPORTED_TYPES

__all__ = [
    "ConfirmedEvent",
    "IncidentRefresh",
    "incident_states",
    "read_incidents",
    "refresh_incidents",
]

_SYNC_NAME = "fleet"
"""The one row of ``incident_sync``."""


# --------------------------------------------------------------------------- incidents: read


def _incident_rows(conn: sa.Connection, condition: Any) -> list[Incident]:
    heads = [dict(r) for r in conn.execute(sa.select(incidents).where(condition)).mappings()]
    if not heads:
        return []
    ids = [h["incident_id"] for h in heads]
    members: dict[str, list[dict[str, Any]]] = {}
    shares: dict[str, list[dict[str, Any]]] = {}
    for chunk in _chunks(ids):
        for r in conn.execute(
            sa.select(incident_members).where(incident_members.c.incident_id.in_(chunk))
        ).mappings():
            members.setdefault(r["incident_id"], []).append(dict(r))
        for r in conn.execute(
            sa.select(incident_labels).where(incident_labels.c.incident_id.in_(chunk))
        ).mappings():
            shares.setdefault(r["incident_id"], []).append(dict(r))
    out = []
    for h in heads:
        iid = h["incident_id"]
        mem = sorted(
            (
                IncidentMember(
                    series_id=m["series_id"],
                    event_time=m["event_time"],
                    event_ts=pd.Timestamp(m["event_ts"]).tz_convert("UTC"),
                    event_type=m["event_type"],
                    effect=float(m["effect"]),
                    effect_pct=None if m["effect_pct"] is None else float(m["effect_pct"]),
                    t_stat=float(m["t_stat"]),
                    status=m["status"],
                )
                for m in members.get(iid, [])
            ),
            key=lambda m: (m.event_ts, m.series_id, m.event_time),
        )
        labs = sorted(
            (
                LabelShare(
                    label=s["label"],
                    value=s["value"],
                    members_with=int(s["members_with"]),
                    members_known=int(s["members_known"]),
                    fleet_with=int(s["fleet_with"]),
                    fleet_known=int(s["fleet_known"]),
                    p_value=float(s["p_value"]),
                    p_adjusted=float(s["p_adjusted"]),
                    shared=bool(s["shared"]),
                )
                for s in shares.get(iid, [])
            ),
            key=lambda s: (s.p_adjusted, s.p_value, -s.members_with, s.label, s.value),
        )
        counts = json.loads(h["type_counts"])
        out.append(
            Incident(
                incident_id=iid,
                quantity=h["quantity"],
                direction=h["direction"],
                start=pd.Timestamp(h["start_ts"]).tz_convert("UTC"),
                end=pd.Timestamp(h["end_ts"]).tz_convert("UTC"),
                members=tuple(mem),
                n_series=int(h["n_series"]),
                fleet_size=int(h["fleet_size"]),
                share_of_fleet=float(h["share_of_fleet"]),
                dominant_type=h["dominant_type"],
                type_counts=tuple((t, int(counts[t])) for t in REPORTED_TYPES if t in counts),
                median_effect_pct=None
                if h["median_effect_pct"] is None
                else float(h["median_effect_pct"]),
                n_provisional=int(h["n_provisional"]),
                labels=tuple(labs),
            )
        )
    return out


def read_incidents(
    db: Database,
    *,
    since: datetime | str | None = None,
    open_only: bool = False,
) -> list[Incident]:
    """Stored incidents, newest first (by start, then id, descending).

    ``since``: only incidents that end at or after this time (naive = UTC).
    ``open_only``: only incidents in state ``open``.
    """
    conditions = [sa.true()]
    since_ts = _as_datetime(since, "since")
    if since_ts is not None:
        conditions.append(incidents.c.end_ts >= since_ts)
    if open_only:
        conditions.append(incidents.c.state == "open")
    with _engine(db) as engine, engine.connect() as conn:
        found = _incident_rows(conn, sa.and_(*conditions))
    found.sort(key=lambda i: (i.start, i.incident_id), reverse=True)
    return found


def incident_states(db: Database) -> dict[str, str]:
    """``incident_id -> state`` of every stored incident."""
    with _engine(db) as engine, engine.connect() as conn:
        return dict(conn.execute(sa.select(incidents.c.incident_id, incidents.c.state)).all())


# --------------------------------------------------------------------------- incidents: update


@dataclass(frozen=True, slots=True)
class ConfirmedEvent:
    """An event that became confirmed since the last update (for notifications)."""

    series_id: str
    event_time: str
    event_type: str
    effect: float
    effect_pct: float | None
    t_stat: float
    labels: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True, slots=True)
class IncidentRefresh:
    """What one :func:`refresh_incidents` did.

    ``changes`` are the written changes (no ``unchanged``); ``confirmed`` the
    events newly confirmed since the last update; ``span`` the span
    recomputed (None when nothing had changed); ``n_revisions`` the event
    revisions taken into account; ``n_settled`` incidents that became
    settled; ``seconds`` the time taken.
    """

    changes: tuple[IncidentChange, ...] = ()
    confirmed: tuple[ConfirmedEvent, ...] = ()
    span: tuple[pd.Timestamp, pd.Timestamp] | None = None
    n_revisions: int = 0
    n_settled: int = 0
    reads: int = 0
    seconds: float = 0.0

    def counts(self) -> dict[str, int]:
        return {k: sum(c.kind == k for c in self.changes) for k in INCIDENT_CHANGES}

    @property
    def to_notify(self) -> tuple[IncidentChange, ...]:
        return tuple(c for c in self.changes if c.notify)


def _steps(conn: sa.Connection) -> dict[str, float]:
    """Each series' sampling interval in seconds (the window for windowed models)."""
    out: dict[str, float] = {}
    for sid, text in conn.execute(sa.select(series_models.c.series_id, series_models.c.model_json)):
        try:
            data = json.loads(text)
        except (TypeError, ValueError):
            continue
        step = None
        if data.get("window"):
            try:
                step = pd.Timedelta(data["window"]).total_seconds()
            except (TypeError, ValueError):
                step = None
        if step is None:
            step = data.get("step_seconds")
        if isinstance(step, int | float) and math.isfinite(step) and step > 0:
            out[sid] = float(step)
    return out


def _observed(conn: sa.Connection) -> tuple[pd.Timestamp, pd.Timestamp] | None:
    """The span the event record covers: first analysed time (or event) to the newest watermark."""
    rows = conn.execute(sa.select(series_models.c.analysed_from, series_models.c.watermark)).all()

    def parsed(texts: set[Any]) -> pd.Series:  # each distinct text once (most are equal)
        values = pd.Series(sorted(t for t in texts if t is not None), dtype=object)
        return pd.to_datetime(values, utc=True, errors="coerce", format="ISO8601")

    starts = parsed({r[0] for r in rows})
    ends = parsed({r[1] for r in rows})
    if ends.notna().sum() == 0:
        return None
    first_event = conn.execute(sa.select(sa.func.min(series_events.c.event_ts))).scalar()
    candidates = [t for t in (starts.min(), first_event) if t is not None and not pd.isna(t)]
    end = pd.Timestamp(ends.max())
    start = min((pd.Timestamp(t) for t in candidates), default=end)
    start = start.tz_convert("UTC") if start.tzinfo else start.tz_localize("UTC")
    return (min(start, end), end)


def _read_events(conn: sa.Connection, span: tuple[pd.Timestamp, pd.Timestamp]) -> pd.DataFrame:
    table = series_events
    query = sa.select(*(table.c[n] for n in REQUIRED_COLUMNS)).where(
        table.c.event_ts >= span[0].to_pydatetime(), table.c.event_ts <= span[1].to_pydatetime()
    )
    rows = [dict(r) for r in conn.execute(query).mappings()]
    frame = pd.DataFrame(rows, columns=list(REQUIRED_COLUMNS))
    frame["event_ts"] = pd.to_datetime(frame["event_ts"], utc=True)
    return frame


def _drop_incident(conn: sa.Connection, iid: str) -> None:
    """Delete one incident's rows (members, label shares, summary)."""
    conn.execute(sa.delete(incident_members).where(incident_members.c.incident_id == iid))
    conn.execute(sa.delete(incident_labels).where(incident_labels.c.incident_id == iid))
    conn.execute(sa.delete(incidents).where(incidents.c.incident_id == iid))


def _write_incident(
    conn: sa.Connection,
    inc: Incident,
    *,
    state: str,
    run_id: str,
    when: datetime,
    first: tuple[str, datetime] | None,
) -> None:
    """Replace one incident's rows (summary, members, label shares)."""
    iid = inc.incident_id
    _drop_incident(conn, iid)
    first_run, first_seen = first if first is not None else (run_id, when)
    conn.execute(
        sa.insert(incidents),
        [
            {
                "incident_id": iid,
                "quantity": inc.quantity,
                "direction": inc.direction,
                "start_ts": inc.start.to_pydatetime(),
                "end_ts": inc.end.to_pydatetime(),
                "n_series": inc.n_series,
                "fleet_size": inc.fleet_size,
                "share_of_fleet": inc.share_of_fleet,
                "dominant_type": inc.dominant_type,
                "type_counts": json.dumps(dict(inc.type_counts), separators=(",", ":")),
                "median_effect_pct": inc.median_effect_pct,
                "n_provisional": inc.n_provisional,
                "shared_labels": json.dumps(inc.shared_labels, sort_keys=True),
                "state": state,
                "first_run_id": first_run,
                "last_run_id": run_id,
                "first_seen": first_seen,
                "last_seen": when,
            }
        ],
    )
    conn.execute(
        sa.insert(incident_members),
        [
            {
                "incident_id": iid,
                "series_id": m.series_id,
                "event_time": m.event_time,
                "event_ts": m.event_ts.to_pydatetime(),
                "event_type": m.event_type,
                "effect": m.effect,
                "effect_pct": m.effect_pct,
                "t_stat": m.t_stat,
                "status": m.status,
            }
            for m in inc.members
        ],
    )
    if inc.labels:
        conn.execute(
            sa.insert(incident_labels),
            [
                {
                    "incident_id": iid,
                    "label": s.label,
                    "value": s.value,
                    "members_with": s.members_with,
                    "members_known": s.members_known,
                    "fleet_with": s.fleet_with,
                    "fleet_known": s.fleet_known,
                    "p_value": s.p_value,
                    "p_adjusted": s.p_adjusted,
                    "shared": s.shared,
                }
                for s in inc.labels
            ],
        )


def _state(inc: Incident, observed_end: pd.Timestamp, margin: pd.Timedelta) -> str:
    return "open" if inc.n_provisional > 0 or inc.end >= observed_end - margin else "settled"


def _keys_json(keys: Sequence[tuple[str, str]]) -> str:
    return json.dumps([list(k) for k in keys], separators=(",", ":"))


def refresh_incidents(
    db: Database,
    run_id: str,
    *,
    rule: GroupingRule | None = None,
    at: datetime | None = None,
) -> IncidentRefresh:
    """Bring the stored incidents up to date with the stored events.

    Parameters
    ----------
    db : Engine or str
        The database (see :mod:`changekind.tasks.persist`).
    run_id : str
        The run recorded as the writer of the changes.
    rule : GroupingRule, optional
        The grouping's knobs (default ``GroupingRule()``).
    at : datetime, optional
        Time recorded with the changes (default now, UTC).

    Returns
    -------
    IncidentRefresh

    Notes
    -----
    1. Read the sync row: the last event revision taken into account and the
       observed record of the last update.
    2. The event revisions since: their events' times, and the events newly
       confirmed (for notifications).  The observed record now (from the
       models' analysed spans and watermarks).  Nothing new and the same
       record: nothing to do.
    3. ``changed``: the span of those events joined with the newly observed
       span; recompute and reconcile
       (:func:`~changekind.tasks.incidents.update_incidents`) with the fleet's
       labels and each series' sampling interval.
    4. Write every change (replace or delete the incident's rows, one revision
       row each), settle incidents that can no longer change on their own,
       and move the sync row, all in one transaction.
    """
    t0 = time.perf_counter()
    rule = GroupingRule() if rule is None else rule
    when = _now(at)
    ev, rev = series_events, event_revisions
    with _engine(db) as engine, engine.begin() as conn:
        # Step 1
        sync = (
            conn.execute(sa.select(incident_sync).where(incident_sync.c.name == _SYNC_NAME))
            .mappings()
            .first()
        )
        last_rev = 0 if sync is None else int(sync["revision_id"])
        before_end = (
            None
            if sync is None or sync["observed_end"] is None
            else pd.Timestamp(sync["observed_end"])
        )
        # Step 2
        newest_rev = conn.execute(sa.select(sa.func.max(rev.c.revision_id))).scalar() or 0
        revised = conn.execute(
            sa.select(
                rev.c.series_id,
                rev.c.event_time,
                rev.c.old_status,
                rev.c.new_status,
                ev.c.event_ts,
                ev.c.event_type,
                ev.c.effect,
                ev.c.effect_pct,
                ev.c.t_stat,
                ev.c.status,
            )
            .join(
                ev, sa.and_(ev.c.series_id == rev.c.series_id, ev.c.event_time == rev.c.event_time)
            )
            .where(rev.c.revision_id > last_rev, rev.c.revision_id <= newest_rev)
            .order_by(rev.c.revision_id)
        ).all()
        observed = _observed(conn)
        times = [pd.Timestamp(r.event_ts) for r in revised if r.event_ts is not None]
        confirmed: dict[tuple[str, str], Any] = {}
        for r in revised:
            newly = r.new_status == "confirmed" and r.old_status != "confirmed"
            if newly and r.status == "confirmed":
                confirmed[(r.series_id, r.event_time)] = r
        grew = observed is not None and (before_end is None or observed[1] > before_end)
        labels_now: dict[str, dict[str, str | None]] = {}
        if confirmed:
            labels_now = read_labels(conn, sorted({k[0] for k in confirmed}))
        confirmed_events = tuple(
            ConfirmedEvent(
                series_id=r.series_id,
                event_time=r.event_time,
                event_type=r.event_type,
                effect=float(r.effect),
                effect_pct=None if r.effect_pct is None else float(r.effect_pct),
                t_stat=float(r.t_stat),
                labels=tuple(
                    (k, v) for k, v in sorted(labels_now.get(r.series_id, {}).items()) if v
                ),
            )
            for r in confirmed.values()
        )

        def move_sync(n_settled: int = 0) -> None:
            _upsert(
                conn,
                incident_sync,
                [
                    {
                        "name": _SYNC_NAME,
                        "revision_id": newest_rev,
                        "observed_start": None if observed is None else observed[0].to_pydatetime(),
                        "observed_end": None if observed is None else observed[1].to_pydatetime(),
                    }
                ],
                keys=("name",),
                update=("revision_id", "observed_start", "observed_end"),
            )

        if observed is None or (not times and not grew):
            if newest_rev != last_rev:
                move_sync()
            return IncidentRefresh(
                confirmed=confirmed_events,
                n_revisions=len(revised),
                seconds=time.perf_counter() - t0,
            )
        # Step 3
        lo_parts = [*times]
        hi_parts = [*times]
        if grew:
            lo_parts.append(observed[0] if before_end is None else before_end)
            hi_parts.append(observed[1])
        changed = (min(lo_parts), max(hi_parts))
        steps = _steps(conn)
        fleet = read_fleet_labels(conn)
        missing = [s for s in fleet.index if s not in steps]
        if missing:  # a series with events but no model (removed): the fleet's usual step
            fill = float(np.median(list(steps.values()))) if steps else 60.0
            steps.update(dict.fromkeys(missing, fill))

        def stored(span: tuple[pd.Timestamp, pd.Timestamp]) -> list[Incident]:
            return _incident_rows(
                conn,
                sa.and_(
                    incidents.c.start_ts <= span[1].to_pydatetime(),
                    incidents.c.end_ts >= span[0].to_pydatetime(),
                ),
            )

        update = update_incidents(
            changed,
            observed=observed,
            read_events=lambda span: _read_events(conn, span),
            read_incidents=stored,
            labels=fleet,
            step_seconds=steps,
            rule=rule,
        )
        # Step 4
        margin = pd.Timedelta(rule.margin(max(steps.values()) * 1e9), unit="ns")
        firsts = {
            r[0]: (r[1], r[2])
            for r in conn.execute(
                sa.select(incidents.c.incident_id, incidents.c.first_run_id, incidents.c.first_seen)
            )
        }
        revisions = []
        written = update.changes.to_write
        for change in written:
            if change.kind == "gone":
                _drop_incident(conn, change.incident_id)
            else:
                assert change.incident is not None
                inherited = [
                    firsts[i] for i in (change.incident_id, *change.supersedes) if i in firsts
                ]
                _write_incident(
                    conn,
                    change.incident,
                    state=_state(change.incident, observed[1], margin),
                    run_id=run_id,
                    when=when,
                    first=min(inherited, key=lambda f: f[1]) if inherited else None,
                )
            revisions.append(
                {
                    "incident_id": change.incident_id,
                    "run_id": run_id,
                    "change": change.kind,
                    "n_series": None if change.incident is None else change.incident.n_series,
                    "added": _keys_json(change.added),
                    "removed": _keys_json(change.removed),
                    "supersedes": json.dumps(list(change.supersedes)),
                    "superseded_by": json.dumps(list(change.superseded_by)),
                    "changed_at": when,
                }
            )
        if revisions:
            conn.execute(sa.insert(incident_revisions), revisions)
        cut = (observed[1] - margin).to_pydatetime()
        settled = conn.execute(
            sa.update(incidents)
            .where(
                incidents.c.state == "open",
                incidents.c.n_provisional == 0,
                incidents.c.end_ts < cut,
            )
            .values(state="settled")
        ).rowcount
        move_sync()
    return IncidentRefresh(
        changes=written,
        confirmed=confirmed_events,
        span=update.span,
        n_revisions=len(revised),
        n_settled=int(settled or 0),
        reads=update.reads,
        seconds=time.perf_counter() - t0,
    )
