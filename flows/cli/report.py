"""``changekind report``: an HTML page with one picture per stored event.

Reads the events from the database (all, or those of one run, since a time,
of some series) with their verdicts, the series' stored models and other
events, and the observations around each event from the source;
:func:`changekind.tasks.report.write_stored_report` draws the pictures and
writes ``index.html`` beside them.  No Prefect flow: a report is a read-only
look at what the scans wrote.
"""

from __future__ import annotations

import contextlib
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

from changekind.flows.cli.app import EXIT_SERIES_FAILED, app, err_console, fail_usage, out_console
from changekind.flows.cli.config import column_map, env_settings, reading_source
from changekind.flows.cli.options import (
    DbOpt,
    QueryOpt,
    ReadSourceOpt,
    SeriesColOpt,
    SeriesOpt,
    SinceOpt,
    TableOpt,
    TimeColOpt,
    TimestampUnitOpt,
    ValueColOpt,
)
from changekind.tasks.errors import ChangekindError
from changekind.tasks.fetch import SourceSpec, open_source

if TYPE_CHECKING:
    from changekind.tasks.report.data import WrittenReport
from changekind.tasks.timeaxis import parse_instant


def report(
    out: Annotated[
        Path,
        typer.Option("--out", metavar="DIR", help="Folder for index.html and the pictures."),
    ] = Path("changekind-report"),
    db: DbOpt = None,
    source: ReadSourceOpt = None,
    run: Annotated[
        str | None,
        typer.Option(
            "--run",
            metavar="RUN_ID",
            help="Only events new in, or changed by, this run.",
            show_default=False,
        ),
    ] = None,
    since: SinceOpt = None,
    series: SeriesOpt = None,
    table: TableOpt = None,
    query: QueryOpt = None,
    series_column: SeriesColOpt = None,
    timestamp_column: TimeColOpt = None,
    value_column: ValueColOpt = None,
    timestamp_unit: TimestampUnitOpt = None,
    sort: Annotated[
        str,
        typer.Option(
            "--sort",
            metavar="ORDER",
            help="Order of the list: effect_pct (largest |effect %| first), effect "
            "(largest |effect| in the series' units), t (largest |t|) or time (newest "
            "first).  Ties by |t|, then series and time; dismissed events always last.",
        ),
    ] = "effect_pct",
    hide_dismissed: Annotated[
        bool,
        typer.Option(
            "--hide-dismissed",
            help="Leave out events a person dismissed (changekind triage ... dismissed).",
        ),
    ] = False,
    unit: Annotated[
        list[str] | None,
        typer.Option(
            "--unit",
            metavar="PATTERN=UNIT",
            help="Unit of the series matching PATTERN (a series id or a shell pattern such "
            "as '*/write-latency-ms'), shown on the pictures' axes; repeat for several.",
            show_default=False,
        ),
    ] = None,
) -> None:
    """Write an HTML report of stored events, one picture per event.

    The observations come from --source, else $CHANGEKIND_SOURCE, else the
    source the latest scan, backfill or refit of --db recorded.
    """

    units = parse_units(unit or [])
    try:
        settings = env_settings()
    except ChangekindError as exc:
        raise fail_usage(str(exc)) from None
    db_url = db or settings.db_url
    try:
        if since is not None:
            parse_instant(since, what="--since")  # ISO 8601 only: '05/03/2030' is refused
        where = reading_source(
            source, db_url, column_map(series_column, timestamp_column, value_column)
        )
        if where.said() is not None:
            err_console().print(where.said(), markup=False)
        spec = open_source(
            where.location,
            columns=where.columns,
            table=table,
            query=query,
            timestamp_unit=timestamp_unit,
        )
        written = write_stored_report(
            db_url,
            spec,
            out,
            run=run,
            since=since,
            series=series,
            sort=sort,
            hide_dismissed=hide_dismissed,
            units=units,
        )
    except ChangekindError as exc:
        raise fail_usage(str(exc)) from None
    missing = written.n_events - written.drawn
    if missing:
        err_console().print(
            f"changekind: {missing} event(s) have no picture; the report says why for each",
            markup=False,
        )
        raise typer.Exit(EXIT_SERIES_FAILED)


def parse_units(given: Sequence[str]) -> dict[str, str]:
    """``--unit PATTERN=UNIT`` options as a mapping (the last ``=`` splits)."""
    units: dict[str, str] = {}
    for text in given:
        pattern, sep, name = text.rpartition("=")
        if not sep or not pattern.strip() or not name.strip():
            raise fail_usage(
                f"--unit {text!r} is not PATTERN=UNIT; give for example "
                "--unit '*/write-latency-ms=ms'"
            )
        units[pattern.strip()] = name.strip()
    return units


def write_stored_report(
    db_url: str,
    spec: SourceSpec,
    out: Path,
    *,
    run: str | None = None,
    since: str | None = None,
    series: Sequence[str] | None = None,
    **options: Any,
) -> WrittenReport:
    """:func:`changekind.tasks.report.write_stored_report` with a progress bar, announced.

    ``options`` are its keywords (``sort``, ``hide_dismissed``, ``units``).

    Used by ``changekind report`` and by the demo.  Damaged stored models are
    said on stderr (their events are drawn without them).
    """

    # Deliberately here: the report loads matplotlib (about a second), which the
    # other commands registered on the same app do not need.
    from changekind.tasks.report import data

    err = err_console()
    # A progress bar on a terminal only; the same call either way.
    bar = None
    if err.is_terminal:
        columns = (TextColumn("drawing"), BarColumn(), MofNCompleteColumn())
        bar = Progress(*columns, console=err, transient=True)
    with bar or contextlib.nullcontext():
        on_progress = None
        if bar is not None:
            task_id = bar.add_task("drawing", total=None)

            def on_progress(done: int, total: int) -> None:
                bar.update(task_id, completed=done, total=total)

        written = data.write_stored_report(
            db_url,
            spec,
            out,
            run=run,
            since=since,
            series=series,
            on_progress=on_progress,
            **options,
        )
    for sid, problem in written.problems:
        err.print(f"changekind: series {sid!r}: {problem}", markup=False)
    hidden = f" ({written.n_hidden} dismissed left out)" if written.n_hidden else ""
    out_console().print(
        f"Report of {written.n_events} event(s) in {written.n_series} series{hidden}, "
        f"{written.drawn} picture(s): {written.index}",
        markup=False,
    )
    return written


app.command(name="report")(report)
