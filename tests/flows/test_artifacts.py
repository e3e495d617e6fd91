"""What a fleet run leaves for people: Prefect artifacts and the ``report`` command.

Both are checked on a database built by two real scans of the small invented
fleet (tests/flows/fleet.py: hourly AR(1) series with injected level shifts and
spikes, and one constant series that must fail).

References
----------
- The injected truth of the fleet: the events the artifacts and the report
  must show.
- The database itself, read through ``persist.read_events``: the rows of the
  run's events table must be exactly the events whose ``last_run_id`` is the
  run, and the report must hold every stored event.
- Prefect's own validator of artifact keys (``prefect.types.names.ArtifactKey``)
  and its API (artifacts read back by flow-run id through the client).
"""

from __future__ import annotations

import json
import re

import pandas as pd
import pytest
from prefect.types.names import ArtifactKey
from pydantic import TypeAdapter
from typer.testing import CliRunner

from changekind.flows.artifacts import artifact_key, publish_run_artifacts, run_markdown
from changekind.flows.cli import app
from changekind.flows.scan import scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from changekind.tasks.types import EVENT_NAMES, EVENT_TYPES
from tests.flows.fleet import found_in, make_fleet, write_source
from tests.flows.prefect_api import artifacts_of
from tests.tasks.test_report import check_page, png_size

runner = CliRunner()


def _publish_in_a_flow(summary, db):
    """A tiny flow that publishes a real run's artifacts; returns its flow-run id."""
    from prefect import flow
    from prefect.runtime import flow_run

    @flow(name="changekind-test-publish")
    def publish() -> str:
        publish_run_artifacts(summary, db=db)
        return str(flow_run.id)

    return publish()


@pytest.fixture(scope="module")
def scanned(prefect_server, tmp_path_factory):
    """Two scans (history, then two more days), each followed by its artifacts."""
    root = tmp_path_factory.mktemp("artifacts")
    data, truth = make_fleet(9)
    source = root / "source"
    db = f"sqlite:///{root / 'scan.db'}"
    options = RunOptions(workers=2)
    write_source(data, source, until="2026-06-19")
    first = scan_flow(str(source), db, options)
    first_events = persist.read_events(db, include_retracted=True)
    first_publish = _publish_in_a_flow(first, db)
    write_source(data, source)
    second = scan_flow(str(source), db, options)
    second_publish = _publish_in_a_flow(second, db)
    return {
        "db": db,
        "source": source,
        "truth": truth,
        "runs": [(first, first_publish, first_events), (second, second_publish, None)],
    }


def _matches(rows: pd.DataFrame, truth: pd.DataFrame) -> int:
    """:func:`found_in` over an artifact's table (columns series, time, type)."""
    names = {"series": "series_id", "time": "event_time", "type": "event_type"}
    return found_in(rows.rename(columns=names), truth)


# --------------------------------------------------------------------------- artifacts


def test_artifact_keys_follow_prefects_rule():
    # Reference: Prefect's own ArtifactKey validator, and its documented rule
    # (lowercase letters, digits and dashes).
    validate = TypeAdapter(ArtifactKey)
    for kind in ("scan", "backfill", "refit", "Back Fill_2", "--odd--"):
        for what in ("summary", "events"):
            key = artifact_key(kind, what)
            assert re.fullmatch(r"[a-z0-9]+(-[a-z0-9]+)*", key), key
            assert validate.validate_python(key) == key
    assert artifact_key("scan", "summary") == "changekind-scan-summary"


def test_scan_artifacts_hold_the_counts_and_the_runs_events(scanned):
    db = scanned["db"]
    for summary, publish_id, events_then in scanned["runs"]:
        artifacts = artifacts_of(publish_id)
        assert set(artifacts) == {"changekind-scan-summary", "changekind-scan-events"}
        markdown = artifacts["changekind-scan-summary"].data
        assert markdown == run_markdown(
            summary, n_table_rows=len(json.loads(artifacts["changekind-scan-events"].data))
        )
        counts = dict(summary.by_type)
        assert (
            f"{summary.events_new} new, {summary.events_changed} changed, "
            f"{summary.events_retracted} retracted"
        ) in markdown
        for kind in EVENT_TYPES:
            assert f"| {kind} | {EVENT_NAMES[kind]} | {counts[kind]} |" in markdown
        assert f"| failed | {summary.series_failed} |" in markdown
        # The constant series failed in every run and is named with the reason.
        assert "shelf-x/stuck" in markdown and "constant" in markdown

        rows = pd.DataFrame(json.loads(artifacts["changekind-scan-events"].data))
        # Reference: the database as it was right after the run.
        stored = (
            events_then
            if events_then is not None
            else persist.read_events(db, include_retracted=True)
        )
        mine = stored[stored["last_run_id"] == summary.run_id]
        assert len(mine) > 0
        assert sorted(zip(rows["series"], rows["time"], strict=True)) == sorted(
            zip(mine["series_id"], mine["event_time"], strict=True)
        )
        assert list(rows.columns) == [
            "series",
            "time",
            "type",
            "effect",
            "effect_pct",
            "t",
            "status",
        ]
        assert (rows["t"].abs().diff().dropna() <= 0).all()  # strongest first
    # The first scan's table holds the injected events (reference: the truth).
    first_rows = pd.DataFrame(
        json.loads(artifacts_of(scanned["runs"][0][1])["changekind-scan-events"].data)
    )
    assert _matches(first_rows, scanned["truth"]) >= len(scanned["truth"]) - 1


# --------------------------------------------------------------------------- report command


def test_report_of_a_scanned_database_shows_every_event(scanned, tmp_path):
    out = tmp_path / "report"
    result = runner.invoke(
        app,
        ["report", "--db", scanned["db"], "--source", str(scanned["source"]), "--out", str(out)],
    )
    assert result.exit_code == 0, result.output
    page = check_page(out / "index.html")
    stored = persist.read_events(scanned["db"])
    assert len(page.images) == len(stored) > 0
    alts = [str(i["alt"]) for i in page.images]
    for row in stored.itertuples():
        assert sum(row.series_id in a and row.event_time in a for a in alts) == 1
    for img in page.images:
        width, height = png_size(out / str(img["src"]))
        assert width >= 400 and height >= 250
    text = " ".join(page.text)
    assert f"{len(stored)} events in {stored['series_id'].nunique()} series" in text


def test_report_selects_one_runs_events_and_series(scanned, tmp_path):
    second = scanned["runs"][1][0]
    stored = persist.read_events(scanned["db"])
    of_run = stored[
        (stored["first_run_id"] == second.run_id) | (stored["last_run_id"] == second.run_id)
    ]
    out = tmp_path / "run"
    base = ["report", "--db", scanned["db"], "--source", str(scanned["source"])]
    result = runner.invoke(app, [*base, "--out", str(out), "--run", second.run_id])
    assert result.exit_code == 0, result.output
    page = check_page(out / "index.html")
    assert len(page.images) == len(of_run)
    one = "shelf-0/disk-0"
    out = tmp_path / "series"
    result = runner.invoke(app, [*base, "--out", str(out), "--series", one])
    assert result.exit_code == 0, result.output
    page = check_page(out / "index.html")
    assert len(page.images) == int((stored["series_id"] == one).sum()) > 0
    assert all(one in str(i["alt"]) for i in page.images)


def test_report_says_what_is_wrong_with_its_options(tmp_path, scanned, monkeypatch):
    monkeypatch.delenv("CHANGEKIND_SOURCE", raising=False)
    no_runs = f"sqlite:///{tmp_path / 'no-runs.db'}"
    persist.migrate(no_runs)  # tables, but no run has recorded a source
    cases = [
        (["--db", f"sqlite:///{tmp_path / 'none.db'}", "--source", "x"], "does not exist"),
        (["--db", no_runs], "no run recorded in the database names one; pass --source PATH"),
        (["--db", scanned["db"], "--source", str(tmp_path / "nope")], "does not exist"),
        (
            ["--db", scanned["db"], "--source", str(scanned["source"]), "--since", "soon"],
            "--since 'soon' is not ISO 8601",
        ),
    ]
    for args, message in cases:
        result = runner.invoke(app, ["report", "--out", str(tmp_path / "r"), *args])
        assert result.exit_code == 2, (args, result.output)
        assert message in result.output and "Traceback" not in result.output
    assert not (tmp_path / "none.db").exists()  # a report never creates a database
    # Without --source the report reads the source the latest run recorded.
    result = runner.invoke(app, ["report", "--out", str(tmp_path / "r"), "--db", scanned["db"]])
    assert result.exit_code == 0, result.output
    assert "Report of" in result.output


def test_report_of_a_series_missing_from_the_source_says_so(scanned, tmp_path):
    # The source without shelf-0/disk-1: its event is listed without a picture, exit 1.
    data, _ = make_fleet(9)
    partial = write_source(data[data["series_id"] != "shelf-0/disk-1"], tmp_path / "partial")
    out = tmp_path / "partial-report"
    result = runner.invoke(
        app, ["report", "--db", scanned["db"], "--source", str(partial), "--out", str(out)]
    )
    assert result.exit_code == 1, result.output
    page = check_page(out / "index.html")
    stored = persist.read_events(scanned["db"])
    missing = int((stored["series_id"] == "shelf-0/disk-1").sum())
    assert missing > 0 and len(page.images) == len(stored) - missing
    assert "the source holds no observations of 'shelf-0/disk-1'" in " ".join(page.text)
