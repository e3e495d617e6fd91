"""``changekind demo``: the fleet pipeline on an invented fleet with known events.

The flows are imported inside the command, on purpose: importing them loads
Prefect, which costs seconds that ``changekind detect`` must not pay.
"""

from __future__ import annotations

import json
import math
import os
import shlex
import time
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import numpy as np
import pandas as pd
import typer
from rich.table import Table

from changekind.flows.cli.app import (
    EXIT_SERIES_FAILED,
    app,
    err_console,
    out_console,
    usage_errors,
)
from changekind.flows.cli.config import FleetConfig, check_db, flow_arguments, prefect_defaults
from changekind.flows.cli.incidents import incident_records, incidents_table
from changekind.flows.cli.output import event_json_records, print_summary, seconds_text
from changekind.flows.cli.report import write_stored_report
from changekind.flows.cli.runs import run_fleet_flow
from changekind.flows.demo import (
    DAY_FILE_GLOB,
    score_against_truth,
    score_rollout_incident,
    write_day_files,
)
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from changekind.tasks.errors import ConfigError
from changekind.tasks.fetch import open_source
from changekind.tasks.simulate import LABEL_COLUMNS, make_demo_fleet
from changekind.tasks.types import EVENT_TYPES, REPORTED_TYPES, format_duration

if TYPE_CHECKING:
    from changekind.flows.pipeline import RunSummary

# --------------------------------------------------------------------------- demo


DEMO_WARMUP_DAYS = 2
"""Days the demo's backfill fits on before reporting (no event is injected in them)."""


def _pct(x: float) -> str:
    return "-" if not math.isfinite(x) else f"{100 * x:.0f} %"


def _fresh_demo_files(out: Path, db_file: Path | None) -> Path:
    """Make ``out/fleet/`` empty of earlier demo files; remove the earlier demo database."""

    folder = out / "fleet"
    folder.mkdir(parents=True, exist_ok=True)
    for old in folder.glob(DAY_FILE_GLOB):
        old.unlink()
    if db_file is not None:
        for suffix in ("", "-journal", "-wal", "-shm"):
            Path(f"{db_file}{suffix}").unlink(missing_ok=True)
    return folder


def _demo_config(folder: Path, db: str, workers: int) -> FleetConfig:

    options = RunOptions(workers=workers)
    return FleetConfig(
        source=str(folder),
        db=db,
        runner="threads",
        workers=workers,
        dask_address=None,
        options=options,
        columns=None,
        time_kind="datetime",
        labels=LABEL_COLUMNS,
    )


def _by_type_table(frame: pd.DataFrame) -> Table:

    found = Table(title="Events stored, by type", title_justify="left")
    for name in ("type", "confirmed", "provisional", "total"):
        found.add_column(name, justify="left" if name == "type" else "right")
    for kind in REPORTED_TYPES:
        mine = frame[frame["event_type"] == kind]
        confirmed = int((mine["status"] == "confirmed").sum())
        found.add_row(kind, str(confirmed), str(len(mine) - confirmed), str(len(mine)))
    return found


def _score_table(score: Any, *, clean: int, on_clean: int) -> Table:

    table = Table(
        title="Against the injected truth (found = an event within ±2 samples)",
        title_justify="left",
        caption=(
            f"recall {_pct(score.recall)} ({score.n_matched}/{score.n_injected}), "
            f"type accuracy {_pct(score.type_accuracy)} ({score.n_typed}/{score.n_matched}), "
            f"{score.false_events} false events ({on_clean} on {clean} clean series)"
        ),
        caption_justify="left",
    )
    columns = ("injected", "n", "found", "recall", "right type", *[f"as {k}" for k in EVENT_TYPES])
    for name in columns:
        table.add_column(name, justify="left" if name == "injected" else "right")
    for kind, row in score.per_type.iterrows():
        table.add_row(
            str(kind),
            str(int(row["injected"])),
            str(int(row["found"])),
            _pct(row["recall"]),
            _pct(row["type_accuracy"]),
            *[str(int(row[f"called_{k}"])) for k in EVENT_TYPES],
        )
    return table


@app.command()
def demo(
    controllers: Annotated[
        int, typer.Option(min=1, max=5000, help="Storage controllers (two series each).")
    ] = 24,
    days: Annotated[int, typer.Option(min=4, max=60, help="Days of 5-minute history.")] = 14,
    seed: Annotated[int, typer.Option(min=0, help="Seed of the invented fleet.")] = 2031,
    out: Annotated[
        Path,
        typer.Option(
            help="Folder for the fleet's Parquet files (fleet/), truth.csv, events.json, "
            "the report of the events (report/index.html) and the demo database demo.db "
            "(made afresh on every run)."
        ),
    ] = Path("changekind-demo"),
    db: Annotated[
        str | None,
        typer.Option(
            "--db",
            metavar="URL",
            help="Write to this database instead of OUT/demo.db (kept as it is: a second "
            "demo into it reuses what the first stored).",
            show_default=False,
        ),
    ] = None,
) -> None:
    """The fleet pipeline on an invented fleet with known events, scored against them.

    Writes the fleet as daily Parquet files, backfills all days but the last
    into the database, adds the last day's file and scans it as the hourly
    scan would, then compares the stored events with the injected truth.
    """
    prefect_defaults()

    started = time.perf_counter()
    console = out_console()
    db_file = None if db is not None else out / "demo.db"
    url = db if db is not None else f"sqlite:///{db_file}"
    workers = os.cpu_count() or 1
    with usage_errors():
        try:
            folder = _fresh_demo_files(out, db_file)
        except OSError as exc:
            raise ConfigError(f"cannot write to {out}: {exc.strerror or exc}") from None
        check_db(url)

        # Step 1: the fleet, all days but the last.
        fleet = make_demo_fleet(np.random.default_rng(seed), n_controllers=controllers, days=days)
        truth_out = fleet.truth.assign(event_time=fleet.truth["event_time"].map(_iso))
        truth_out.to_csv(out / "truth.csv", index=False)
        first = fleet.data["timestamp"].min()
        write_day_files(fleet.data, folder, last=days - 1, labels=fleet.labels)
        n_series = fleet.data["series_id"].nunique()
        console.print(
            f"Invented fleet: {controllers} storage controllers, {n_series} series, {days} days "
            f"every {_step_text(fleet.step)}, {len(fleet.truth)} injected events; attributes "
            f"{', '.join(LABEL_COLUMNS)} beside the values; "
            f"daily Parquet files in {folder}{os.sep}, database {url}",
            markup=False,
        )

        # Step 2: backfill every day but the last.
        # Deliberately here: the flows import Prefect (seconds of start-up).
        from changekind.flows.scan import backfill_flow, scan_flow

        config = _demo_config(folder, url, workers)
        start = (first + pd.Timedelta(days=DEMO_WARMUP_DAYS)).isoformat()
        end = (first + pd.Timedelta(days=days - 1)).isoformat()
        t0 = time.perf_counter()
        arguments = flow_arguments(
            backfill_flow,
            config,
            start=start,
            end=end,
            chunk="7D",
            warmup=f"{DEMO_WARMUP_DAYS}D",
        )
        filled = run_fleet_flow(backfill_flow, arguments, config, label="backfill")
        backfill_wall = time.perf_counter() - t0
        console.print(
            f"\n1. Backfill {start[:10]} .. {end[:10]} (after {DEMO_WARMUP_DAYS} days to fit "
            f"on), in chunks of 7 days: {seconds_text(backfill_wall)} including Prefect start-up",
            markup=False,
        )
        print_summary(console, _without_tops(filled))

        # Step 3: the last day arrives; the hourly scan tests only the new points.
        write_day_files(fleet.data, folder, first=days - 1, labels=fleet.labels)
        t0 = time.perf_counter()
        arguments = flow_arguments(scan_flow, config)
        scanned = run_fleet_flow(scan_flow, arguments, config, label="scan")
        scan_wall = time.perf_counter() - t0
        console.print(
            f"\n2. The last day's file arrives; scan of the new points: {seconds_text(scan_wall)}",
            markup=False,
        )
        print_summary(console, _without_tops(scanned))

        # Step 4: what the table holds, against the truth.

        stored = persist.read_events(url)
        incidents = persist.read_incidents(url)
        states = persist.incident_states(url)
    (out / "events.json").write_text(
        json.dumps(event_json_records(stored), indent=2, allow_nan=False) + "\n"
    )
    console.print()
    console.print(_by_type_table(stored))
    score = score_against_truth(stored, fleet.truth, step=fleet.step, tolerance=2)
    clean = set(fleet.data["series_id"]) - set(fleet.truth["series_id"])
    on_clean = int(stored["series_id"].isin(clean).sum())
    console.print(_score_table(score, clean=len(clean), on_clean=on_clean))
    example = _example_event(stored)

    # Step 5: incidents, and the injected rollout among them.
    records = incident_records(incidents, states)
    (out / "incidents.json").write_text(json.dumps(records, indent=2, allow_nan=False) + "\n")
    rollout = score_rollout_incident(incidents, fleet.rollout_series)
    update = [dict(s.timings).get("incidents") for s in (filled, scanned)]
    console.print(
        f"\n{len(incidents)} incident(s): events of several series at about the same time "
        f"(updated after each run: {_seconds(update[0])} after the backfill, "
        f"{_seconds(update[1])} after the scan).",
        markup=False,
    )
    if records:
        console.print(incidents_table(records, title="Incidents, newest first"))
    console.print(f"The injected firmware rollout: {rollout.words()}.", markup=False)

    # Step 5: a picture of every stored event, for a person to look at.

    console.print(
        "\n3. Pictures of the stored events and the incidents (changekind report):",
        markup=False,
    )
    with usage_errors():
        write_stored_report(url, open_source(folder), out / "report")
    console.print(
        f"\nWhole demo: {seconds_text(time.perf_counter() - started)} on {workers} core(s).\n"
        "Events are statistical evidence for a person to judge, not verdicts.\n"
        f"All events as JSON: {out / 'events.json'}; incidents: {out / 'incidents.json'}; "
        f"injected truth: {out / 'truth.csv'}.\n"
        "\nQuery the event table yourself:\n"
        f"  changekind events --db {url} --json\n"
        f"  changekind events --db {url} --since {end[:10]}\n"
        f"  changekind incidents --db {url} --json\n"
        "or with SQL, for example through the views for BI tools:\n"
        "  SELECT series_id, event_time, effect, effect_pct FROM open_level_shifts;\n"
        "  SELECT day, event_type, n_events, n_confirmed FROM daily_event_counts "
        "ORDER BY day, event_type;\n"
        "Record a verdict on an event (later scans keep it):\n"
        f"  changekind triage {example} acknowledged --reason 'change ticket' --db {url}\n"
        "Scan again when new files arrive:\n"
        f"  changekind scan --source {folder} --db {url}",
        markup=False,
    )
    failed = filled.failures + scanned.failures
    for sid, stage, message in failed:
        err_console().print(f"changekind: series {sid!r} failed ({stage}): {message}", markup=False)
    if failed:
        raise typer.Exit(EXIT_SERIES_FAILED)


def _seconds(value: float | None) -> str:
    return "-" if value is None else f"{value:.2f} s"


def _without_tops(summary: RunSummary) -> RunSummary:
    """The demo prints the score instead of each run's strongest events."""

    return replace(summary, top_events=())


def _example_event(frame: pd.DataFrame) -> str:
    """``SERIES_ID EVENT_TIME`` of a stored event, quoted for a shell."""

    if frame.empty:
        return "SERIES_ID EVENT_TIME"
    row = frame.iloc[0]
    return f"{shlex.quote(str(row['series_id']))} {shlex.quote(str(row['event_time']))}"


def _step_text(step: Any) -> str:

    return format_duration(step.total_seconds())


def _iso(stamp: Any) -> str:
    return stamp.isoformat() if hasattr(stamp, "isoformat") else str(stamp)
