"""The event table and its revision log: idempotent writes, reads and triage."""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, fields
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Connection

from changekind.tasks.errors import (
    ConfigError,
)
from changekind.tasks.persist.convert import (
    _as_datetime,
    _chunks,
    _finite_or_none,
    _now,
    _one_of,
    _parse_timestamp,
    _text,
    _upsert,
)
from changekind.tasks.persist.engines import _engine
from changekind.tasks.persist.schema import (
    _COMPARED,
    _FLOAT_EVENT_COLUMNS,
    _UPDATED_ON_CHANGE,
    EVENT_COLUMNS,
    EVENT_EXTRA_COLUMNS,
    EVENT_STATUSES,
    TRIAGE_STATES,
    Database,
    TriageState,
    event_revisions,
    series_events,
    triage_history,
)
from changekind.tasks.types import REPORTED_TYPES, Event

# --------------------------------------------------------------------------- values


@dataclass(frozen=True, slots=True)
class WriteSummary:
    """What one :func:`write_events` call did.

    ``new`` rows inserted, ``changed`` rows whose classification or numbers
    changed (including a retracted event coming back), ``unchanged`` rows left
    untouched because the stored row was identical, ``retracted`` rows newly set
    to ``retracted``.  Summaries add up: ``sum(parts, WriteSummary())``.
    """

    new: int = 0
    changed: int = 0
    unchanged: int = 0
    retracted: int = 0

    def __add__(self, other: WriteSummary) -> WriteSummary:
        if not isinstance(other, WriteSummary):
            return NotImplemented
        return WriteSummary(
            *(getattr(self, f.name) + getattr(other, f.name) for f in fields(WriteSummary))
        )

    @property
    def revisions(self) -> int:
        """Revision rows written (one per new, changed or retracted event)."""
        return self.new + self.changed + self.retracted


# --------------------------------------------------------------------------- events


def _event_values(event: Event) -> dict[str, Any]:
    """The stored form of an event's contract columns, validated."""
    if not isinstance(event, Event):
        raise ConfigError(f"expected an Event, got {type(event).__name__}")
    where = f"event of series {event.series_id!r} at {event.event_time!r}"
    _text(event.series_id, "series_id")
    _text(event.event_time, f"event_time of series {event.series_id!r}")
    _one_of(event.event_type, REPORTED_TYPES, f"{where}: event_type")
    _one_of(event.status, EVENT_STATUSES[:2], f"{where}: status")
    values: dict[str, Any] = {
        "series_id": event.series_id,
        "event_time": event.event_time,
        "event_ts": _parse_timestamp(event.event_time),
        "event_type": event.event_type,
        "type_weights": json.dumps(
            {str(k): float(v) for k, v in event.type_weights}, separators=(",", ":")
        ),
        "status": event.status,
        "model": str(event.model),
        "window_start": event.window_start,
        "window_end": event.window_end,
    }
    for name in _FLOAT_EVENT_COLUMNS:
        values[name] = _finite_or_none(getattr(event, name))
    for name in ("effect", "t_stat", "se", "level"):
        if values[name] is None:
            raise ConfigError(f"{where}: {name} is missing or NaN; it must be a number")
    return values


def _stored_events(
    conn: Connection, keys: Sequence[tuple[str, str]]
) -> dict[tuple[str, str], dict[str, Any]]:
    """The stored rows for ``keys`` (those that exist), read in chunks of series."""
    wanted = set(keys)
    series = sorted({series_id for series_id, _ in wanted})
    columns = [series_events.c[name] for name in ("series_id", "event_time", *_COMPARED)]
    found: dict[tuple[str, str], dict[str, Any]] = {}
    for chunk in _chunks(series):
        query = sa.select(*columns).where(series_events.c.series_id.in_(chunk))
        for row in conn.execute(query).mappings():
            key = (row["series_id"], row["event_time"])
            if key in wanted:
                found[key] = dict(row)
    return found


def _differs(a: Any, b: Any) -> bool:
    """A real change: floats that agree to 1e-9 relative are the same value.

    The same analysis run twice can differ in the last bits of a float; that
    is not a change of the event and must not log a revision.
    """
    if isinstance(a, float) and isinstance(b, float):
        if math.isnan(a) or math.isnan(b):
            return not (math.isnan(a) and math.isnan(b))
        return not math.isclose(a, b, rel_tol=1e-9, abs_tol=0.0)
    return a != b


LATER_COLUMNS = ("effect_sigma", "duration")
"""Event columns added after the first schemas (migration 0006).  A database
still at an older revision (a migration test writing at 0001-0005) gets the
others; the fleet runs migrate to the head before they write, so there every
column is written."""


def _absent_columns(conn: sa.Connection) -> frozenset[str]:
    """The LATER_COLUMNS the database's ``series_events`` does not have yet."""
    try:
        have = {c["name"] for c in sa.inspect(conn).get_columns("series_events")}
    except sa.exc.NoSuchTableError:
        return frozenset()  # the write itself raises the driver's error
    return frozenset(c for c in LATER_COLUMNS if c not in have)


def write_events(
    db: Database,
    run_id: str,
    events: Sequence[Event],
    *,
    retract: Sequence[tuple[str, str]] = (),
    at: datetime | None = None,
) -> WriteSummary:
    """Upsert a batch of events and retractions; log every change as a revision.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    run_id : str
        The run writing (a Prefect flow-run id when there is one).
    events : sequence of Event
        The current classification of each event; one per (series_id, event_time).
    retract : sequence of (series_id, event_time), default=()
        Stored events that the run no longer finds.  Keys not stored, or already
        retracted, are left alone.
    at : datetime, optional
        The time written to ``first_seen``/``last_seen``/``changed_at``; now (UTC)
        by default.

    Returns
    -------
    WriteSummary

    Raises
    ------
    ConfigError
        An invalid event, a key given twice, or a key both written and retracted.

    Notes
    -----
    1. Read the stored rows of the batch's keys.
    2. Compare each event with its row on the contract's columns (exactly: the
       database keeps doubles bit for bit).  Identical -> the row is left
       untouched entirely, bookkeeping included, so writing the same batch again
       changes nothing.  No row -> ``new``.  Another type -> ``reclassified``;
       any other difference (status, effect, t statistic, model, ...) ->
       ``updated``.  The window and ``last_run_id``/``last_seen`` are rewritten
       only with a change; ``last_seen`` is thus the time of the last change.
    3. Upsert the new and changed rows (triage columns are never in the update).
    4. Set ``status = 'retracted'`` on retracted keys and log those.
    5. Insert one ``event_revisions`` row per new, changed or retracted event.
    All in one transaction.
    """
    run_id = _text(run_id, "run_id")
    when = _now(at)
    rows = [_event_values(event) for event in events]
    keys = [(row["series_id"], row["event_time"]) for row in rows]
    if len(set(keys)) != len(keys):
        dup = next(k for k in keys if keys.count(k) > 1)
        raise ConfigError(
            f"the batch holds series {dup[0]!r} at {dup[1]!r} more than once; give each event once"
        )
    retract_keys = sorted({(_text(s, "series_id"), _text(t, "event_time")) for s, t in retract})
    both = set(keys) & set(retract_keys)
    if both:
        s, t = sorted(both)[0]
        raise ConfigError(
            f"series {s!r} at {t!r} is both written and retracted in one batch; give it once"
        )

    with _engine(db) as engine, engine.begin() as conn:
        absent = _absent_columns(conn)
        if absent:
            rows = [{k: v for k, v in row.items() if k not in absent} for row in rows]
        # Step 1.
        stored = _stored_events(conn, [*keys, *retract_keys])
        # Step 2.
        upserts: list[dict[str, Any]] = []
        revisions: list[dict[str, Any]] = []
        new = changed = unchanged = 0
        for key, row in zip(keys, rows, strict=True):
            old = stored.get(key)
            if old is None:
                change, diff = "new", None
                new += 1
            else:
                diff = [name for name in _COMPARED if _differs(row[name], old[name])]
                if not diff:
                    unchanged += 1
                    continue
                change = "reclassified" if "event_type" in diff else "updated"
                changed += 1
            upserts.append(
                {
                    **row,
                    "first_run_id": run_id,
                    "last_run_id": run_id,
                    "first_seen": when,
                    "last_seen": when,
                }
            )
            revisions.append(_revision(key, run_id, change, old, row, diff, when))
        # Step 3.
        _upsert(
            conn,
            series_events,
            upserts,
            keys=("series_id", "event_time"),
            update=tuple(c for c in _UPDATED_ON_CHANGE if c not in absent),
        )
        # Step 4.
        retracted = 0
        for key in retract_keys:
            old = stored.get(key)
            if old is None or old["status"] == "retracted":
                continue
            conn.execute(
                sa.update(series_events)
                .where(series_events.c.series_id == key[0], series_events.c.event_time == key[1])
                .values(status="retracted", last_run_id=run_id, last_seen=when)
            )
            revisions.append(
                _revision(
                    key, run_id, "retracted", old, {**old, "status": "retracted"}, ["status"], when
                )
            )
            retracted += 1
        # Step 5.
        if revisions:
            conn.execute(sa.insert(event_revisions), revisions)
    return WriteSummary(new=new, changed=changed, unchanged=unchanged, retracted=retracted)


def _revision(
    key: tuple[str, str],
    run_id: str,
    change: str,
    old: Mapping[str, Any] | None,
    new: Mapping[str, Any],
    diff: Sequence[str] | None,
    when: datetime,
) -> dict[str, Any]:
    return {
        "series_id": key[0],
        "event_time": key[1],
        "run_id": run_id,
        "change": change,
        "old_type": None if old is None else old["event_type"],
        "new_type": new["event_type"],
        "old_status": None if old is None else old["status"],
        "new_status": new["status"],
        "old_effect": None if old is None else old["effect"],
        "new_effect": new["effect"],
        "changed_columns": None if diff is None else ",".join(diff),
        "changed_at": when,
    }


def read_events(
    db: Database,
    *,
    since: datetime | str | None = None,
    until: datetime | str | None = None,
    series_ids: Sequence[str] | None = None,
    include_retracted: bool = False,
    event_types: Sequence[str] | None = None,
    statuses: Sequence[str] | None = None,
    triage: Sequence[str] | None = None,
    min_effect_pct: float | None = None,
    newest_first: bool = False,
    limit: int | None = None,
) -> pd.DataFrame:
    """Stored events as a table, oldest first (or newest first).

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    since, until : datetime or str, optional
        Only events at or after ``since`` and at or before ``until`` (by
        ``event_ts``; events whose time is not a date-time are then left out).
        Naive times are UTC.
    series_ids : sequence of str, optional
        Only these series.
    include_retracted : bool, default=False
        Also return events the scans have retracted (implied when ``statuses``
        names ``retracted``).
    event_types : sequence of str, optional
        Only these types (``AO``, ``LS``, ``TC``, ``IO``, ``VC``).
    statuses : sequence of str, optional
        Only these statuses (``provisional``, ``confirmed``, ``retracted``).
    triage : sequence of str, optional
        Only events with one of these verdicts; ``none`` stands for no verdict.
    min_effect_pct : float, optional
        Only events whose ``|effect_pct|`` is at least this (events without a
        percentage are then left out).
    newest_first : bool, default=False
        Sort the newest first.
    limit : int, optional
        At most this many rows (the first ones in the chosen order).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`EVENT_COLUMNS` (the ``detect --json`` contract; numbers
        float64 with NaN for missing, texts object with None, ``type_weights`` a
        dict) then :data:`EVENT_EXTRA_COLUMNS` (times as ``datetime64[ns, UTC]``).
        Sorted by ``event_ts`` (rows without one last), ``series_id``,
        ``event_time``, each descending when ``newest_first``.

    Raises
    ------
    ConfigError
        An unknown type, status or triage state, or a bad bound or limit.
    """
    conditions = _event_filters(
        since=since,
        until=until,
        include_retracted=include_retracted,
        event_types=event_types,
        statuses=statuses,
        triage=triage,
        min_effect_pct=min_effect_pct,
    )
    if limit is not None and (isinstance(limit, bool) or not isinstance(limit, int) or limit < 1):
        raise ConfigError(f"limit must be a whole number of at least 1, got {limit!r}")
    columns = [series_events.c[name] for name in (*EVENT_COLUMNS, *EVENT_EXTRA_COLUMNS)]
    c = series_events.c
    direction = sa.desc if newest_first else sa.asc
    order = [
        sa.case((c.event_ts.is_(None), 1), else_=0),
        direction(c.event_ts),
        direction(c.series_id),
        direction(c.event_time),
    ]
    base = sa.select(*columns).where(*conditions).order_by(*order)
    with _engine(db) as engine, engine.connect() as conn:
        if series_ids is None:
            records = [dict(r) for r in conn.execute(base.limit(limit)).mappings()]
        else:
            ids = sorted({_text(s, "series_id") for s in series_ids})
            records = []
            for chunk in _chunks(ids):
                query = base.where(series_events.c.series_id.in_(chunk)).limit(limit)
                records.extend(dict(r) for r in conn.execute(query).mappings())
    frame = _events_frame(records, newest_first=newest_first)
    return frame if limit is None else frame.head(limit)


def count_events(
    db: Database,
    *,
    since: datetime | str | None = None,
    until: datetime | str | None = None,
    series_ids: Sequence[str] | None = None,
    include_retracted: bool = False,
    event_types: Sequence[str] | None = None,
    statuses: Sequence[str] | None = None,
    triage: Sequence[str] | None = None,
    min_effect_pct: float | None = None,
) -> int:
    """How many stored events :func:`read_events` would return without a limit."""
    conditions = _event_filters(
        since=since,
        until=until,
        include_retracted=include_retracted,
        event_types=event_types,
        statuses=statuses,
        triage=triage,
        min_effect_pct=min_effect_pct,
    )
    base = sa.select(sa.func.count()).select_from(series_events).where(*conditions)
    with _engine(db) as engine, engine.connect() as conn:
        if series_ids is None:
            return int(conn.execute(base).scalar_one())
        ids = sorted({_text(s, "series_id") for s in series_ids})
        return sum(
            int(conn.execute(base.where(series_events.c.series_id.in_(chunk))).scalar_one())
            for chunk in _chunks(ids)
        )


TRIAGE_NONE = "none"
"""The ``triage`` filter's word for events without a verdict."""


def _event_filters(
    *,
    since: datetime | str | None,
    until: datetime | str | None,
    include_retracted: bool,
    event_types: Sequence[str] | None,
    statuses: Sequence[str] | None,
    triage: Sequence[str] | None,
    min_effect_pct: float | None,
) -> list[Any]:
    """The WHERE conditions of :func:`read_events` and :func:`count_events`."""
    c = series_events.c
    conditions: list[Any] = []
    since_ts = _as_datetime(since, "since")
    until_ts = _as_datetime(until, "until")
    if since_ts is not None and until_ts is not None and until_ts < since_ts:
        raise ConfigError(
            f"until ({until_ts.isoformat()}) is before since ({since_ts.isoformat()}); "
            "give until at or after since"
        )
    if since_ts is not None:
        conditions.append(c.event_ts >= since_ts)
    if until_ts is not None:
        conditions.append(c.event_ts <= until_ts)
    if event_types:
        for kind in event_types:
            _one_of(kind, REPORTED_TYPES, "event type")
        conditions.append(c.event_type.in_(sorted(set(event_types))))
    if statuses:
        for status in statuses:
            _one_of(status, EVENT_STATUSES, "event status")
        conditions.append(c.status.in_(sorted(set(statuses))))
    elif not include_retracted:
        conditions.append(c.status != "retracted")
    if triage:
        for state in triage:
            _one_of(state, (*TRIAGE_STATES, TRIAGE_NONE), "triage state")
        states = sorted(set(triage) - {TRIAGE_NONE})
        either = [c.triage_state.in_(states)] if states else []
        if TRIAGE_NONE in triage:
            either.append(c.triage_state.is_(None))
        conditions.append(sa.or_(*either))
    if min_effect_pct is not None:
        if (
            isinstance(min_effect_pct, bool)
            or not isinstance(min_effect_pct, int | float)
            or (not math.isfinite(min_effect_pct) or min_effect_pct < 0)
        ):
            raise ConfigError(
                f"min_effect_pct must be a number of at least 0 (a percentage), got "
                f"{min_effect_pct!r}"
            )
        conditions.append(sa.func.abs(c.effect_pct) >= float(min_effect_pct))
    return conditions


def load_known_events(
    db: Database, series_ids: Sequence[str] | None = None
) -> dict[str, tuple[Event, ...]]:
    """Stored events that are not retracted, as Event values grouped by series.

    What a scan hands the engine so earlier effects are removed before new
    points are tested and provisional events can be revisited.  ``position``
    is -1 (positions belong to one analysed grid; stored events are placed by
    time).
    """
    frame = read_events(db, series_ids=series_ids)
    out: dict[str, list[Event]] = {}
    for row in frame.itertuples(index=False):
        rec = row._asdict()
        out.setdefault(rec["series_id"], []).append(
            Event(
                series_id=rec["series_id"],
                position=-1,
                event_time=rec["event_time"],
                event_type=rec["event_type"],
                effect=float(rec["effect"]),
                effect_pct=_nan_to_none(rec["effect_pct"]),
                effect_sigma=_nan_to_none(rec["effect_sigma"]),
                t_stat=float(rec["t_stat"]),
                se=float(rec["se"]),
                type_weights=tuple((k, float(v)) for k, v in rec["type_weights"].items()),
                status=rec["status"],
                decay=_nan_to_none(rec["decay"]),
                half_life=_nan_to_none(rec["half_life"]),
                duration=_nan_to_none(rec["duration"]),
                level=float(rec["level"]),
                model=rec["model"],
                window_start=rec["window_start"],
                window_end=rec["window_end"],
            )
        )
    return {k: tuple(v) for k, v in out.items()}


def _nan_to_none(value: Any) -> float | None:
    return (
        None if value is None or (isinstance(value, float) and math.isnan(value)) else float(value)
    )


def _events_frame(records: list[dict[str, Any]], *, newest_first: bool = False) -> pd.DataFrame:
    data: dict[str, Any] = {}
    for name in (*EVENT_COLUMNS, *EVENT_EXTRA_COLUMNS):
        values = [r[name] for r in records]
        if name in _FLOAT_EVENT_COLUMNS:
            data[name] = np.array([np.nan if v is None else v for v in values], dtype=np.float64)
        elif name in ("event_ts", "first_seen", "last_seen", "triage_at"):
            data[name] = pd.to_datetime(pd.Series(values, dtype=object), utc=True).astype(
                "datetime64[ns, UTC]"
            )
        elif name == "type_weights":
            data[name] = pd.Series([json.loads(v) for v in values], dtype=object)
        else:
            data[name] = pd.Series(values, dtype=object)
    frame = pd.DataFrame(data)
    frame = frame.sort_values(
        ["event_ts", "series_id", "event_time"],
        ascending=not newest_first,
        na_position="last",
        kind="stable",
    )
    return frame.reset_index(drop=True)


def set_triage(
    db: Database,
    series_id: str,
    event_time: str,
    state: TriageState | None,
    reason: str | None = None,
    *,
    by: str | None = None,
    at: datetime | None = None,
) -> None:
    """Record a person's verdict on an event; scans never overwrite it.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    series_id, event_time : str
        The event, ``event_time`` exactly as stored.
    state : {'acknowledged', 'dismissed', 'explained'} or None
        The verdict; None clears it (with its reason and time).
    reason : str, optional
        Free text, e.g. the change ticket that explains a level shift.
    by : str, optional
        Who gave the verdict (kept in ``triage_history``).
    at : datetime, optional
        Written to ``triage_at``; now (UTC) by default.

    Notes
    -----
    The event's ``triage_*`` columns hold the current verdict; every call also
    adds a row to ``triage_history`` (a cleared verdict as state NULL), in the
    same transaction, so earlier verdicts and their reasons are kept.

    Raises
    ------
    ConfigError
        ``state`` is not one of the verdicts, or no such event is stored.
    """
    if state is not None:
        _one_of(state, TRIAGE_STATES, "triage state")
    if reason is not None and not isinstance(reason, str):
        raise ConfigError(f"triage reason must be a text, got {reason!r}")
    if by is not None and not isinstance(by, str):
        raise ConfigError(f"who gave the verdict must be a text, got {by!r}")
    when = _now(at)
    values = (
        {"triage_state": None, "triage_reason": None, "triage_at": None}
        if state is None
        else {"triage_state": state, "triage_reason": reason, "triage_at": when}
    )
    with _engine(db) as engine, engine.begin() as conn:
        result = conn.execute(
            sa.update(series_events)
            .where(series_events.c.series_id == series_id, series_events.c.event_time == event_time)
            .values(**values)
        )
        if result.rowcount == 0:
            raise ConfigError(
                f"no stored event for series {series_id!r} at {event_time!r}; list the "
                "stored events (with their event_time as stored) and pick one of them"
            )
        conn.execute(
            sa.insert(triage_history).values(
                series_id=series_id,
                event_time=event_time,
                state=state,
                reason=reason,
                decided_by=by,
                decided_at=when,
            )
        )


def read_triage_history(db: Database, series_id: str, event_time: str) -> pd.DataFrame:
    """Every verdict given to one event, oldest first.

    Returns
    -------
    pandas.DataFrame
        Columns ``state`` (None: cleared), ``reason``, ``decided_by`` and
        ``decided_at`` (``datetime64[ns, UTC]``).
    """
    c = triage_history.c
    query = (
        sa.select(c.state, c.reason, c.decided_by, c.decided_at)
        .where(c.series_id == series_id, c.event_time == event_time)
        .order_by(c.decided_at, c.verdict_id)
    )
    with _engine(db) as engine, engine.connect() as conn:
        rows = [dict(r) for r in conn.execute(query).mappings()]
    frame = pd.DataFrame(
        {
            name: pd.Series([r[name] for r in rows], dtype=object)
            for name in ("state", "reason", "decided_by")
        }
    )
    frame["decided_at"] = pd.to_datetime(
        pd.Series([r["decided_at"] for r in rows], dtype=object), utc=True
    ).astype("datetime64[ns, UTC]")
    return frame
