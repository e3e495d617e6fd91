"""The fleet commands of ``changekind``: scan, backfill, refit, events, triage, demo.

They register themselves on the shared :data:`changekind.flows.cli.app`, which
imports this module.  Importing it stays cheap (typer and rich only): Prefect,
the flows, the database layer and the engine are imported inside the commands,
so ``changekind detect`` never loads Prefect.

Every command checks its configuration in this process before any flow runs:
the settings, the options, the source (:func:`~changekind.tasks.fetch.open_source`)
and the database (:func:`~changekind.tasks.persist.connect`).  A flow wraps the
errors raised inside it in its own machinery; checked here, bad configuration
gets one clear line on stderr and exit code 2 instead.

Exit codes: 0 done, every series and file analysed; 1 done, but some series,
rows or source files could not be analysed (each is named on stderr and
recorded); 2 bad usage or configuration (nothing was run); 3 the run failed
part-way (for example the database stayed away longer than the retries: what
was written stays, and a rerun continues from each series' watermark); 4
another run holds the database (nothing was run); 130 interrupted.
"""

from __future__ import annotations

import csv
import inspect
import io
import json
import logging
import math
import os
import sys
import time
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
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
from rich.table import Table

from changekind.flows.cli import (
    DEBUG_ENV,
    EXIT_SERIES_FAILED,
    _fail_usage,
    _finite,
    _num,
    _stderr,
    _stdout,
    app,
)
from changekind.tasks.errors import ConfigError

if TYPE_CHECKING:
    import pandas as pd

    from changekind.flows.pipeline import RunSummary
    from changekind.flows.settings import RunOptions

EXIT_RUN_FAILED = 3
"""The run itself failed (not one series: the run); a rerun continues where it stopped."""

EXIT_BUSY = 4
"""Another fleet run holds the database (one run at a time per database); nothing was run."""

EXIT_INTERRUPTED = 130
"""Stopped by Ctrl-C (128 + SIGINT, the shell's convention)."""

RUNNERS: tuple[str, ...] = ("threads", "processes", "dask")

PREFECT_DEFAULTS: dict[str, str] = {
    # Offline machines: no telemetry (it also logs a harmless "database is locked").
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    # Per-task INFO logging costs 20-35 % of the orchestration time (PREFECT-NOTES).
    "PREFECT_LOGGING_LEVEL": "WARNING",
    # The ephemeral server's default 20 s start-up timeout was seen to expire under load.
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "120",
}
"""Set in the CLI process (unless already set) before Prefect is imported."""

DASK_DEFAULTS: dict[str, str] = {
    # A local cluster logs some 30 INFO lines (start, workers, closing) on stderr.
    "DASK_LOGGING__DISTRIBUTED": "warning",
}
"""Set (unless already set) before a Dask runner is made."""

TABLE_ROWS = 200
"""Most events the ``events`` table shows (the newest); --json and --csv show all."""

SHOWN_FAILURES = 20
"""Most failed series a summary lists one by one."""

_OPTION_NAMES = {
    "critical": "--critical",
    "min_points": "--min-points",
    "workers": "--workers",
    "wait_seconds": "--wait",
}
_SETTING_NAMES = {
    "db_url": "CHANGEKIND_DB_URL",
    "source": "CHANGEKIND_SOURCE",
    "runner": "CHANGEKIND_RUNNER",
    "workers": "CHANGEKIND_WORKERS",
    "dask_address": "CHANGEKIND_DASK_ADDRESS",
}


# --------------------------------------------------------------------------- options

SourceOpt = Annotated[
    str | None,
    typer.Option(
        "--source",
        metavar="PATH",
        help="Where the series live, in long form (series id, timestamp, value): a Parquet "
        "file or dataset folder, a CSV file or folder, or a database URL with --table or "
        "--query.  Default: $CHANGEKIND_SOURCE.",
        show_default=False,
    ),
]
DbOpt = Annotated[
    str | None,
    typer.Option(
        "--db",
        metavar="URL",
        help="Database for events, models and run records (sqlite:///FILE or "
        "postgresql+psycopg://user@host/db).  Default: $CHANGEKIND_DB_URL, else "
        "sqlite:///changekind.db in the working folder.",
        show_default=False,
    ),
]
RunnerOpt = Annotated[
    str | None,
    typer.Option(
        "--runner",
        metavar="RUNNER",
        help="Where batches run: threads (of this process), processes (workers on this "
        "machine) or dask (a Dask cluster; needs a Prefect server: PREFECT_API_URL).  "
        "Default: $CHANGEKIND_RUNNER, else threads.",
        show_default=False,
    ),
]
DaskOpt = Annotated[
    str | None,
    typer.Option(
        "--dask-address",
        metavar="ADDR",
        help="Scheduler of an existing Dask cluster (tcp://host:8786) for --runner dask; "
        "default: a local cluster of --workers processes.  Default: $CHANGEKIND_DASK_ADDRESS.",
        show_default=False,
    ),
]
WorkersOpt = Annotated[
    int | None,
    typer.Option(
        "--workers",
        metavar="N",
        help="Parallel batches (threads, processes or local Dask workers).  Default: "
        "$CHANGEKIND_WORKERS, else the number of cores.",
        show_default=False,
    ),
]
SeriesColOpt = Annotated[
    str | None,
    typer.Option(
        "--series-column",
        metavar="C",
        help="Source column holding the series id (default series_id).",
        show_default=False,
    ),
]
TimeColOpt = Annotated[
    str | None,
    typer.Option(
        "--timestamp-column",
        metavar="C",
        help="Source column holding the timestamp (default timestamp).",
        show_default=False,
    ),
]
ValueColOpt = Annotated[
    str | None,
    typer.Option(
        "--value-column",
        metavar="C",
        help="Source column holding the value (default value).",
        show_default=False,
    ),
]
TableOpt = Annotated[
    str | None,
    typer.Option(
        "--table",
        metavar="T",
        help="Database sources: the table to read (schema.table allowed).",
        show_default=False,
    ),
]
QueryOpt = Annotated[
    str | None,
    typer.Option(
        "--query",
        metavar="Q",
        help="Database sources: a SELECT to read instead of a table.",
        show_default=False,
    ),
]
CriticalOpt = Annotated[
    float | None,
    typer.Option(
        "--critical",
        metavar="C",
        help="Critical |t| for an event (more than 1).  Default grows with the series "
        "length to keep false events rare.",
        show_default=False,
    ),
]
MinPointsOpt = Annotated[
    int | None,
    typer.Option(
        "--min-points",
        metavar="N",
        help="Observed points a series needs before its first model is fitted; shorter "
        "series are deferred to a later run.  Default 96.",
        show_default=False,
    ),
]
WindowOpt = Annotated[
    str | None,
    typer.Option(
        "--window",
        metavar="SPAN",
        help="Analyse window summaries instead of raw points (any fixed pandas offset, "
        "e.g. 10s, 1min): window medians for AO/LS/TC/IO, window spreads for variance "
        "changes (VC).  --min-points then counts windows.  A series whose model was "
        "fitted on other windows is refitted.",
        show_default=False,
    ),
]
ReportOpt = Annotated[
    Path | None,
    typer.Option(
        "--report",
        metavar="DIR",
        help="Also write the HTML report of the run's new and changed events to DIR "
        "(index.html and a picture per event, as changekind report).",
        show_default=False,
    ),
]
SeriesOpt = Annotated[
    list[str] | None,
    typer.Option(
        "--series",
        metavar="ID",
        help="Only this series; repeat for several.  Default: every series in the source.",
        show_default=False,
    ),
]
WaitOpt = Annotated[
    float | None,
    typer.Option(
        "--wait",
        metavar="SECONDS",
        help="One fleet run at a time per database: how long to wait for another run "
        "to finish before giving up (exit code 4).  Default 300.",
        show_default=False,
    ),
]
JsonOpt = Annotated[
    bool,
    typer.Option("--json", help="Print only the run's summary as JSON on stdout."),
]


# --------------------------------------------------------------------------- configuration


def prefect_defaults(environ: dict[str, str] | None = None) -> None:
    """Set :data:`PREFECT_DEFAULTS` in the environment where they are not set yet."""
    env = os.environ if environ is None else environ
    for name, value in PREFECT_DEFAULTS.items():
        env.setdefault(name, value)


def _text(path: Path | None) -> str | None:
    return None if path is None else str(path)


def _fleet_arguments(given: Mapping[str, Any]) -> dict[str, Any]:
    """The fleet command's own parameters that :func:`fleet_config` checks."""
    wanted = inspect.signature(fleet_config).parameters
    return {name: value for name, value in given.items() if name in wanted}


def _validation_text(exc: Exception, names: Mapping[str, str]) -> str:
    """A pydantic ValidationError in one line, fields named as the user wrote them."""
    errors = getattr(exc, "errors", None)
    if errors is None:
        return str(exc)
    parts = []
    for err in errors():
        loc = err.get("loc") or ("",)
        name = names.get(str(loc[0]), str(loc[0]))
        message = str(err.get("msg", "invalid")).removeprefix("Value error, ")
        parts.append(f"{name} {err.get('input')!r}: {message}")
    return "; ".join(parts)


def _settings():
    """The deployment defaults (``CHANGEKIND_*``); a bad variable is a usage problem."""
    from pydantic import ValidationError

    from changekind.flows.settings import Settings

    try:
        return Settings()
    except ValidationError as exc:
        raise ConfigError(
            f"bad environment setting: {_validation_text(exc, _SETTING_NAMES)}"
        ) from None


def _db_url(db: str | None) -> str:
    return db if db is not None else _settings().db_url


def _check_db(url: str) -> None:
    """Connect once (and let go): an unreachable database is a usage problem."""
    from changekind.tasks import persist

    engine = persist.connect(url)
    engine.dispose()


def _require_tables(url: str) -> None:
    """The database exists and holds changekind's tables (reading commands only)."""
    import sqlalchemy as sa

    from changekind.tasks import persist

    parsed = sa.make_url(url) if "://" in url else None
    if parsed is not None and parsed.get_backend_name() == "sqlite":
        path = parsed.database
        if path and path != ":memory:" and not Path(path).exists():
            raise ConfigError(
                f"no database at {path!r}; run 'changekind scan' (or 'changekind demo') first, "
                "or point --db / CHANGEKIND_DB_URL at an existing one"
            )
    engine = persist.connect(url)
    try:
        present = sa.inspect(engine).has_table(persist.series_events.name)
    finally:
        engine.dispose()
    if not present:
        raise ConfigError(
            f"database {engine.url.render_as_string(hide_password=True)!r} holds no changekind "
            "tables yet; run 'changekind scan' or 'changekind backfill' against it first"
        )


@dataclass(frozen=True, slots=True)
class FleetConfig:
    """Everything a fleet command checked before starting its flow."""

    source: str
    db: str
    runner: str
    workers: int
    dask_address: str | None
    options: RunOptions
    columns: dict[str, str] | None
    time_kind: str
    sql: dict[str, str] = field(default_factory=dict)


def fleet_config(
    *,
    source: str | None,
    db: str | None,
    runner: str | None,
    dask_address: str | None,
    workers: int | None,
    series_column: str | None,
    timestamp_column: str | None,
    value_column: str | None,
    table: str | None,
    query: str | None,
    critical: float | None,
    min_points: int | None,
    window: str | None = None,
    wait: float | None = None,
) -> FleetConfig:
    """Check a fleet command's configuration in the order a person would fix it.

    Raises
    ------
    ConfigError, ChangekindError
        The first problem found, in words (the caller prints it).

    Notes
    -----
    1. Environment settings.  2. Runner and Dask address.  3. Analysis options.
    4. The source (opened and its columns checked).  5. The database (connected).
    6. A Dask runner needs a Prefect server.
    """
    from pydantic import ValidationError

    from changekind.flows.settings import RunOptions
    from changekind.tasks.fetch import open_source

    # Step 1: environment settings.
    settings = _settings()
    source = source if source is not None else settings.source
    if not source:
        raise ConfigError("no source given; pass --source PATH (or set CHANGEKIND_SOURCE)")
    db = db if db is not None else settings.db_url

    # Step 2: runner.
    chosen = runner if runner is not None else settings.runner
    if chosen not in RUNNERS:
        raise ConfigError(f"unknown runner {chosen!r}; use --runner threads, processes or dask")
    address = dask_address if dask_address is not None else settings.dask_address
    if dask_address is not None and chosen != "dask":
        raise ConfigError(
            f"--dask-address applies to --runner dask only (the runner is {chosen!r}); "
            "add --runner dask or drop --dask-address"
        )
    if chosen != "dask":
        address = None

    # Step 3: analysis options.
    knobs: dict[str, Any] = {}
    for name, value in (
        ("critical", critical),
        ("min_points", min_points),
        ("wait_seconds", wait),
    ):
        if value is not None:
            knobs[name] = value
    if window is not None:
        from changekind.tasks.window import window_text

        knobs["window"] = window_text(window)  # a bad window: ConfigError in its own words
    knobs["workers"] = workers if workers is not None else settings.workers
    try:
        options = RunOptions(**knobs)
    except ValidationError as exc:
        raise ConfigError(_validation_text(exc, _OPTION_NAMES)) from None

    # Step 4: the source.
    columns = {
        key: name
        for key, name in (
            ("series_id", series_column),
            ("timestamp", timestamp_column),
            ("value", value_column),
        )
        if name is not None
    }
    spec = open_source(source, columns=columns or None, table=table, query=query)
    sql = {k: v for k, v in (("table", table), ("query", query)) if v is not None}

    # Step 5: the database.
    _check_db(db)

    # Step 6: Dask workers cannot share an ephemeral Prefect server.
    if chosen == "dask":
        prefect_defaults()
        for name, value in DASK_DEFAULTS.items():
            os.environ.setdefault(name, value)
        from prefect.settings import get_current_settings

        if not get_current_settings().api.url:
            raise ConfigError(
                "--runner dask needs a Prefect server that its worker processes can share; "
                "start one with 'prefect server start' and set "
                "PREFECT_API_URL=http://127.0.0.1:4200/api (or use --runner processes)"
            )
    return FleetConfig(
        source=source if spec.kind == "sql" else spec.location,
        db=db,
        runner=chosen,
        workers=options.workers,
        dask_address=address,
        options=options,
        columns=columns or None,
        time_kind=spec.time_kind,
        sql=sql,
    )


def _check_time(value: str | None, what: str, time_kind: str) -> str | None:
    """A time bound the source can compare with: a number or a date-time, as it holds."""
    if value is None:
        return None
    if time_kind == "numeric":
        try:
            float(value)
        except ValueError:
            raise ConfigError(
                f"{what} {value!r} is not a number, and the source's timestamps are numbers"
            ) from None
        return value
    import pandas as pd

    bad = False
    try:
        float(value)
        bad = True
    except ValueError:
        pass
    if not bad:
        try:
            stamp = pd.Timestamp(value)
            bad = stamp is pd.NaT
        except (ValueError, TypeError, OverflowError):
            bad = True
    if bad:
        raise ConfigError(
            f"{what} {value!r} is not a date-time; give an ISO 8601 time such as "
            "2026-06-01 or 2026-06-01T12:00:00Z"
        )
    return value


# --------------------------------------------------------------------------- running a flow


class _NoTraceback(logging.Filter):
    """Keep Prefect's error lines on the console but drop their tracebacks."""

    def filter(self, record: logging.LogRecord) -> bool:
        record.exc_info = None
        record.exc_text = None
        record.stack_info = None
        return True


@contextmanager
def _console_without_tracebacks() -> Iterator[None]:
    """While a flow runs, the root console handler prints no tracebacks (unless debugging)."""
    if os.environ.get(DEBUG_ENV):
        yield
        return
    quiet = _NoTraceback()
    handlers = list(logging.getLogger().handlers)
    for handler in handlers:
        handler.addFilter(quiet)
    try:
        yield
    finally:
        for handler in handlers:
            handler.removeFilter(quiet)


def _is_configuration(exc: BaseException) -> bool:
    """A problem of the configuration (exit 2), not of the run (exit 3)."""
    from pydantic import ValidationError

    return isinstance(exc, ConfigError | ValidationError)


def _known_cause(exc: BaseException) -> BaseException | None:
    """The ChangekindError (or pydantic ValidationError) behind an exception, if any."""
    from pydantic import ValidationError

    from changekind.tasks.errors import ChangekindError

    seen: set[int] = set()
    current: BaseException | None = exc
    while current is not None and id(current) not in seen:
        if isinstance(current, ChangekindError | ValidationError):
            return current
        seen.add(id(current))
        current = current.__cause__ or current.__context__
    return None


class _ProgressBar:
    """The ``progress_hook`` of a run: a spinner until work is planned, then a bar.

    Drawn on stderr when it is a terminal; a backfill's chunks each restart the bar.
    """

    def __init__(self, label: str, console: Console) -> None:
        self.label = label
        self.chunk = 0
        self.complete = True  # the previous chunk's work is done (none at the start)
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

    def __call__(self, done: int, total: int, what: str) -> None:
        if self.complete:
            self.chunk += 1
        self.complete = done >= total
        part = f" chunk {self.chunk}" if self.chunk > 1 else ""
        self.progress.update(
            self.task, completed=done, total=total, description=f"{self.label}{part}: {what}"
        )


def run_fleet_flow(
    flow: Any,
    arguments: Mapping[str, Any],
    config: FleetConfig,
    *,
    label: str,
) -> RunSummary:
    """Run one fleet flow with the configured task runner, drawing a progress bar.

    Raises
    ------
    ConfigError
        An ChangekindError or validation error raised inside the flow.
    typer.Exit
        With :data:`EXIT_RUN_FAILED` when the run failed otherwise, or
        :data:`EXIT_INTERRUPTED` on Ctrl-C (the message printed).
    """
    prefect_defaults()
    from changekind.flows.pipeline import make_task_runner, progress_hook
    from changekind.flows.processes import shared_prefect_server, stop_children_with_this_process
    from changekind.tasks.errors import RunBusyError

    task_runner = make_task_runner(
        config.runner, workers=config.workers, dask_address=config.dask_address
    )
    configured = flow.with_options(task_runner=task_runner)
    err = _stderr()
    bar = _ProgressBar(label, err) if err.is_terminal else None
    token = progress_hook.set(bar)
    try:
        if bar is not None:
            bar.progress.start()
        with (
            stop_children_with_this_process(),
            shared_prefect_server(),
            _console_without_tracebacks(),
        ):
            return configured(**arguments)
    except KeyboardInterrupt:
        _stderr().print(
            f"changekind: {label} interrupted; run it again to continue from where each "
            "series stopped",
            markup=False,
        )
        raise typer.Exit(EXIT_INTERRUPTED) from None
    except Exception as exc:
        cause = _known_cause(exc)
        if isinstance(cause, RunBusyError):
            _stderr().print(f"changekind: {label} not run: {cause}", markup=False)
            raise typer.Exit(EXIT_BUSY) from None
        if cause is not None and _is_configuration(cause):
            raise ConfigError(_validation_text(cause, _OPTION_NAMES)) from None
        if cause is not None:
            exc = cause
        first = " ".join(str(exc).split("\n")[0].split()) or type(exc).__name__
        hint = "" if os.environ.get(DEBUG_ENV) else f" (set {DEBUG_ENV}=1 for the traceback)"
        _stderr().print(
            f"changekind: error: the {label} run failed: {type(exc).__name__}: {first}; "
            f"run it again to continue from where each series stopped{hint}",
            markup=False,
        )
        if os.environ.get(DEBUG_ENV):
            import traceback

            traceback.print_exc()
        raise typer.Exit(EXIT_RUN_FAILED) from None
    finally:
        progress_hook.reset(token)
        if bar is not None:
            bar.progress.stop()


def _flow_arguments(flow: Any, config: FleetConfig, **extra: Any) -> dict[str, Any]:
    """The flow's parameters from the checked configuration."""
    import inspect

    params = inspect.signature(flow.fn).parameters
    arguments: dict[str, Any] = {
        "source": config.source,
        "db": _db_parameter(config.db),
        "options": config.options,
        "columns": config.columns,
        **{k: v for k, v in extra.items() if v is not None},
    }
    for name, value in config.sql.items():
        if name not in params:
            raise ConfigError(
                f"--{name} is not supported yet: the fleet flows of this version read "
                "Parquet and CSV sources only; export the series to Parquet meanwhile"
            )
        arguments[name] = value
    return arguments


def _db_parameter(url: str) -> str:
    """The database URL as a flow parameter: without its password.

    Prefect stores flow-run parameters in the clear; the password goes to
    this process's environment (``CHANGEKIND_DB_PASSWORD``), where the flow
    finds it (:func:`~changekind.flows.settings.resolve_db`).
    """
    from changekind.flows.settings import split_password

    public, password = split_password(url)
    if password is not None:
        os.environ["CHANGEKIND_DB_PASSWORD"] = password
    return public


@contextmanager
def usage_errors() -> Iterator[None]:
    """Turn configuration problems into one stderr line and exit code 2."""
    from pydantic import ValidationError

    from changekind.tasks.errors import ChangekindError

    try:
        yield
    except ChangekindError as exc:  # ConfigError from the checks here, or from the steps
        raise _fail_usage(str(exc)) from None
    except ValidationError as exc:
        raise _fail_usage(_validation_text(exc, _OPTION_NAMES)) from None


# --------------------------------------------------------------------------- summaries


def summary_record(summary: RunSummary) -> dict[str, Any]:
    """A RunSummary as JSON-ready values (NaN and infinities as null)."""
    return _finite(
        {
            "run_id": summary.run_id,
            "kind": summary.kind,
            "series_total": summary.series_total,
            "series_ok": summary.series_ok,
            "series_failed": summary.series_failed,
            "deferred": summary.deferred,
            "cold": summary.cold,
            "warm": summary.warm,
            "events_new": summary.events_new,
            "events_changed": summary.events_changed,
            "events_retracted": summary.events_retracted,
            "by_type": dict(summary.by_type),
            "batches": summary.batches,
            "seconds": summary.seconds,
            "failures": [
                {"series_id": sid, "stage": stage, "message": message}
                for sid, stage, message in summary.failures
            ],
            "top_events": [e.to_record() for e in summary.top_events],
            "timings": dict(summary.timings),
            "source_problems": list(summary.problems),
            "notes": list(summary.notes),
        }
    )


def _seconds(value: float) -> str:
    return f"{value:.1f} s" if value < 120 else f"{value / 60:.1f} min"


def print_summary(console: Console, summary: RunSummary, *, wall: float | None = None) -> None:
    """A run's summary for people: counts, new events by type, strongest events, failures."""
    # Variance changes come from windowed runs only: shown when there are some.
    by_type = ", ".join(f"{k} {n}" for k, n in summary.by_type if k != "VC" or n)
    took = _seconds(summary.seconds)
    if wall is not None:
        took += f" ({_seconds(wall)} with Prefect start-up)"
    console.print(
        f"{summary.kind} {summary.run_id}: {summary.series_total} series "
        f"({summary.cold} cold, {summary.warm} warm, {summary.series_failed} failed, "
        f"{summary.deferred} deferred) in {summary.batches} "
        f"{'batch' if summary.batches == 1 else 'batches'}, {took}",
        markup=False,
    )
    console.print(
        f"events: {summary.events_new} new ({by_type}), {summary.events_changed} changed, "
        f"{summary.events_retracted} retracted",
        markup=False,
    )
    if summary.top_events:
        table = Table(title="Strongest events of the run", title_justify="left")
        for name in ("series", "time", "type", "effect", "effect %", "t", "status"):
            table.add_column(name, justify="left" if name in ("series", "time") else "right")
        for e in summary.top_events:
            table.add_row(
                e.series_id,
                e.event_time,
                e.event_type,
                _num(e.effect, "+.4g"),
                _num(e.effect_pct, "+.1f"),
                _num(e.t_stat, "+.2f"),
                e.status,
            )
        console.print(table)
    if summary.failures:
        table = Table(title="Series that could not be analysed", title_justify="left")
        for name in ("series", "stage", "reason"):
            table.add_column(name, overflow="fold")
        for sid, stage, message in summary.failures[:SHOWN_FAILURES]:
            table.add_row(sid, stage, message)
        console.print(table)
        more = len(summary.failures) - SHOWN_FAILURES
        if more > 0:
            console.print(f"... and {more} more (table series_failures)", markup=False)
    for note in summary.notes:
        console.print(f"note: {note}", markup=False)
    if summary.problems:
        console.print(
            f"{len(summary.problems)} part(s) of the source could not be read and were "
            "skipped (table source_problems):",
            markup=False,
        )
        for line in summary.problems[:SHOWN_FAILURES]:
            console.print(f"  {line}", markup=False)
        more = len(summary.problems) - SHOWN_FAILURES
        if more > 0:
            console.print(f"  ... and {more} more", markup=False)


def _report_failures(summary: RunSummary) -> None:
    err = _stderr()
    for sid, stage, message in summary.failures:
        err.print(f"changekind: series {sid!r} failed ({stage}): {message}", markup=False)
    for line in summary.problems:
        err.print(f"changekind: source: {line}", markup=False)


def _finish(summary: RunSummary, *, as_json: bool, wall: float) -> None:
    if as_json:
        sys.stdout.write(json.dumps(summary_record(summary), indent=2, allow_nan=False) + "\n")
        sys.stdout.flush()
        _report_failures(summary)
    else:
        print_summary(_stdout(), summary, wall=wall)
    if summary.series_failed or summary.problems:
        raise typer.Exit(EXIT_SERIES_FAILED)


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
    critical: CriticalOpt = None,
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
    prefect_defaults()
    with usage_errors():
        config = fleet_config(**_fleet_arguments(locals()))
        until = _check_time(until, "--until", config.time_kind)
        from changekind.flows.scan import scan_flow

        arguments = _flow_arguments(
            scan_flow, config, until=until, series=series or None, report_dir=_text(report)
        )
        t0 = time.perf_counter()
        summary = run_fleet_flow(scan_flow, arguments, config, label="scan")
    _finish(summary, as_json=as_json, wall=time.perf_counter() - t0)


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
    critical: CriticalOpt = None,
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
    prefect_defaults()
    with usage_errors():
        config = fleet_config(**_fleet_arguments(locals()))
        _check_time(start, "--start", config.time_kind)
        _check_time(end, "--end", config.time_kind)
        from changekind.flows.scan import backfill_flow, split_span

        split_span(start, end, chunk, warmup)  # a bad span or duration: ConfigError here
        arguments = _flow_arguments(
            backfill_flow,
            config,
            start=start,
            end=end,
            chunk=chunk,
            warmup=warmup,
            series=series or None,
            report_dir=_text(report),
        )
        t0 = time.perf_counter()
        summary = run_fleet_flow(backfill_flow, arguments, config, label="backfill")
    _finish(summary, as_json=as_json, wall=time.perf_counter() - t0)


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
    critical: CriticalOpt = None,
    min_points: MinPointsOpt = None,
    window: WindowOpt = None,
    wait: WaitOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Estimate the models of all (or the --series given) again on all their history."""
    prefect_defaults()
    with usage_errors():
        config = fleet_config(**_fleet_arguments(locals()))
        from changekind.flows.scan import refit_flow

        arguments = _flow_arguments(refit_flow, config, series=series or None)
        t0 = time.perf_counter()
        summary = run_fleet_flow(refit_flow, arguments, config, label="refit")
    _finish(summary, as_json=as_json, wall=time.perf_counter() - t0)


# --------------------------------------------------------------------------- events, triage


def event_json_records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Stored events as records of the ``detect --json`` contract (NaN as null)."""
    from changekind.tasks.persist import EVENT_COLUMNS

    records = []
    for row in frame.loc[:, list(EVENT_COLUMNS)].itertuples(index=False):
        record = {}
        for name, value in zip(EVENT_COLUMNS, row, strict=True):
            if isinstance(value, float) and math.isnan(value):
                value = None
            elif name == "type_weights":
                value = {k: float(v) for k, v in value.items()}
            record[name] = value
        records.append(_finite(record))
    return records


def event_csv(frame: pd.DataFrame) -> str:
    """Stored events as CSV: the contract's columns, then triage and bookkeeping."""
    from changekind.tasks.persist import EVENT_COLUMNS, EVENT_EXTRA_COLUMNS

    out = frame.loc[:, [*EVENT_COLUMNS, *EVENT_EXTRA_COLUMNS]].copy()
    out["type_weights"] = [json.dumps(w, sort_keys=False) for w in out["type_weights"]]
    for name in ("event_ts", "first_seen", "last_seen", "triage_at"):
        out[name] = [None if v is None or v != v else v.isoformat() for v in out[name]]
    buffer = io.StringIO()
    out.to_csv(buffer, index=False, quoting=csv.QUOTE_MINIMAL, lineterminator="\n")
    return buffer.getvalue()


def _weights_text(weights: Mapping[str, float], *, k: int = 2, floor: float = 0.01) -> str:
    ranked = sorted(weights.items(), key=lambda kv: -kv[1])
    return " · ".join(f"{t} {w:.2f}" for t, w in ranked[:k] if w >= floor) or "-"


def events_table(frame: pd.DataFrame, *, title: str) -> Table:
    """Stored events in a readable table."""
    table = Table(title=title, title_justify="left")
    texts = ("series", "time", "weights", "status", "triage")
    for name in ("series", "time", "type", "effect", "effect %", "t", *texts[2:]):
        table.add_column(
            name,
            justify="left" if name in texts else "right",
            no_wrap=name in ("time", "weights"),
            overflow="fold",
        )
    for row in frame.itertuples(index=False):
        table.add_row(
            row.series_id,
            row.event_time,
            row.event_type,
            _num(row.effect, "+.4g"),
            _num(row.effect_pct, "+.1f"),
            _num(row.t_stat, "+.2f"),
            _weights_text(row.type_weights),
            row.status,
            row.triage_state or "-",
        )
    return table


@app.command()
def events(
    db: DbOpt = None,
    since: Annotated[
        str | None,
        typer.Option(
            "--since",
            metavar="T",
            help="Only events at or after this time (ISO 8601; naive times are UTC).",
            show_default=False,
        ),
    ] = None,
    series: SeriesOpt = None,
    as_json: Annotated[
        bool,
        typer.Option(
            "--json", help="Print only a JSON array of events (the detect --json fields)."
        ),
    ] = False,
    as_csv: Annotated[
        bool,
        typer.Option(
            "--csv", help="Print only CSV: the event fields, then triage and run columns."
        ),
    ] = False,
    include_retracted: Annotated[
        bool,
        typer.Option("--include-retracted", help="Also list events later scans retracted."),
    ] = False,
) -> None:
    """List the stored events, oldest first."""
    if as_json and as_csv:
        raise _fail_usage("give --json or --csv, not both")
    prefect_defaults()  # the database layer imports Prefect
    with usage_errors():
        url = _db_url(db)
        _require_tables(url)
        from changekind.tasks import persist

        frame = persist.read_events(
            url,
            since=since,
            series_ids=series or None,
            include_retracted=include_retracted,
        )
    if as_json:
        sys.stdout.write(json.dumps(event_json_records(frame), indent=2, allow_nan=False) + "\n")
    elif as_csv:
        sys.stdout.write(event_csv(frame))
    else:
        console = _stdout()
        if frame.empty:
            console.print("no events stored (for these filters)", markup=False)
            return
        shown = frame.tail(TABLE_ROWS)
        title = f"{len(frame)} events"
        if len(shown) < len(frame):
            title += f" (the newest {len(shown)} shown; --json or --csv for all)"
        console.print(events_table(shown, title=title))
    sys.stdout.flush()


def _stored_time(url: str, series_id: str, event_time: str) -> str:
    """The stored ``event_time`` text of an event, matching also a differently written time.

    Raises
    ------
    ConfigError
        The series has no stored events, or none at that time (the message
        lists the nearest stored times).
    """
    import pandas as pd

    from changekind.tasks import persist

    frame = persist.read_events(url, series_ids=[series_id], include_retracted=True)
    if frame.empty:
        raise ConfigError(
            f"series {series_id!r} has no stored events; list them with "
            "'changekind events' (series ids are case-sensitive)"
        )
    if (frame["event_time"] == event_time).any():
        return event_time
    stored = frame["event_time"].tolist()
    try:
        when = pd.Timestamp(event_time)
        when = when.tz_localize("UTC") if when.tzinfo is None else when.tz_convert("UTC")
    except (ValueError, TypeError, OverflowError):
        when = None
    if when is not None and when is not pd.NaT:
        same = frame[frame["event_ts"] == when]
        if len(same) == 1:
            return str(same["event_time"].iat[0])
        distance = (frame["event_ts"] - when).abs()
        stored = frame.loc[distance.sort_values().index, "event_time"].tolist()
    nearest = ", ".join(repr(t) for t in stored[:3])
    raise ConfigError(
        f"series {series_id!r} has no stored event at {event_time!r}; the nearest stored "
        f"times are {nearest} (give one as 'changekind events --series ID' prints it)"
    )


@app.command()
def triage(
    series_id: Annotated[
        str, typer.Argument(metavar="SERIES_ID", help="The event's series.", show_default=False)
    ],
    event_time: Annotated[
        str,
        typer.Argument(
            metavar="EVENT_TIME",
            help="The event's time as 'changekind events' prints it (the same instant written "
            "another way is matched too).",
            show_default=False,
        ),
    ],
    state: Annotated[
        str,
        typer.Argument(
            metavar="STATE",
            help="acknowledged, dismissed or explained; 'clear' removes the verdict.",
            show_default=False,
        ),
    ],
    reason: Annotated[
        str | None,
        typer.Option(
            "--reason",
            metavar="TEXT",
            help="Why, for example the change ticket that explains a level shift.",
            show_default=False,
        ),
    ] = None,
    db: DbOpt = None,
) -> None:
    """Record a person's verdict on a stored event; later scans keep it."""
    prefect_defaults()  # the database layer imports Prefect
    with usage_errors():
        from changekind.tasks import persist

        allowed = (*persist.TRIAGE_STATES, "clear")
        if state not in allowed:
            raise ConfigError(f"unknown state {state!r}; use one of {', '.join(allowed)}")
        if state == "clear" and reason is not None:
            raise ConfigError("--reason goes with a verdict, not with 'clear'")
        url = _db_url(db)
        _require_tables(url)
        stored = _stored_time(url, series_id, event_time)
        persist.set_triage(url, series_id, stored, None if state == "clear" else state, reason)
    said = "verdict cleared" if state == "clear" else state
    if reason:
        said += f" ({reason})"
    _stdout().print(f"{series_id} at {stored}: {said}", markup=False)


# --------------------------------------------------------------------------- demo


DEMO_WARMUP_DAYS = 2
"""Days the demo's backfill fits on before reporting (no event is injected in them)."""


def _pct(x: float) -> str:
    return "-" if not math.isfinite(x) else f"{100 * x:.0f} %"


def _fresh_demo_files(out: Path, db_file: Path | None) -> Path:
    """Make ``out/fleet/`` empty of earlier demo files; remove the earlier demo database."""
    from changekind.flows.demo import DAY_FILE_GLOB

    folder = out / "fleet"
    folder.mkdir(parents=True, exist_ok=True)
    for old in folder.glob(DAY_FILE_GLOB):
        old.unlink()
    if db_file is not None:
        for suffix in ("", "-journal", "-wal", "-shm"):
            Path(f"{db_file}{suffix}").unlink(missing_ok=True)
    return folder


def _demo_config(folder: Path, db: str, workers: int) -> FleetConfig:
    from changekind.flows.settings import RunOptions

    options = RunOptions(workers=workers)
    return FleetConfig(
        source=str(folder),
        db=db,
        runner="threads",
        workers=workers,
        dask_address=None,
        options=options,
        columns=None,
        time_kind="datetime",
    )


def _by_type_table(frame: pd.DataFrame) -> Table:
    from changekind.tasks.types import REPORTED_TYPES

    found = Table(title="Events stored, by type", title_justify="left")
    for name in ("type", "confirmed", "provisional", "total"):
        found.add_column(name, justify="left" if name == "type" else "right")
    for kind in REPORTED_TYPES:
        mine = frame[frame["event_type"] == kind]
        confirmed = int((mine["status"] == "confirmed").sum())
        found.add_row(kind, str(confirmed), str(len(mine) - confirmed), str(len(mine)))
    return found


def _score_table(score: Any, *, clean: int, on_clean: int) -> Table:
    from changekind.tasks.types import EVENT_TYPES

    table = Table(
        title="Against the injected truth (found = an event within ±2 samples)",
        title_justify="left",
        caption=(
            f"recall {_pct(score.recall)} ({score.n_matched}/{score.n_injected}), "
            f"type accuracy {_pct(score.type_accuracy)} ({score.n_typed}/{score.n_matched}), "
            f"{score.false_events} false events ({on_clean} on {clean} clean series)"
        ),
        caption_justify="left",
    )
    columns = ("injected", "n", "found", "recall", "right type", *[f"as {k}" for k in EVENT_TYPES])
    for name in columns:
        table.add_column(name, justify="left" if name == "injected" else "right")
    for kind, row in score.per_type.iterrows():
        table.add_row(
            str(kind),
            str(int(row["injected"])),
            str(int(row["found"])),
            _pct(row["recall"]),
            _pct(row["type_accuracy"]),
            *[str(int(row[f"called_{k}"])) for k in EVENT_TYPES],
        )
    return table


@app.command()
def demo(
    controllers: Annotated[
        int, typer.Option(min=1, max=5000, help="Storage controllers (two series each).")
    ] = 24,
    days: Annotated[int, typer.Option(min=4, max=60, help="Days of 5-minute history.")] = 14,
    seed: Annotated[int, typer.Option(min=0, help="Seed of the invented fleet.")] = 2031,
    out: Annotated[
        Path,
        typer.Option(
            help="Folder for the fleet's Parquet files (fleet/), truth.csv, events.json, "
            "the report of the events (report/index.html) and the demo database demo.db "
            "(made afresh on every run)."
        ),
    ] = Path("changekind-demo"),
    db: Annotated[
        str | None,
        typer.Option(
            "--db",
            metavar="URL",
            help="Write to this database instead of OUT/demo.db (kept as it is: a second "
            "demo into it reuses what the first stored).",
            show_default=False,
        ),
    ] = None,
) -> None:
    """The fleet pipeline on an invented fleet with known events, scored against them.

    Writes the fleet as daily Parquet files, backfills all days but the last
    into the database, adds the last day's file and scans it as the hourly
    scan would, then compares the stored events with the injected truth.
    """
    prefect_defaults()
    import numpy as np
    import pandas as pd

    from changekind.flows.demo import make_demo_fleet, score_against_truth, write_day_files

    started = time.perf_counter()
    console = _stdout()
    db_file = None if db is not None else out / "demo.db"
    url = db if db is not None else f"sqlite:///{db_file}"
    workers = os.cpu_count() or 1
    with usage_errors():
        try:
            folder = _fresh_demo_files(out, db_file)
        except OSError as exc:
            raise ConfigError(f"cannot write to {out}: {exc.strerror or exc}") from None
        _check_db(url)

        # Step 1: the fleet, all days but the last.
        fleet = make_demo_fleet(np.random.default_rng(seed), n_controllers=controllers, days=days)
        truth_out = fleet.truth.assign(event_time=fleet.truth["event_time"].map(_iso))
        truth_out.to_csv(out / "truth.csv", index=False)
        first = fleet.data["timestamp"].min()
        write_day_files(fleet.data, folder, last=days - 1)
        n_series = fleet.data["series_id"].nunique()
        console.print(
            f"Invented fleet: {controllers} storage controllers, {n_series} series, {days} days "
            f"every {_step_text(fleet.step)}, {len(fleet.truth)} injected events; "
            f"daily Parquet files in {folder}{os.sep}, database {url}",
            markup=False,
        )

        # Step 2: backfill every day but the last.
        from changekind.flows.scan import backfill_flow, scan_flow

        config = _demo_config(folder, url, workers)
        start = (first + pd.Timedelta(days=DEMO_WARMUP_DAYS)).isoformat()
        end = (first + pd.Timedelta(days=days - 1)).isoformat()
        t0 = time.perf_counter()
        arguments = _flow_arguments(
            backfill_flow,
            config,
            start=start,
            end=end,
            chunk="7D",
            warmup=f"{DEMO_WARMUP_DAYS}D",
        )
        filled = run_fleet_flow(backfill_flow, arguments, config, label="backfill")
        backfill_wall = time.perf_counter() - t0
        console.print(
            f"\n1. Backfill {start[:10]} .. {end[:10]} (after {DEMO_WARMUP_DAYS} days to fit "
            f"on), in chunks of 7 days: {_seconds(backfill_wall)} including Prefect start-up",
            markup=False,
        )
        print_summary(console, _without_tops(filled))

        # Step 3: the last day arrives; the hourly scan tests only the new points.
        write_day_files(fleet.data, folder, first=days - 1)
        t0 = time.perf_counter()
        arguments = _flow_arguments(scan_flow, config)
        scanned = run_fleet_flow(scan_flow, arguments, config, label="scan")
        scan_wall = time.perf_counter() - t0
        console.print(
            f"\n2. The last day's file arrives; scan of the new points: {_seconds(scan_wall)}",
            markup=False,
        )
        print_summary(console, _without_tops(scanned))

        # Step 4: what the table holds, against the truth.
        from changekind.tasks import persist

        stored = persist.read_events(url)
    (out / "events.json").write_text(
        json.dumps(event_json_records(stored), indent=2, allow_nan=False) + "\n"
    )
    console.print()
    console.print(_by_type_table(stored))
    score = score_against_truth(stored, fleet.truth, step=fleet.step, tolerance=2)
    clean = set(fleet.data["series_id"]) - set(fleet.truth["series_id"])
    on_clean = int(stored["series_id"].isin(clean).sum())
    console.print(_score_table(score, clean=len(clean), on_clean=on_clean))
    example = _example_event(stored)

    # Step 5: a picture of every stored event, for a person to look at.
    from changekind.flows.cli_report import write_stored_report
    from changekind.tasks.fetch import open_source

    console.print("\n3. Pictures of the stored events (changekind report):", markup=False)
    with usage_errors():
        write_stored_report(url, open_source(folder), out / "report")
    console.print(
        f"\nWhole demo: {_seconds(time.perf_counter() - started)} on {workers} core(s).\n"
        "Events are statistical evidence for a person to judge, not verdicts.\n"
        f"All events as JSON: {out / 'events.json'}; injected truth: {out / 'truth.csv'}.\n"
        "\nQuery the event table yourself:\n"
        f"  changekind events --db {url} --json\n"
        f"  changekind events --db {url} --since {end[:10]}\n"
        "or with SQL, for example through the views for BI tools:\n"
        "  SELECT series_id, event_time, effect, effect_pct FROM open_level_shifts;\n"
        "  SELECT day, event_type, n_events, n_confirmed FROM daily_event_counts "
        "ORDER BY day, event_type;\n"
        "Record a verdict on an event (later scans keep it):\n"
        f"  changekind triage {example} acknowledged --reason 'change ticket' --db {url}\n"
        "Scan again when new files arrive:\n"
        f"  changekind scan --source {folder} --db {url}",
        markup=False,
    )
    failed = filled.failures + scanned.failures
    for sid, stage, message in failed:
        _stderr().print(f"changekind: series {sid!r} failed ({stage}): {message}", markup=False)
    if failed:
        raise typer.Exit(EXIT_SERIES_FAILED)


def _without_tops(summary: RunSummary) -> RunSummary:
    """The demo prints the score instead of each run's strongest events."""
    from dataclasses import replace

    return replace(summary, top_events=())


def _example_event(frame: pd.DataFrame) -> str:
    """``SERIES_ID EVENT_TIME`` of a stored event, quoted for a shell."""
    import shlex

    if frame.empty:
        return "SERIES_ID EVENT_TIME"
    row = frame.iloc[0]
    return f"{shlex.quote(str(row['series_id']))} {shlex.quote(str(row['event_time']))}"


def _step_text(step: Any) -> str:
    from changekind.tasks.types import format_duration

    return format_duration(step.total_seconds())


def _iso(stamp: Any) -> str:
    return stamp.isoformat() if hasattr(stamp, "isoformat") else str(stamp)
