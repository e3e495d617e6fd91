"""What the commands print: tables, summaries and machine-readable records."""

from __future__ import annotations

import csv
import functools
import io
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal

import pandas as pd
from rich import box
from rich.cells import cell_len
from rich.console import Console
from rich.measure import Measurement
from rich.table import Table

from changekind.flows.cli.app import err_console
from changekind.tasks.effects import EFFECTS, UNKNOWN
from changekind.tasks.persist import EVENT_COLUMNS, EVENT_EXTRA_COLUMNS
from changekind.tasks.types import DetectionResult, Event, format_duration, number

if TYPE_CHECKING:
    from changekind.flows.cli.detect import SeriesOutcome
    from changekind.flows.pipeline import RunSummary

TABLE_ROWS = 200
"""Most events the ``events`` table shows (the newest); --json and --csv show all."""

SHOWN_FAILURES = 20
"""Most failed series a summary lists one by one."""

# --------------------------------------------------------------------------- output


def finite(value: Any) -> Any:
    """JSON has no NaN or infinity: write them as null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [finite(v) for v in value]
    return value


# --------------------------------------------------------------------------- fitting tables

DEFAULT_WIDTH = 120
"""Width of tables built without a console (wide enough for every column)."""

MIN_ID_WIDTH = 12
"""Narrowest a shortened id gets before columns are left out instead."""


@dataclass(frozen=True, slots=True)
class Column:
    """A column of a table that fits its width.

    ``priority``: columns with the highest number are left out first when the
    table is too wide (0: never left out).  ``shorten``: cells are ids that may
    be shortened in the middle (both ends kept); other cells are never cut.
    """

    name: str
    justify: Literal["left", "right"] = "right"
    priority: int = 0
    shorten: bool = False


def shorten_middle(text: str, width: int) -> str:
    """``text`` cut to ``width`` characters by an ellipsis in the middle (both ends kept)."""
    if len(text) <= width:
        return text
    keep = max(width - 1, 2)
    head = (keep + 1) // 2
    return f"{text[:head]}…{text[len(text) - (keep - head) :]}"


def _shown(column: Column, cell: str, id_width: int | None) -> str:
    """The cell as the table shows it: an id shortened in the middle to ``id_width``."""
    return shorten_middle(cell, id_width) if column.shorten and id_width is not None else cell


def _build(
    columns: Sequence[Column],
    rows: Sequence[Sequence[str]],
    id_width: int | None,
    *,
    title: str | None = None,
    caption: str | None = None,
) -> Table:
    table = Table(
        title=title,
        title_justify="left",
        caption=caption,
        caption_justify="left",
        box=box.SIMPLE_HEAD,
        pad_edge=False,
    )
    for column in columns:
        table.add_column(column.name, justify=column.justify, no_wrap=True)
    for row in rows:
        table.add_row(*(_shown(c, cell, id_width) for c, cell in zip(columns, row, strict=True)))
    return table


_MEASURE = Console(width=10_000)


@functools.cache
def _overhead(n_columns: int) -> int:
    """Characters a table of ``n_columns`` adds to its cells (padding, rules), measured once."""
    table = _build([Column("x")] * n_columns, [["x"] * n_columns], None)
    return Measurement.get(_MEASURE, _MEASURE.options, table).maximum - n_columns


def _width(columns: Sequence[Column], rows: Sequence[Sequence[str]], id_width: int | None) -> int:
    """Characters the table's columns need (titles and captions wrap, so they do not count)."""
    total = _overhead(len(columns))
    for i, column in enumerate(columns):
        widest = cell_len(column.name)
        for row in rows:
            widest = max(widest, cell_len(_shown(column, row[i], id_width)))
        total += widest
    return total


def fitted_table(
    columns: Sequence[Column],
    rows: Sequence[Sequence[str]],
    *,
    width: int | None,
    title: str | None = None,
    caption: str | None = None,
) -> Table:
    """A table whose every cell is shown whole within ``width`` characters.

    Notes
    -----
    1. Everything fits: done.  2. Otherwise with ids shortened in the middle to
    :data:`MIN_ID_WIDTH`, the columns that fit: leave out columns, highest
    ``priority`` first, until they do; the ids then get the room left.
    3. When even the columns never left out do not fit, the ids are shortened
    below :data:`MIN_ID_WIDTH` (to 4 characters at least).  Numbers and times
    are never cut: a column shows whole or is left out.
    """
    width = width or DEFAULT_WIDTH
    kept = list(columns)
    rows = [list(r) for r in rows]

    def pick(cols: list[Column]) -> list[list[str]]:
        where = [columns.index(c) for c in cols]
        return [[r[i] for i in where] for r in rows]

    def done(cols: list[Column], id_width: int | None) -> Table:
        return _build(cols, pick(cols), id_width, title=title, caption=caption)

    # Step 1.
    if _width(kept, pick(kept), None) <= width:
        return done(kept, None)
    ids = [i for i, c in enumerate(columns) if c.shorten]
    longest = max((len(r[i]) for r in rows for i in ids), default=0)
    id_floor = min(longest, MIN_ID_WIDTH) if ids else None
    # Step 2.
    droppable = sorted((c for c in kept if c.priority), key=lambda c: -c.priority)
    while True:
        need = _width(kept, pick(kept), id_floor)
        if need <= width:
            if id_floor is None:
                return done(kept, None)
            id_width = min(longest, id_floor + (width - need))
            while id_width > id_floor and _width(kept, pick(kept), id_width) > width:
                id_width -= 1
            return done(kept, id_width)
        if not droppable:
            break
        kept.remove(droppable.pop(0))
    # Step 3.
    if id_floor is None:
        return done(kept, None)
    return done(kept, max(4, id_floor - (need - width)))


def half_life_text(value: float | None, *, timed: bool = True) -> str:
    """A stored half-life readable: ``'1.94 h'`` (seconds) or ``'12 steps'`` (index units)."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return format_duration(float(value)) if timed else f"{float(value):.3g} units"


def time_text(event_time: str, event_ts: Any) -> str:
    """An event's time for a table: UTC ``YYYY-MM-DD HH:MM[:SS]``, or the label as given."""
    if event_ts is None or event_ts is pd.NaT or (isinstance(event_ts, float)):
        return event_time
    stamp = pd.Timestamp(event_ts).tz_convert("UTC")
    if stamp.nanosecond or stamp.microsecond:
        return stamp.strftime("%Y-%m-%d %H:%M:%S.%f")
    return stamp.strftime("%Y-%m-%d %H:%M:%S" if stamp.second else "%Y-%m-%d %H:%M")


def _ordered_events(result: DetectionResult) -> list[Event]:
    return sorted(result.events, key=lambda e: e.position)


def event_records(outcomes: Sequence[SeriesOutcome]) -> list[dict[str, Any]]:
    """Every event as its JSON record, series in input order, then by time."""
    return [
        finite(event.to_record())
        for outcome in outcomes
        if outcome.result is not None
        for event in _ordered_events(outcome.result)
    ]


def top_weights(event: Event, *, k: int = 3, floor: float = 0.01) -> str:
    """The leading type weights, e.g. ``'LS 0.79 · TC 0.19'``."""
    ranked = sorted(event.type_weights, key=lambda kv: -kv[1])
    shown = [f"{kind} {w:.2f}" for kind, w in ranked[:k] if w >= floor]
    return " · ".join(shown) or "-"


def number_text(value: float | None, fmt: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return format(value, fmt)


def series_table(result: DetectionResult, *, width: int | None = None) -> Table:
    """A readable table of one series' events, fitted to ``width`` characters."""
    columns = (
        Column("time", "left"),
        Column("type", "left"),
        Column("effect"),
        Column("effect %", priority=2),
        Column("t"),
        Column("status", "left", priority=3),
        Column("half-life", priority=4),
        Column("type weights", "left", priority=5),
    )
    rows = []
    for event in _ordered_events(result):
        timed = _parse_time(event.event_time)
        rows.append(
            [
                event.event_time,
                event.event_type,
                number_text(event.effect, "+.4g"),
                number_text(event.effect_pct, "+.1f"),
                number_text(event.t_stat, "+.2f"),
                event.status,
                half_life_text(event.half_life, timed=timed),
                top_weights(event),
            ]
        )
    return fitted_table(
        columns,
        rows,
        width=width,
        title=shorten_middle(result.series_id, max(20, (width or DEFAULT_WIDTH) - 2)),
        caption=f"model: {result.model.spec()}",
    )


def _parse_time(text: str) -> bool:
    """Whether an event time is a date-time (not a numeric grid's label)."""
    try:
        float(text)
    except ValueError:
        return True
    return False


def print_result(console: Console, result: DetectionResult) -> None:
    """One series in human form: events table (or a line), model, patterns, notes."""
    counts = f"{result.nobs} points, {result.n_missing} missing, critical |t| {result.critical:.2f}"
    if result.events:
        console.print(series_table(result, width=console.width))
        console.print(f"  {counts}", markup=False)
    else:
        console.print(f"{result.series_id}: no events ({counts})", markup=False)
        console.print(f"  model: {result.model.spec()}", markup=False)
    for pattern in result.patterns:
        console.print(
            f"  recurring pattern: spikes every {pattern.period_time} "
            f"({pattern.period} points), {pattern.occurrences} times, "
            f"amplitude {pattern.amplitude:+.4g}; absorbed into the seasonal model",
            markup=False,
        )
    for note in result.notes:
        console.print(f"  note: {note}", markup=False)
    console.print()


# --------------------------------------------------------------------------- summaries


def summary_record(summary: RunSummary) -> dict[str, Any]:
    """A RunSummary as JSON-ready values (NaN and infinities as null)."""
    return finite(
        {
            "run_id": summary.run_id,
            "kind": summary.kind,
            "series_total": summary.series_total,
            "series_ok": summary.series_ok,
            "series_failed": summary.series_failed,
            "deferred": summary.deferred,
            "up_to_date": summary.up_to_date,
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
            "top_events": [
                {**e.to_record(), "change": change}
                for e, change in zip(
                    summary.top_events,
                    summary.top_changes or (None,) * len(summary.top_events),
                    strict=True,
                )
            ],
            "timings": dict(summary.timings),
            "source_problems": list(summary.problems),
            "notes": list(summary.notes),
            "refits": dict(summary.refits),
            "refits_deferred": summary.refits_deferred,
            "incidents": dict(summary.incidents),
            "notified": summary.notified,
            "labelled": summary.labelled,
        }
    )


def seconds_text(value: float) -> str:
    return f"{value:.1f} s" if value < 120 else f"{value / 60:.1f} min"


def print_summary(console: Console, summary: RunSummary, *, wall: float | None = None) -> None:
    """A run's summary for people: counts, new events by type, strongest events, failures."""
    # Variance changes come from windowed runs only: shown when there are some.
    by_type = ", ".join(
        f"{k} {n}" for k, n in summary.by_type if not EFFECTS.get(k, UNKNOWN).in_spread or n
    )
    took = seconds_text(summary.seconds)
    if wall is not None:
        took += f" ({seconds_text(wall)} with Prefect start-up)"
    idle = f", {summary.up_to_date} up to date" if summary.up_to_date else ""
    console.print(
        f"{summary.kind} {summary.run_id}: {summary.series_total} series "
        f"({summary.cold} cold, {summary.warm} warm, {summary.series_failed} failed, "
        f"{summary.deferred} deferred{idle}) in {summary.batches} "
        f"{'batch' if summary.batches == 1 else 'batches'}, {took}",
        markup=False,
    )
    console.print(
        f"events: {summary.events_new} new ({by_type}), {summary.events_changed} changed, "
        f"{summary.events_retracted} retracted",
        markup=False,
    )
    if summary.top_events:
        changes = summary.top_changes or ("",) * len(summary.top_events)
        columns = (
            Column("", "left"),
            Column("series", "left", shorten=True),
            Column("time", "left"),
            Column("type", "left"),
            Column("effect"),
            Column("effect %", priority=2),
            Column("t"),
            Column("status", "left", priority=1),
        )
        rows = [
            [
                change,
                e.series_id,
                e.event_time,
                e.event_type,
                number(e.effect, "+.4g"),
                number(e.effect_pct, "+.1f"),
                number(e.t_stat, "+.2f"),
                e.status,
            ]
            for e, change in zip(summary.top_events, changes, strict=True)
        ]
        console.print(
            fitted_table(
                columns,
                rows,
                width=console.width,
                title="Strongest events of the run (new: found by this run; changed: "
                "type or status changed; seen: stored before, unchanged)",
            )
        )
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


def report_failures(summary: RunSummary) -> None:
    err = err_console()
    for sid, stage, message in summary.failures:
        err.print(f"changekind: series {sid!r} failed ({stage}): {message}", markup=False)
    for line in summary.problems:
        err.print(f"changekind: source: {line}", markup=False)


# --------------------------------------------------------------------------- events, triage


def event_json_records(
    frame: pd.DataFrame, labels: Mapping[str, Mapping[str, str | None]] | None = None
) -> list[dict[str, Any]]:
    """Stored events as records of the ``detect --json`` contract (NaN as null).

    With ``labels`` (series id -> {attribute: value}), each record ends with
    ``labels``: its series' attributes (an empty object when it has none).
    """

    records = []
    for row in frame.loc[:, list(EVENT_COLUMNS)].itertuples(index=False):
        record = {}
        for name, value in zip(EVENT_COLUMNS, row, strict=True):
            if isinstance(value, float) and math.isnan(value):
                value = None
            elif name == "type_weights":
                value = {k: float(v) for k, v in value.items()}
            record[name] = value
        if labels is not None:
            record["labels"] = dict(labels.get(record["series_id"], {}))
        records.append(finite(record))
    return records


def event_csv(
    frame: pd.DataFrame, labels: Mapping[str, Mapping[str, str | None]] | None = None
) -> str:
    """Stored events as CSV: the contract's columns, then triage and bookkeeping,
    then (with ``labels``) ``labels``: the series' attributes as a JSON object."""

    out = frame.loc[:, [*EVENT_COLUMNS, *EVENT_EXTRA_COLUMNS]].copy()
    if labels is not None:
        out["labels"] = [
            json.dumps(dict(labels.get(s, {})), sort_keys=True) for s in out["series_id"]
        ]
    out["type_weights"] = [json.dumps(w, sort_keys=False) for w in out["type_weights"]]
    for name in ("event_ts", "first_seen", "last_seen", "triage_at"):
        out[name] = [None if v is None or v != v else v.isoformat() for v in out[name]]
    buffer = io.StringIO()
    out.to_csv(buffer, index=False, quoting=csv.QUOTE_MINIMAL, lineterminator="\n")
    return buffer.getvalue()


def _weights_text(weights: Mapping[str, float], *, k: int = 2, floor: float = 0.01) -> str:
    ranked = sorted(weights.items(), key=lambda kv: -kv[1])
    return " · ".join(f"{t} {w:.2f}" for t, w in ranked[:k] if w >= floor) or "-"


def events_table(
    frame: pd.DataFrame,
    *,
    title: str,
    width: int | None = None,
    labels: Mapping[str, Mapping[str, str | None]] | None = None,
) -> Table:
    """Stored events in a readable table fitted to ``width`` characters (times in UTC),
    with an ``attributes`` column when ``labels`` (left out first when narrow)."""
    columns = (
        Column("series", "left", shorten=True),
        Column("time (UTC)", "left"),
        Column("type", "left"),
        Column("effect"),
        Column("effect %", priority=2),
        Column("t", priority=3),
        Column("status", "left", priority=5),
        Column("triage", "left", priority=1),
        Column("half-life", priority=4),
        Column("weights", "left", priority=6),
        *([Column("attributes", "left", priority=7, shorten=True)] if labels else []),
    )
    rows = [
        [
            row.series_id,
            time_text(row.event_time, row.event_ts),
            row.event_type,
            number_text(row.effect, "+.4g"),
            number_text(row.effect_pct, "+.1f"),
            number_text(row.t_stat, "+.2f"),
            row.status,
            row.triage_state or "-",
            half_life_text(row.half_life, timed=not pd.isna(row.event_ts)),
            _weights_text(row.type_weights),
            *(
                [", ".join(f"{k}={v}" for k, v in sorted(labels.get(row.series_id, {}).items()))]
                if labels
                else []
            ),
        ]
        for row in frame.itertuples(index=False)
    ]
    return fitted_table(columns, rows, width=width, title=title)


def verdicts_table(history: pd.DataFrame, *, title: str, width: int | None = None) -> Table:
    """An event's verdicts, oldest first: when (UTC), state, who and why."""
    columns = (
        Column("when (UTC)", "left"),
        Column("state", "left"),
        Column("by", "left", shorten=True),
        Column("reason", "left", shorten=True),
    )
    rows = [
        [
            time_text(row.decided_at.isoformat(), row.decided_at),
            row.state or "cleared",
            row.decided_by or "-",
            row.reason or "-",
        ]
        for row in history.itertuples(index=False)
    ]
    return fitted_table(columns, rows, width=width, title=title)
