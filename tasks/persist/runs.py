"""Run records: start and finish, runs left behind, failed series and source problems."""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Literal

import sqlalchemy as sa

from changekind.tasks.errors import ConfigError, mask_source
from changekind.tasks.persist.convert import _as_datetime, _count, _now, _one_of, _text, _upsert
from changekind.tasks.persist.engines import _engine
from changekind.tasks.persist.schema import (
    RUN_KINDS,
    RUN_STATUSES,
    Database,
    RunKind,
    scan_runs,
    series_failures,
    source_problems,
)

# --------------------------------------------------------------------------- runs


def start_run(
    db: Database,
    run_id: str,
    kind: RunKind,
    span_start: datetime | str | None,
    span_end: datetime | str | None,
    *,
    source: str | None = None,
    source_columns: Mapping[str, str] | None = None,
    at: datetime | None = None,
) -> None:
    """Record that a run started (again, if it is retried under the same id).

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    run_id : str
        The Prefect flow-run id when there is one.
    kind : {'scan', 'backfill', 'refit'}
    span_start, span_end : datetime or ISO text or None
        The time span the run covers.
    source : str, optional
        Where the run reads its series (a path or a URL); recorded with any
        password hidden (:func:`~changekind.tasks.errors.mask_source`).
    source_columns : mapping, optional
        The column names given for the source (``series_id``, ``timestamp``,
        ``value``); None for the default names.
    at : datetime, optional
        ``started_at``; now (UTC) by default.
    """
    row = {
        "run_id": _text(run_id, "run_id"),
        "kind": _one_of(kind, RUN_KINDS, "run kind"),
        "span_start": _as_datetime(span_start, "span_start"),
        "span_end": _as_datetime(span_end, "span_end"),
        "status": "running",
        "series_total": 0,
        "series_ok": 0,
        "series_failed": 0,
        "events_new": 0,
        "events_changed": 0,
        "events_retracted": 0,
        "started_at": _now(at),
        "finished_at": None,
        "seconds": None,
        "source": None if source is None else mask_source(_text(source, "source")),
        "source_columns": _columns_text(source_columns),
        "message": None,
    }
    if row["span_start"] and row["span_end"] and row["span_end"] < row["span_start"]:
        raise ConfigError(
            f"run {run_id!r}: span_end {span_end!r} is before span_start {span_start!r}"
        )
    with _engine(db) as engine, engine.begin() as conn:
        _upsert(
            conn,
            scan_runs,
            [row],
            keys=("run_id",),
            update=[name for name in row if name != "run_id"],
        )


def finish_run(
    db: Database,
    run_id: str,
    status: Literal["completed", "failed"],
    *,
    series_total: int = 0,
    series_ok: int = 0,
    series_failed: int = 0,
    events_new: int = 0,
    events_changed: int = 0,
    events_retracted: int = 0,
    message: str | None = None,
    at: datetime | None = None,
) -> float:
    """Record a run's end, its counts and its duration.

    Returns
    -------
    float
        The run's duration in seconds (``finished_at - started_at``).

    Raises
    ------
    ConfigError
        Bad status or counts, or no run ``run_id`` was started.
    """
    _one_of(status, RUN_STATUSES[1:], "final run status")
    counts = {
        name: _count(value, name)
        for name, value in (
            ("series_total", series_total),
            ("series_ok", series_ok),
            ("series_failed", series_failed),
            ("events_new", events_new),
            ("events_changed", events_changed),
            ("events_retracted", events_retracted),
        )
    }
    when = _now(at)
    with _engine(db) as engine, engine.begin() as conn:
        started = conn.execute(
            sa.select(scan_runs.c.started_at).where(scan_runs.c.run_id == run_id)
        ).scalar_one_or_none()
        if started is None:
            raise ConfigError(f"no run {run_id!r} was started; call start_run first")
        seconds = (when - started).total_seconds()
        conn.execute(
            sa.update(scan_runs)
            .where(scan_runs.c.run_id == run_id)
            .values(status=status, finished_at=when, seconds=seconds, message=message, **counts)
        )
    return seconds


def _columns_text(columns: Mapping[str, str] | None) -> str | None:
    if not columns:
        return None
    if not all(isinstance(k, str) and isinstance(v, str) for k, v in columns.items()):
        raise ConfigError(f"source columns must map names to names, got {columns!r}")
    return json.dumps(dict(columns), sort_keys=True)


@dataclass(frozen=True, slots=True)
class RunSource:
    """The source a recorded run read: see :func:`latest_source`."""

    run_id: str
    kind: str
    started_at: datetime
    source: str
    """As recorded: a path, or a URL with its password hidden (``***``)."""
    columns: dict[str, str] | None
    """The column names the run was given; None for the default names."""

    @property
    def masked(self) -> bool:
        """The recorded source had a password, which was not stored."""
        return ":***@" in self.source


def latest_source(db: Database) -> RunSource | None:
    """The source of the latest run that recorded one (None: no run did).

    Runs refused on their configuration record no source, so the answer is a
    source some run did read.
    """
    with _engine(db) as engine, engine.connect() as conn:
        row = conn.execute(
            sa.select(
                scan_runs.c.run_id,
                scan_runs.c.kind,
                scan_runs.c.started_at,
                scan_runs.c.source,
                scan_runs.c.source_columns,
            )
            .where(scan_runs.c.source.is_not(None))
            .order_by(scan_runs.c.started_at.desc(), scan_runs.c.run_id)
            .limit(1)
        ).one_or_none()
    if row is None:
        return None
    columns = json.loads(row.source_columns) if row.source_columns else None
    return RunSource(row.run_id, row.kind, row.started_at, row.source, columns)


def record_refused_run(
    db: Database,
    run_id: str,
    kind: RunKind,
    message: str,
    *,
    at: datetime | None = None,
) -> None:
    """Record a run that never started: its configuration was refused.

    One row, status ``failed``, started and finished ``at`` (now by default),
    no series, ``message`` saying what was wrong.  Only the columns the
    database's ``scan_runs`` has are written, so an older schema (not yet
    migrated by a run) takes the record too.
    """
    when = _now(at)
    row = {
        "run_id": _text(run_id, "run_id"),
        "kind": _one_of(kind, RUN_KINDS, "run kind"),
        "span_start": None,
        "span_end": None,
        "status": "failed",
        "series_total": 0,
        "series_ok": 0,
        "series_failed": 0,
        "events_new": 0,
        "events_changed": 0,
        "events_retracted": 0,
        "started_at": when,
        "finished_at": when,
        "seconds": 0.0,
        "message": _text(message, "message"),
    }
    with _engine(db) as engine, engine.begin() as conn:
        present = {c["name"] for c in sa.inspect(conn).get_columns(scan_runs.name)}
        conn.execute(sa.insert(scan_runs).values({k: v for k, v in row.items() if k in present}))


def record_source_problems(
    db: Database,
    run_id: str,
    problems: Sequence[tuple[str, int | None, str | None, str]],
    *,
    at: datetime | None = None,
) -> int:
    """Record parts of a source a run could not read.

    Parameters
    ----------
    problems : sequence of (location, row_number, series_id, problem)
        ``row_number`` and ``series_id`` may be None.  The same problem given
        again for the same run is recorded once.
    """
    run_id = _text(run_id, "run_id")
    when = _now(at)
    rows = []
    with _engine(db) as engine, engine.begin() as conn:
        known = {
            tuple(r)
            for r in conn.execute(
                sa.select(
                    source_problems.c.location,
                    source_problems.c.row_number,
                    source_problems.c.series_id,
                    source_problems.c.problem,
                ).where(source_problems.c.run_id == run_id)
            )
        }
        for location, row, series_id, problem in dict.fromkeys(tuple(p) for p in problems):
            if (location, row, series_id, problem) in known:
                continue
            rows.append(
                {
                    "run_id": run_id,
                    "location": _text(location, "problem location"),
                    "row_number": None if row is None else int(row),
                    "series_id": series_id,
                    "problem": str(problem),
                    "found_at": when,
                }
            )
        if rows:
            conn.execute(sa.insert(source_problems), rows)
    return len(rows)


def close_stale_runs(db: Database, run_id: str, *, at: datetime | None = None) -> list[str]:
    """Close every other run still recorded as ``running``: status ``abandoned``.

    Called by a run that holds the run lock (:mod:`changekind.tasks.runlock`):
    no other run can be running then, so a ``running`` row is a run that
    ended without recording its end (killed, or its database went away).

    Returns
    -------
    list of str
        The run ids closed.
    """
    when = _now(at)
    with _engine(db) as engine, engine.begin() as conn:
        stale = conn.execute(
            sa.select(scan_runs.c.run_id, scan_runs.c.started_at).where(
                scan_runs.c.status == "running", scan_runs.c.run_id != run_id
            )
        ).all()
        for stale_id, started in stale:
            conn.execute(
                sa.update(scan_runs)
                .where(scan_runs.c.run_id == stale_id)
                .values(
                    status="abandoned",
                    finished_at=when,
                    seconds=(when - started).total_seconds(),
                    message=(
                        f"closed by run {run_id} at {when.isoformat(timespec='seconds')}: "
                        "this run ended without recording its end (killed, or its database "
                        "went away); what it wrote stays, and a rerun continues from each "
                        "series' watermark"
                    ),
                )
            )
    return [row[0] for row in stale]


def record_failures(
    db: Database,
    run_id: str,
    failures: Sequence[tuple[str, str, str]],
    *,
    at: datetime | None = None,
) -> int:
    """Record series a run could not analyse.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    run_id : str
    failures : sequence of (series_id, stage, message)
        ``stage`` names the step that failed (e.g. ``fetch``, ``fit``).  The same
        (run, series, stage) again replaces its message.
    at : datetime, optional
        ``failed_at``; now (UTC) by default.

    Returns
    -------
    int
        The number of failures written.
    """
    run_id = _text(run_id, "run_id")
    when = _now(at)
    rows: dict[tuple[str, str], dict[str, Any]] = {}
    for item in failures:
        if not isinstance(item, tuple | list) or len(item) != 3:
            raise ConfigError(f"a failure must be (series_id, stage, message), got {item!r}")
        series_id, stage, message = item
        key = (_text(series_id, "failure series_id"), _text(stage, "failure stage"))
        rows[key] = {
            "run_id": run_id,
            "series_id": key[0],
            "stage": key[1],
            "message": str(message),
            "failed_at": when,
        }
    with _engine(db) as engine, engine.begin() as conn:
        _upsert(
            conn,
            series_failures,
            list(rows.values()),
            keys=("run_id", "series_id", "stage"),
            update=("message", "failed_at"),
        )
    return len(rows)
