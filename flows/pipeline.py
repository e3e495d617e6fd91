"""What the scan, backfill and refit flows share: planning, fan-out, writing.

A run is: plan a :class:`~changekind.tasks.batch.SeriesWork` per series from
the database's state, cut the work into batches of a few seconds each, submit
the batches to the flow's task runner with a bounded number in flight (memory
stays bounded however large the fleet), and write each finished batch in one
transaction.  A batch that fails after its retries turns into failures of its
series; it never fails the run.
"""

from __future__ import annotations

import time
import uuid
from collections.abc import Callable, Mapping, Sequence, Set
from contextvars import ContextVar
from dataclasses import dataclass, field, replace

import pandas as pd
from prefect.context import FlowRunContext
from prefect.futures import as_completed
from prefect.runtime import flow_run
from prefect.task_runners import ProcessPoolTaskRunner, ThreadPoolTaskRunner

from changekind.flows.processes import die_with_parent
from changekind.flows.records import BatchOutcomes, time_key
from changekind.flows.steps import run_batch_task, start_worker_task, write_outcomes_task
from changekind.tasks import persist
from changekind.tasks.batch import (
    AnalysisOptions,
    BatchOutcome,
    SeriesOutcome,
    SeriesWork,
    WorkBatch,
    plan_batches,
    warm_contexts,
)
from changekind.tasks.fetch import SourceProblem, SourceSpec
from changekind.tasks.types import REPORTED_TYPES, Event, FittedModel

Progress = Callable[[int, int, str], None]
progress_hook: ContextVar[Progress | None] = ContextVar("changekind_progress", default=None)
"""Set by the CLI to draw a progress bar: called with (done, total, what)."""


@dataclass(frozen=True, slots=True)
class RunSummary:
    """What a run did, returned by every flow."""

    run_id: str
    kind: str
    series_total: int
    series_ok: int
    series_failed: int
    deferred: int
    events_new: int
    events_changed: int
    events_retracted: int
    by_type: tuple[tuple[str, int], ...]
    cold: int
    warm: int
    batches: int
    seconds: float
    failures: tuple[tuple[str, str, str], ...] = ()
    top_events: tuple[Event, ...] = ()
    top_changes: tuple[str, ...] = ()
    """For each of ``top_events``: ``new`` (first found by this run), ``changed``
    (its type or status changed in this run) or ``seen`` (stored before, as is)."""
    timings: tuple[tuple[str, float], ...] = field(default=())
    problems: tuple[str, ...] = ()
    """Parts of the source that could not be read (files, rows, cells), in words."""
    notes: tuple[str, ...] = ()
    """What the run did beyond the usual (abandoned runs closed, a span extended)."""
    refits: tuple[tuple[str, int], ...] = ()
    """Model refits by reason (age, variance drift, confirmed LS re-estimates)."""
    refits_deferred: int = 0
    """Refits due but deferred to later runs by the rate limit (RunOptions.refit_share)."""
    incidents: tuple[tuple[str, int], ...] = ()
    """Incidents the update after the run wrote, by change (new, grown, shrunk, changed, gone)."""
    notified: int = 0
    """Prefect events the run emitted (new and grown incidents, newly confirmed events)."""
    labelled: int = 0
    """Series whose labels the run read from the source."""
    up_to_date: int = 0
    """Series with nothing new to analyse: no point after their watermark, or
    already analysed through the run's end (a backfill's span, a scan's
    ``until``).  Counted in ``series_total`` and ``series_ok``, so the summary's
    counts are the run record's."""

    @property
    def nothing_to_do(self) -> bool:
        """Every series of the run was up to date: the run analysed nothing."""
        return self.series_total > 0 and self.up_to_date == self.series_total


def current_run_id() -> str:
    """The Prefect flow-run id when inside a flow run, else a fresh UUID."""
    try:
        run = flow_run.id
    except Exception:  # outside a flow run
        run = None
    return str(run) if run else str(uuid.uuid4())


def make_task_runner(runner: str, *, workers: int, dask_address: str | None = None):
    """The Prefect task runner for ``threads``, ``processes`` or ``dask``.

    Threads suit I/O-bound sources (the numerics hold the GIL); processes use
    every core of one machine; ``dask`` sends batches to a Dask cluster at
    ``dask_address`` (a local cluster of ``workers`` processes when None).
    """
    if runner == "threads":
        return ThreadPoolTaskRunner(max_workers=workers)
    if runner == "processes":
        # Workers end with the run's process, however it ends (flows/processes.py).
        return ProcessPoolTaskRunner(max_workers=workers, initializer=die_with_parent)
    if runner == "dask":
        # Deliberately here: prefect_dask loads Dask (seconds), for Dask runs only.
        from prefect_dask import DaskTaskRunner

        if dask_address:
            return DaskTaskRunner(address=dask_address)
        return DaskTaskRunner(
            cluster_kwargs={"n_workers": workers, "threads_per_worker": 1, "processes": True}
        )
    raise ValueError(f"unknown runner {runner!r}; use threads, processes or dask")


def start_workers(workers: int) -> list:
    """Submit one :func:`~changekind.tasks.batch.start_worker` per worker; wait with ``.wait()``."""
    return [start_worker_task.submit() for _ in range(max(1, workers))]


def local_task_runner() -> bool:
    """Whether the running flow's task runner is a pool on this machine (threads or
    processes), whose work the flow's own process can do as well; not a Dask
    cluster, whose workers may be the only machines that reach the source."""
    context = FlowRunContext.get()
    runner = getattr(context, "task_runner", None)
    return isinstance(runner, ThreadPoolTaskRunner | ProcessPoolTaskRunner)


def small_run(expected_seconds: float, batch_seconds: float) -> bool:
    """Whether work expected to take ``expected_seconds`` runs in the flow's own process.

    Work of at most one batch (``batch_seconds``) gains nothing from the task
    runner: a worker process spends 3-7 s on its imports and each submitted
    batch 0.2-0.4 s of orchestration (measured on the 2-core test machine),
    against 8 ms per warm series.  Its batches are then called as tasks in the
    flow's process, one after the other (same retries, same records).
    """
    return expected_seconds <= batch_seconds


def plan_works(
    series_ids: Sequence[str],
    *,
    models: Mapping[str, FittedModel],
    watermarks: Mapping[str, str],
    known: Mapping[str, tuple[Event, ...]],
    options: AnalysisOptions,
    time_kind: str,
    end: object = None,
    cold_start: object = None,
    refit: bool = False,
    rewind: Set[str] = frozenset(),
) -> list[SeriesWork]:
    """One SeriesWork per series: warm after its watermark, or cold.

    Parameters
    ----------
    end : timestamp or number, optional
        Data at or after ``end`` is not read (a backfill's chunk end).
    cold_start : timestamp or number, optional
        Where a cold read starts (a backfill's warm-up); None reads all history.
    refit : bool
        Cold analysis of every series, whatever its cache.  A series whose
        cached model was fitted with another window width than
        ``options.window`` (or raw when windowed, or windowed when raw) is
        analysed cold too.
    rewind : set of str
        Series analysed again from ``cold_start`` (cold), whatever their cache:
        a backfill's span starts before their analysed span does.
    """
    works = []
    end_bound = time_key(end, time_kind)
    # Each warm series' filter memory, computed for all of them at once.
    filters = {
        sid: models[sid]
        for sid in series_ids
        if sid in models and sid not in rewind and watermarks.get(sid) is not None
    }
    contexts = dict(zip(filters, warm_contexts(list(filters.values()), options), strict=True))
    for sid in series_ids:
        model = models.get(sid)
        mark = watermarks.get(sid)
        # A model fitted on other windows (or on raw points) cannot filter these.
        same_grid = model is None or model.window == options.window
        warm = model is not None and mark is not None and not refit and same_grid
        if warm and sid not in rewind:
            mark_bound = time_key(mark, time_kind)
            if (
                end_bound is not None
                and mark_bound is not None
                and mark_bound >= _before(end_bound)
            ):
                continue  # nothing new before the end
            # The filter's memory before the watermark, or before the earliest
            # provisional event when that is older (it is examined again).
            first = min(
                [mark_bound]
                + [
                    time_key(e.event_time, time_kind)
                    for e in known.get(sid, ())
                    if e.status == "provisional"
                ]
            )
            lags = contexts[sid] - 1
            if time_kind == "numeric":
                start = first - lags * (model.step_seconds or 1.0)
            else:
                start = first - lags * pd.Timedelta(seconds=model.step_seconds or 1.0)
            works.append(SeriesWork(sid, model, mark, known.get(sid, ()), start, end_bound))
        else:
            start = time_key(cold_start, time_kind)
            works.append(
                SeriesWork(sid, model, mark, known.get(sid, ()), start, end_bound, refit=True)
            )
    return works


@dataclass(frozen=True, slots=True)
class Reach:
    """Where one series' analysis stands at a run's chunk, and what it must catch up with.

    Attributes
    ----------
    report_from : str or None
        Events before this time are not reported by the series' cold analysis;
        a cold analysis records it as the series' ``analysed_from``.
    rewind : bool
        The series is analysed again, cold, from the backfill's start: the
        span given starts before the span analysed so far.
    known : tuple of Event
        The stored events the analysis builds on: those up to the watermark
        (before the start when rewound).
    ahead : tuple of str
        Times of stored events beyond that point (left by an analysis that
        had gone further): each is found again as the analysis passes it, or
        retracted.
    until : str or None
        ``reanalyse_until``: the watermark an earlier analysis had reached,
        which this one must reach again.
    """

    report_from: str | None = None
    rewind: bool = False
    known: tuple[Event, ...] = ()
    ahead: tuple[str, ...] = ()
    until: str | None = None


def plan_reach(
    series_ids: Sequence[str],
    *,
    coverage: Mapping[str, persist.Coverage],
    known: Mapping[str, tuple[Event, ...]],
    time_kind: str,
    start: str | None = None,
    refit: bool = False,
) -> dict[str, Reach]:
    """Each series' :class:`Reach` from its analysed span and stored events.

    ``start`` is a backfill's start (None for scans and refits).  A series
    whose analysed span begins after ``start`` is rewound: analysed again
    from ``start`` through the watermark it had reached, so a backfill covers
    its whole span whatever was analysed before, and two backfills in either
    order end as one over their union.
    """
    start_bound = time_key(start, time_kind)
    out: dict[str, Reach] = {}
    for sid in series_ids:
        stored = known.get(sid, ())
        cov = coverage.get(sid)
        if cov is None:  # never analysed: cold from the start (a scan: all history)
            out[sid] = Reach(report_from=start, known=stored)
            continue
        begun = time_key(cov.analysed_from, time_kind)
        rewind = not refit and start_bound is not None and begun is not None and begun > start_bound
        if rewind:
            before = [e for e in stored if time_key(e.event_time, time_kind) < start_bound]
            later = [e for e in stored if time_key(e.event_time, time_kind) >= start_bound]
            until = _latest([cov.watermark, cov.reanalyse_until], time_kind)
            out[sid] = Reach(start, True, tuple(before), tuple(e.event_time for e in later), until)
            continue
        mark = time_key(cov.watermark, time_kind)
        if mark is None:
            before, later = list(stored), []
        else:
            before = [e for e in stored if time_key(e.event_time, time_kind) <= mark]
            later = [e for e in stored if time_key(e.event_time, time_kind) > mark]
        report_from = cov.analysed_from if start is not None else None
        out[sid] = Reach(
            report_from,
            False,
            tuple(before),
            tuple(e.event_time for e in later),
            cov.reanalyse_until,
        )
    return out


def execute(
    spec: SourceSpec,
    db: str,
    run_id: str,
    works: Sequence[SeriesWork],
    options: AnalysisOptions,
    *,
    workers: int,
    reach: Mapping[str, Reach] | None = None,
    batch_seconds: float = 10.0,
    small_in_process: bool = False,
    logger=None,
    before_write: Callable[[], None] | None = None,
    problems: list[SourceProblem] | None = None,
) -> tuple[list[SeriesOutcome], dict[str, float], int]:
    """Submit the batches, write each as it finishes; return outcomes and timings.

    At most ``2 * workers`` batches are in flight, so the data held in memory
    is a few batches' worth.  Outcomes keep only what the summary needs.
    Works are batched by the time their events are reported from (each
    batch's options carry it).  Each write is a Prefect task, tried again on
    transient database errors (``flows/steps.py``); ``before_write`` is called
    first (the run lock's check).  Parts of the
    source the batches could not read are recorded with their batch and
    appended to ``problems``.  With ``small_in_process``, work of at most one
    batch (:func:`small_run`) is called as tasks in this process instead.
    """
    reach = reach or {}
    groups: dict[str | None, list[SeriesWork]] = {}
    for w in works:
        r = reach.get(w.series_id)
        groups.setdefault(options.report_from if r is None else r.report_from, []).append(w)
    batches = [
        (replace(options, report_from=report_from), batch)
        for report_from, group in groups.items()
        for batch in plan_batches(group, target_seconds=batch_seconds, workers=workers)
    ]
    expected = sum(w.expected_seconds for w in works)
    in_process = small_in_process and small_run(expected, batch_seconds)
    hook = progress_hook.get()
    total = len(works)
    done = 0
    results: list[SeriesOutcome] = []
    timings = {"read": 0.0, "analyse": 0.0, "write": 0.0}
    pending: dict = {}
    queue = list(batches)
    limit = max(2, 2 * workers)

    def finish(result: Callable[[], BatchOutcome], batch: list[SeriesWork]) -> None:
        nonlocal done
        found: tuple[SourceProblem, ...] = ()
        try:
            outcome: BatchOutcome = result()
            outs = list(outcome.outcomes)
            found = outcome.problems
            timings["read"] += outcome.read_seconds
            timings["analyse"] += outcome.analyse_seconds
        except Exception as exc:  # the batch failed after its retries
            message = f"{type(exc).__name__}: {exc}"
            if logger is not None:
                logger.error("batch of %d series failed: %s", len(batch), message)
            outs = [SeriesOutcome(w.series_id, "failed", failure=("batch", message)) for w in batch]
        outs = [_catch_up(o, reach.get(o.series_id), spec.time_kind) for o in outs]
        t0 = time.perf_counter()

        write_outcomes_task(
            db,
            run_id,
            BatchOutcomes(tuple(outs)),
            before_write=before_write,
            # This batch's entries only: Prefect walks a task's mappings for futures.
            reach={o.series_id: reach[o.series_id] for o in outs if o.series_id in reach},
            time_kind=spec.time_kind,
            problems=found,
        )
        timings["write"] += time.perf_counter() - t0
        if problems is not None:
            problems.extend(found)
        results.extend(_slim(o) for o in outs)
        done += len(batch)
        if hook is not None:
            hook(done, total, "series")

    if in_process:
        for batch_options, batch in queue:
            args = (spec, WorkBatch(batch), batch_options)
            finish(lambda args=args: run_batch_task(*args), batch)
        queue = []
    while queue or pending:
        while queue and len(pending) < limit:
            batch_options, batch = queue.pop(0)
            # One opaque value: Prefect need not walk a thousand works looking for futures.
            pending[run_batch_task.submit(spec, WorkBatch(batch), batch_options)] = batch
        future = next(as_completed(list(pending)))
        finish(future.result, pending.pop(future))
    return results, timings, len(batches)


def _catch_up(outcome: SeriesOutcome, reach: Reach | None, time_kind: str) -> SeriesOutcome:
    """Retract stored events the analysis passed without finding them again.

    They were left by an analysis that had gone further (a later span
    analysed first): once this analysis reaches their time and does not
    report them, they no longer stand.
    """
    if reach is None or not reach.ahead or outcome.watermark is None:
        return outcome
    if outcome.mode not in ("cold", "warm"):
        return outcome
    reached = time_key(outcome.watermark, time_kind)
    found = {e.event_time for e in outcome.events} | set(outcome.retract)
    stale = tuple(t for t in reach.ahead if t not in found and time_key(t, time_kind) <= reached)
    if not stale:
        return outcome
    return replace(outcome, retract=(*outcome.retract, *stale))


def summarize(
    run_id: str,
    kind: str,
    outcomes: Sequence[SeriesOutcome],
    before: Mapping[tuple[str, str], tuple[str, str]],
    batches: int,
    seconds: float,
    timings: Mapping[str, float],
    *,
    up_to_date: int = 0,
) -> RunSummary:
    """Counts for the run record and the run's summary.

    ``before`` maps stored (series_id, event_time) to (type, status) as they
    were before the run, so new, changed and retracted events are told apart.
    ``up_to_date``: series of the run that were not planned at all (already
    analysed through the run's end; they have no outcome); they count as done,
    so ``series_total`` is every series of the run, and they add to the
    outcomes with no new point (``unchanged``) in ``RunSummary.up_to_date``.
    """
    new = changed = retracted = 0
    by_type = dict.fromkeys(REPORTED_TYPES, 0)
    tops: list[tuple[Event, str]] = []
    for o in outcomes:
        for e in o.events:
            old = before.get((o.series_id, e.event_time))
            if old is None:
                new += 1
                by_type[e.event_type] += 1
                change = "new"
            elif old != (e.event_type, e.status):
                changed += 1
                change = "changed"
            else:
                change = "seen"
            tops.append((e, change))
        retracted += sum(1 for t in o.retract if (o.series_id, t) in before)
    tops.sort(key=lambda pair: -abs(pair[0].t_stat))
    merged = [(o.series_id, o.n_duplicates) for o in outcomes if o.n_duplicates]
    notes = ()
    if merged:
        notes = (
            f"{sum(n for _, n in merged)} duplicate timestamp(s) in {len(merged)} series "
            f"merged into their median (e.g. {merged[0][0]!r}: {merged[0][1]})",
        )
    failures = tuple((o.series_id, *o.failure) for o in outcomes if o.failure is not None)
    refits, deferred = refit_reasons(outcomes)
    if refits or deferred:
        notes = (*notes, refit_text(refits, deferred))
    return RunSummary(
        run_id=run_id,
        kind=kind,
        series_total=len(outcomes) + up_to_date,
        series_ok=sum(o.mode in ("cold", "warm", "unchanged") for o in outcomes) + up_to_date,
        series_failed=len(failures),
        deferred=sum(o.mode == "deferred" for o in outcomes),
        events_new=new,
        events_changed=changed,
        events_retracted=retracted,
        by_type=tuple(by_type.items()),
        cold=sum(o.mode == "cold" for o in outcomes),
        warm=sum(o.mode == "warm" for o in outcomes),
        batches=batches,
        seconds=seconds,
        failures=failures,
        top_events=tuple(e for e, _ in tops[:10]),
        top_changes=tuple(change for _, change in tops[:10]),
        timings=tuple(timings.items()),
        notes=notes,
        refits=refits,
        refits_deferred=deferred,
        up_to_date=up_to_date + sum(o.mode == "unchanged" for o in outcomes),
    )


def nothing_to_do(kind: str, n_series: int, end: object) -> str:
    """The note of a run in which no series had anything new to analyse."""
    if kind == "backfill":
        return (
            f"nothing to do: span already done (all {n_series} series were analysed "
            f"through {end} before this run)"
        )
    before = "" if end is None else f" before {end}"
    return f"nothing to do: none of the {n_series} series has new points{before}"


_REFIT_PREFIXES = (("refit: ", ""), ("coefficients re-estimated: ", "re-estimated after "))


def refit_reasons(outcomes: Sequence[SeriesOutcome]) -> tuple[tuple[tuple[str, int], ...], int]:
    """Refits by reason, from the outcomes' notes, and the number deferred."""
    counts: dict[str, int] = {}
    for o in outcomes:
        for prefix, label in _REFIT_PREFIXES:
            if o.note and o.note.startswith(prefix) and not o.refit_deferred:
                reason = label + o.note.removeprefix(prefix).split(";")[0]
                counts[reason] = counts.get(reason, 0) + 1
    deferred = sum(o.refit_deferred for o in outcomes)
    return tuple(sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))), deferred


def refit_text(refits: Sequence[tuple[str, int]], deferred: int) -> str:
    """``'refits: 3 (age 2, variance drift 1); 5 deferred to later runs'``."""
    total = sum(n for _, n in refits)
    text = f"refits: {total}"
    if refits:
        text += " (" + ", ".join(f"{reason} {n}" for reason, n in refits) + ")"
    if deferred:
        text += f"; {deferred} deferred to later runs (refit rate limit)"
    return text


def _slim(outcome: SeriesOutcome) -> SeriesOutcome:
    """Drop the model from a kept outcome (the summary needs only counts and events)."""
    if outcome.model is None:
        return outcome
    return replace(outcome, model=None)


def _latest(labels: Sequence[str | None], time_kind: str) -> str | None:
    """The latest of some time labels (None ignored)."""
    given = [label for label in labels if label is not None]
    return max(given, key=lambda label: time_key(label, time_kind)) if given else None


def _before(bound):
    """The largest value strictly before ``bound`` that a watermark can take."""
    if isinstance(bound, pd.Timestamp):
        return bound - pd.Timedelta(1, unit="ns")
    return bound - 1e-9
