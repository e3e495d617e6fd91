"""What a report shows, gathered from the database and the source.

The stored events of a selection (all, one run's, since a time, some series)
with their verdicts, the series' other stored events (each picture marks its
neighbours), the series' stored models, and the observations around each
event from the source (window medians, or spreads for a variance change, when
the model was fitted on windows).  :func:`write_stored_report` puts this
together with :func:`~changekind.tasks.report.files.write_report`; the fleet
flows run it as a Prefect task (``flows/steps.py``) after a scan or backfill
when asked for a report, and ``changekind report`` calls it directly.  Nothing
here imports Prefect.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import sqlalchemy as sa
from sqlalchemy.exc import DBAPIError

from changekind.tasks import persist
from changekind.tasks.effects import EFFECTS, UNKNOWN
from changekind.tasks.errors import ConfigError, ModelError, SeriesError, SourceError, mask_url
from changekind.tasks.fetch import SourceSpec, read_series
from changekind.tasks.report.files import PICTURE_PATTERN, write_report
from changekind.tasks.report.order import DEFAULT_SORT, SORT_ORDERS
from changekind.tasks.report.span import slice_window, window_bounds
from changekind.tasks.report.views import (
    EventView,
    Verdict,
    event_from_record,
    event_key,
    verdict_from_record,
)
from changekind.tasks.types import Event, FittedModel
from changekind.tasks.window.summary import summarize_windows

__all__ = [
    "WrittenReport",
    "build_views",
    "read_selected_events",
    "stored_models",
    "unit_of",
    "write_stored_report",
]


@dataclass(frozen=True, slots=True)
class WrittenReport:
    """What :func:`write_stored_report` wrote.

    ``problems`` maps a series to why its stored model could not be read (its
    events are drawn without it); ``n_hidden`` counts the dismissed events
    left out.
    """

    index: Path
    n_events: int
    n_series: int
    drawn: int
    problems: tuple[tuple[str, str], ...] = ()
    n_hidden: int = 0
    n_incidents: int = 0
    incidents_page: Path | None = None


def write_stored_report(
    db: str,
    spec: SourceSpec,
    out: Path | str,
    *,
    run: str | None = None,
    since: str | None = None,
    series: Sequence[str] | None = None,
    hide_dismissed: bool = False,
    sort: str = DEFAULT_SORT,
    units: Mapping[str, str] | None = None,
    on_progress: Callable[[int, int], None] | None = None,
) -> WrittenReport:
    """The report of the selected stored events at ``out/index.html``, a picture per event.

    Parameters
    ----------
    db : str
        Database URL the scans wrote to.
    spec : SourceSpec
        The source the events came from.
    out : str or Path
        Folder of the report.
    run, since, series : optional
        The selection: events new in or changed by one run, at or after a
        time, of some series (see :func:`read_selected_events`).
    hide_dismissed : bool, default=False
        Leave out events a person dismissed (they are listed last otherwise).
    sort : {"effect_pct", "effect", "t", "time"}, default="effect_pct"
        The order of the list (:mod:`changekind.tasks.report.order`).
    units : mapping of str to str, optional
        Units of the series for the pictures' axes: series id, or a
        shell-style pattern of ids (``*/write-latency-ms``), to unit; an exact
        id wins over patterns, and patterns are tried in the given order.
    on_progress : callable, optional
        Called with (done, total) after each picture.

    Raises
    ------
    ChangekindError
        The database or source cannot be read, ``out`` cannot be written, or
        ``sort`` is unknown.
    """
    if sort not in SORT_ORDERS:  # before any reading
        raise ConfigError(f"sort must be one of {', '.join(SORT_ORDERS)}, got {sort!r}")
    # Step 1: the selection, its verdicts, and the dismissed left out if asked.
    frame = read_selected_events(db, run=run, since=since, series=series)
    dismissed = (frame["triage_state"] == "dismissed").to_numpy(dtype=bool)
    n_hidden = int(dismissed.sum()) if hide_dismissed else 0
    if hide_dismissed:
        frame = frame[~dismissed].reset_index(drop=True)
    records = frame.to_dict(orient="records")
    events = [event_from_record(rec) for rec in records]
    verdicts = {
        event_key(e): verdict
        for e, rec in zip(events, records, strict=True)
        if (verdict := verdict_from_record(rec)) is not None
    }
    # Step 2: the series' models and all their stored events (the neighbours).
    series_ids = sorted({e.series_id for e in events})
    models, problems = stored_models(db, series_ids)
    neighbours = stored_neighbours(db, series_ids)
    # Step 3: the observations, and the report.
    views = build_views(spec, events, models, neighbours=neighbours, verdicts=verdicts, units=units)
    selection = [
        f"run {run}" if run else None,
        f"since {since}" if since else None,
        f"series {', '.join(series)}" if series else None,
    ]
    if hide_dismissed:
        hidden = f"left out ({n_hidden})"
    else:
        hidden = "listed last"
    facts = [
        ("database", mask_url(db)),
        ("source", spec.describe),
        ("selection", "; ".join(s for s in selection if s) or "all stored events"),
        ("order", SORT_ORDERS[sort].words),
        ("dismissed events", hidden),
    ]
    keys = {event_key(e) for e in events}
    whole = run is None and not series
    labels = _stored_labels(db)
    incidents, page = _write_incidents(
        db, spec, Path(out), since=since, keep=None if whole else keys, facts=facts, labels=labels
    )
    index = write_report(
        Path(out),
        views,
        facts=facts,
        sort=sort,
        on_progress=on_progress,
        incidents_page=None if page is None else page.name,
        labels=labels,
    )
    drawn = sum(1 for _ in index.parent.glob(PICTURE_PATTERN))
    return WrittenReport(
        index=index,
        n_events=len(events),
        n_series=len(series_ids),
        drawn=drawn,
        problems=tuple(sorted(problems.items())),
        n_hidden=n_hidden,
        n_incidents=incidents,
        incidents_page=page,
    )


def _stored_labels(db: str) -> dict[str, dict[str, str | None]]:
    """The series' attributes (none for a database from before them)."""
    try:
        return persist.read_labels(db)
    except DBAPIError:
        return {}


def _write_incidents(
    db: str,
    spec: SourceSpec,
    out: Path,
    *,
    since: str | None,
    keep: set[tuple[str, str]] | None,
    facts: Sequence[tuple[str, str]],
    labels: Mapping[str, Mapping[str, str | None]],
) -> tuple[int, Path | None]:
    """The incidents page beside the events' page (incidents with a selected member,
    or all since ``since``); no page when there is no incident."""
    from changekind.tasks.report.incidents import read_member_series, write_incident_report

    try:
        found = persist.read_incidents(db, since=since)
        states = persist.incident_states(db)
    except DBAPIError:  # a database from before the incidents (it is migrated by any scan)
        return 0, None
    if keep is not None:
        found = [i for i in found if i.member_keys & keep]
    if not found:
        return 0, None
    steps = {
        sid: m.step_seconds or 0.0
        for sid, m in stored_models(db, sorted({s for i in found for s in i.series_ids}))[0].items()
    }
    series = read_member_series(spec, found, steps)
    page = write_incident_report(
        out, found, series, labels=labels, states=states, facts=list(facts)
    )
    return len(found), page


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


def _read_events(db: str, **selection) -> pd.DataFrame:
    _check_sqlite_file(db)
    try:
        return persist.read_events(db, **selection)
    except DBAPIError as exc:
        first = str(getattr(exc, "orig", exc)).splitlines()[0]
        raise SourceError(
            f"cannot read events from {mask_url(db)} ({first}); is it the database of a "
            "changekind scan? run a scan first or give another --db"
        ) from None


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
    frame = _read_events(db, since=since, series_ids=list(series) if series else None)
    if run is not None:
        frame = frame[(frame["first_run_id"] == run) | (frame["last_run_id"] == run)]
    return frame.reset_index(drop=True)


def stored_neighbours(db: str, series_ids: Sequence[str]) -> dict[str, tuple[Event, ...]]:
    """Every stored event (not retracted) of each series, whatever the selection."""
    if not series_ids:
        return {}
    frame = _read_events(db, series_ids=list(series_ids))
    out: dict[str, list[Event]] = {}
    for rec in frame.to_dict(orient="records"):
        out.setdefault(str(rec["series_id"]), []).append(event_from_record(rec))
    return {sid: tuple(found) for sid, found in out.items()}


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


def unit_of(series_id: str, units: Mapping[str, str] | None) -> str | None:
    """The unit of a series: its exact entry in ``units``, else the first matching pattern."""
    if not units:
        return None
    if series_id in units:
        return units[series_id]
    for pattern, unit in units.items():
        if fnmatch.fnmatchcase(series_id, pattern):
            return unit
    return None


def windowed_values(event: Event, timestamps, values, window: str):
    """The window series a windowed event was found in: window spreads for a
    variance change, window medians for the other types (raw points when the
    read holds too few windows to summarize)."""
    try:
        summary = summarize_windows(event.series_id, timestamps, values, window)
    except SeriesError:
        return timestamps, values
    series = summary.spread if EFFECTS.get(event.event_type, UNKNOWN).in_spread else summary.median
    return pd.Series(summary.index), pd.Series(series)


def build_views(
    spec: SourceSpec,
    events: Sequence[Event],
    models: Mapping[str, FittedModel],
    *,
    neighbours: Mapping[str, Sequence[Event]] | None = None,
    verdicts: Mapping[tuple[str, str], Verdict] | None = None,
    units: Mapping[str, str] | None = None,
) -> list[EventView]:
    """Each event with the observations of its shown span (one read per series).

    ``neighbours`` are each series' stored events; the span of a picture
    reaches to those nearby (:func:`~changekind.tasks.report.span.shown_span`).
    """
    neighbours = neighbours or {}
    verdicts = verdicts or {}
    by_series: dict[str, list[Event]] = {}
    for e in events:
        by_series.setdefault(e.series_id, []).append(e)
    views: dict[tuple[str, str], EventView] = {}
    for sid, mine in by_series.items():
        model = models.get(sid)
        near = tuple(neighbours.get(sid, ()))
        extra = {"neighbours": near, "unit": unit_of(sid, units)}
        start = end = None
        if model is not None and model.step_seconds:
            bounds = [
                window_bounds(
                    e,
                    step_seconds=model.step_seconds,
                    time_kind=spec.time_kind,
                    neighbours=near,
                    model=model,
                )
                for e in mine
            ]
            start, end = min(b[0] for b in bounds), max(b[1] for b in bounds)
        # Without a model the spacing is unknown: the whole series is read.
        data = read_series(spec, [sid], start=start, end=end)
        for e in mine:
            verdict = verdicts.get(event_key(e))
            if data.empty:
                views[event_key(e)] = EventView(
                    e,
                    model=model,
                    note=f"the source holds no observations of {sid!r} around {e.event_time}",
                    verdict=verdict,
                    **extra,
                )
                continue
            stamps, values = data["timestamp"], data["value"]
            if model is not None and model.window is not None:
                stamps, values = windowed_values(e, stamps, values, model.window)
            stamps, values = slice_window(e, stamps, values, model=model, neighbours=near)
            views[event_key(e)] = EventView(e, stamps, values, model, verdict=verdict, **extra)
    return [views[event_key(e)] for e in events]
