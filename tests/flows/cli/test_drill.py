"""``changekind drill`` and ``report`` find what they need in the database.

A run records its source (password hidden) in ``scan_runs``; ``drill`` finds
an event's window from the stored event or model, and both read the latest
run's source when ``--source`` is not given.

References
----------
- The source files themselves, read with pandas: the rows a drill prints must
  be exactly the source's rows of the windows asked for.
- The invented series of tests/tasks/test_window.py (second resolution, a level
  shift inside the 08:00 window of day 2) and tests/flows/fleet.py (hourly
  AR(1) series with injected level shifts): what is stored to be drilled.
"""

from __future__ import annotations

import io
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from changekind.flows import steps  # noqa: F401  (imports Prefect here, so its logging binds to the real stderr)
from changekind.flows.cli import app
from changekind.flows.cli.config import reading_source
from changekind.flows.scan import scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from changekind.tasks.errors import ConfigError
from tests.flows.fleet import make_fleet, write_source
from tests.tasks.test_window import LS_AT, SID, START, make_second_series

runner = CliRunner()
MINUTE = pd.Timedelta("1min")


@pytest.fixture(autouse=True)
def _no_source_setting(monkeypatch):
    monkeypatch.delenv("CHANGEKIND_SOURCE", raising=False)
    monkeypatch.delenv("CHANGEKIND_DB_URL", raising=False)


def _source_rows(folder: Path, series_id: str, start, end) -> pd.DataFrame:
    """The source's rows of one series with start <= t < end (the reference)."""
    frame = pd.read_parquet(folder)
    frame = frame[(frame["series_id"] == series_id)]
    stamps = pd.to_datetime(frame["timestamp"])
    return frame[(stamps >= start) & (stamps < end)].reset_index(drop=True)


def _csv(stdout: str) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(stdout))


# --------------------------------------------------------------------------- windowed


@pytest.fixture(scope="module")
def windowed(prefect_server, tmp_path_factory):
    root = tmp_path_factory.mktemp("drill-windowed")
    folder = root / "source"
    folder.mkdir()
    make_second_series(2026).to_parquet(folder / "part-0.parquet", index=False)
    db = f"sqlite:///{root / 'windowed.db'}"
    scan_flow(
        str(folder),
        db,
        RunOptions(workers=2, window="1min"),
        until=str(START + pd.Timedelta(hours=36)),
    )
    events = persist.read_events(db)
    home = LS_AT.floor(MINUTE)
    starts = pd.to_datetime(events["window_start"])
    ls = events[(events["event_type"] == "LS") & starts.between(home, home + MINUTE)]
    assert len(ls) == 1
    return {"folder": folder, "db": db, "ls": ls.iloc[0]}


def test_drill_finds_a_windowed_events_window_and_source_in_the_database(windowed):
    ls = windowed["ls"]
    start = pd.Timestamp(ls["window_start"])
    inside = (start + pd.Timedelta(seconds=30)).isoformat()  # any time in the window
    for when in (ls["event_time"], inside):
        result = runner.invoke(app, ["drill", SID, when, "--db", windowed["db"], "--csv"])
        assert result.exit_code == 0, result.stderr
        # The source came from the run record, and stderr says so.
        assert f"reading {windowed['folder']}" in result.stderr
        rows = _csv(result.stdout)
        # Reference: the source's rows of the event's minute and two either side.
        expected = _source_rows(windowed["folder"], SID, start - 2 * MINUTE, start + 3 * MINUTE)
        assert len(rows) == len(expected) > 0
        assert (rows["value"].to_numpy() == expected["value"].to_numpy()).all()
        assert sorted(set(rows["window_offset"])) == [-2, -1, 0, 1, 2]
    # With --window and --source the database is not needed (as before).
    given = runner.invoke(
        app,
        [
            "drill",
            SID,
            ls["event_time"],
            "--window",
            "1min",
            "--source",
            str(windowed["folder"]),
            "--csv",
        ],
    )
    assert given.exit_code == 0, given.stderr
    assert given.stdout == result.stdout


# --------------------------------------------------------------------------- raw


@pytest.fixture(scope="module")
def raw_fleet(prefect_server, tmp_path_factory):
    root = tmp_path_factory.mktemp("drill-raw")
    data, _ = make_fleet(3, seed=4)
    data = data[data.series_id != "shelf-x/stuck"]
    folder = write_source(data, root / "source")
    db = f"sqlite:///{root / 'raw.db'}"
    scan_flow(str(folder), db, RunOptions(workers=2))
    return {"folder": folder, "db": db}


def test_drill_of_a_raw_event_shows_grid_steps_around_it(raw_fleet):
    events = persist.read_events(raw_fleet["db"])
    assert len(events) > 0 and events["window_start"].isna().all()
    times = pd.to_datetime(events["event_time"])
    middle = (times >= pd.Timestamp("2026-06-02")) & (times < pd.Timestamp("2026-06-20"))
    event = events[middle.to_numpy()].iloc[0]  # a day of data either side
    result = runner.invoke(
        app, ["drill", event["series_id"], event["event_time"], "--db", raw_fleet["db"], "--csv"]
    )
    assert result.exit_code == 0, result.stderr
    rows = _csv(result.stdout)
    # One window per hourly grid step (the model's step), 12 either side by default.
    when = pd.Timestamp(event["event_time"]).tz_localize(None)
    hour = pd.Timedelta("1h")
    expected = _source_rows(
        raw_fleet["folder"], event["series_id"], when - 12 * hour, when + 13 * hour
    )
    assert len(rows) == len(expected) == 25
    assert (rows["value"].to_numpy() == expected["value"].to_numpy()).all()
    assert sorted(set(rows["window_offset"])) == list(range(-12, 13))
    table = runner.invoke(
        app, ["drill", event["series_id"], event["event_time"], "--db", raw_fleet["db"]]
    )
    assert table.exit_code == 0, table.stderr
    assert "one grid step per window" in " ".join(table.stdout.split())


def test_drill_without_window_event_or_model_says_to_give_a_window(raw_fleet):
    result = runner.invoke(
        app, ["drill", "no/such-series", "2026-06-10T00:00:00", "--db", raw_fleet["db"]]
    )
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "give --window" in lines[0] and "'no/such-series'" in lines[0]


def test_report_reads_the_source_the_latest_run_recorded(raw_fleet, tmp_path):
    out = tmp_path / "report"
    result = runner.invoke(app, ["report", "--db", raw_fleet["db"], "--out", str(out)])
    assert result.exit_code == 0, result.stderr
    assert f"reading {raw_fleet['folder']}" in result.stderr
    n = len(persist.read_events(raw_fleet["db"]))
    assert f"Report of {n} event(s)" in result.stdout
    assert len(list(out.glob("*.png"))) == n


# --------------------------------------------------------------------------- the rule


def test_the_source_to_read_given_set_or_recorded(sqlite_url, monkeypatch):
    persist.migrate(sqlite_url)
    with pytest.raises(ConfigError, match="no run recorded in the database names one"):
        reading_source(None, sqlite_url, {})
    persist.start_run(
        sqlite_url,
        "r1",
        "scan",
        None,
        None,
        source="/data/fleet",
        source_columns={"series_id": "host", "value": "v"},
    )
    got = reading_source(None, sqlite_url, {"value": "latency"})
    # The recorded column names, with the ones given now winning.
    assert (got.location, got.columns) == ("/data/fleet", {"series_id": "host", "value": "latency"})
    assert got.recorded is not None and got.recorded.run_id == "r1"
    assert reading_source("/elsewhere", sqlite_url, {}).location == "/elsewhere"
    monkeypatch.setenv("CHANGEKIND_SOURCE", "/from/env")
    assert reading_source(None, sqlite_url, {}).location == "/from/env"
    monkeypatch.delenv("CHANGEKIND_SOURCE")
    persist.start_run(sqlite_url, "r2", "scan", None, None, source="postgresql://ops:pw@db/m")
    with pytest.raises(ConfigError, match=r"read postgresql://ops:\*\*\*@db/m, whose password"):
        reading_source(None, sqlite_url, {})
