"""``omegascan report``: an HTML page with one picture per stored event.

Reads the events from the database (all, or those of one run, since a time,
of some series), the series' stored models, and the observations around each
event from the source; :func:`omegascan.tasks.report.write_report` draws the
pictures and writes ``index.html`` beside them.  No Prefect flow: a report is
a read-only look at what the scans wrote.

Registers itself on the shared :data:`omegascan.flows.cli.app` when imported.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from omegascan.flows.cli import EXIT_SERIES_FAILED, _fail_usage, _stderr, _stdout, app

if TYPE_CHECKING:
    import pandas as pd

    from omegascan.tasks.fetch import SourceSpec
    from omegascan.tasks.report import EventView
    from omegascan.tasks.types import Event, FittedModel


def _masked(db: str) -> str:
    import sqlalchemy as sa

    try:
        return sa.make_url(db).render_as_string(hide_password=True)
    except Exception:  # an unreadable URL is reported by persist with its own message
        return db


def _check_sqlite_file(db: str) -> None:
    """A report never creates a database: a SQLite file that is not there is an error."""
    import sqlalchemy as sa

    try:
        url = sa.make_url(db)
    except Exception:
        return  # persist.connect says what is wrong with it
    if url.get_backend_name() != "sqlite" or url.database in (None, "", ":memory:"):
        return
    if not Path(url.database).is_file():
        raise _fail_usage(
            f"database file {url.database!r} does not exist; give the --db of a scan "
            "(or set OMEGASCAN_DB_URL), or run a scan first"
        )


def read_selected_events(
    db: str,
    *,
    run: str | None = None,
    since: str | None = None,
    series: Sequence[str] | None = None,
) -> pd.DataFrame:
    """Stored events (not retracted) matching the selection, as read_events returns them.

    ``run`` keeps events first or last seen in that run (new in it, or changed by it).
    """
    from sqlalchemy.exc import DBAPIError

    from omegascan.tasks import persist
    from omegascan.tasks.errors import OmegascanError

    _check_sqlite_file(db)
    try:
        frame = persist.read_events(db, since=since, series_ids=list(series) if series else None)
    except OmegascanError as exc:
        raise _fail_usage(str(exc)) from None
    except DBAPIError as exc:
        first = str(getattr(exc, "orig", exc)).splitlines()[0]
        raise _fail_usage(
            f"cannot read events from {_masked(db)} ({first}); is it the database of an "
            "omegascan scan? run a scan first or give another --db"
        ) from None
    if run is not None:
        frame = frame[(frame["first_run_id"] == run) | (frame["last_run_id"] == run)]
    return frame.reset_index(drop=True)


def _models(db: str, series_ids: Sequence[str]) -> tuple[dict[str, FittedModel], dict[str, str]]:
    """Stored models by series; a damaged one is left out with the reason."""
    from omegascan.tasks import persist
    from omegascan.tasks.errors import ModelError

    try:
        return persist.load_models(db, list(series_ids)), {}
    except ModelError:
        pass
    models: dict[str, FittedModel] = {}
    problems: dict[str, str] = {}
    for sid in series_ids:
        try:
            models.update(persist.load_models(db, [sid]))
        except ModelError as exc:
            problems[sid] = f"{exc}; the picture is drawn without it"
    return models, problems


def windowed_values(event: Event, timestamps, values, window: str):
    """The window series a windowed event was found in: window spreads for a
    variance change, window medians for the other types (raw points when the
    read holds too few windows to summarize)."""
    import pandas as pd

    from omegascan.tasks.errors import SeriesError
    from omegascan.tasks.window import summarize_windows

    try:
        summary = summarize_windows(event.series_id, timestamps, values, window)
    except SeriesError:
        return timestamps, values
    series = summary.spread if event.event_type == "VC" else summary.median
    return pd.Series(summary.index), pd.Series(series)


def build_views(
    spec: SourceSpec,
    events: Sequence[Event],
    models: dict[str, FittedModel],
) -> list[EventView]:
    """Each event with the observations around it (one read per series)."""
    from omegascan.tasks.fetch import read_series
    from omegascan.tasks.report import EventView, slice_window, window_bounds

    by_series: dict[str, list[Event]] = {}
    for e in events:
        by_series.setdefault(e.series_id, []).append(e)
    views: dict[tuple[str, str], EventView] = {}
    for sid, mine in by_series.items():
        model = models.get(sid)
        start = end = None
        if model is not None and model.step_seconds:
            bounds = [
                window_bounds(e, step_seconds=model.step_seconds, time_kind=spec.time_kind)
                for e in mine
            ]
            start, end = min(b[0] for b in bounds), max(b[1] for b in bounds)
        # Without a model the spacing is unknown: the whole series is read.
        data = read_series(spec, [sid], start=start, end=end)
        for e in mine:
            if data.empty:
                views[(sid, e.event_time)] = EventView(
                    e,
                    model=model,
                    note=f"the source holds no observations of {sid!r} around {e.event_time}",
                )
                continue
            stamps, values = data["timestamp"], data["value"]
            if model is not None and model.window is not None:
                stamps, values = windowed_values(e, stamps, values, model.window)
            stamps, values = slice_window(e, stamps, values, model=model)
            views[(sid, e.event_time)] = EventView(e, stamps, values, model)
    return [views[(e.series_id, e.event_time)] for e in events]


def report(
    out: Annotated[
        Path,
        typer.Option("--out", metavar="DIR", help="Folder for index.html and the pictures."),
    ] = Path("omegascan-report"),
    db: Annotated[
        str | None,
        typer.Option(
            "--db",
            metavar="URL",
            help="Database the scans wrote to.  Default: OMEGASCAN_DB_URL, else "
            "sqlite:///omegascan.db.",
            show_default=False,
        ),
    ] = None,
    source: Annotated[
        str | None,
        typer.Option(
            "--source",
            metavar="PATH",
            help="Where the series live (Parquet, CSV or a SQL URL), as given to the scan.  "
            "Default: OMEGASCAN_SOURCE.",
            show_default=False,
        ),
    ] = None,
    run: Annotated[
        str | None,
        typer.Option(
            "--run",
            metavar="RUN_ID",
            help="Only events new in, or changed by, this run.",
            show_default=False,
        ),
    ] = None,
    since: Annotated[
        str | None,
        typer.Option(
            "--since",
            metavar="T",
            help="Only events at or after this time (ISO 8601; naive times are UTC).",
            show_default=False,
        ),
    ] = None,
    series: Annotated[
        list[str] | None,
        typer.Option(
            "--series",
            metavar="ID",
            help="Only this series; repeat for several.",
            show_default=False,
        ),
    ] = None,
    table: Annotated[
        str | None,
        typer.Option("--table", help="SQL sources: the table to read.", show_default=False),
    ] = None,
    query: Annotated[
        str | None,
        typer.Option("--query", help="SQL sources: a SELECT to read.", show_default=False),
    ] = None,
    series_column: Annotated[
        str, typer.Option("--series-column", help="Source column of the series id.")
    ] = "series_id",
    timestamp_column: Annotated[
        str, typer.Option("--timestamp-column", help="Source column of the timestamp.")
    ] = "timestamp",
    value_column: Annotated[
        str, typer.Option("--value-column", help="Source column of the value.")
    ] = "value",
    timestamp_unit: Annotated[
        str | None,
        typer.Option(
            "--timestamp-unit",
            help="Numeric timestamps are epoch times in this unit (s, ms, us, ns).",
            show_default=False,
        ),
    ] = None,
) -> None:
    """Write an HTML report of stored events, one picture per event."""
    from omegascan.flows.settings import Settings
    from omegascan.tasks.errors import OmegascanError
    from omegascan.tasks.fetch import open_source

    settings = Settings()
    db_url = db or settings.db_url
    location = source or settings.source
    if not location:
        raise _fail_usage(
            "the report needs the source the events came from: give --source PATH "
            "(or set OMEGASCAN_SOURCE)"
        )
    try:
        spec = open_source(
            location,
            columns={
                "series_id": series_column,
                "timestamp": timestamp_column,
                "value": value_column,
            },
            table=table,
            query=query,
            timestamp_unit=timestamp_unit,
        )
        written = write_stored_report(db_url, spec, out, run=run, since=since, series=series)
    except OmegascanError as exc:
        raise _fail_usage(str(exc)) from None
    missing = written.n_events - written.drawn
    if missing:
        _stderr().print(
            f"omegascan: {missing} event(s) have no picture; the report says why for each",
            markup=False,
        )
        raise typer.Exit(EXIT_SERIES_FAILED)


@dataclass(frozen=True, slots=True)
class WrittenReport:
    """What :func:`write_stored_report` wrote."""

    index: Path
    n_events: int
    n_series: int
    drawn: int


def write_stored_report(
    db_url: str,
    spec: SourceSpec,
    out: Path,
    *,
    run: str | None = None,
    since: str | None = None,
    series: Sequence[str] | None = None,
) -> WrittenReport:
    """The report of the selected stored events at ``out/index.html``, announced on stdout.

    Used by ``omegascan report`` and by the demo.  A stored model that cannot
    be read is said on stderr (its events are drawn without it).

    Raises
    ------
    OmegascanError
        The database or source cannot be read, or ``out`` cannot be written.
    """
    from omegascan.tasks.report import event_from_record

    frame = read_selected_events(db_url, run=run, since=since, series=series)
    events = [event_from_record(rec) for rec in frame.to_dict(orient="records")]
    models, model_problems = _models(db_url, sorted({e.series_id for e in events}))
    views = build_views(spec, events, models)
    selection = [
        f"run {run}" if run else None,
        f"since {since}" if since else None,
        f"series {', '.join(series)}" if series else None,
    ]
    facts = [
        ("database", _masked(db_url)),
        ("source", spec.describe),
        ("selection", "; ".join(s for s in selection if s) or "all stored events"),
    ]
    index = _write_with_progress(out, views, facts)
    drawn = _count_pictures(index)
    err = _stderr()
    for sid, problem in sorted(model_problems.items()):
        err.print(f"omegascan: series {sid!r}: {problem}", markup=False)
    n_series = len({e.series_id for e in events})
    _stdout().print(
        f"Report of {len(events)} event(s) in {n_series} series, {drawn} picture(s): {index}",
        markup=False,
    )
    return WrittenReport(index, len(events), n_series, drawn)


def _write_with_progress(out: Path, views: Sequence[EventView], facts: Sequence[Any]) -> Path:
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

    from omegascan.tasks.report import write_report

    err = _stderr()
    if len(views) < 2 or not err.is_terminal:
        return write_report(out, views, facts=facts)
    with Progress(
        TextColumn("drawing"), BarColumn(), MofNCompleteColumn(), console=err, transient=True
    ) as progress:
        task_id = progress.add_task("drawing", total=len(views))
        return write_report(
            out,
            views,
            facts=facts,
            on_progress=lambda done, _total: progress.update(task_id, completed=done),
        )


def _count_pictures(index: Path) -> int:
    from omegascan.tasks.report import PICTURE_PATTERN

    return sum(1 for _ in index.parent.glob(PICTURE_PATTERN))


app.command(name="report")(report)
