"""``changekind events`` and ``changekind triage``: the stored events, and a person's verdict."""

from __future__ import annotations

import json
import sys
from typing import Annotated

import pandas as pd
import sqlalchemy as sa
import typer

from changekind.flows.cli.app import app, fail_usage, out_console, usage_errors
from changekind.flows.cli.config import database_url, require_tables
from changekind.flows.cli.options import DbOpt, SeriesOpt, SinceOpt
from changekind.flows.cli.output import TABLE_ROWS, event_csv, event_json_records, events_table
from changekind.tasks import incident_store, persist
from changekind.tasks.errors import ConfigError


@app.command()
def events(
    db: DbOpt = None,
    since: SinceOpt = None,
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
    sort: Annotated[
        str,
        typer.Option(
            "--sort",
            metavar="KEY",
            help="Order: time (oldest first), or largest first by effect_sigma (noise "
            "sigma), effect_pct (per cent of the level), effect (series units) or t (|t|).",
        ),
    ] = "time",
) -> None:
    """List the stored events, oldest first (or by size with --sort)."""
    if sort not in SORT_KEYS:
        raise fail_usage(f"--sort {sort!r} is not a key; use one of {', '.join(SORT_KEYS)}")
    if as_json and as_csv:
        raise fail_usage("give --json or --csv, not both")
    with usage_errors():
        url = database_url(db)
        require_tables(url)

        frame = persist.read_events(
            url,
            since=since,
            series_ids=series or None,
            include_retracted=include_retracted,
        )
        labels = _series_labels(url)
    frame = sort_events(frame, sort)
    if as_json:
        records = event_json_records(frame, labels)
        sys.stdout.write(json.dumps(records, indent=2, allow_nan=False) + "\n")
    elif as_csv:
        sys.stdout.write(event_csv(frame, labels))
    else:
        console = out_console()
        if frame.empty:
            console.print("no events stored (for these filters)", markup=False)
            return
        shown = frame.tail(TABLE_ROWS) if sort == "time" else frame.head(TABLE_ROWS)
        title = f"{len(frame)} events"
        if len(shown) < len(frame):
            which = "newest" if sort == "time" else f"largest by {sort}"
            title += f" (the {which} {len(shown)} shown; --json or --csv for all)"
        console.print(events_table(shown, title=title, labels=labels))
    sys.stdout.flush()


SORT_KEYS = ("time", "effect_sigma", "effect_pct", "effect", "t")
_SORT_COLUMNS = {
    "effect_sigma": "effect_sigma",
    "effect_pct": "effect_pct",
    "effect": "effect",
    "t": "t_stat",
}


def sort_events(frame: pd.DataFrame, key: str) -> pd.DataFrame:
    """Events in stored order (time) or largest |size| first; rows without the size last."""
    if key == "time" or frame.empty:
        return frame
    size = frame[_SORT_COLUMNS[key]].abs()
    order = size.sort_values(ascending=False, na_position="last", kind="stable").index
    return frame.loc[order].reset_index(drop=True)


def _series_labels(url: str) -> dict[str, dict[str, str | None]]:
    """The series' attributes (none in a database from before them: its next run adds them)."""
    try:
        return incident_store.read_labels(url)
    except sa.exc.DBAPIError:
        return {}


def _stored_time(url: str, series_id: str, event_time: str) -> str:
    """The stored ``event_time`` text of an event, matching also a differently written time.

    Raises
    ------
    ConfigError
        The series has no stored events, or none at that time (the message
        lists the nearest stored times).
    """

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
    with usage_errors():
        allowed = (*persist.TRIAGE_STATES, "clear")
        if state not in allowed:
            raise ConfigError(f"unknown state {state!r}; use one of {', '.join(allowed)}")
        if state == "clear" and reason is not None:
            raise ConfigError("--reason goes with a verdict, not with 'clear'")
        url = database_url(db)
        require_tables(url)
        stored = _stored_time(url, series_id, event_time)
        persist.set_triage(url, series_id, stored, None if state == "clear" else state, reason)
    said = "verdict cleared" if state == "clear" else state
    if reason:
        said += f" ({reason})"
    out_console().print(f"{series_id} at {stored}: {said}", markup=False)
