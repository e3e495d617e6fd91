"""Backfills that do not depend on chunking (issue 10, step 4).

The rule (README, "backfill"): with the false-alarm budget the critical
value depends on the spacing only, not on how many points a chunk or a
warm-up holds, so the same span backfilled with different ``--chunk`` and
``--warmup`` gives the same confirmed events (time and type) away from the
data's own edges: events in the first ``EDGE`` of the span (where each
chunking's first cold fit sees a different warm-up) and the last ``EDGE`` (where
events are still provisional) are left out of the comparison.  Checked
against an uninterrupted cold analysis of the whole span (one chunk), on the
invented hourly disk fleet (tests/flows/fleet.py), on SQLite and PostgreSQL.
"""

from __future__ import annotations

import pandas as pd
import pytest

from changekind.flows.scan import backfill_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from tests.flows.fleet import make_fleet, write_source

START, END = "2026-06-05", "2026-06-22"
EDGE = pd.Timedelta("2D")
CHUNKINGS = (("17D", "4D"), ("7D", "4D"), ("2D", "2D"), ("1D", "4D"))
OPTIONS = RunOptions(workers=1)


def _confirmed(db: str) -> set[tuple[str, str, str]]:
    events = persist.read_events(db)
    times = pd.to_datetime(events.event_time)
    inside = (times >= pd.Timestamp(START) + EDGE) & (times < pd.Timestamp(END) - EDGE)
    keep = events[inside & (events.status == "confirmed")]
    return set(zip(keep.series_id, keep.event_time, keep.event_type, strict=True))


def _check(make_db, tmp_path) -> None:
    data, _ = make_fleet(6, seed=5)
    source = write_source(data, tmp_path / "source")
    found = {}
    for chunk, warmup in CHUNKINGS:
        db = make_db(f"{chunk}-{warmup}")
        backfill_flow(str(source), START, END, db, chunk=chunk, warmup=warmup, options=OPTIONS)
        found[(chunk, warmup)] = _confirmed(db)
    whole = found[CHUNKINGS[0]]  # one chunk: an uninterrupted cold analysis
    assert len(whole) >= 2
    for key, events in found.items():
        assert events == whole, (key, sorted(events ^ whole))


@pytest.mark.multirun
def test_chunking_does_not_change_confirmed_events(prefect_server, tmp_path):
    _check(lambda name: f"sqlite:///{tmp_path / (name + '.db')}", tmp_path)


@pytest.mark.multirun
@pytest.mark.postgres
def test_chunking_does_not_change_confirmed_events_on_postgresql(
    prefect_server, pg_url_factory, tmp_path
):
    _check(lambda name: pg_url_factory(), tmp_path)
