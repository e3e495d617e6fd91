"""``changekind incidents``: the stored incidents, newest first.

An incident is a set of events of different series that moved the same way at
about the same time (see :mod:`changekind.tasks.incidents`); the fleet runs
keep them up to date.  ``--json`` prints only a JSON array (the contract of
:func:`incident_records`), ``--csv`` only CSV, one row per incident.

Registers itself on the shared :data:`changekind.flows.cli.app.app` when imported.
"""

from __future__ import annotations

import csv
import io
import json
import sys
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Annotated, Any

import typer
from rich.table import Table

from changekind.flows.cli.app import app, fail_usage, out_console, usage_errors
from changekind.flows.cli.config import database_url, has_table, require_tables
from changekind.flows.cli.options import DbOpt
from changekind.flows.cli.output import TABLE_ROWS
from changekind.tasks import persist
from changekind.tasks.errors import ConfigError
from changekind.tasks.types import number

if TYPE_CHECKING:
    from changekind.tasks.incidents import Incident

__all__ = [
    "INCIDENT_CSV_COLUMNS",
    "incident_csv",
    "incident_records",
    "incidents",
    "incidents_table",
]

INCIDENT_CSV_COLUMNS: tuple[str, ...] = (
    "incident_id",
    "start",
    "end",
    "n_series",
    "fleet_size",
    "share_of_fleet",
    "dominant_type",
    "direction",
    "quantity",
    "median_effect_pct",
    "n_provisional",
    "state",
    "shared_labels",
    "members",
)
"""``--csv`` columns: ``shared_labels`` as ``label=value`` pairs joined by ``;``,
``members`` as ``series_id@event_time`` joined by ``;``."""


def incident_records(
    incidents: Sequence[Incident], states: Mapping[str, str] | None = None
) -> list[dict[str, Any]]:
    """The ``incidents --json`` contract: one object per incident, in the given order.

    Each object has ``incident_id``, ``start`` and ``end`` (ISO 8601, UTC),
    ``n_series``, ``fleet_size``, ``share_of_fleet``, ``dominant_type``,
    ``type_counts``, ``direction``, ``quantity``, ``median_effect_pct`` (null
    when no member has one), ``n_provisional``, ``state`` (open or settled),
    ``shared_labels`` (label -> value, the attributes found shared),
    ``labels`` (every value tested: carriers among the members and in the
    fleet, p-value, Holm-adjusted p-value, shared) and ``members`` (objects
    with ``series_id``, ``event_time``, ``event_ts``, ``event_type``,
    ``effect``, ``effect_pct``, ``t_stat``, ``status``).
    """
    out = []
    for inc in incidents:
        record = inc.to_record()
        record["state"] = (states or {}).get(inc.incident_id)
        out.append(record)
    return out


def incident_csv(records: Sequence[Mapping[str, Any]]) -> str:
    """``--csv``: one row per incident (see :data:`INCIDENT_CSV_COLUMNS`)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(INCIDENT_CSV_COLUMNS)
    for rec in records:
        row = dict(rec)
        row["shared_labels"] = ";".join(f"{k}={v}" for k, v in rec["shared_labels"].items())
        row["members"] = ";".join(f"{m['series_id']}@{m['event_time']}" for m in rec["members"])
        writer.writerow(["" if row[c] is None else row[c] for c in INCIDENT_CSV_COLUMNS])
    return buffer.getvalue()


def incidents_table(records: Sequence[Mapping[str, Any]], *, title: str) -> Table:
    table = Table(title=title, title_justify="left")
    for name in ("start (UTC)", "end", "series", "% of fleet", "type", "dir", "median %"):
        table.add_column(
            name,
            justify="left" if name in ("start (UTC)", "end", "type", "dir") else "right",
            no_wrap=True,
        )
    table.add_column("shared attributes", overflow="fold")
    table.add_column("state")
    table.add_column("id", overflow="fold")
    for rec in records:
        shared = ", ".join(f"{k}={v}" for k, v in rec["shared_labels"].items()) or "-"
        table.add_row(
            rec["start"][:16].replace("T", " "),
            rec["end"][:16].replace("T", " "),
            str(rec["n_series"]),
            number(100 * rec["share_of_fleet"], ".1f"),
            rec["dominant_type"],
            rec["direction"],
            number(rec["median_effect_pct"], "+.1f"),
            shared,
            rec["state"] or "-",
            rec["incident_id"],
        )
    return table


def _require_incident_tables(url: str) -> None:
    if not has_table(url, persist.schema.incidents.name):
        raise ConfigError(
            "the database has no incidents table yet (it was written by an older changekind); "
            "run a scan or backfill on it, which updates its tables and its incidents"
        )


@app.command()
def incidents(
    db: DbOpt = None,
    since: Annotated[
        str | None,
        typer.Option(
            "--since",
            metavar="T",
            help="Only incidents that end at or after this time (ISO 8601; naive times are UTC).",
            show_default=False,
        ),
    ] = None,
    open_only: Annotated[
        bool, typer.Option("--open", help="Only incidents that may still change (state open).")
    ] = False,
    as_json: Annotated[
        bool,
        typer.Option(
            "--json",
            help="Print only a JSON array of incidents, each with its shared attributes and "
            "members.",
        ),
    ] = False,
    as_csv: Annotated[
        bool, typer.Option("--csv", help="Print only CSV, one row per incident.")
    ] = False,
) -> None:
    """List the stored incidents (events of several series at about the same time), newest first.

    Incidents are statistical evidence for a person to judge, not verdicts.
    """
    if as_json and as_csv:
        raise fail_usage("give --json or --csv, not both")
    with usage_errors():
        url = database_url(db)
        require_tables(url)
        _require_incident_tables(url)
        found = persist.read_incidents(url, since=since, open_only=open_only)
        states = persist.incident_states(url)
    records = incident_records(found, states)
    if as_json:
        sys.stdout.write(json.dumps(records, indent=2, allow_nan=False) + "\n")
    elif as_csv:
        sys.stdout.write(incident_csv(records))
    else:
        console = out_console()
        if not records:
            console.print("no incidents stored (for these filters)", markup=False)
            return
        shown = records[:TABLE_ROWS]
        title = f"{len(records)} incidents, newest first"
        if len(shown) < len(records):
            title += f" (the newest {len(shown)} shown; --json or --csv for all)"
        console.print(incidents_table(shown, title=title))
    sys.stdout.flush()
