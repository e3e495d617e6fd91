"""The options the commands share, each declared once."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

# --------------------------------------------------------------------------- options

SourceOpt = Annotated[
    str | None,
    typer.Option(
        "--source",
        metavar="PATH",
        help="Where the series live, in long form (series id, timestamp, value): a Parquet "
        "file or dataset folder, a CSV file or folder, or a database URL with --table or "
        "--query.  Default: $CHANGEKIND_SOURCE.",
        show_default=False,
    ),
]
ReadSourceOpt = Annotated[
    str | None,
    typer.Option(
        "--source",
        metavar="PATH",
        help="Where the series live, in long form (series id, timestamp, value): a Parquet "
        "file or dataset folder, a CSV file or folder, or a database URL with --table or "
        "--query.  Default: $CHANGEKIND_SOURCE, else the source (and column names) that "
        "the latest scan, backfill or refit recorded in --db.",
        show_default=False,
    ),
]
DbOpt = Annotated[
    str | None,
    typer.Option(
        "--db",
        metavar="URL",
        help="Database for events, models and run records (sqlite:///FILE or "
        "postgresql+psycopg://user@host/db).  Default: $CHANGEKIND_DB_URL, else "
        "sqlite:///changekind.db in the working folder.",
        show_default=False,
    ),
]
RunnerOpt = Annotated[
    str | None,
    typer.Option(
        "--runner",
        metavar="RUNNER",
        help="Where batches run: threads (of this process), processes (workers on this "
        "machine) or dask (a Dask cluster; needs a Prefect server: PREFECT_API_URL).  "
        "Default: $CHANGEKIND_RUNNER, else threads.",
        show_default=False,
    ),
]
DaskOpt = Annotated[
    str | None,
    typer.Option(
        "--dask-address",
        metavar="ADDR",
        help="Scheduler of an existing Dask cluster (tcp://host:8786) for --runner dask; "
        "default: a local cluster of --workers processes.  Default: $CHANGEKIND_DASK_ADDRESS.",
        show_default=False,
    ),
]
WorkersOpt = Annotated[
    int | None,
    typer.Option(
        "--workers",
        metavar="N",
        help="Parallel batches (threads, processes or local Dask workers).  Default: "
        "$CHANGEKIND_WORKERS, else the number of cores.",
        show_default=False,
    ),
]
SeriesColOpt = Annotated[
    str | None,
    typer.Option(
        "--series-column",
        metavar="C",
        help="Source column holding the series id (default series_id).",
        show_default=False,
    ),
]
TimeColOpt = Annotated[
    str | None,
    typer.Option(
        "--timestamp-column",
        metavar="C",
        help="Source column holding the timestamp (default timestamp).",
        show_default=False,
    ),
]
ValueColOpt = Annotated[
    str | None,
    typer.Option(
        "--value-column",
        metavar="C",
        help="Source column holding the value (default value).",
        show_default=False,
    ),
]
TableOpt = Annotated[
    str | None,
    typer.Option(
        "--table",
        metavar="T",
        help="Database sources: the table to read (schema.table allowed).",
        show_default=False,
    ),
]
QueryOpt = Annotated[
    str | None,
    typer.Option(
        "--query",
        metavar="Q",
        help="Database sources: a SELECT to read instead of a table.",
        show_default=False,
    ),
]
CriticalOpt = Annotated[
    float | None,
    typer.Option(
        "--critical",
        metavar="C",
        help="Critical |t| for an event (more than 1), an expert override.  Fleet runs "
        "default to the value that spends --false-budget; detect to one that grows with "
        "the series length.",
        show_default=False,
    ),
]
FalseBudgetOpt = Annotated[
    float | None,
    typer.Option(
        "--false-budget",
        metavar="B",
        help="Expected false events per clean series per 30 days of data; every cold "
        "analysis and warm scan takes its critical value from it and the spacing, so "
        "scanning more often does not raise the false-event rate.  Default 0.5 "
        "($CHANGEKIND_FALSE_BUDGET).  --critical overrides it.",
        show_default=False,
    ),
]
MinEffectOpt = Annotated[
    str | None,
    typer.Option(
        "--min-effect",
        metavar="E",
        help="Smallest effect an event needs to be written: '5%' of the local level, "
        "'2sigma' (noise sigma) or '3.5' (series units).  Smaller events are not stored "
        "and not logged.  Default: none ($CHANGEKIND_MIN_EFFECT).",
        show_default=False,
    ),
]
MinPointsOpt = Annotated[
    int | None,
    typer.Option(
        "--min-points",
        metavar="N",
        help="Observed points a series needs before its first model is fitted; shorter "
        "series are deferred to a later run.  Default 96.",
        show_default=False,
    ),
]
WindowOpt = Annotated[
    str | None,
    typer.Option(
        "--window",
        metavar="SPAN",
        help="Analyse window summaries instead of raw points (any fixed pandas offset, "
        "e.g. 10s, 1min): window medians for AO/LS/TC/IO, window spreads for variance "
        "changes (VC).  --min-points then counts windows.  A series whose model was "
        "fitted on other windows is refitted.",
        show_default=False,
    ),
]
ReportOpt = Annotated[
    Path | None,
    typer.Option(
        "--report",
        metavar="DIR",
        help="Also write the HTML report of the run's new and changed events to DIR "
        "(index.html and a picture per event, as changekind report).",
        show_default=False,
    ),
]
SeriesOpt = Annotated[
    list[str] | None,
    typer.Option(
        "--series",
        metavar="ID",
        help="Only this series; repeat for several.  Default: every series in the source.",
        show_default=False,
    ),
]
WaitOpt = Annotated[
    float | None,
    typer.Option(
        "--wait",
        metavar="SECONDS",
        help="One fleet run at a time per database: how long to wait for another run "
        "to finish before giving up (exit code 4).  Default 300.",
        show_default=False,
    ),
]
LabelOpt = Annotated[
    list[str] | None,
    typer.Option(
        "--label-column",
        metavar="NAME",
        help="A source column that describes a series (rack, host, firmware...); repeat "
        "for several.  Its latest value per series is stored and incidents say which "
        "values their series share.",
        show_default=False,
    ),
]
JsonOpt = Annotated[
    bool,
    typer.Option("--json", help="Print only the run's summary as JSON on stdout."),
]
SinceOpt = Annotated[
    str | None,
    typer.Option(
        "--since",
        metavar="T",
        help="Only events at or after this time (ISO 8601; naive times are UTC).",
        show_default=False,
    ),
]
TimestampUnitOpt = Annotated[
    str | None,
    typer.Option(
        "--timestamp-unit",
        metavar="UNIT",
        help="Numeric timestamps are epoch times in this unit: s, ms, us or ns.",
        show_default=False,
    ),
]
