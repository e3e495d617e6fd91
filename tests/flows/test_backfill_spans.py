"""Backfills over overlapping spans, in either order, end as one backfill over their union.

Regression (issue 12, finding 1): a backfill of a later span, then one of an
earlier span on the same database, analysed nothing the second time ("0
series", exit 0, completed) and 99 of 173 events were never found: every
series' watermark already lay past the second span's chunks.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from changekind.flows.scan import backfill_flow, scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from tests.flows.fleet import make_fleet, write_source

OPTIONS = RunOptions(workers=2)
UNION = ("2026-06-05", "2026-06-21")
LATER = ("2026-06-13", "2026-06-21")
EARLIER = ("2026-06-05", "2026-06-17")
CHUNK, WARMUP = "4D", "3D"  # the three spans lie on one grid of 4-day chunks


def current_state(db: str) -> dict[str, list]:
    """What the tables say now: events not retracted (contract columns) and models.

    The revision log and retracted rows are history: a database that first
    analysed a later span keeps the record of what that run said.
    """
    snap = persist.content_snapshot(db)
    skip = persist.BOOKKEEPING_COLUMNS
    cols = [c.name for c in persist.series_events.columns if c.name not in skip]
    status = cols.index("status")
    return {
        "events": [row for row in snap["series_events"] if row[status] != "retracted"],
        "models": snap["series_models"],
    }


def _backfill(source: Path, db: str, span: tuple[str, str]):
    return backfill_flow(str(source), *span, db, chunk=CHUNK, warmup=WARMUP, options=OPTIONS)


@pytest.fixture(scope="module")
def source(tmp_path_factory) -> Path:
    data, _ = make_fleet(9)
    return write_source(data, tmp_path_factory.mktemp("spans") / "source")


@pytest.fixture(scope="module")
def union_sqlite(prefect_server, source, tmp_path_factory) -> dict[str, list]:
    db = f"sqlite:///{tmp_path_factory.mktemp('union') / 'union.db'}"
    _backfill(source, db, UNION)
    return current_state(db)


def _check_both_orders(source: Path, url_later_first: str, url_earlier_first: str, union) -> None:
    # Later span first, then the earlier one: the second run analyses its span again.
    first = _backfill(source, url_later_first, LATER)
    assert first.series_ok >= 8
    second = _backfill(source, url_later_first, EARLIER)
    assert second.series_total == first.series_total
    assert second.cold >= 8  # every analysable series fitted again from 06-05
    assert second.events_new > 0
    assert current_state(url_later_first) == union
    runs = persist.table_snapshot(url_later_first)["scan_runs"]
    notes = [r for r in runs if r[4] == "completed" and r[-1] and "analysed again" in r[-1]]
    assert len(notes) == 1  # the second run says what it did
    # Earlier span first, then the later one: the second run continues.
    _backfill(source, url_earlier_first, EARLIER)
    _backfill(source, url_earlier_first, LATER)
    assert current_state(url_earlier_first) == union
    # Both databases agree on every stored event's classification.
    events = persist.read_events(url_later_first)
    assert len(events) == len(union["events"])
    assert (pd.to_datetime(events.event_time) >= pd.Timestamp(UNION[0])).all()


@pytest.mark.multirun
def test_backfills_in_either_order_equal_one_over_the_union_sqlite(
    prefect_server, source, union_sqlite, tmp_path
):
    _check_both_orders(
        source,
        f"sqlite:///{tmp_path / 'later-first.db'}",
        f"sqlite:///{tmp_path / 'earlier-first.db'}",
        union_sqlite,
    )


@pytest.mark.multirun
@pytest.mark.postgres
def test_backfills_in_either_order_equal_one_over_the_union_postgresql(
    prefect_server, source, union_sqlite, pg_url, tmp_path
):
    # One PostgreSQL schema for the union, then a fresh one per order.
    _backfill(source, pg_url, UNION)
    union_pg = current_state(pg_url)
    assert len(union_pg["events"]) == len(union_sqlite["events"])
    with persist.connect(pg_url).begin() as conn:
        for table in reversed(persist.metadata.sorted_tables):
            conn.execute(table.delete())
    later_first = pg_url
    _backfill(source, later_first, LATER)
    _backfill(source, later_first, EARLIER)
    assert current_state(later_first) == union_pg
    _check_earlier_then_later_pg(source, pg_url, union_pg)


def _check_earlier_then_later_pg(source: Path, pg_url: str, union_pg) -> None:
    with persist.connect(pg_url).begin() as conn:
        for table in reversed(persist.metadata.sorted_tables):
            conn.execute(table.delete())
    _backfill(source, pg_url, EARLIER)
    _backfill(source, pg_url, LATER)
    assert current_state(pg_url) == union_pg


@pytest.mark.multirun
def test_a_gap_between_analysed_and_given_span_is_analysed_not_skipped(
    prefect_server, source, tmp_path
):
    """A series last analysed before the span continues from its watermark and
    reports what it finds in the gap (events there used to be tested, then dropped)."""
    db = f"sqlite:///{tmp_path / 'gap.db'}"
    _backfill(source, db, ("2026-06-05", "2026-06-09"))
    _backfill(source, db, ("2026-06-13", "2026-06-21"))
    gapless = f"sqlite:///{tmp_path / 'gapless.db'}"
    _backfill(source, gapless, ("2026-06-05", "2026-06-09"))
    scan_flow(str(source), gapless, OPTIONS, until="2026-06-21")
    gap_events = persist.read_events(db)
    in_gap = gap_events[
        (pd.to_datetime(gap_events.event_time) >= pd.Timestamp("2026-06-09"))
        & (pd.to_datetime(gap_events.event_time) < pd.Timestamp("2026-06-13"))
    ]
    reference = persist.read_events(gapless)
    ref_gap = reference[
        (pd.to_datetime(reference.event_time) >= pd.Timestamp("2026-06-09"))
        & (pd.to_datetime(reference.event_time) < pd.Timestamp("2026-06-13"))
    ]
    assert len(ref_gap) >= 1  # the fleet has events in the gap
    assert sorted(in_gap.event_time) == sorted(ref_gap.event_time)
