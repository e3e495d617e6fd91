"""``changekind drill``: the raw points behind an event, windowed or raw.

Without ``--window`` the event is looked up in the database (by its series
and time: the event's key) and its window comes from what is stored: a
windowed event's own ``window_start``/``window_end``, else the series' stored
model (its window width, or one grid step for a raw model).  Without
``--source`` the source is the one the latest run recorded.

matplotlib is imported only for ``--png``, on purpose: it costs a second at
start-up that the table and CSV outputs do not need.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated

import numpy as np
import pandas as pd
import typer
from rich.table import Table

from changekind.flows.cli.app import app, err_console, fail_usage, out_console
from changekind.flows.cli.config import column_map, database_url, reading_source, require_tables
from changekind.flows.cli.options import (
    DbOpt,
    QueryOpt,
    ReadSourceOpt,
    SeriesColOpt,
    TableOpt,
    TimeColOpt,
    TimestampUnitOpt,
    ValueColOpt,
)
from changekind.tasks import persist
from changekind.tasks.errors import ChangekindError, ConfigError
from changekind.tasks.fetch import open_source
from changekind.tasks.timeaxis import parse_instant
from changekind.tasks.types import format_duration, number
from changekind.tasks.window.drill import drill
from changekind.tasks.window.summary import MAD_SCALE, parse_window

# --------------------------------------------------------------------------- drill

DEFAULT_AROUND = 2
"""Windows shown either side of the drilled one."""
RAW_AROUND = 12
"""Grid steps shown either side of a raw event (its "windows" are single steps)."""


@dataclass(frozen=True, slots=True)
class StoredWindow:
    """The window of a drill, found in the database."""

    width: pd.Timedelta
    time: str
    """The time to drill at: the stored event's time when one was found."""
    raw: bool
    """True for a raw (not windowed) analysis: the width is one grid step."""
    said: str
    """Where the width came from, in words (for the title)."""


def stored_window(db_url: str, series_id: str, event_time: str) -> StoredWindow:
    """The window to drill from the stored event at ``event_time``, or the series' model.

    The event is the series' stored event whose time is ``event_time`` (the
    same instant written another way matches too) or, for a windowed event,
    whose window holds it.  A windowed event gives its own window; otherwise
    the series' stored model gives its window width, or its grid step when it
    was fitted on raw points.

    Raises
    ------
    ConfigError
        No database, or neither an event nor a model of the series there (the
        message says to give ``--window``).
    """
    require_tables(db_url)
    when = parse_instant(event_time, what="event time")
    if isinstance(when, float):
        raise ConfigError(
            f"event time {event_time!r} is a number; drill needs a date-time (ISO 8601)"
        )
    events = persist.read_events(db_url, series_ids=[series_id], include_retracted=True)
    event = None
    if not events.empty:
        starts = pd.to_datetime(events["window_start"], utc=True, format="ISO8601")
        ends = pd.to_datetime(events["window_end"], utc=True, format="ISO8601")
        hit = (events["event_time"] == event_time) | (events["event_ts"] == when)
        hit |= (starts <= when) & (when < ends)
        if hit.any():
            event = events[hit.to_numpy()].iloc[0]
    if event is not None and isinstance(event["window_start"], str) and event["window_end"]:
        width = pd.Timestamp(event["window_end"]) - pd.Timestamp(event["window_start"])
        return StoredWindow(
            width, str(event["event_time"]), False, f"the stored {event['event_type']}'s window"
        )
    model = persist.load_models(db_url, [series_id]).get(series_id)
    what = f"the stored {event['event_type']}" if event is not None else None
    at = str(event["event_time"]) if event is not None else event_time
    if model is not None and model.window is not None:
        return StoredWindow(
            parse_window(model.window), at, False, "the window of the series' stored model"
        )
    if model is not None and model.step_seconds:
        width = pd.Timedelta(seconds=model.step_seconds)
        said = f"{what}, raw" if what else "raw model"
        return StoredWindow(width, at, True, f"{said}: one grid step per window")
    raise ConfigError(
        f"series {series_id!r} has no stored event at {event_time!r} and no stored model "
        "with a window or a time grid in the database; give --window (e.g. 1min)"
    )


def _point(x: float) -> str:
    return number(x, ".6g")


def _windows_table(rows: pd.DataFrame, title: str) -> Table:
    """One line per window: count, first, min, median, max, last, spread."""

    table = Table(title=title, title_justify="left")
    for name in ("window", "start", "points", "first", "min", "median", "max", "last", "spread"):
        table.add_column(name, justify="left" if name in ("window", "start") else "right")
    for offset, part in rows.groupby("window_offset", sort=True):
        v = part["value"].to_numpy(dtype=float)
        v = v[~np.isnan(v)]
        med = float(np.median(v)) if v.size else math.nan
        spread = MAD_SCALE * float(np.median(np.abs(v - med))) if v.size else math.nan
        cells = (
            [_point(v[0]), _point(v.min()), _point(med), _point(v.max()), _point(v[-1])]
            if v.size
            else ["-"] * 5
        )
        table.add_row(
            f"{int(offset):+d}" if offset else "0 (drilled)",
            part["window_start"].iloc[0].isoformat(),
            str(v.size),
            *cells,
            _point(spread),
            style="bold" if offset == 0 else None,
        )
    return table


def _points_table(rows: pd.DataFrame) -> Table:
    table = Table(title="Raw points", title_justify="left")
    table.add_column("time", justify="left", no_wrap=True)
    table.add_column("value", justify="right")
    table.add_column("window", justify="right")
    table.add_column("extreme", justify="center")
    extreme = rows["extreme"] if "extreme" in rows else [False] * len(rows)
    for stamp, value, offset, far in zip(
        rows["timestamp"], rows["value"], rows["window_offset"], extreme, strict=True
    ):
        when = stamp.isoformat() if hasattr(stamp, "isoformat") else str(stamp)
        table.add_row(
            when,
            _point(float(value)),
            f"{int(offset):+d}" if offset else "0",
            "yes" if far else "",
            style="bold" if offset == 0 else None,
        )
    return table


def _write_png(rows: pd.DataFrame, path: Path, *, title: str, width: pd.Timedelta) -> None:
    """Raw points, window medians as steps, the drilled window shaded."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    starts = pd.DatetimeIndex(rows["window_start"])
    times = starts + pd.to_timedelta(_within(rows, width), unit="ns")
    if starts.tz is not None:
        starts, times = starts.tz_localize(None), times.tz_localize(None)
    fig, ax = plt.subplots(figsize=(10, 4), dpi=100)
    try:
        ax.plot(times, rows["value"], ".", markersize=3, color="tab:blue", label="raw points")
        focus = starts[(rows["window_offset"] == 0).to_numpy()][0]
        offsets = rows["window_offset"].to_numpy()
        span = range(int(offsets.min()), int(offsets.max()) + 1)  # empty windows too
        medians = rows.groupby(offsets)["value"].median().reindex(span)
        edges = [focus + k * width for k in [*span, span.stop]]
        ax.stairs(
            medians.to_numpy(), edges, baseline=None, color="tab:orange", label="window median"
        )
        ax.axvspan(focus, focus + width, color="tab:red", alpha=0.15, label="drilled window")
        for edge in edges:
            ax.axvline(edge, color="0.85", linewidth=0.6, zorder=0)
        ax.set_title(title, fontsize=10)
        ax.set_ylabel("value")
        ax.legend(loc="best", fontsize=8)
        fig.autofmt_xdate()
        fig.tight_layout()
        fig.savefig(path, format="png")
    finally:
        plt.close(fig)


def _within(rows: pd.DataFrame, width: pd.Timedelta):
    """Nanoseconds of each row after its window start (for plotting text timestamps)."""

    stamps = rows["timestamp"]
    if not pd.api.types.is_datetime64_any_dtype(stamps.dtype):
        stamps = pd.to_datetime(stamps.astype(str), format="ISO8601", utc=True)
    starts = rows["window_start"]
    if getattr(stamps.dt, "tz", None) is not None and getattr(starts.dt, "tz", None) is None:
        stamps = stamps.dt.tz_convert("UTC").dt.tz_localize(None)
    elif getattr(stamps.dt, "tz", None) is None and getattr(starts.dt, "tz", None) is not None:
        stamps = stamps.dt.tz_localize("UTC")  # a naive time is UTC (timeaxis)
    offset = (stamps - starts).to_numpy().astype("timedelta64[ns]").view("i8")
    return offset.clip(0, int(width.value) - 1)


@app.command(name="drill")
def drill_command(
    series_id: Annotated[
        str,
        typer.Argument(metavar="SERIES_ID", help="The series to look into.", show_default=False),
    ],
    event_time: Annotated[
        str,
        typer.Argument(
            metavar="EVENT_TIME",
            help="A time inside the window, e.g. an event's window_start (ISO 8601).",
            show_default=False,
        ),
    ],
    window: Annotated[
        str | None,
        typer.Option(
            "--window",
            metavar="SPAN",
            help="Window width used for detection: 250ms, 10s, 1min, 15min, 1h...  "
            "Default: the stored event's window in --db, else its series' stored model's "
            "(one grid step for a raw model).",
            show_default=False,
        ),
    ] = None,
    source: ReadSourceOpt = None,
    db: DbOpt = None,
    around: Annotated[
        int | None,
        typer.Option(
            "--around",
            metavar="K",
            min=0,
            max=1000,
            help=f"Windows shown either side.  Default: {DEFAULT_AROUND}, or {RAW_AROUND} "
            "grid steps for a raw event.",
            show_default=False,
        ),
    ] = None,
    as_csv: Annotated[
        bool, typer.Option("--csv", help="Print the raw rows as CSV on stdout.")
    ] = False,
    png: Annotated[
        Path | None,
        typer.Option(
            "--png",
            metavar="FILE",
            help="Write a plot of the raw points with the window shaded.",
            show_default=False,
        ),
    ] = None,
    series_column: SeriesColOpt = None,
    timestamp_column: TimeColOpt = None,
    value_column: ValueColOpt = None,
    table: TableOpt = None,
    query: QueryOpt = None,
    timestamp_unit: TimestampUnitOpt = None,
    timezone: Annotated[
        str,
        typer.Option("--timezone", metavar="ZONE", help="IANA time zone of naive timestamps."),
    ] = "UTC",
) -> None:
    """Show the raw points of one window (and K windows either side) from the source.

    The event is named by its series and time, as 'changekind events' prints
    them; without --window its window is found in the database.
    """

    columns = column_map(series_column, timestamp_column, value_column)
    found = None
    try:
        db_url = None if db is None and source is not None and window else database_url(db)
        if window is not None:
            width = parse_window(window)
        else:
            assert db_url is not None
            found = stored_window(db_url, series_id, event_time)
            width, event_time = found.width, found.time
        if around is None:
            around = RAW_AROUND if found is not None and found.raw else DEFAULT_AROUND
        where = reading_source(source, db_url, columns)
        if where.said() is not None:
            err_console().print(where.said(), markup=False)
        spec = open_source(
            where.location,
            columns=where.columns,
            table=table,
            query=query,
            timestamp_unit=timestamp_unit,
            timezone=timezone,
        )
        rows = drill(spec, series_id, event_time, width, around=around)
    except ChangekindError as exc:
        raise fail_usage(str(exc)) from None

    focus = rows.loc[rows["window_offset"] == 0, "window_start"].iloc[0]
    name = format_duration(width.total_seconds())
    title = (
        f"{series_id}: window {focus.isoformat()} to {(focus + width).isoformat()} "
        f"({name}{'' if found is None else ', from ' + found.said}), {around} window(s) "
        f"either side, {len(rows)} raw points"
    )
    if png is not None:
        try:
            _write_png(rows, png, title=title, width=width)
        except OSError as exc:
            raise fail_usage(f"cannot write {png}: {exc.strerror or exc}") from None
    if as_csv:
        out = rows.assign(window_start=rows["window_start"].map(lambda t: t.isoformat()))
        out.to_csv(sys.stdout, index=False, lineterminator="\n")
        sys.stdout.flush()
    elif png is not None:
        out_console().print(f"{title}; plot written to {png}", markup=False)
    else:
        console = out_console()
        console.print(_windows_table(rows, title))
        console.print(_points_table(rows))
    if png is not None and as_csv:
        err_console().print(f"plot written to {png}", markup=False)
