"""Incidents and labels through the fleet flows, and the Prefect events a run emits.

The fleet is invented (tests/flows/incident_fleet.py): a firmware rollout on
one host per rack, a rack-wide spike, unrelated single spikes.  The reference
is the injected truth: the rollout's series must form one incident sharing
firmware 5.2, the spike's one sharing rack r3, the single spikes none.
"""

from __future__ import annotations

import pandas as pd
import pytest
from prefect.events.clients import AssertingEventsClient
from prefect.events.worker import EventsWorker

from changekind.flows.scan import backfill_flow, scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from changekind.tasks.errors import ConfigError
from tests.flows.incident_fleet import START, make_incident_fleet, write_source

OPTIONS = RunOptions(workers=2, notify_min_effect_pct=5.0)
LABELS = ["rack", "firmware"]


@pytest.fixture(scope="module")
def fleet():
    return make_incident_fleet()


@pytest.fixture
def events_worker(monkeypatch):
    """Prefect's asserting events client: every event a flow emits is kept for the test."""
    AssertingEventsClient.reset()
    worker = EventsWorker.instance(AssertingEventsClient)
    monkeypatch.setattr(EventsWorker, "instance", lambda *_: worker)
    monkeypatch.setattr("prefect.events.utilities.should_emit_events", lambda: True)
    yield worker
    worker.drain()


def _ours(worker) -> list:
    worker.drain()
    events = [e for client in AssertingEventsClient.all for e in client.events]
    return [e for e in events if e.event.startswith("changekind.")]


def _incident_of(db: str, series: set[str]):
    found = persist.read_incidents(db)
    return max(found, key=lambda i: len(set(i.series_ids) & series)) if found else None


def _check_incidents(db: str, truth) -> None:
    rollout = _incident_of(db, truth["rollout"])
    spike = _incident_of(db, truth["spike"])
    assert rollout is not None and spike is not None and rollout != spike
    assert set(rollout.series_ids) == truth["rollout"]
    assert rollout.shared_labels == {"firmware": "5.2"}
    assert rollout.dominant_type == "LS" and rollout.direction == "up"
    assert set(spike.series_ids) == truth["spike"]
    assert spike.shared_labels == {"rack": "r3"}
    # The injected single spikes join no incident (chance coincidences of false
    # events may: two events within a link of each other in a quiet fleet are one).
    members = {(m.series_id, m.event_time) for i in persist.read_incidents(db) for m in i.members}
    found = {
        (s, t)
        for s, t in persist.read_events(db)[["series_id", "event_time"]].itertuples(index=False)
    }
    assert truth["singles"] & found  # found as events
    assert not members & truth["singles"]


def _run(flow, source, db, **kwargs):
    return flow(source=str(source), db=db, options=OPTIONS, label_columns=LABELS, **kwargs)


def test_scan_stores_labels_and_incidents_and_emits_events(
    prefect_server, fleet, tmp_path, events_worker
):
    data, truth = fleet
    source = write_source(data, tmp_path / "src")
    db = f"sqlite:///{tmp_path / 'ck.db'}"
    summary = _run(scan_flow, source, db)
    assert summary.labelled == 24
    labels = persist.read_labels(db)
    assert labels["vault-r2-h2/commit-ms"] == {"firmware": "5.2", "rack": "r2"}
    assert labels["vault-r2-h1/commit-ms"] == {"firmware": "5.1", "rack": "r2"}
    _check_incidents(db, truth)
    assert dict(summary.incidents)["new"] >= 2
    emitted = _ours(events_worker)
    assert summary.notified == len(emitted)
    news = [e for e in emitted if e.event == "changekind.incident.new"]
    rollout = _incident_of(db, truth["rollout"])
    mine = next(e for e in news if e.resource.id == f"changekind.incident.{rollout.incident_id}")
    # What an automation filters on, and the --json record as payload.
    assert mine.resource["changekind.label.firmware"] == "5.2"
    assert mine.resource["changekind.dominant-type"] == "LS"
    assert mine.resource["changekind.direction"] == "up"
    assert mine.resource["changekind.n-series"] == "8"
    assert mine.payload["incident_id"] == rollout.incident_id
    assert mine.payload["shared_labels"] == {"firmware": "5.2"}
    assert {m["series_id"] for m in mine.payload["members"]} == truth["rollout"]
    assert {r.id for r in mine.related if r.role == "series"} == {
        f"changekind.series.{s}" for s in truth["rollout"]
    }
    confirmed = [e for e in emitted if e.event == "changekind.event.confirmed"]
    stored = persist.read_events(db)
    big = stored[(stored["status"] == "confirmed") & (stored["effect_pct"].abs() >= 5.0)]
    assert {(e.payload["series_id"], e.payload["event_time"]) for e in confirmed} == set(
        zip(big["series_id"], big["event_time"], strict=True)
    )
    one = next(e for e in confirmed if e.payload["series_id"] == "vault-r3-h1/commit-ms")
    assert one.resource["changekind.label.rack"] == "r3"
    # A rerun changes nothing and announces nothing.
    before = persist.content_snapshot(db)
    again = _run(scan_flow, source, db)
    assert again.incidents == () and again.notified == 0
    assert persist.content_snapshot(db) == before


@pytest.mark.multirun
def test_overlapping_backfills_give_the_incidents_of_one_scan(
    prefect_server, fleet, pg_url, tmp_path
):
    """On PostgreSQL: two overlapping backfills end with the incidents one run gives."""
    data, truth = fleet
    source = write_source(data, tmp_path / "src")
    end = (START + pd.Timedelta(days=12)).isoformat()
    start = (START + pd.Timedelta(days=5)).isoformat()
    _run(
        backfill_flow,
        source,
        pg_url,
        start=start,
        end=(START + pd.Timedelta(days=9)).isoformat(),
        chunk="2D",
        warmup="5D",
    )
    _run(
        backfill_flow,
        source,
        pg_url,
        start=(START + pd.Timedelta(days=7)).isoformat(),
        end=end,
        chunk="2D",
        warmup="5D",
    )
    _check_incidents(pg_url, truth)
    first = [i.to_record() for i in persist.read_incidents(pg_url)]
    once = f"sqlite:///{tmp_path / 'once.db'}"
    _run(backfill_flow, source, once, start=start, end=end, chunk="2D", warmup="5D")
    # The incidents of the events each database holds are the grouping of those events:
    # equal when the events are equal.
    a = persist.read_events(pg_url)[["series_id", "event_time", "event_type", "status"]]
    b = persist.read_events(once)[["series_id", "event_time", "event_type", "status"]]
    if a.reset_index(drop=True).equals(b.reset_index(drop=True)):
        assert first == [i.to_record() for i in persist.read_incidents(once)]


def test_a_missing_label_column_is_refused_before_anything_runs(prefect_server, fleet, tmp_path):
    data, _ = fleet
    source = write_source(data, tmp_path / "src")
    db = f"sqlite:///{tmp_path / 'ck.db'}"
    with pytest.raises(ConfigError, match=r"no column 'region'.*rack, firmware"):
        scan_flow(source=str(source), db=db, options=OPTIONS, label_columns=["region"])
    assert persist.read_events(db).empty
