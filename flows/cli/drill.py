"""``changekind drill``: the raw points behind a windowed event.

matplotlib is imported only for ``--png``, on purpose: it costs a second at
start-up that the table and CSV outputs do not need.
"""

from __future__ import annotations

import math
import os
import sys
from pathlib import Path
from typing import Annotated

import numpy as np
import pandas as pd
import typer
from rich.table import Table

from changekind.flows.cli.app import app, err_console, fail_usage, out_console
from changekind.flows.cli.config import column_map
from changekind.flows.cli.options import (
    QueryOpt,
    SeriesColOpt,
    SourceOpt,
    TableOpt,
    TimeColOpt,
    TimestampUnitOpt,
    ValueColOpt,
)
from changekind.tasks.errors import ChangekindError
from changekind.tasks.fetch import open_source
from changekind.tasks.types import format_duration, number
from changekind.tasks.window.drill import drill
from changekind.tasks.window.summary import MAD_SCALE, parse_window

# --------------------------------------------------------------------------- drill

DEFAULT_AROUND = 2
"""Windows shown either side of the drilled one."""


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
        str,
        typer.Option(
            "--window",
            metavar="SPAN",
            help="Window width used for detection: 250ms, 10s, 1min, 15min, 1h...",
            show_default=False,
        ),
    ],
    source: SourceOpt = None,
    around: Annotated[
        int,
        typer.Option("--around", metavar="K", min=0, max=1000, help="Windows shown either side."),
    ] = DEFAULT_AROUND,
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
    """Show the raw points of one window (and K windows either side) from the source."""

    source = source if source is not None else os.environ.get("CHANGEKIND_SOURCE")
    if not source:
        raise fail_usage("no source given; pass --source PATH (or set CHANGEKIND_SOURCE)")
    columns = column_map(series_column, timestamp_column, value_column)
    try:
        width = parse_window(window)
        spec = open_source(
            source,
            columns=columns or None,
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
        f"({name}), {around} window(s) either side, {len(rows)} raw points"
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
