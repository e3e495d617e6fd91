"""``changekind events`` and ``changekind triage``: the stored events, and a person's verdict."""

from __future__ import annotations

import getpass
import json
import sys
from datetime import datetime
from typing import Annotated

import pandas as pd
import sqlalchemy as sa
import typer

from changekind.flows.cli.app import app, fail_usage, out_console, usage_errors
from changekind.flows.cli.config import database_url, require_tables
from changekind.flows.cli.options import DbOpt
from changekind.flows.cli.output import (
    TABLE_ROWS,
    event_csv,
    event_json_records,
    events_table,
    verdicts_table,
)
from changekind.tasks import persist
from changekind.tasks.errors import ConfigError
from changekind.tasks.timeaxis import parse_instant

StoredSeriesOpt = Annotated[
    list[str] | None,
    typer.Option(
        "--series",
        metavar="ID",
        help="Only this series; repeat for several.  Default: every series with stored events.",
        show_default=False,
    ),
]


def _time_bound(value: str | None, option: str) -> datetime | None:
    """An ISO 8601 bound (naive is UTC); a number or an ambiguous date is refused."""
    if value is None:
        return None
    when = parse_instant(value, what=option)
    if isinstance(when, float):
        raise ConfigError(
            f"{option} {value!r} is a number; stored events are filtered by date-time, so "
            "give an ISO 8601 time such as 2030-03-05T00:00:00Z"
        )
    return when.to_pydatetime(warn=False)


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
    until: Annotated[
        str | None,
        typer.Option(
            "--until",
            metavar="T",
            help="Only events at or before this time (ISO 8601; naive times are UTC).",
            show_default=False,
        ),
    ] = None,
    series: StoredSeriesOpt = None,
    event_type: Annotated[
        list[str] | None,
        typer.Option(
            "--type",
            metavar="TYPE",
            help="Only this event type (AO, LS, TC, IO, VC); repeat for several.",
            show_default=False,
        ),
    ] = None,
    status: Annotated[
        list[str] | None,
        typer.Option(
            "--status",
            metavar="STATUS",
            help="Only this status (provisional, confirmed, retracted); repeat for several.",
            show_default=False,
        ),
    ] = None,
    triage_state: Annotated[
        list[str] | None,
        typer.Option(
            "--triage",
            metavar="STATE",
            help="Only this verdict (acknowledged, dismissed, explained, or none for events "
            "nobody has judged); repeat for several.",
            show_default=False,
        ),
    ] = None,
    min_effect_pct: Annotated[
        float | None,
        typer.Option(
            "--min-effect-pct",
            metavar="PCT",
            help="Only events whose effect is at least this many percent of the level, "
            "either sign (events without a percentage are left out).",
            show_default=False,
        ),
    ] = None,
    limit: Annotated[
        int | None,
        typer.Option(
            "--limit",
            metavar="N",
            help=f"At most N events, the first in the chosen order.  Default: all for --json "
            f"and --csv, {TABLE_ROWS} in the table.",
            show_default=False,
        ),
    ] = None,
    oldest_first: Annotated[
        bool,
        typer.Option("--oldest-first", help="List the oldest events first."),
    ] = False,
    as_json: Annotated[
        bool,
        typer.Option(
            "--json",
            help="Print only a JSON array of events (the detect --json fields).",
        ),
    ] = False,
    as_csv: Annotated[
        bool,
        typer.Option(
            "--csv",
            help="Print only CSV: the event fields, then triage and run columns.",
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
            help="Order: time (newest first; see --oldest-first), or largest first by "
            "effect_sigma (noise sigma), effect_pct (per cent of the level), effect "
            "(series units) or t (|t|).",
        ),
    ] = "time",
) -> None:
    """List the stored events, newest first (or largest first with --sort)."""
    if sort not in SORT_KEYS:
        raise fail_usage(f"--sort {sort!r} is not a key; use one of {', '.join(SORT_KEYS)}")
    if as_json and as_csv:
        raise fail_usage("give --json or --csv, not both")
    if limit is not None and limit < 1:
        raise fail_usage(f"--limit must be at least 1, got {limit}")
    with usage_errors():
        filters = {
            "since": _time_bound(since, "--since"),
            "until": _time_bound(until, "--until"),
            "series_ids": series or None,
            "include_retracted": include_retracted,
            "event_types": event_type or None,
            "statuses": status or None,
            "triage": triage_state or None,
            "min_effect_pct": min_effect_pct,
        }
        url = database_url(db)
        require_tables(url)
        machine = as_json or as_csv
        shown_limit = limit if machine else min(limit or TABLE_ROWS, TABLE_ROWS)
        # Sorted by size, the largest of all matching events come first: read them
        # all, sort, then keep the first N (by time, the database keeps N).
        by_time = sort == "time"
        frame = persist.read_events(
            url, **filters, newest_first=not oldest_first, limit=shown_limit if by_time else None
        )
        total = None
        if not machine and len(frame) == shown_limit:
            total = persist.count_events(url, **filters)
        labels = _series_labels(url)
    if not by_time:
        frame = sort_events(frame, sort)
        if shown_limit is not None and len(frame) > shown_limit:
            total = len(frame)
            frame = frame.head(shown_limit)
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
        order = ("oldest" if oldest_first else "newest") if sort == "time" else f"largest {sort}"
        title = f"{total if total is not None else len(frame)} events, {order} first"
        if total is not None and len(frame) < total:
            title += f" ({len(frame)} shown; --limit, --json or --csv for more)"
        console.print(events_table(frame, title=title, width=console.width, labels=labels))
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
        return persist.read_labels(url)
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
    by: Annotated[
        str | None,
        typer.Option(
            "--by",
            metavar="NAME",
            help="Who gives the verdict.  Default: the login name of this session.",
            show_default=False,
        ),
    ] = None,
    db: DbOpt = None,
) -> None:
    """Record a person's verdict on a stored event; later scans keep it.

    Every verdict is kept (changekind verdicts SERIES_ID EVENT_TIME lists them):
    a new one does not erase an earlier one's reason.
    """
    with usage_errors():
        allowed = (*persist.TRIAGE_STATES, "clear")
        if state not in allowed:
            raise ConfigError(f"unknown state {state!r}; use one of {', '.join(allowed)}")
        if state == "clear" and reason is not None:
            raise ConfigError("--reason goes with a verdict, not with 'clear'")
        url = database_url(db)
        require_tables(url)
        stored = _stored_time(url, series_id, event_time)
        persist.set_triage(
            url,
            series_id,
            stored,
            None if state == "clear" else state,
            reason,
            by=by if by is not None else _login(),
        )
    said = "verdict cleared" if state == "clear" else state
    if reason:
        said += f" ({reason})"
    out_console().print(f"{series_id} at {stored}: {said}", markup=False)


def _login() -> str | None:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no login name in this environment (a container)
        return None


@app.command()
def verdicts(
    series_id: Annotated[
        str, typer.Argument(metavar="SERIES_ID", help="The event's series.", show_default=False)
    ],
    event_time: Annotated[
        str,
        typer.Argument(
            metavar="EVENT_TIME",
            help="The event's time as 'changekind events' prints it.",
            show_default=False,
        ),
    ],
    db: DbOpt = None,
) -> None:
    """List every verdict given to a stored event, oldest first (who, when, state, why)."""
    with usage_errors():
        url = database_url(db)
        require_tables(url)
        stored = _stored_time(url, series_id, event_time)
        history = persist.read_triage_history(url, series_id, stored)
    console = out_console()
    if history.empty:
        console.print(f"{series_id} at {stored}: no verdict given yet", markup=False)
        return
    console.print(verdicts_table(history, title=f"{series_id} at {stored}", width=console.width))
