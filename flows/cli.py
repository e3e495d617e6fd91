"""The ``changekind`` command line.

``changekind detect`` calls the engine's pure functions directly, in a process
pool over the machine's cores: no Prefect flow, so no Prefect import (it costs
seconds).  Commands that need Prefect import it inside their own function.

The fleet commands (scan, backfill, refit, events, triage, demo) live in
:mod:`changekind.flows.cli_fleet`, which registers them on :data:`app` when
imported at the bottom of this module (see DEVELOPERS.md).
"""

from __future__ import annotations

import functools
import json
import math
import os
import sys
import traceback
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from changekind.flows.inputs import SeriesInput, read_series_file
from changekind.tasks.errors import ChangekindError, SeriesError, SourceError

if TYPE_CHECKING:
    from changekind.tasks.types import DetectionResult, Event

EXIT_SERIES_FAILED = 1
"""Some series could not be analysed (the others were)."""

EXIT_USAGE = 2
"""Bad usage or unreadable input; nothing was analysed."""

DEBUG_ENV = "CHANGEKIND_DEBUG"
"""Set to 1 to get the traceback of an unexpected error in a series."""

app = typer.Typer(
    name="changekind",
    help="Find and classify events (AO, LS, TC, IO) in fleets of metric series.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


def _stdout() -> Console:
    """Console for results: plain lines are never hard-wrapped (commands stay copyable)."""
    console = Console(highlight=False, soft_wrap=True)
    if not console.is_terminal:
        console = Console(highlight=False, soft_wrap=True, width=120)
    return console


def _stderr() -> Console:
    return Console(stderr=True, highlight=False, soft_wrap=True)


def _fail_usage(message: str) -> typer.Exit:
    """Print one clear line on stderr; return the exit to raise."""
    _stderr().print(f"changekind: error: {message}", markup=False)
    return typer.Exit(EXIT_USAGE)


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
    item: SeriesInput, periods: tuple[int, ...] | None, critical: float | None
) -> SeriesOutcome:
    """Run the engine on one series; a bad series becomes a problem, not an exception.

    Runs in a worker process, so it takes and returns picklable values only.
    """
    from dataclasses import replace

    from changekind.tasks.decompose import regularize
    from changekind.tasks.detect import analyse_series

    try:
        result = analyse_series(
            item.series_id, item.timestamps, item.values, periods=periods, critical=critical
        )
        # Duplicate timestamps are merged by their median: say how many.
        merged = regularize(item.series_id, item.timestamps, item.values).n_duplicates
        if merged:
            note = duplicates_note(merged)
            result = replace(result, notes=(*result.notes, note))
    except SeriesError as exc:
        return SeriesOutcome(item.series_id, None, exc.problem)
    except ChangekindError as exc:
        return SeriesOutcome(item.series_id, None, str(exc))
    except Exception as exc:  # a bug: keep the other series going, but say so
        problem = f"internal error ({type(exc).__name__}: {exc}); please report it"
        if os.environ.get(DEBUG_ENV):
            problem += "\n" + traceback.format_exc()
        return SeriesOutcome(item.series_id, None, problem)
    return SeriesOutcome(item.series_id, result)


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
    err = _stderr()
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


# --------------------------------------------------------------------------- output


def _finite(value: Any) -> Any:
    """JSON has no NaN or infinity: write them as null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    return value


def _ordered_events(result: DetectionResult) -> list[Event]:
    return sorted(result.events, key=lambda e: e.position)


def event_records(outcomes: Sequence[SeriesOutcome]) -> list[dict[str, Any]]:
    """Every event as its JSON record, series in input order, then by time."""
    return [
        _finite(event.to_record())
        for outcome in outcomes
        if outcome.result is not None
        for event in _ordered_events(outcome.result)
    ]


def top_weights(event: Event, *, k: int = 3, floor: float = 0.01) -> str:
    """The leading type weights, e.g. ``'LS 0.79 · TC 0.19'``."""
    ranked = sorted(event.type_weights, key=lambda kv: -kv[1])
    shown = [f"{kind} {w:.2f}" for kind, w in ranked[:k] if w >= floor]
    return " · ".join(shown) or "-"


def _num(value: float | None, fmt: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return format(value, fmt)


def series_table(result: DetectionResult) -> Table:
    """A readable table of one series' events."""
    table = Table(
        title=f"{result.series_id}",
        title_justify="left",
        caption=f"model: {result.model.spec()}",
        caption_justify="left",
    )
    for name, justify in (
        ("time", "left"),
        ("type", "left"),
        ("effect", "right"),
        ("effect %", "right"),
        ("t", "right"),
        ("type weights", "left"),
        ("status", "left"),
        ("half-life", "right"),
    ):
        table.add_column(name, justify=justify, no_wrap=name in ("time", "type weights"))
    for event in _ordered_events(result):
        table.add_row(
            event.event_time,
            event.event_type,
            _num(event.effect, "+.4g"),
            _num(event.effect_pct, "+.1f"),
            _num(event.t_stat, "+.2f"),
            top_weights(event),
            event.status,
            event.half_life or "-",
        )
    return table


def print_result(console: Console, result: DetectionResult) -> None:
    """One series in human form: events table (or a line), model, patterns, notes."""
    counts = f"{result.nobs} points, {result.n_missing} missing, critical |t| {result.critical:.2f}"
    if result.events:
        console.print(series_table(result))
        console.print(f"  {counts}", markup=False)
    else:
        console.print(f"{result.series_id}: no events ({counts})", markup=False)
        console.print(f"  model: {result.model.spec()}", markup=False)
    for pattern in result.patterns:
        console.print(
            f"  recurring pattern: spikes every {pattern.period_time} "
            f"({pattern.period} points), {pattern.occurrences} times, "
            f"amplitude {pattern.amplitude:+.4g}; absorbed into the seasonal model",
            markup=False,
        )
    for note in result.notes:
        console.print(f"  note: {note}", markup=False)
    console.print()


def report_problems(outcomes: Sequence[SeriesOutcome]) -> int:
    """One stderr line per failed series; returns how many failed."""
    err = _stderr()
    failed = [o for o in outcomes if o.problem is not None]
    for outcome in failed:
        err.print(
            f"changekind: series {outcome.series_id!r} skipped: {outcome.problem}", markup=False
        )
    return len(failed)


# --------------------------------------------------------------------------- detect


def _check_critical(value: float | None) -> float | None:
    if value is not None and (not math.isfinite(value) or value <= 0):
        raise typer.BadParameter(
            f"{value} is not usable; give a positive number of standard errors such as 3.5 "
            "(or leave it out for the default, which grows with the series length)"
        )
    return value


@app.command()
def detect(
    input: Annotated[
        Path,
        typer.Argument(
            metavar="INPUT",
            help="CSV or Parquet: columns series_id,timestamp,value (many series) or "
            "timestamp,value (one series, named after the file).",
            show_default=False,
        ),
    ],
    season: Annotated[
        list[int] | None,
        typer.Option(
            "--season",
            min=2,
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
            callback=_check_critical,
            help="Critical |t| for an event.  Default grows with the series length to "
            "keep false events rare.",
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
    worker = None
    if window is not None:
        from changekind.tasks.window import parse_window

        try:
            parse_window(window)
        except ChangekindError as exc:
            raise _fail_usage(str(exc)) from None
        worker = functools.partial(_windowed_worker, window=window)
    try:
        items = read_series_file(input)
    except SourceError as exc:
        raise _fail_usage(str(exc)) from None
    periods = tuple(season) if season else None
    outcomes = _run_with_progress(
        items, periods=periods, critical=critical, label="analysing", worker=worker
    )
    if as_json:
        sys.stdout.write(json.dumps(event_records(outcomes), indent=2, allow_nan=False) + "\n")
        sys.stdout.flush()
        err = _stderr()
        for outcome in outcomes:  # merged duplicates: the JSON array has no place for them
            for note in outcome.result.notes if outcome.result is not None else ():
                if "duplicate timestamp" in note:
                    err.print(f"changekind: series {outcome.series_id!r}: {note}", markup=False)
    else:
        console = _stdout()
        for outcome in outcomes:
            if outcome.result is not None:
                print_result(console, outcome.result)
    if report_problems(outcomes):
        raise typer.Exit(EXIT_SERIES_FAILED)


def _windowed_worker(
    item: SeriesInput, periods: tuple[int, ...] | None, critical: float | None, *, window: str
) -> SeriesOutcome:
    from changekind.flows.cli_window import analyse_windowed_one

    return analyse_windowed_one(item, window, periods, critical)


def main() -> None:
    """Entry point of the ``changekind`` console script."""
    app()


if __name__ == "__main__":
    # Run as ``python -m``, this file is ``__main__``; the commands register
    # themselves on the app of the importable module, so run that one.
    from changekind.flows.cli import main as _main

    _main()
else:
    # The other commands register themselves on ``app`` when imported.
    from changekind.flows import (
        cli_fleet,  # noqa: F401
        cli_incidents,  # noqa: F401
        cli_report,  # noqa: F401
        cli_window,  # noqa: F401
    )
