"""Prefect artifacts of a fleet run: a summary in markdown and a table of its events.

Call :func:`publish_run_artifacts` at the end of a scan, backfill or refit
flow (inside the flow run, so the artifacts belong to it).  Two keyed
artifacts are created, so the Prefect UI keeps their history across runs:

- ``changekind-<kind>-summary`` (markdown): series analysed, up to date and
  failed (the counts of the run record), events new/changed/retracted, new
  events by type, the strongest events by |t| marked new, changed or seen, the
  failures, and the run's notes (the run record's message: refit reasons,
  "nothing to do: span already done", ...);
- ``changekind-<kind>-events`` (table): the run's events, strongest first --
  those it wrote or changed (``last_run_id`` is the run) when the database is
  given, else the summary's strongest events.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

from prefect.artifacts import create_markdown_artifact, create_table_artifact

from changekind.flows.pipeline import RunSummary
from changekind.tasks import persist
from changekind.tasks.types import EVENT_NAMES, REPORTED_TYPES, format_duration, number

MAX_TABLE_ROWS = 1000
"""Most rows in the events table (strongest first); the description says how many were left out."""

MAX_FAILURES_SHOWN = 20
MAX_TOP_SHOWN = 10
MAX_MESSAGE_CHARS = 200

_MD_SPECIAL = re.compile(r"([\\`*_{}\[\]<>()#+!|~])")
_MD_INLINE = re.compile(r"([\\`*_\[\]<>|~])")


def artifact_key(kind: str, what: str) -> str:
    """``changekind-<kind>-<what>`` in lowercase letters, digits and dashes (Prefect's rule)."""
    raw = f"changekind-{kind}-{what}".lower()
    return re.sub(r"-{2,}", "-", re.sub(r"[^a-z0-9-]+", "-", raw)).strip("-")


def _md(text: object) -> str:
    """Text safe inside a markdown table cell: special characters escaped, one line."""
    flat = " ".join(str(text).split())
    return _MD_SPECIAL.sub(r"\\\1", flat)


def run_markdown(summary: RunSummary, *, n_table_rows: int | None = None) -> str:
    """The summary artifact's text.

    Parameters
    ----------
    summary : RunSummary
    n_table_rows : int, optional
        Rows of the events table published beside it (mentioned when given).
    """
    s = summary
    lines = [
        f"# changekind {_md(s.kind)} run",
        "",
        f"Run `{_md(s.run_id)}`, {format_duration(s.seconds)}, {s.batches} batch(es).",
        "",
        "| series | count |",
        "|---|---:|",
        f"| total | {s.series_total} |",
        f"| analysed | {s.series_ok} |",
        f"| first fit (cold) | {s.cold} |",
        f"| new points only (warm) | {s.warm} |",
        f"| deferred (too little history) | {s.deferred} |",
        f"| up to date (nothing to analyse) | {s.up_to_date} |",
        f"| failed | {s.series_failed} |",
        "",
        f"**Events:** {s.events_new} new, {s.events_changed} changed, "
        f"{s.events_retracted} retracted.",
        "",
        "| type | meaning | new events |",
        "|---|---|---:|",
    ]
    counts = dict(s.by_type)
    lines += [f"| {k} | {EVENT_NAMES[k]} | {counts.get(k, 0)} |" for k in REPORTED_TYPES]
    lines += ["", f"## Strongest events (by |t|, at most {MAX_TOP_SHOWN})", ""]
    if s.top_events:
        lines += [
            "new: found by this run; changed: type or status changed; seen: stored before, "
            "unchanged.",
            "",
            "| change | series | time | type | effect | effect % | t | status |",
            "|---|---|---|---|---:|---:|---:|---|",
        ]
        changes = s.top_changes or ("",) * len(s.top_events)
        for e, change in list(zip(s.top_events, changes, strict=True))[:MAX_TOP_SHOWN]:
            lines.append(
                f"| {change} | {_md(e.series_id)} | {_md(e.event_time)} | {e.event_type} | "
                f"{number(e.effect, '+.4g')} | {number(e.effect_pct, '+.1f')} | "
                f"{number(e.t_stat, '+.2f')} | {e.status} |"
            )
    else:
        lines.append("No event in this run.")
    if n_table_rows is not None:
        lines += ["", f"The events table of this run holds {n_table_rows} row(s)."]
    lines += ["", "## Failures", ""]
    if s.failures:
        lines += ["| series | stage | message |", "|---|---|---|"]
        for sid, stage, message in s.failures[:MAX_FAILURES_SHOWN]:
            text = (
                message if len(message) <= MAX_MESSAGE_CHARS else message[:MAX_MESSAGE_CHARS] + "…"
            )
            lines.append(f"| {_md(sid)} | {_md(stage)} | {_md(text)} |")
        if len(s.failures) > MAX_FAILURES_SHOWN:
            lines.append("")
            lines.append(
                f"{len(s.failures) - MAX_FAILURES_SHOWN} more failure(s): see the "
                "series_failures table for this run."
            )
    else:
        lines.append("No series failed.")
    if s.notes:
        lines += ["", "## Notes", ""]
        # Inside a list item only emphasis, code, links and HTML need escaping.
        lines += ["- " + _MD_INLINE.sub(r"\\\1", " ".join(note.split())) for note in s.notes]
    return "\n".join(lines) + "\n"


def _row(values: Mapping[str, Any]) -> dict[str, Any]:
    def as_float(x: Any) -> float | None:
        try:
            f = float(x)
        except (TypeError, ValueError):
            return None
        return f if math.isfinite(f) else None

    return {
        "series": str(values["series_id"]),
        "time": str(values["event_time"]),
        "type": str(values["event_type"]),
        "effect": as_float(values["effect"]),
        "effect_pct": as_float(values.get("effect_pct")),
        "t": as_float(values["t_stat"]),
        "status": str(values["status"]),
    }


def run_event_rows(
    summary: RunSummary, *, records: Sequence[Mapping[str, Any]] | None = None
) -> list[dict[str, Any]]:
    """The events table: one row per event, strongest |t| first.

    ``records`` are rows of :func:`changekind.tasks.persist.read_events`; those
    whose ``last_run_id`` is the run are kept.  Without records, the summary's
    strongest events.
    """
    if records is None:
        rows = [_row(e.to_record()) for e in summary.top_events]
    else:
        rows = [_row(r) for r in records if r.get("last_run_id") == summary.run_id]
    rows.sort(key=lambda r: (-(abs(r["t"]) if r["t"] is not None else -1.0), r["series"]))
    return rows


def publish_run_artifacts(
    summary: RunSummary, *, db: str | None = None, max_rows: int = MAX_TABLE_ROWS
) -> None:
    """Create the run's markdown summary and events table as Prefect artifacts.

    Parameters
    ----------
    summary : RunSummary
        What the flow returns.
    db : str, optional
        The run's database URL: the table then lists every event the run
        wrote, changed or retracted.  Without it, the summary's strongest events.
    max_rows : int, default=1000
        Most rows in the table (the strongest); the description says if more.

    Notes
    -----
    Call it inside the flow run (the artifacts are attached to the current
    flow run).  Artifact keys are :func:`artifact_key` of the run's kind.
    """
    records: list[dict[str, Any]] | None = None
    if db is not None:
        frame = persist.read_events(db, include_retracted=True)
        frame = frame[frame["last_run_id"] == summary.run_id]
        records = frame.to_dict(orient="records")
    rows = run_event_rows(summary, records=records)
    shown = rows[:max_rows]
    create_markdown_artifact(
        markdown=run_markdown(summary, n_table_rows=len(shown)),
        key=artifact_key(summary.kind, "summary"),
        description=f"changekind {summary.kind} {summary.run_id}: counts, strongest events, "
        "failures",
    )
    what = "events written, changed or retracted" if db is not None else "strongest events"
    more = f" (the {len(shown)} strongest of {len(rows)})" if len(rows) > len(shown) else ""
    create_table_artifact(
        table=shown,
        key=artifact_key(summary.kind, "events"),
        description=f"changekind {summary.kind} {summary.run_id}: {what}{more}",
    )


__all__ = [
    "MAX_TABLE_ROWS",
    "artifact_key",
    "publish_run_artifacts",
    "run_event_rows",
    "run_markdown",
]
