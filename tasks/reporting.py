"""What a report shows, read from the database and the source, and the report of a run.

:mod:`changekind.tasks.report` draws and writes; this module gathers what it
draws: the stored events of a selection (all, one run's, since a time, some
series), the series' stored models, and the observations around each event
from the source (window medians, or spreads for a variance change, when the
model was fitted on windows).  :func:`write_stored_report` puts the two
together; ``write_stored_report_task`` is the Prefect task the fleet flows run
after a scan or backfill when asked for a report, and ``changekind report``
calls the same function.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import sqlalchemy as sa
from sqlalchemy.exc import DBAPIError

from changekind.tasks import persist
from changekind.tasks.errors import ConfigError, ModelError, SeriesError, SourceError
from changekind.tasks.fetch import SourceSpec, read_series
from changekind.tasks.report import (
    PICTURE_PATTERN,
    EventView,
    event_from_record,
    slice_window,
    window_bounds,
    write_report,
)
from changekind.tasks.types import Event, FittedModel
from changekind.tasks.window import summarize_windows
from changekind.tasks.wrappers import TaskSpec, lazy_task


@dataclass(frozen=True, slots=True)
class WrittenReport:
    """What :func:`write_stored_report` wrote.

    ``problems`` maps a series to why its stored model could not be read (its
    events are drawn without it).
    """

    index: Path
    n_events: int
    n_series: int
    drawn: int
    problems: tuple[tuple[str, str], ...] = ()


def write_stored_report(
    db: str,
    spec: SourceSpec,
    out: Path | str,
    *,
    run: str | None = None,
    since: str | None = None,
    series: Sequence[str] | None = None,
    on_progress: Callable[[int, int], None] | None = None,
) -> WrittenReport:
    """The report of the selected stored events at ``out/index.html``, a picture per event.

    Raises
    ------
    ChangekindError
        The database or source cannot be read, or ``out`` cannot be written.
    """
    frame = read_selected_events(db, run=run, since=since, series=series)
    events = [event_from_record(rec) for rec in frame.to_dict(orient="records")]
    models, problems = stored_models(db, sorted({e.series_id for e in events}))
    views = build_views(spec, events, models)
    selection = [
        f"run {run}" if run else None,
        f"since {since}" if since else None,
        f"series {', '.join(series)}" if series else None,
    ]
    facts = [
        ("database", masked_url(db)),
        ("source", spec.describe),
        ("selection", "; ".join(s for s in selection if s) or "all stored events"),
    ]
    index = write_report(Path(out), views, facts=facts, on_progress=on_progress)
    drawn = sum(1 for _ in index.parent.glob(PICTURE_PATTERN))
    return WrittenReport(
        index=index,
        n_events=len(events),
        n_series=len({e.series_id for e in events}),
        drawn=drawn,
        problems=tuple(sorted(problems.items())),
    )


def masked_url(db: str) -> str:
    try:
        return sa.make_url(db).render_as_string(hide_password=True)
    except Exception:  # an unreadable URL is reported by persist with its own message
        return db


def _check_sqlite_file(db: str) -> None:
    """A report never creates a database: a SQLite file that is not there is an error."""
    try:
        url = sa.make_url(db)
    except Exception:
        return  # persist.connect says what is wrong with it
    if url.get_backend_name() != "sqlite" or url.database in (None, "", ":memory:"):
        return
    if not Path(url.database).is_file():
        raise ConfigError(
            f"database file {url.database!r} does not exist; give the --db of a scan "
            "(or set CHANGEKIND_DB_URL), or run a scan first"
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
    _check_sqlite_file(db)
    try:
        frame = persist.read_events(db, since=since, series_ids=list(series) if series else None)
    except DBAPIError as exc:
        first = str(getattr(exc, "orig", exc)).splitlines()[0]
        raise SourceError(
            f"cannot read events from {masked_url(db)} ({first}); is it the database of an "
            "changekind scan? run a scan first or give another --db"
        ) from None
    if run is not None:
        frame = frame[(frame["first_run_id"] == run) | (frame["last_run_id"] == run)]
    return frame.reset_index(drop=True)


def stored_models(
    db: str, series_ids: Sequence[str]
) -> tuple[dict[str, FittedModel], dict[str, str]]:
    """Stored models by series; a damaged one is left out with the reason."""
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


_TASKS: dict[str, TaskSpec] = {
    "write_stored_report_task": (
        write_stored_report,
        {"name": "write-report", "retries": 1, "retry_delay_seconds": 5},
    ),
}


def __getattr__(name: str):
    return lazy_task(__name__, name, _TASKS)
