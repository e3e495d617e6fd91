"""The fleet runs: ``scan``, ``backfill`` and ``refit``, each one Prefect flow.

The flows are imported inside the commands, on purpose: importing them loads
Prefect, which costs seconds that ``changekind detect`` (registered on the
same app) must not pay.
"""

from __future__ import annotations

import json
import os
import sys
import time
import traceback
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from typing import TYPE_CHECKING, Annotated, Any

import typer
from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    SpinnerColumn,
    TextColumn,
    TimeElapsedColumn,
)

from changekind.flows.cli.app import (
    DEBUG_ENV,
    EXIT_BUSY,
    EXIT_INTERRUPTED,
    EXIT_RUN_FAILED,
    EXIT_SERIES_FAILED,
    OPTION_NAMES,
    app,
    console_without_tracebacks,
    err_console,
    is_configuration,
    known_cause,
    out_console,
    usage_errors,
    validation_text,
)
from changekind.flows.cli.config import (
    FleetConfig,
    check_time,
    fleet_arguments,
    fleet_config,
    flow_arguments,
    path_text,
    prefect_defaults,
    refusals_recorded,
)
from changekind.flows.cli.options import (
    CriticalOpt,
    DaskOpt,
    DbOpt,
    FalseBudgetOpt,
    JsonOpt,
    LabelOpt,
    MinEffectOpt,
    MinPointsOpt,
    QueryOpt,
    ReportOpt,
    RunnerOpt,
    SeriesColOpt,
    SeriesOpt,
    SourceOpt,
    TableOpt,
    TimeColOpt,
    ValueColOpt,
    WaitOpt,
    WindowOpt,
    WorkersOpt,
)
from changekind.flows.cli.output import print_summary, report_failures, summary_record
from changekind.flows.processes import shared_prefect_server, stop_children_with_this_process
from changekind.tasks.errors import ConfigError, RunBusyError

if TYPE_CHECKING:
    from changekind.flows.pipeline import RunSummary


class ProgressBar:
    """The ``progress_hook`` of a run: a spinner until work is planned, then a bar.

    Drawn on stderr when it is a terminal; a backfill's chunks each restart the bar.
    Until the work is planned the spinner says what the command waits for
    (:meth:`say`): the configuration's checks, Prefect's import, its server.
    """

    def __init__(self, label: str, console: Console) -> None:
        self.label = label
        self.chunk = 0
        self.complete = True  # the previous chunk's work is done (none at the start)
        self.running = False
        self.progress = Progress(
            SpinnerColumn(),
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TimeElapsedColumn(),
            console=console,
            transient=True,
        )
        self.task = self.progress.add_task(f"{label}: starting", total=None)

    def start(self) -> None:
        if not self.running:
            self.progress.start()
            self.running = True

    def stop(self) -> None:
        """Take the spinner off the terminal (before an error line is printed)."""
        if self.running:
            self.progress.stop()
            self.running = False

    def say(self, what: str) -> None:
        """Show what the command is waiting for, beside the spinner."""
        self.progress.update(self.task, description=f"{self.label}: {what}")

    def __call__(self, done: int, total: int, what: str) -> None:
        if self.complete:
            self.chunk += 1
        self.complete = done >= total
        part = f" chunk {self.chunk}" if self.chunk > 1 else ""
        self.progress.update(
            self.task, completed=done, total=total, description=f"{self.label}{part}: {what}"
        )


@contextmanager
def waiting(label: str) -> Iterator[ProgressBar | None]:
    """A spinner on stderr, when it is a terminal, for the command's whole wait.

    Taken off the terminal when the block ends, before any error is printed
    (``usage_errors`` outside this block prints it).  Nothing is drawn when
    stderr is not a terminal, and nothing ever goes to stdout (``--json``).
    """
    err = err_console()
    bar = ProgressBar(label, err) if err.is_terminal else None
    if bar is not None:
        bar.say("checking the source and the database")
        bar.start()
    try:
        yield bar
    finally:
        if bar is not None:
            bar.stop()


def run_fleet_flow(
    flow: Any,
    arguments: Mapping[str, Any],
    config: FleetConfig,
    *,
    label: str,
    bar: ProgressBar | None = None,
) -> RunSummary:
    """Run one fleet flow with the configured task runner, drawing a progress bar.

    ``bar`` (from :func:`waiting`) is drawn on; without it, one is made when
    stderr is a terminal.

    Raises
    ------
    ConfigError
        An ChangekindError or validation error raised inside the flow.
    typer.Exit
        With :data:`EXIT_RUN_FAILED` when the run failed otherwise, or
        :data:`EXIT_INTERRUPTED` on Ctrl-C (the message printed).
    """
    prefect_defaults()
    # Deliberately here: the pipeline imports Prefect (seconds of start-up).
    from changekind.flows.pipeline import make_task_runner, progress_hook

    task_runner = make_task_runner(
        config.runner, workers=config.workers, dask_address=config.dask_address
    )
    configured = flow.with_options(task_runner=task_runner)
    err = err_console()
    if bar is None and err.is_terminal:
        bar = ProgressBar(label, err)
    token = progress_hook.set(bar)
    try:
        if bar is not None:
            bar.start()
        with (
            stop_children_with_this_process(),
            shared_prefect_server(say=None if bar is None else bar.say),
            console_without_tracebacks(),
        ):
            return configured(**arguments)
    except KeyboardInterrupt:
        if bar is not None:
            bar.stop()
        err_console().print(
            f"changekind: {label} interrupted; run it again to continue from where each "
            "series stopped",
            markup=False,
        )
        raise typer.Exit(EXIT_INTERRUPTED) from None
    except Exception as exc:
        if bar is not None:
            bar.stop()
        cause = known_cause(exc)
        if isinstance(cause, RunBusyError):
            err_console().print(f"changekind: {label} not run: {cause}", markup=False)
            raise typer.Exit(EXIT_BUSY) from None
        if cause is not None and is_configuration(cause):
            raise ConfigError(validation_text(cause, OPTION_NAMES)) from None
        if cause is not None:
            exc = cause
        first = " ".join(str(exc).split("\n")[0].split()) or type(exc).__name__
        hint = "" if os.environ.get(DEBUG_ENV) else f" (set {DEBUG_ENV}=1 for the traceback)"
        err_console().print(
            f"changekind: error: the {label} run failed: {type(exc).__name__}: {first}; "
            f"run it again to continue from where each series stopped{hint}",
            markup=False,
        )
        if os.environ.get(DEBUG_ENV):
            traceback.print_exc()
        raise typer.Exit(EXIT_RUN_FAILED) from None
    finally:
        progress_hook.reset(token)
        if bar is not None:
            bar.stop()


# --------------------------------------------------------------------------- scan, backfill, refit


@app.command()
def scan(
    source: SourceOpt = None,
    db: DbOpt = None,
    runner: RunnerOpt = None,
    dask_address: DaskOpt = None,
    workers: WorkersOpt = None,
    series_column: SeriesColOpt = None,
    timestamp_column: TimeColOpt = None,
    value_column: ValueColOpt = None,
    table: TableOpt = None,
    query: QueryOpt = None,
    label_column: LabelOpt = None,
    critical: CriticalOpt = None,
    false_budget: FalseBudgetOpt = None,
    min_effect: MinEffectOpt = None,
    min_points: MinPointsOpt = None,
    window: WindowOpt = None,
    report: ReportOpt = None,
    until: Annotated[
        str | None,
        typer.Option(
            "--until",
            metavar="T",
            help="Read data before this time only (exclusive).  Default: all data.",
            show_default=False,
        ),
    ] = None,
    series: SeriesOpt = None,
    wait: WaitOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Scan the fleet: test every series' new points against its stored model.

    Series without a model are fitted on the history they have and every event
    in it is reported.  Events, models and the run's record go to --db.
    """
    given = locals()

    def prepare(config: FleetConfig, bar: ProgressBar | None) -> tuple[Any, dict[str, Any]]:
        bound = check_time(until, "--until", config.time_kind)
        _say(bar, "loading Prefect")
        # Deliberately here: the flows import Prefect (seconds of start-up).
        from changekind.flows.scan import scan_flow

        return scan_flow, flow_arguments(
            scan_flow, config, until=bound, series=series or None, report_dir=path_text(report)
        )

    run_fleet_command("scan", given, prepare, as_json=as_json)


@app.command()
def backfill(
    start: Annotated[
        str,
        typer.Option(
            "--start", metavar="T", help="First time of the span (inclusive).", show_default=False
        ),
    ],
    end: Annotated[
        str,
        typer.Option("--end", metavar="T", help="End of the span (exclusive).", show_default=False),
    ],
    source: SourceOpt = None,
    db: DbOpt = None,
    chunk: Annotated[
        str,
        typer.Option(
            "--chunk",
            metavar="D",
            help="Length of each chunk, processed in order (a rerun after a crash continues "
            "from the last chunk written).",
        ),
    ] = "7D",
    warmup: Annotated[
        str,
        typer.Option(
            "--warmup",
            metavar="D",
            help="History before --start that series without a model are fitted on; "
            "events in it are not reported.",
        ),
    ] = "7D",
    runner: RunnerOpt = None,
    dask_address: DaskOpt = None,
    workers: WorkersOpt = None,
    series_column: SeriesColOpt = None,
    timestamp_column: TimeColOpt = None,
    value_column: ValueColOpt = None,
    table: TableOpt = None,
    query: QueryOpt = None,
    label_column: LabelOpt = None,
    critical: CriticalOpt = None,
    false_budget: FalseBudgetOpt = None,
    min_effect: MinEffectOpt = None,
    min_points: MinPointsOpt = None,
    window: WindowOpt = None,
    report: ReportOpt = None,
    series: SeriesOpt = None,
    wait: WaitOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Analyse a historical span, START <= t < END, in chunks; resumable.

    Times are ISO 8601 (2026-06-01, 2026-06-01T12:00:00Z) and durations such as
    7D or 6h; sources with numeric timestamps take numbers for all four.
    """
    given = locals()

    def prepare(config: FleetConfig, bar: ProgressBar | None) -> tuple[Any, dict[str, Any]]:
        check_time(start, "--start", config.time_kind)
        check_time(end, "--end", config.time_kind)
        _say(bar, "loading Prefect")
        # Deliberately here: the flows import Prefect (seconds of start-up).
        from changekind.flows.scan import backfill_flow, split_span

        split_span(start, end, chunk, warmup)  # a bad span or duration: ConfigError here
        return backfill_flow, flow_arguments(
            backfill_flow,
            config,
            start=start,
            end=end,
            chunk=chunk,
            warmup=warmup,
            series=series or None,
            report_dir=path_text(report),
        )

    run_fleet_command("backfill", given, prepare, as_json=as_json)


@app.command()
def refit(
    source: SourceOpt = None,
    db: DbOpt = None,
    series: SeriesOpt = None,
    runner: RunnerOpt = None,
    dask_address: DaskOpt = None,
    workers: WorkersOpt = None,
    series_column: SeriesColOpt = None,
    timestamp_column: TimeColOpt = None,
    value_column: ValueColOpt = None,
    table: TableOpt = None,
    query: QueryOpt = None,
    label_column: LabelOpt = None,
    critical: CriticalOpt = None,
    false_budget: FalseBudgetOpt = None,
    min_effect: MinEffectOpt = None,
    min_points: MinPointsOpt = None,
    window: WindowOpt = None,
    wait: WaitOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Estimate the models of all (or the --series given) again on all their history."""
    given = locals()

    def prepare(config: FleetConfig, bar: ProgressBar | None) -> tuple[Any, dict[str, Any]]:
        _say(bar, "loading Prefect")
        # Deliberately here: the flows import Prefect (seconds of start-up).
        from changekind.flows.scan import refit_flow

        return refit_flow, flow_arguments(refit_flow, config, series=series or None)

    run_fleet_command("refit", given, prepare, as_json=as_json)


def run_fleet_command(
    label: str,
    given: Mapping[str, Any],
    prepare: Callable[[FleetConfig, ProgressBar | None], tuple[Any, dict[str, Any]]],
    *,
    as_json: bool,
) -> None:
    """The common course of scan, backfill and refit.

    ``given`` are the command's parameters (its ``locals()``); ``prepare`` checks
    what is the command's own, imports its flow and returns the flow with its
    arguments.  A configuration error up to there is recorded as a refusal.
    """
    prefect_defaults()
    with usage_errors(), waiting(label) as bar:
        with refusals_recorded(label, given["db"]):
            config = fleet_config(**fleet_arguments(given))
            flow, arguments = prepare(config, bar)
        t0 = time.perf_counter()
        summary = run_fleet_flow(flow, arguments, config, label=label, bar=bar)
    finish(summary, as_json=as_json, wall=time.perf_counter() - t0)


def _say(bar: ProgressBar | None, what: str) -> None:
    if bar is not None:
        bar.say(what)


def finish(summary: RunSummary, *, as_json: bool, wall: float) -> None:
    if as_json:
        sys.stdout.write(json.dumps(summary_record(summary), indent=2, allow_nan=False) + "\n")
        sys.stdout.flush()
        report_failures(summary)
    else:
        print_summary(out_console(), summary, wall=wall)
    if summary.series_failed or summary.problems:
        raise typer.Exit(EXIT_SERIES_FAILED)
