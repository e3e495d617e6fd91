"""What the commands print: tables, summaries and machine-readable records."""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import pandas as pd
from rich.console import Console
from rich.table import Table

from changekind.flows.cli.app import err_console
from changekind.tasks.persist import EVENT_COLUMNS, EVENT_EXTRA_COLUMNS
from changekind.tasks.types import DetectionResult, Event, number

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


def series_table(result: DetectionResult) -> Table:
    """A readable table of one series' events."""
    table = Table(
        title=f"{result.series_id}",
        title_justify="left",
        caption=f"model: {result.model.spec()}",
        caption_justify="left",
    )
    for name, justify in (
        ("time", "left"),
        ("type", "left"),
        ("effect", "right"),
        ("effect %", "right"),
        ("t", "right"),
        ("type weights", "left"),
        ("status", "left"),
        ("half-life", "right"),
    ):
        table.add_column(name, justify=justify, no_wrap=name in ("time", "type weights"))
    for event in _ordered_events(result):
        table.add_row(
            event.event_time,
            event.event_type,
            number(event.effect, "+.4g"),
            number(event.effect_pct, "+.1f"),
            number(event.t_stat, "+.2f"),
            top_weights(event),
            event.status,
            event.half_life or "-",
        )
    return table


def print_result(console: Console, result: DetectionResult) -> None:
    """One series in human form: events table (or a line), model, patterns, notes."""
    counts = f"{result.nobs} points, {result.n_missing} missing, critical |t| {result.critical:.2f}"
    if result.events:
        console.print(series_table(result))
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
    by_type = ", ".join(f"{k} {n}" for k, n in summary.by_type if k != "VC" or n)
    took = seconds_text(summary.seconds)
    if wall is not None:
        took += f" ({seconds_text(wall)} with Prefect start-up)"
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
                number(e.effect, "+.4g"),
                number(e.effect_pct, "+.1f"),
                number(e.t_stat, "+.2f"),
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
    labels: Mapping[str, Mapping[str, str | None]] | None = None,
) -> Table:
    """Stored events in a readable table (with an ``attributes`` column when ``labels``)."""
    table = Table(title=title, title_justify="left")
    texts = ("series", "time", "weights", "status", "triage")
    if labels:
        texts = (*texts, "attributes")
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
            number(row.effect, "+.4g"),
            number(row.effect_pct, "+.1f"),
            number(row.t_stat, "+.2f"),
            _weights_text(row.type_weights),
            row.status,
            row.triage_state or "-",
            *(
                [", ".join(f"{k}={v}" for k, v in sorted(labels.get(row.series_id, {}).items()))]
                if labels
                else []
            ),
        )
    return table
