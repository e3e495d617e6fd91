"""The fleet flows: hourly scan, historical backfill, refit.

All three plan per-series work from the database's state and hand it to
:func:`changekind.flows.pipeline.execute`; they differ in what they read:

- ``scan``: series with a cached model are tested on the points after their
  watermark; series without one are fitted on the history they have (at least
  ``min_points`` points) and every event in it is reported;
- ``backfill``: a historical span cut into chunks, processed in order; each
  chunk is a scan that stops at the chunk's end, so a rerun after a crash
  continues from each series' watermark and ends with the tables an
  uninterrupted run leaves;
- ``refit``: models of all or some series estimated again on all their history.
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from dataclasses import replace
from pathlib import Path

import pandas as pd
from prefect import flow, get_run_logger

from changekind.flows.artifacts import publish_run_artifacts
from changekind.flows.notify import emit_run_events
from changekind.flows.pipeline import (
    RunSummary,
    current_run_id,
    execute,
    local_task_runner,
    nothing_to_do,
    plan_reach,
    plan_works,
    small_run,
    start_workers,
    summarize,
)
from changekind.flows.processes import stop_children_with_this_process
from changekind.flows.records import problem_rows, time_key
from changekind.flows.settings import RunOptions, resolve_db
from changekind.flows.steps import (
    close_stale_runs_task,
    finish_run_task,
    load_coverage_task,
    migrate_task,
    record_source_problems_task,
    refresh_incidents_task,
    start_run_task,
    stored_state_task,
    take_lock_task,
    write_labels_task,
    write_report_task,
)
from changekind.tasks import persist
from changekind.tasks.batch import WARM_SECONDS
from changekind.tasks.errors import ChangekindError, ConfigError, RunBusyError
from changekind.tasks.fetch import ColumnMap, SourceProblem, open_source, survey_source
from changekind.tasks.labels import check_label_columns, read_labels
from changekind.tasks.runlock import RunLock
from changekind.tasks.timeaxis import parse_instant


def _columns(columns: dict[str, str] | None) -> ColumnMap | None:
    return ColumnMap.coerce(columns) if columns else None


def _run(
    kind: str,
    source: str,
    db: str | None,
    options: RunOptions,
    *,
    columns: dict[str, str] | None,
    series: Sequence[str] | None,
    table: str | None = None,
    query: str | None = None,
    chunks: Sequence[tuple[object, object]] = ((None, None),),
    chunk: str | None = None,
    cold_start: object = None,
    report_from: str | None = None,
    refit: bool = False,
    report_dir: str | None = None,
    label_columns: Sequence[str] | None = None,
) -> RunSummary:
    logger = get_run_logger()
    t0 = time.perf_counter()
    run_id = current_run_id()
    # The parameter never holds a password (Prefect stores parameters in the
    # clear): it comes from the environment or a Secret block (settings.py).
    db = resolve_db(db)

    try:
        migrate_task(db)
        spec = open_source(source, columns=_columns(columns), table=table, query=query)
        labels = check_label_columns(spec, label_columns)  # a wrong name: nothing is run
    except ChangekindError as exc:  # configuration: nothing run, but the run is recorded
        _record_refusal(db, run_id, kind, exc, logger=logger)
        raise
    span = (chunks[0][0], chunks[-1][1])
    # Recorded (password hidden) so that report and drill can read it again.
    origin = {"source": source, "source_columns": columns or None}
    try:
        lock = RunLock(db, run_id, kind, wait_seconds=options.wait_seconds)
        take_lock_task(lock)
    except RunBusyError as exc:
        start_run_task(db, run_id, kind, *_span(span), **origin)
        finish_run_task(db, run_id, "failed", message=str(exc))
        raise
    try:
        with stop_children_with_this_process():
            return _locked_run(
                kind,
                spec,
                db,
                options,
                run_id=run_id,
                lock=lock,
                logger=logger,
                t0=t0,
                series=series,
                chunks=chunks,
                chunk=chunk,
                cold_start=cold_start,
                report_from=report_from,
                refit=refit,
                report_dir=report_dir,
                labels=labels,
                origin=origin,
            )
    finally:
        lock.release()


def _locked_run(
    kind: str,
    spec,
    db: str,
    options: RunOptions,
    *,
    run_id: str,
    lock: RunLock,
    logger,
    t0: float,
    series: Sequence[str] | None,
    chunks: Sequence[tuple[object, object]],
    chunk: str | None,
    cold_start: object,
    report_from: str | None,
    refit: bool,
    report_dir: str | None,
    labels: Sequence[str] = (),
    origin: Mapping[str, object] | None = None,
) -> RunSummary:
    """The run, once it holds the database (see :mod:`changekind.tasks.runlock`)."""
    closed = close_stale_runs_task(db, run_id)
    for stale in closed:
        logger.warning("run %s had been left 'running' (killed?); recorded as abandoned", stale)
    survey = survey_source(spec)
    ids = list(series) if series else survey.series_ids
    # Worker imports overlap the planning, unless a scan's fleet is small even if
    # every series is warm (pipeline.small_run): then no worker is started at all.
    # Backfills and refits, long runs of cold fits, always use the task runner,
    # and so do runs on a Dask cluster.
    may_stay = kind == "scan" and local_task_runner()
    in_process = may_stay and small_run(len(ids) * WARM_SECONDS, options.batch_seconds)
    starting = [] if in_process else start_workers(options.workers)
    problems: list[SourceProblem] = list(survey.problems)
    notes: list[str] = []
    if closed:
        notes.append(f"closed {len(closed)} abandoned run(s): {', '.join(closed)}")
    if report_from is not None:
        coverage = load_coverage_task(db, ids)
        chunks, extended = extend_chunks(
            chunks, chunk, coverage, start=report_from, time_kind=spec.time_kind
        )
        if extended:
            notes.append(extended)
            logger.warning("%s", extended)
    span = (chunks[0][0], chunks[-1][1])
    start_run_task(db, run_id, kind, *_span(span), **(origin or {}))
    if problems:
        record_source_problems_task(db, run_id, problem_rows(problems))
        for problem in problems:
            logger.warning("source: %s", problem.describe())
    labelled = _store_labels(spec, db, run_id, labels, ids, logger=logger)
    analysis = options.analysis(report_from=report_from)
    if kind != "scan":  # a backfill or refit run refits everything due
        analysis = replace(analysis, refit_share=None)
    outcomes_all = []
    timings: dict[str, float] = {"open": time.perf_counter() - t0}
    batches = 0
    before: dict = {}
    worked: set[str] = set()  # series with work in some chunk
    try:
        for k, (_, chunk_end) in enumerate(chunks, start=1):
            t_plan = time.perf_counter()
            models, marks, known, index = stored_state_task(db, ids)
            coverage = load_coverage_task(db, ids)
            if k == 1:
                before = index
            reach = plan_reach(
                ids,
                coverage=coverage,
                known=known,
                time_kind=spec.time_kind,
                start=report_from,
                refit=refit,
            )
            works = plan_works(
                ids,
                models=models,
                watermarks=marks,
                known={sid: r.known for sid, r in reach.items()},
                options=analysis,
                time_kind=spec.time_kind,
                end=chunk_end,
                cold_start=cold_start,
                refit=refit and k == 1,
                rewind={sid for sid, r in reach.items() if r.rewind},
            )
            timings["plan"] = timings.get("plan", 0.0) + time.perf_counter() - t_plan
            worked.update(w.series_id for w in works)
            logger.info(
                "%s chunk %d/%d: %d of %d series have work",
                kind,
                k,
                len(chunks),
                len(works),
                len(ids),
            )
            outcomes, chunk_timings, n_batches = execute(
                spec,
                db,
                run_id,
                works,
                analysis,
                reach=reach,
                workers=options.workers,
                batch_seconds=options.batch_seconds,
                small_in_process=may_stay,
                logger=logger,
                before_write=lock.check,
                problems=problems,
            )
            outcomes_all.extend(outcomes)
            batches += n_batches
            for key, value in chunk_timings.items():
                timings[key] = timings.get(key, 0.0) + value
    except BaseException as exc:
        message = f"failed part-way: {type(exc).__name__}: {exc}"
        if notes:
            message += "; " + "; ".join(notes)
        try:
            finish_run_task(db, run_id, "failed", message=message)
        except Exception as record_exc:  # the database is gone: the next run closes the row
            logger.error("could not record the run's failure: %s", record_exc)
        raise
    finally:
        for future in starting:
            future.wait()
    idle = sum(sid not in worked for sid in dict.fromkeys(ids))
    summary = replace(
        summarize(
            run_id,
            kind,
            _last_per_series(outcomes_all),
            before,
            batches,
            time.perf_counter() - t0,
            timings,
            up_to_date=idle,
        ),
        problems=tuple(p.describe() for p in dict.fromkeys(problems)),
    )
    if summary.nothing_to_do:
        said = nothing_to_do(kind, summary.series_total, span[1])
        notes.append(said)
        logger.warning("%s", said)
    notes.extend(summary.notes)
    t_incidents = time.perf_counter()
    incident_changes, notified = _update_incidents(db, run_id, options, logger=logger, notes=notes)
    summary = replace(
        summary,
        notes=tuple(notes),
        incidents=incident_changes,
        notified=notified,
        labelled=labelled,
        timings=(*summary.timings, ("incidents", time.perf_counter() - t_incidents)),
    )
    if summary.problems:
        notes.append(
            f"{len(summary.problems)} part(s) of the source could not be read "
            "(table source_problems)"
        )
    finish_run_task(
        db,
        run_id,
        "completed",
        series_total=summary.series_total,
        series_ok=summary.series_ok,
        series_failed=summary.series_failed,
        events_new=summary.events_new,
        events_changed=summary.events_changed,
        events_retracted=summary.events_retracted,
        message="; ".join(notes) or None,
    )
    try:
        publish_run_artifacts(summary, db=db)
    except Exception as exc:  # the run's data is written; a missing page must not fail it
        logger.warning("could not publish the run's artifacts: %s", exc)
    if report_dir:
        _write_report(logger, db, spec, report_dir, run_id)
    logger.info(
        "%s %s: %d series (%d cold, %d warm, %d failed), %d new events, %d changed, %d retracted",
        kind,
        run_id,
        len(ids),
        summary.cold,
        summary.warm,
        summary.series_failed,
        summary.events_new,
        summary.events_changed,
        summary.events_retracted,
    )
    return summary


def _record_refusal(db: str, run_id: str, kind: str, exc: Exception, *, logger) -> None:
    """Record a run refused on its configuration (never hides the refusal itself)."""
    try:
        persist.record_refused_run(db, run_id, kind, f"not run: {exc}")  # type: ignore[arg-type]
    except Exception as record_exc:  # the database itself is what is wrong
        logger.warning("could not record the refused run: %s", record_exc)


def _store_labels(spec, db: str, run_id: str, labels: Sequence[str], ids, *, logger) -> int:
    """Read the source's label columns (latest value per series) and store them."""
    if not labels:
        return 0
    found = read_labels(spec, labels)
    wanted = set(ids)
    frame = found.frame[found.frame["series_id"].isin(wanted)]
    changed = write_labels_task(db, run_id, frame)
    logger.info(
        "labels %s of %d series read; %d value(s) changed",
        ", ".join(labels),
        len(frame),
        changed,
    )
    return len(frame)


def _update_incidents(
    db: str, run_id: str, options: RunOptions, *, logger, notes: list[str]
) -> tuple[tuple[tuple[str, int], ...], int]:
    """Bring the incidents up to date and announce what is new (never fails the run).

    The update works from the event revisions since the last update, so a
    failure here leaves the work to the next run.
    """
    try:
        refresh = refresh_incidents_task(db, run_id)
    except Exception as exc:  # the run's events are written; the next update catches up
        logger.warning("could not update the incidents (the next run will): %s", exc)
        notes.append(f"incidents not updated ({exc}); the next run updates them")
        return (), 0
    counts = tuple((k, v) for k, v in refresh.counts().items() if v)
    if counts:
        notes.append("incidents: " + ", ".join(f"{v} {k}" for k, v in counts))
    logger.info(
        "incidents updated in %.2f s: %s",
        refresh.seconds,
        ", ".join(f"{v} {k}" for k, v in counts) or "no change",
    )
    try:
        emitted = emit_run_events(
            refresh, min_effect_pct=options.notify_min_effect_pct, run_id=run_id
        )
    except Exception as exc:  # an unreachable event stream must not fail a finished run
        logger.warning("could not emit the run's Prefect events: %s", exc)
        return counts, 0
    return counts, len(emitted)


def extend_chunks(
    chunks: Sequence[tuple[object, object]],
    chunk: str | None,
    coverage: Mapping[str, persist.Coverage],
    *,
    start: str,
    time_kind: str,
) -> tuple[list[tuple[object, object]], str | None]:
    """A backfill's chunks, extended so that rewound series reach their old watermark.

    A series whose analysed span begins after ``start`` is analysed again
    from ``start`` (see :func:`~changekind.flows.pipeline.plan_reach`) up to
    the watermark it had reached, and one whose earlier re-analysis was cut
    short continues to its ``reanalyse_until``: the span grows by whole chunks
    until it covers those.  Returns the chunks and a note when they grew.
    """
    begin = time_key(start, time_kind)
    targets = []
    rewound = 0
    for cov in coverage.values():
        if cov.reanalyse_until is not None:
            targets.append(cov.reanalyse_until)
        begun = time_key(cov.analysed_from, time_kind)
        if begun is not None and begun > begin and cov.watermark is not None:
            targets.append(cov.watermark)
            rewound += 1
    out = [tuple(c) for c in chunks]
    if not targets or chunk is None:
        return out, None
    until = max(time_key(t, time_kind) for t in targets)
    size = float(chunk) if time_kind == "numeric" else pd.Timedelta(chunk)
    grew = False
    while time_key(out[-1][1], time_kind) <= until:
        last = time_key(out[-1][1], time_kind)
        nxt = last + size
        label = nxt if time_kind == "numeric" else nxt.isoformat()
        out.append((out[-1][1], label))
        grew = True
    if not grew:
        return out, None
    return out, (
        f"{rewound} series had been analysed only from a later start and are analysed again "
        f"from {start}; span extended to {out[-1][1]} to reach what they had reached"
    )


@flow(name="changekind-scan", log_prints=False)
def scan_flow(
    source: str,
    db: str | None = None,
    options: RunOptions = RunOptions(),  # noqa: B008 - pydantic model, immutable
    columns: dict[str, str] | None = None,
    series: list[str] | None = None,
    until: str | None = None,
    table: str | None = None,
    query: str | None = None,
    report_dir: str | None = None,
    label_columns: list[str] | None = None,
) -> RunSummary:
    """Hourly fleet scan: new points of every series against its cached model.

    ``until`` stops reading at that time (exclusive); default all data.
    ``table`` or ``query`` say what to read when ``source`` is a database URL.
    ``report_dir``: also write the HTML report of the run's new and changed
    events there (a picture each; see ``changekind report``).
    ``label_columns``: source columns that describe a series (rack,
    firmware...); their latest values are stored and used by the incidents.
    """
    return _run(
        "scan",
        source,
        db,
        options,
        columns=columns,
        series=series,
        table=table,
        query=query,
        chunks=((None, until),),
        report_dir=report_dir,
        label_columns=label_columns,
    )


@flow(name="changekind-backfill", log_prints=False)
def backfill_flow(
    source: str,
    start: str,
    end: str,
    db: str | None = None,
    chunk: str = "7D",
    warmup: str = "7D",
    options: RunOptions = RunOptions(),  # noqa: B008
    columns: dict[str, str] | None = None,
    series: list[str] | None = None,
    table: str | None = None,
    query: str | None = None,
    report_dir: str | None = None,
    label_columns: list[str] | None = None,
) -> RunSummary:
    """Analyse the span ``start <= t < end`` in chunks of ``chunk``, resumably.

    Series without a model are fitted on the ``warmup`` before ``start`` plus
    the first chunk; events are reported from ``start`` on.  Numeric sources
    take numbers for start, end, chunk and warmup.  ``report_dir`` as for
    :func:`scan_flow`.
    """
    chunks, cold_start = split_span(start, end, chunk, warmup)
    return _run(
        "backfill",
        source,
        db,
        options,
        columns=columns,
        series=series,
        table=table,
        query=query,
        chunks=chunks,
        chunk=chunk,
        cold_start=cold_start,
        report_from=str(start),
        report_dir=report_dir,
        label_columns=label_columns,
    )


@flow(name="changekind-refit", log_prints=False)
def refit_flow(
    source: str,
    db: str | None = None,
    options: RunOptions = RunOptions(),  # noqa: B008
    columns: dict[str, str] | None = None,
    series: list[str] | None = None,
    table: str | None = None,
    query: str | None = None,
    label_columns: list[str] | None = None,
) -> RunSummary:
    """Estimate the models of all (or the given) series again on all their history."""
    return _run(
        "refit",
        source,
        db,
        options,
        columns=columns,
        series=series,
        table=table,
        query=query,
        refit=True,
        label_columns=label_columns,
    )


def split_span(start: str, end: str, chunk: str, warmup: str):
    """Chunks ``[(s0, e0), ...]`` covering ``start <= t < end``, and the warm-up start.

    ``start`` and ``end`` are read by the time axis's rule
    (:func:`~changekind.tasks.timeaxis.parse_instant`: ISO 8601, a naive time
    is UTC, or numbers); the chunk edges are written naive when both bounds
    were, else in the zone of the first aware bound.
    """
    a = parse_instant(start, what="backfill start")
    b = parse_instant(end, what="backfill end")
    if isinstance(a, float) != isinstance(b, float):
        raise ConfigError(
            f"backfill span {start!r}..{end!r} mixes a number and a date-time; give both "
            "as numbers (numeric timestamps) or both as ISO 8601 times"
        )
    if isinstance(a, float) and isinstance(b, float):
        try:
            size, back = float(chunk), float(warmup)
        except ValueError:
            raise ConfigError(
                f"chunk {chunk!r} and warm-up {warmup!r} must be numbers for a source with "
                "numeric timestamps"
            ) from None
        if not (b > a and size > 0 and back >= 0):
            raise ConfigError("backfill needs start < end, a positive chunk and warm-up >= 0")
        edges = [a]
        while edges[-1] + size < b:
            edges.append(edges[-1] + size)
        edges.append(b)
        return [(edges[i], edges[i + 1]) for i in range(len(edges) - 1)], a - back
    try:
        size_td, back_td = pd.Timedelta(chunk), pd.Timedelta(warmup)
    except ValueError as exc:
        raise ConfigError(
            f"backfill chunk {chunk!r} and warm-up {warmup!r} are not understood ({exc}); "
            "use durations such as 7D or 6h"
        ) from None
    if not (b > a and size_td > pd.Timedelta(0) and back_td >= pd.Timedelta(0)):
        raise ConfigError("backfill needs start < end, a positive chunk and warm-up >= 0")
    zones = [t.tz for t in (pd.Timestamp(start), pd.Timestamp(end)) if t.tz is not None]

    def text(instant: pd.Timestamp) -> str:
        shown = instant.tz_convert(zones[0]) if zones else instant.tz_localize(None)
        return shown.isoformat()

    edges = [a]
    while edges[-1] + size_td < b:
        edges.append(edges[-1] + size_td)
    edges.append(b)
    chunks = [(text(edges[i]), text(edges[i + 1])) for i in range(len(edges) - 1)]
    return chunks, text(a - back_td)


def _write_report(logger, db: str, spec, report_dir: str, run_id: str) -> None:
    """The run's events as an HTML report with a picture each (never fails the run)."""
    try:
        written = write_report_task(db, spec, Path(report_dir), run=run_id)
    except (ChangekindError, OSError) as exc:
        logger.warning("could not write the run's report to %s: %s", report_dir, exc)
        return
    logger.info(
        "report of the run's %d event(s), %d picture(s): %s",
        written.n_events,
        written.drawn,
        written.index,
    )


def _span(span: tuple[object, object]) -> tuple[str | None, str | None]:
    return _span_text(span[0]), _span_text(span[1])


def _span_text(value: object) -> str | None:
    if value is None:
        return None
    try:
        float(value)  # type: ignore[arg-type]
        return None  # numeric spans have no date-time to record
    except (TypeError, ValueError):
        return str(value)


def _last_per_series(outcomes):
    """One outcome per series: its events over all chunks; cold if fitted in any chunk."""
    merged: dict[str, object] = {}
    for o in outcomes:
        prev = merged.get(o.series_id)
        if prev is None:
            merged[o.series_id] = o
            continue
        events = {e.event_time: e for e in (*prev.events, *o.events)}  # type: ignore[attr-defined]
        retract = tuple(t for t in (*prev.retract, *o.retract) if t not in events)  # type: ignore[attr-defined]
        mode = o.mode
        if mode not in ("failed", "deferred") and "cold" in (prev.mode, o.mode):  # type: ignore[attr-defined]
            mode = "cold"  # fitted in some chunk
        merged[o.series_id] = replace(
            o,
            mode=mode,
            events=tuple(events.values()),
            retract=retract,
            n_duplicates=max(prev.n_duplicates, o.n_duplicates),  # type: ignore[attr-defined]
        )
    return list(merged.values())
