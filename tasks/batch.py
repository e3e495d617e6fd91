"""One batch of series through the engine: the unit of work of the fleet flows.

The flows plan a :class:`SeriesWork` per series (its cached model, watermark,
stored events and the span to read), cut them into batches, and hand each
batch to :func:`run_batch` (a Prefect task on a thread, a process or a Dask
worker).  It reads the batch's windows in one pushed-down query and runs
:func:`analyse_series_work` on each series; the result is plain data for the
flow to write in one transaction.

Per series (``analyse_series_work``, pure):

- **cold** (no cached model, a refit, a stale model): fit and detect on all
  the history read; every event found is reported; a first fit needs
  ``min_points`` observed points, else the series is *deferred*;
- **warm**: only the points after the watermark are tested against the cached
  model (no estimation), together with the span of stored *provisional*
  events, which are re-examined with the new data and confirmed, reclassified
  or retracted; the model is refitted (cold, same run) when it is stale by age
  or when the new residuals' variance drifted; after a confirmed level shift
  its coefficients are estimated again on the whole history with the known
  events removed (orders kept: one likelihood fit, not a cold analysis; in
  windowed mode, and after a variance change, the refit is cold).
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Literal

import numpy as np
import pandas as pd
from scipy.special import chdtri

from changekind.tasks.arma import impulse_responses, polynomials
from changekind.tasks.critical import FALSE_BUDGET
from changekind.tasks.decompose import MIN_POINTS, decompose, regularize
from changekind.tasks.detect import detect_events, reestimate, screen_new_points
from changekind.tasks.effects import EFFECTS
from changekind.tasks.errors import series_failure
from changekind.tasks.fetch import SeriesWindow, SourceProblem, SourceSpec, read_windows
from changekind.tasks.magnitude import MinEffect, keep_effects
from changekind.tasks.timeaxis import TimeAxis, parse_instant
from changekind.tasks.types import Event, FittedModel
from changekind.tasks.window.detection import detect_windowed, screen_windowed, windowed_model
from changekind.tasks.window.summary import (
    complete_windows,
    count_windows,
    last_window_label,
    summarize_windows,
)

Mode = Literal["cold", "warm", "unchanged", "deferred", "failed"]

WARM_SECONDS = 0.008
"""Rough cost of a warm series: 3.5-5 ms of analysis for 60 new points plus its
read and share of the task (measured in tests/benchmarks/bench_fleet.py)."""
COLD_SECONDS = 0.2
"""Rough cost of a cold series: 0.1-0.3 s of CPU at 480-1,440 points (fleet
benchmark), more for long histories."""


@dataclass(frozen=True, slots=True)
class AnalysisOptions:
    """Knobs of the per-series analysis (validated by the flows' parameters).

    Attributes
    ----------
    critical : float or None
        Critical |t| (expert override); None takes the default from
        ``false_budget``.
    false_budget : float or None
        Expected false events per clean series per 30 days of data
        (changekind.tasks.critical.budget_critical): the cold analysis and
        every warm scan take their critical value from it and the spacing, so
        the false-event rate does not grow with the scan frequency.  None
        takes the engine's length-dependent default (an allowance per
        analysis, spent again at every scan).  Windowed mode keeps that
        default.
    min_effect : MinEffect or None
        Events whose |effect| is below this floor (per cent of the level,
        noise sigma or series units; changekind.tasks.magnitude) are not
        reported: never written, so the revision log says nothing about them;
        a stored provisional event that shrinks below it is retracted.  None:
        every event that clears the critical value.
    periods : tuple of int or None
        Seasonal periods in points; None chooses them from the spacing.
    min_points : int
        Observed points a first fit needs (in points, not days).
    context_points : int
        Most points before the watermark a warm scan reads.  A raw model reads
        only its filter's memory (:func:`warm_context`: the lags after which
        its pi weights are negligible, at least ``MIN_CONTEXT``), up to this
        bound; windowed models read this many windows.
    refit_after : float
        A model is stale once the points tested since its fit exceed this
        multiple of the points it was fitted on.
    drift_alpha : float
        Level of the residual-variance drift test (chi-square on the new
        points' residuals against the model's sigma); a drift refits.
    refit_share : float or None
        Rate limit of full refits (a warm series whose model is stale by age
        or whose residual variance drifted): at most this share of a batch's
        series (at least one) is refitted in a run, the series waiting
        longest first (oldest watermark, then oldest fit); the others are
        deferred: the old model still tests the run's new points and a later
        run takes the refit up.  Only routine refits are limited: a model
        stale by age in a scan whose new points are at most ROUTINE_SHARE of
        its fit; a drift of the residual variance, a confirmed level shift or
        a long catch-up always refits at once.  None: every refit now
        (backfill and refit runs).
    report_from : str or None
        Events before this time are not reported (a backfill's warm-up).
    window : str or None
        Windowed mode (changekind.tasks.window): raw points are summarized into
        windows of this width and the engine models the window medians and
        spreads; ``min_points`` and ``context_points`` then count windows.
        Canonical text (:func:`~changekind.tasks.window.summary.window_text`).
    """

    critical: float | None = None
    false_budget: float | None = FALSE_BUDGET
    min_effect: MinEffect | None = None
    periods: tuple[int, ...] | None = None
    min_points: int = 96
    context_points: int = 240
    refit_after: float = 1.0
    drift_alpha: float = 0.001
    refit_share: float | None = None
    report_from: str | None = None
    window: str | None = None


ROUTINE_SHARE = 0.25
"""A scan is routine for a stale model when its new points are at most this
share of the points the model was fitted on (an hourly scan of a minute series
fitted on a day: 60 of 1,440).  A long catch-up (a scan after days without
one) refits at once: a deferred refit there gave a false level shift and a
spike typed TC on the invented disk fleet (tests/flows/test_backfill_spans.py)."""

MIN_CONTEXT = MIN_POINTS
"""Fewest points up to the watermark a warm read takes (a series of fewer is
refused by ``regularize``, whose minimum this is)."""
MEMORY_TOLERANCE = 1e-10
"""A filter's memory ends where the sum of its remaining |pi| weights falls below this."""


def warm_context(model: FittedModel, options: AnalysisOptions) -> int:
    """Points before the watermark a warm screen of ``model`` needs.

    The residuals of the new points are pi(B) applied to the observations:
    observations more lags back than the filter's memory weigh less than
    ``MEMORY_TOLERANCE`` in total, so reading them changes nothing.  An AR(1)
    needs 1 lag (``MIN_CONTEXT``, 24, are read), an MA(1) with theta -0.4 about 26,
    a near unit MA root all of ``options.context_points``.
    """
    return warm_contexts([model], options)[0]


def warm_contexts(models: Sequence[FittedModel], options: AnalysisOptions) -> list[int]:
    """:func:`warm_context` of many models, their pi weights computed together
    (:func:`~changekind.tasks.arma.impulse_responses`: a scan plans 10,000 in
    milliseconds)."""
    cap = options.context_points
    filtered = [i for i, m in enumerate(models) if m.window is None]
    contexts = [cap] * len(models)
    if not filtered:
        return contexts
    weights = np.abs(impulse_responses([polynomials(models[i]) for i in filtered], cap + 1))
    # remaining[:, k] = sum of |pi_j| for j >= k, row by row
    remaining = np.cumsum(weights[:, ::-1], axis=1)[:, ::-1]
    negligible = remaining < MEMORY_TOLERANCE
    first = np.where(negligible.any(axis=1), negligible.argmax(axis=1), cap)
    for i, memory in zip(filtered, first.tolist(), strict=True):
        contexts[i] = max(min(MIN_CONTEXT, cap), min(int(memory), cap))
    return contexts


@dataclass(frozen=True, slots=True)
class SeriesWork:
    """What one series needs from a run.

    ``start``/``end`` bound the read (``start <= t < end``; None open);
    ``watermark`` is the last timestamp already tested (None: never); ``known``
    the stored, not retracted events; ``refit`` forces a cold analysis.
    """

    series_id: str
    model: FittedModel | None = None
    watermark: str | None = None
    known: tuple[Event, ...] = ()
    start: object = None
    end: object = None
    refit: bool = False

    @property
    def expected_seconds(self) -> float:
        return WARM_SECONDS if self.model is not None and not self.refit else COLD_SECONDS


@dataclass(frozen=True, slots=True)
class SeriesOutcome:
    """What a run learned about one series (plain data, written in one transaction)."""

    series_id: str
    mode: Mode
    events: tuple[Event, ...] = ()
    retract: tuple[str, ...] = ()
    model: FittedModel | None = None
    watermark: str | None = None
    failure: tuple[str, str] | None = None
    points: int = 0
    seconds: float = 0.0
    note: str | None = None
    reestimate: tuple[Event, ...] | None = None
    n_duplicates: int = 0  # rows merged into their timestamp's median (regularize)
    refit_deferred: bool = False  # a refit was due but the run's rate limit deferred it
    refit_due: str | None = None  # warm outcome of a series due a refit (by age) if allowed


class WorkBatch(Sequence[SeriesWork]):
    """The works of one batch as a single opaque value.

    A plain sequence class, not a list or a dataclass: task runners walk
    those looking for futures in a task's parameters (Prefect's walk over
    1,250 works cost about 0.3 s a submit), and pass this through untouched.
    """

    __slots__ = ("_works",)

    def __init__(self, works: Sequence[SeriesWork]) -> None:
        self._works = tuple(works)

    def __len__(self) -> int:
        return len(self._works)

    def __getitem__(self, i):
        return self._works[i]

    def __reduce__(self):
        return (WorkBatch, (self._works,))


@dataclass(frozen=True, slots=True)
class BatchOutcome:
    """The outcomes of one batch, in the batch's order."""

    outcomes: tuple[SeriesOutcome, ...]
    read_seconds: float
    analyse_seconds: float
    rows_read: int = 0
    notes: tuple[str, ...] = field(default=())
    problems: tuple[SourceProblem, ...] = ()  # cells read as missing (not numbers)


def run_batch(
    spec: SourceSpec, works: Sequence[SeriesWork], options: AnalysisOptions
) -> BatchOutcome:
    """Read one batch's windows and analyse each series.

    Read errors propagate (the Prefect task retries them); a series that
    cannot be analysed becomes a ``failed`` outcome and never fails the batch.
    A cell that is not a number is read as missing and returned as a problem.
    """
    t0 = time.perf_counter()
    problems: list[SourceProblem] = []
    windows = [SeriesWindow(w.series_id, w.start, w.end) for w in works]
    frame = read_windows(spec, windows, problems=problems)
    t1 = time.perf_counter()
    groups = _by_series(frame)
    empty = frame.iloc[0:0]
    skipped = {p.series_id: p.problem for p in problems if p.skip_series}
    outcomes = [
        SeriesOutcome(work.series_id, "failed", failure=("read", skipped[work.series_id]))
        if work.series_id in skipped
        else analyse_series_work(work, *_columns(groups.get(work.series_id, empty)), options)
        for work in works
    ]
    # Series whose warm analysis asks for the whole history (a refit, or new
    # coefficients after a confirmed level shift) get it in one read.
    wanted = [
        i
        for i, (work, outcome) in enumerate(zip(works, outcomes, strict=True))
        if (
            outcome.reestimate is not None
            or outcome.refit_due is not None
            or _turned_cold(work, outcome)
        )
        and work.series_id not in skipped
    ]
    wanted = _rate_limited(works, outcomes, wanted, options.refit_share)
    reread = [works[i] for i in wanted if works[i].start is not None]
    t2 = time.perf_counter()
    history = _by_series(_histories(spec, reread, problems)) if reread else {}
    t3 = time.perf_counter()
    for i in wanted:
        work, outcome = works[i], outcomes[i]
        held = history if work.start is not None else groups
        full = _columns(held.get(work.series_id, empty))
        if outcome.reestimate is not None:
            outcome = _reestimated(work, outcome, *full)
        else:
            why = outcome.note if outcome.refit_due is None else f"refit: {outcome.refit_due}"
            outcome = analyse_series_work(replace(work, refit=True), *full, options)
            if outcome.note is None:
                outcome = replace(outcome, note=why)
        outcomes[i] = outcome
    return BatchOutcome(
        outcomes=tuple(outcomes),
        read_seconds=(t1 - t0) + (t3 - t2),
        analyse_seconds=time.perf_counter() - t1 - (t3 - t2),
        rows_read=len(frame),
        problems=tuple(dict.fromkeys(problems)),  # a history re-read finds them again
    )


def _rate_limited(
    works: Sequence[SeriesWork],
    outcomes: list[SeriesOutcome],
    wanted: list[int],
    share: float | None,
) -> list[int]:
    """The refits a batch makes now; the others' outcomes become deferrals (in place).

    Only routine refits are limited (``refit_due``: stale by age in a scan of
    few new points); the deferred keep this scan's warm outcome (events
    written, watermark moved).  Beyond ``ceil(share * len(works))`` (at least
    one) they wait, the longest waiting first: the oldest watermark, then the
    oldest fit (a deferred series keeps its old fit, so it moves up).  Light
    re-estimates after a confirmed level shift, refits after a drift of the
    residual variance and refits after many new points are not limited.
    """
    full = [i for i in wanted if outcomes[i].refit_due is not None]
    if share is None or not full:
        return wanted
    cap = max(1, math.ceil(share * len(works)))
    if len(full) <= cap:
        return wanted

    def waiting(i: int) -> tuple[str, str]:
        model = works[i].model
        return (works[i].watermark or "", (model.fitted_through if model else None) or "")

    now = set(sorted(full, key=waiting)[:cap])
    for i in full:
        if i not in now:  # this scan's warm test stands; the refit waits
            outcomes[i] = replace(
                outcomes[i],
                note=f"refit deferred: {outcomes[i].refit_due}",
                refit_due=None,
                refit_deferred=True,
            )
    return [i for i in wanted if i in now or i not in full]


def _turned_cold(work: SeriesWork, outcome: SeriesOutcome) -> bool:
    """A warm read whose analysis decided the model must be refitted."""
    return outcome.mode == "cold" and work.model is not None and not work.refit


def _by_series(frame: pd.DataFrame) -> dict[str, pd.DataFrame]:
    return {sid: g for sid, g in frame.groupby("series_id", sort=False)}


def _columns(data: pd.DataFrame) -> tuple[pd.Series, pd.Series]:
    return data["timestamp"], data["value"]


def _histories(
    spec: SourceSpec, works: Sequence[SeriesWork], problems: list[SourceProblem]
) -> pd.DataFrame:
    """All history up to each work's end (a warm read holds only the context), in one read."""
    windows = [SeriesWindow(w.series_id, None, w.end) for w in works]
    return read_windows(spec, windows, problems=problems)


def analyse_series_work(
    work: SeriesWork, timestamps: pd.Series, values: pd.Series, options: AnalysisOptions
) -> SeriesOutcome:
    """Cold or warm analysis of one series' window (pure; never raises for bad data).

    A warm analysis that decides the model must be refitted returns mode
    ``"cold"`` with no events when its window lacks the history: the caller
    reads the whole history and calls again with ``refit=True``.
    """
    t0 = time.perf_counter()
    try:
        if work.model is None or work.refit:
            outcome = _cold(work, timestamps, values, options)
        else:
            outcome = _warm(work, timestamps, values, options)
    except Exception as exc:
        failure = series_failure(exc)  # the one per-series error policy
        if failure is None:
            raise  # not the series' own problem: a bug, or the machinery failing
        outcome = SeriesOutcome(work.series_id, "failed", failure=failure)
    return replace(outcome, seconds=time.perf_counter() - t0)


def _cold(
    work: SeriesWork, timestamps: pd.Series, values: pd.Series, options: AnalysisOptions
) -> SeriesOutcome:
    if options.window is not None:
        keep = complete_windows(work.series_id, timestamps, options.window, work.end)
        timestamps, values = timestamps[keep], values[keep]
    observed = int(pd.to_numeric(values, errors="coerce").notna().sum())
    if options.window is not None and observed:
        observed = count_windows(work.series_id, timestamps, values, options.window)
    unit = "points" if options.window is None else f"windows of {options.window}"
    if observed < options.min_points:
        return SeriesOutcome(
            work.series_id,
            "deferred",
            points=observed,
            note=f"{observed} observed {unit}; a first fit needs {options.min_points}",
        )
    if options.window is None:
        series = regularize(work.series_id, timestamps, values)
        result = detect_events(
            decompose(series, periods=options.periods),
            critical=options.critical,
            false_budget=options.false_budget,
        )
        found_events, model = result.events, result.model
        watermark, points = series.label(_last_observed(series.values)), series.nobs
        merged = series.n_duplicates
    else:
        windowed = detect_windowed(
            work.series_id,
            timestamps,
            values,
            options.window,
            critical=options.critical,
            periods=options.periods,
            false_budget=options.false_budget,
        )
        found_events, model = windowed.events, windowed_model(windowed)
        watermark, points = last_window_label(windowed.summary), windowed.summary.n_windows
        merged = 0
    events = _reportable(found_events, options)
    found = {e.event_time for e in events}
    retract = tuple(
        e.event_time
        for e in work.known
        if e.status == "provisional" and e.event_time not in found and _after(e, options)
    )
    return SeriesOutcome(
        work.series_id,
        "cold",
        events=events,
        retract=retract,
        model=model,
        watermark=watermark,
        points=points,
        n_duplicates=merged,
    )


def _warm(
    work: SeriesWork, timestamps: pd.Series, values: pd.Series, options: AnalysisOptions
) -> SeriesOutcome:
    model = work.model
    assert model is not None
    unchanged = SeriesOutcome(work.series_id, "unchanged", watermark=work.watermark)
    if model.window is not None:
        keep = complete_windows(work.series_id, timestamps, model.window, work.end)
        timestamps, values = timestamps[keep], values[keep]
    if len(values) == 0:
        return unchanged
    merged = 0
    if model.window is None:
        series = regularize(work.series_id, timestamps, values)
        merged = series.n_duplicates
        index = series.index
        last = series.label(_last_observed(series.values))

        def screen(start: int, fixed: list[Event]):
            return screen_new_points(
                model,
                series,
                series.nobs - start,
                known=fixed,
                critical=options.critical,
                false_budget=options.false_budget,
            )
    else:
        summary = summarize_windows(work.series_id, timestamps, values, model.window)
        index = summary.index
        last = last_window_label(summary)

        def screen(start: int, fixed: list[Event]):
            return screen_windowed(
                model,
                summary,
                index[start],
                known=fixed,
                critical=options.critical,
                false_budget=options.false_budget,
            )

    after = _after_watermark(index, work.watermark)
    if not after.any():
        return unchanged
    first_new = int(np.argmax(after))
    # Stored provisional events inside the window are examined again.
    positions = {e.event_time: _position(index, e.event_time) for e in work.known}
    pending = [
        e for e in work.known if e.status == "provisional" and positions[e.event_time] is not None
    ]
    test_from = min([first_new] + [positions[e.event_time] for e in pending])
    retest = {e.event_time for e in work.known if (positions[e.event_time] or -1) >= test_from}
    fixed = [e for e in work.known if e.event_time not in retest]
    result = screen(test_from, fixed)
    why = _needs_refit(model, index, first_new, result, options)
    light = why is not None and why.startswith("confirmed") and model.window is None
    # Stale by age in a routine scan (few new points against the fit) under a
    # rate limit: the old model still serves this scan's test, so the warm
    # outcome is kept in case the refit is deferred.
    routine = int(after.sum()) <= ROUTINE_SHARE * model.nobs
    age_due = why == "age" and options.refit_share is not None and routine
    if why is not None and not light and not age_due:
        return SeriesOutcome(work.series_id, "cold", note=f"refit: {why}")
    events = _reportable(result.events, options)
    found = {e.event_time for e in events}
    retract = tuple(
        e.event_time
        for e in work.known
        if e.event_time in retest and e.status == "provisional" and e.event_time not in found
    )
    return SeriesOutcome(
        work.series_id,
        "warm",
        events=events,
        retract=retract,
        watermark=last,
        points=int(after.sum()),
        note=f"coefficients re-estimated: {why}" if light else None,
        reestimate=(*fixed, *result.events) if light else None,
        n_duplicates=merged,
        refit_due=why if age_due else None,
    )


def _reestimated(
    work: SeriesWork, outcome: SeriesOutcome, timestamps: pd.Series, values: pd.Series
) -> SeriesOutcome:
    """The warm outcome with the cached model's coefficients re-estimated on the history.

    The events to remove are in ``outcome.reestimate``; a failure keeps the
    cached model (the outcome says why) and never fails the series.
    """
    assert work.model is not None and outcome.reestimate is not None
    t0 = time.perf_counter()
    try:
        series = regularize(work.series_id, timestamps, values)
        model = reestimate(work.model, series, outcome.reestimate)
        done = replace(outcome, model=model, reestimate=None)
    except Exception as exc:
        if series_failure(exc) is None:
            raise
        done = replace(
            outcome, reestimate=None, note=f"{outcome.note}; failed ({exc}), cached model kept"
        )
    return replace(done, seconds=outcome.seconds + time.perf_counter() - t0)


def _needs_refit(
    model: FittedModel,
    index: pd.Index,
    first_new: int,
    result,
    options: AnalysisOptions,
) -> str | None:
    """Why the cached model must be refitted, or None when it still serves.

    Stale by age, a drift of the residual variance, or a confirmed lasting
    step: a level shift or, in windowed mode, a variance change; either leaves
    the cached model describing a series that is no longer there.
    """
    tested_since_fit = _points_since(index, model.fitted_through, model.step_seconds)
    if tested_since_fit is not None and tested_since_fit > options.refit_after * model.nobs:
        return "age"
    for e in result.events:
        if EFFECTS[e.event_type].lasting and e.status == "confirmed":
            return f"confirmed {e.event_type}"
    scale = result.resid_scale
    n_new = len(index) - first_new
    if scale is not None and n_new >= 20:
        # n s^2 / sigma^2 ~ chi2(n) without drift (robust s from the new points).
        stat = n_new * scale**2
        if stat > chdtri(n_new, options.drift_alpha):  # chi2.isf(alpha, n), as a ufunc
            return "variance drift"
    return None


MAX_BATCH = 2500
"""Most series in one batch (bounds a batch's memory: 2,500 warm reads are about 1 MB)."""


def plan_batches(
    works: Sequence[SeriesWork], *, target_seconds: float = 10.0, workers: int = 1
) -> list[list[SeriesWork]]:
    """Cut the work into batches of about ``target_seconds`` of computation each.

    Warm and cold series are batched apart (their costs differ 25-fold), so a
    task carries seconds of real work: the per-task overhead measured for
    Prefect on this kind of machine is about 10 ms with threads and 0.2-0.4 s
    with processes or Dask, which a batch of that size amortizes to a few
    percent.  Each group is then cut into a multiple of ``workers`` batches of
    equal size, so no worker is left running a last batch while the others
    wait.  At 10 s: warm batches of up to 1,250 series, cold of 50.
    """
    batches: list[list[SeriesWork]] = []
    workers = max(1, workers)
    for cold in (True, False):
        group = [w for w in works if (w.expected_seconds == COLD_SECONDS) == cold]
        if not group:
            continue
        size = max(1, min(MAX_BATCH, int(target_seconds / group[0].expected_seconds)))
        count = -(-len(group) // size)
        count = min(len(group), workers * -(-count // workers))
        size = -(-len(group) // count)
        batches.extend(group[i : i + size] for i in range(0, len(group), size))
    return batches


# -- helpers ---------------------------------------------------------------------


def _reportable(events: Sequence[Event], options: AnalysisOptions) -> tuple[Event, ...]:
    """Events after the warm-up whose effect reaches the run's floor."""
    kept = keep_effects(events, options.min_effect)
    if options.report_from is None:
        return kept
    return tuple(e for e in kept if _at_or_after(e.event_time, options.report_from))


def _after(event: Event, options: AnalysisOptions) -> bool:
    return options.report_from is None or _at_or_after(event.event_time, options.report_from)


def _at_or_after(label: str, bound: str) -> bool:
    """Whether an event time is at or after a bound (a naive time is UTC)."""
    return bool(parse_instant(label, what="event time") >= parse_instant(bound, what="bound"))


def _as_time(label: str | None, like: pd.Index):
    """A label as a value comparable with ``like`` (naive labels are UTC, timeaxis' rule)."""
    if label is None:
        return None
    when = TimeAxis.of_index("", like).instant(label)
    if isinstance(like, pd.DatetimeIndex) and like.tz is None:
        return when.tz_localize(None)
    return when


def _after_watermark(index: pd.Index, watermark: str | None) -> np.ndarray:
    mark = _as_time(watermark, index)
    if mark is None:
        return np.ones(len(index), dtype=bool)
    return np.asarray(index > mark)


def _position(index: pd.Index, label: str) -> int | None:
    """The grid point of an event time: the nearest one within half a step (the rounding
    the warm screen's ``known_effects`` places it by), or None outside the grid."""
    if len(index) == 0:
        return None
    when = _as_time(label, index)
    i = _nearest(index, when)
    if len(index) < 2:
        return i if index[i] == when else None
    step = index[1] - index[0] if i == 0 else index[i] - index[i - 1]
    return i if 2 * abs(index[i] - when) <= step else None


def _nearest(index: pd.Index, when) -> int:
    """``index.get_indexer([when], method="nearest")[0]`` for a sorted, non-empty index
    (ties to the later point, as pandas does), by binary search: a tenth of the time."""
    if isinstance(index, pd.DatetimeIndex):  # nanoseconds (UTC for a zoned index)
        points, at = index.as_unit("ns").asi8, pd.Timestamp(when).as_unit("ns").value
    else:
        points, at = index.to_numpy(dtype=np.float64), float(when)
    n = points.size
    after = int(np.searchsorted(points, at, side="left"))  # first point at or after
    before = int(np.searchsorted(points, at, side="right")) - 1  # last point at or before
    if before == after or after == n:
        return before
    if before < 0:
        return after
    return before if at - points[before] < points[after] - at else after


def _points_since(index: pd.Index, label: str | None, step_seconds: float | None) -> float | None:
    if label is None or not step_seconds:
        return None
    when = _as_time(label, index)
    last = index[-1]
    if isinstance(index, pd.DatetimeIndex):
        return (last - when).total_seconds() / step_seconds
    return (float(last) - float(when)) / step_seconds


def _last_observed(values: np.ndarray) -> int:
    ok = np.flatnonzero(~np.isnan(values))
    return int(ok[-1]) if ok.size else values.size - 1


def start_worker() -> int:
    """Do nothing but load this module and the engine's libraries where the task runs.

    The flows submit one per worker before they plan: a process or Dask
    worker spends seconds on its imports, which then overlap the planning
    instead of delaying the first batch.  The engine imports scipy's filters,
    optimizer and FFT where it uses them (start-up of commands that need
    none); a worker will, so it loads them here.  Returns the worker's
    process id.
    """
    import scipy.fft
    import scipy.optimize
    import scipy.signal  # noqa: F401  (loaded for the batches to come)

    return os.getpid()
