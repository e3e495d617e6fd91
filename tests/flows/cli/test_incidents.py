"""``changekind incidents``: the JSON and CSV contracts, parsed from stdout.

The database holds the invented fleet of tests/flows/incident_fleet.py (its
injected events, models and labels; incidents from ``refresh_incidents``).
References: the injected truth (members, shared attribute, effect sizes) and
the stored rows read back through ``persist.read_incidents``.
"""

from __future__ import annotations

import csv
import io
import json
import statistics

import pytest
from typer.testing import CliRunner

from changekind.flows.cli import app
from tests.contract import INCIDENT_FIELDS, INCIDENT_MEMBER_FIELDS
from tests.flows.incident_fleet import SPIKE_AT, store_incident_fleet

runner = CliRunner()


@pytest.fixture
def db(tmp_path, sqlite_url):
    _, truth = store_incident_fleet(sqlite_url, tmp_path / "src")
    return sqlite_url, truth


def test_json_prints_only_the_incidents_newest_first(db):
    url, truth = db
    done = runner.invoke(app, ["incidents", "--db", url, "--json"])
    assert done.exit_code == 0, done.stderr
    records = json.loads(done.stdout)  # nothing but the JSON array on stdout
    assert isinstance(records, list) and len(records) == 2
    for rec in records:
        assert set(rec) >= INCIDENT_FIELDS
        assert all(set(m) >= INCIDENT_MEMBER_FIELDS for m in rec["members"])
        assert rec["state"] in ("open", "settled")
    spike, rollout = records  # newest first
    assert spike["start"] == SPIKE_AT.tz_localize("UTC").isoformat()
    assert {m["series_id"] for m in spike["members"]} == truth["spike"]
    assert spike["shared_labels"] == {"rack": "r3"}
    assert spike["dominant_type"] == "AO" and spike["n_series"] == 6
    assert spike["share_of_fleet"] == pytest.approx(6 / 24, rel=1e-9)
    assert {m["series_id"] for m in rollout["members"]} == truth["rollout"]
    assert rollout["shared_labels"] == {"firmware": "5.2"}
    # Injected: every rollout step is 9.2 on a level of 50, i.e. 18.4 %.
    assert rollout["median_effect_pct"] == pytest.approx(
        statistics.median(m["effect_pct"] for m in rollout["members"])
    )
    assert rollout["median_effect_pct"] == pytest.approx(18.4)
    fw = next(s for s in rollout["labels"] if s["label"] == "firmware" and s["value"] == "5.2")
    assert (fw["members_with"], fw["fleet_with"], fw["fleet_known"]) == (8, 8, 24)
    assert fw["shared"] is True


def test_since_and_csv(db):
    url, truth = db
    late = runner.invoke(app, ["incidents", "--db", url, "--json", "--since", SPIKE_AT.isoformat()])
    assert [r["shared_labels"] for r in json.loads(late.stdout)] == [{"rack": "r3"}]
    done = runner.invoke(app, ["incidents", "--db", url, "--csv"])
    assert done.exit_code == 0, done.stderr
    rows = list(csv.DictReader(io.StringIO(done.stdout)))
    assert [r["shared_labels"] for r in rows] == ["rack=r3", "firmware=5.2"]
    assert {m.split("@")[0] for m in rows[1]["members"].split(";")} == truth["rollout"]
    table = runner.invoke(app, ["incidents", "--db", url])
    assert table.exit_code == 0 and table.stdout.startswith("2 incidents, newest first")


def test_bad_use_is_refused_with_a_message(tmp_path, db):
    url, _ = db
    both = runner.invoke(app, ["incidents", "--db", url, "--json", "--csv"])
    assert both.exit_code == 2 and "not both" in both.stderr
    missing = runner.invoke(app, ["incidents", "--db", f"sqlite:///{tmp_path / 'none.db'}"])
    assert missing.exit_code == 2 and "no database" in missing.stderr


def test_a_label_column_that_does_not_exist_is_named_with_those_that_do(tmp_path):
    """Nothing runs (exit code 2); the message lists the source's columns."""
    from tests.flows.incident_fleet import make_incident_fleet, write_source

    data, _ = make_incident_fleet()
    source = write_source(data.head(48), tmp_path / "src")
    db = f"sqlite:///{tmp_path / 'ck.db'}"
    done = runner.invoke(
        app,
        [
            "scan",
            "--source",
            str(source),
            "--db",
            db,
            "--label-column",
            "rack",
            "--label-column",
            "region",
        ],
    )
    assert done.exit_code == 2
    message = " ".join(done.stderr.split())
    assert "no column 'region' for --label-column" in message
    assert "series_id, timestamp, value, rack, firmware" in message
    assert not (tmp_path / "ck.db").exists()  # refused before the database is opened
