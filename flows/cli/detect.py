"""``changekind detect``: every series of one input, analysed on the machine's cores.

It calls the engine's pure functions directly, in a process pool: no Prefect
flow, so no Prefect import (it costs seconds; ``tests/flows/cli/test_detect.py``
checks that ``detect`` does not load it).  ``--window`` analyses window
summaries instead of raw points (:func:`changekind.tasks.window.detection.detect_windowed`).
"""

from __future__ import annotations

import functools
import json
import os
import sys
import traceback
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Annotated

import typer
from pydantic import ValidationError
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from changekind.flows.cli.app import (
    DEBUG_ENV,
    EXIT_SERIES_FAILED,
    OPTION_NAMES,
    app,
    err_console,
    fail_usage,
    out_console,
    validation_text,
)
from changekind.flows.cli.output import event_records, print_result
from changekind.flows.settings import RunOptions
from changekind.tasks.decompose import regularize
from changekind.tasks.detect import analyse_series
from changekind.tasks.errors import SourceError, series_failure
from changekind.tasks.fetch.inputs import SeriesInput, read_series_file
from changekind.tasks.fetch.values import SourceProblem
from changekind.tasks.types import DetectionResult, Event
from changekind.tasks.window.detection import detect_windowed

# --------------------------------------------------------------------------- running the engine


@dataclass(frozen=True, slots=True)
class SeriesOutcome:
    """What the engine made of one input series: a result, or the problem in words."""

    series_id: str
    result: DetectionResult | None
    problem: str | None = None

    @property
    def ok(self) -> bool:
        return self.result is not None


def analyse_one(
    item: SeriesInput,
    periods: tuple[int, ...] | None,
    critical: float | None,
    *,
    false_budget: float | None = None,
) -> SeriesOutcome:
    """Run the engine on one series; a bad series becomes a problem, not an exception.

    Runs in a worker process, so it takes and returns picklable values only.
    ``false_budget``: as for :func:`~changekind.tasks.detect.analyse_series`.
    """

    def run() -> DetectionResult:
        result = analyse_series(
            item.series_id,
            item.timestamps,
            item.values,
            periods=periods,
            critical=critical,
            false_budget=false_budget,
        )
        # Duplicate timestamps are merged by their median: say how many.
        merged = regularize(item.series_id, item.timestamps, item.values).n_duplicates
        if merged:
            result = replace(result, notes=(*result.notes, duplicates_note(merged)))
        return result

    return _outcome(item.series_id, run)


def analyse_windowed_one(
    item: SeriesInput,
    window: str,
    periods: tuple[int, ...] | None,
    critical: float | None,
    *,
    false_budget: float | None = None,
) -> SeriesOutcome:
    """:func:`analyse_one` for windowed mode: one series, problems as text, picklable.

    The outcome's result is :meth:`WindowedResult.as_detection`, so the
    ``detect`` command's table and JSON output apply unchanged (``nobs`` counts
    windows; a note gives the raw points).
    """

    def run() -> DetectionResult:
        return detect_windowed(
            item.series_id,
            item.timestamps,
            item.values,
            window,
            critical=critical,
            periods=periods,
            false_budget=false_budget,
        ).as_detection()

    return _outcome(item.series_id, run)


def _outcome(series_id: str, run: Callable[[], DetectionResult]) -> SeriesOutcome:
    """``run()`` as an outcome: a series' own problem in words (:func:`series_failure`);
    anything else, a bug, is said as one without stopping the other series."""
    try:
        return SeriesOutcome(series_id, run())
    except Exception as exc:
        failure = series_failure(exc)
        if failure is not None:
            return SeriesOutcome(series_id, None, failure[1])
        problem = f"internal error ({type(exc).__name__}: {exc}); please report it"
        if os.environ.get(DEBUG_ENV):
            problem += "\n" + traceback.format_exc()
        return SeriesOutcome(series_id, None, problem)


def duplicates_note(n: int) -> str:
    """The note of a series whose duplicate timestamps were merged."""
    return (
        f"{n} duplicate timestamp(s): the values of each repeated time were merged into "
        "their median"
    )


def analyse_inputs(
    items: Sequence[SeriesInput],
    *,
    periods: Sequence[int] | None = None,
    critical: float | None = None,
    max_workers: int | None = None,
    on_done: Callable[[SeriesOutcome], None] | None = None,
    worker: Callable[..., SeriesOutcome] | None = None,
) -> list[SeriesOutcome]:
    """Analyse many series on the machine's cores, results in input order.

    Parameters
    ----------
    items : sequence of SeriesInput
    periods : sequence of int, optional
        Seasonal periods in grid points for every series (None: the engine
        chooses per series).
    critical : float, optional
        Critical |t| (None: the engine's default for the series length).
    max_workers : int, optional
        Worker processes; default ``os.cpu_count()``.  One series, or one
        worker, runs in this process.
    on_done : callable, optional
        Called with each outcome as it completes (for progress displays).
    worker : callable, optional
        ``worker(item, periods, critical) -> SeriesOutcome`` (picklable);
        default :func:`analyse_one` (windowed mode passes its own).

    Returns
    -------
    list of SeriesOutcome
        Same order as ``items``.
    """
    period_tuple = None if periods is None else tuple(int(p) for p in periods)
    run = worker or analyse_one
    workers = max_workers or os.cpu_count() or 1
    if len(items) <= 1 or workers <= 1:
        out = []
        for item in items:
            outcome = run(item, period_tuple, critical)
            if on_done is not None:
                on_done(outcome)
            out.append(outcome)
        return out
    results: list[SeriesOutcome | None] = [None] * len(items)
    with ProcessPoolExecutor(max_workers=min(workers, len(items))) as pool:
        # Submit everything (forking the workers) before the caller's progress
        # display starts any thread.
        futures = {
            pool.submit(run, item, period_tuple, critical): i for i, item in enumerate(items)
        }
        for future in as_completed(futures):
            outcome = future.result()
            results[futures[future]] = outcome
            if on_done is not None:
                on_done(outcome)
    return [r for r in results if r is not None]


def _run_with_progress(
    items: Sequence[SeriesInput],
    *,
    periods: Sequence[int] | None,
    critical: float | None,
    label: str,
    worker: Callable[..., SeriesOutcome] | None = None,
) -> list[SeriesOutcome]:
    """:func:`analyse_inputs` with a progress bar on stderr when it is a terminal."""
    err = err_console()
    if len(items) < 2 or not err.is_terminal:
        return analyse_inputs(items, periods=periods, critical=critical, worker=worker)
    progress = Progress(
        TextColumn(label),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        console=err,
        transient=True,
    )
    task_id = progress.add_task(label, total=len(items))
    started = False

    def tick(_: SeriesOutcome) -> None:
        nonlocal started
        if not started:
            progress.start()
            started = True
        progress.advance(task_id)

    try:
        return analyse_inputs(
            items, periods=periods, critical=critical, on_done=tick, worker=worker
        )
    finally:
        if started:
            progress.stop()


def report_problems(outcomes: Sequence[SeriesOutcome]) -> int:
    """One stderr line per failed series; returns how many failed."""
    err = err_console()
    failed = [o for o in outcomes if o.problem is not None]
    for outcome in failed:
        err.print(
            f"changekind: series {outcome.series_id!r} skipped: {outcome.problem}", markup=False
        )
    return len(failed)


# --------------------------------------------------------------------------- detect


@app.command()
def detect(
    input: Annotated[
        Path,
        typer.Argument(
            metavar="INPUT",
            help="CSV or Parquet file, or a folder of them, as scan --source reads it: "
            "columns series_id,timestamp,value (many series) or timestamp,value (one "
            "series, named after the file).",
            show_default=False,
        ),
    ],
    season: Annotated[
        list[int] | None,
        typer.Option(
            "--season",
            metavar="N",
            help="Seasonal period in samples (e.g. 288 for daily on 5-minute data); "
            "repeat for several.  Default: day/week/year cycles found in the data.",
            show_default=False,
        ),
    ] = None,
    critical: Annotated[
        float | None,
        typer.Option(
            "--critical",
            metavar="C",
            help="Critical |t| for an event.  Default grows with the series length to "
            "keep false events rare.",
            show_default=False,
        ),
    ] = None,
    false_budget: Annotated[
        float | None,
        typer.Option(
            "--false-budget",
            metavar="B",
            help="Expected false events per clean series per 30 days of data: the "
            "critical value then comes from the spacing, as in scan.  Default: from "
            "the series length (about 0.2 false events per analysis).  --critical "
            "overrides it.",
            show_default=False,
        ),
    ] = None,
    as_json: Annotated[
        bool,
        typer.Option("--json", help="Print only a JSON array of events on stdout."),
    ] = False,
    window: Annotated[
        str | None,
        typer.Option(
            "--window",
            metavar="SPAN",
            help="Analyse window summaries instead of raw points (any pandas offset, "
            "e.g. 10s, 1min): the window medians for AO/LS/TC/IO and the window "
            "spreads for variance changes (VC).",
            show_default=False,
        ),
    ] = None,
) -> None:
    """Find events in every series of INPUT and say what kind they are."""
    # One validation of each option: the same model as the fleet runs' options.
    try:
        options = RunOptions(
            critical=critical,
            periods=tuple(season) if season else None,
            window=window,
            **({} if false_budget is None else {"false_budget": false_budget}),
        )
    except ValidationError as exc:
        raise fail_usage(validation_text(exc, OPTION_NAMES)) from None
    budget = None if false_budget is None else options.false_budget  # given, checked
    worker = functools.partial(analyse_one, false_budget=budget)
    if options.window is not None:
        worker = functools.partial(_windowed_worker, window=options.window, false_budget=budget)
    problems: list[SourceProblem] = []
    try:
        items = read_series_file(input, problems=problems)
    except SourceError as exc:
        raise fail_usage(str(exc)) from None
    err = err_console()
    for problem in problems:  # skipped files, rows and cells, as scan records them
        err.print(f"changekind: {problem.describe()}", markup=False)
    outcomes = _run_with_progress(
        items, periods=options.periods, critical=options.critical, label="analysing", worker=worker
    )
    if as_json:
        sys.stdout.write(json.dumps(event_records(outcomes), indent=2, allow_nan=False) + "\n")
        sys.stdout.flush()
        err = err_console()
        for outcome in outcomes:  # merged duplicates: the JSON array has no place for them
            for note in outcome.result.notes if outcome.result is not None else ():
                if "duplicate timestamp" in note:
                    err.print(f"changekind: series {outcome.series_id!r}: {note}", markup=False)
    else:
        console = out_console()
        for outcome in outcomes:
            if outcome.result is not None:
                print_result(console, outcome.result)
    if report_problems(outcomes) or problems:
        raise typer.Exit(EXIT_SERIES_FAILED)


def _windowed_worker(
    item: SeriesInput,
    periods: tuple[int, ...] | None,
    critical: float | None,
    *,
    window: str,
    false_budget: float | None = None,
) -> SeriesOutcome:
    return analyse_windowed_one(item, window, periods, critical, false_budget=false_budget)


def windowed_records(
    series_id: str,
    timestamps,
    values,
    window: str,
    critical: float | None = None,
    *,
    periods: tuple[int, ...] | None = None,
) -> list[Event]:
    """Windowed detection of one series: its events (level events and VC), by window.

    Raises the ConfigError / SeriesError of
    :func:`changekind.tasks.window.detection.detect_windowed`.
    """
    result = detect_windowed(
        series_id, timestamps, values, window, critical=critical, periods=periods
    )
    return list(result.events)
