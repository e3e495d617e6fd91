"""The event table and its revision log (tasks/persist/events.py).

Reference: the input itself (see this package's ``__init__``).
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa

from changekind.tasks.errors import (
    ConfigError,
)
from changekind.tasks.persist import (
    EVENT_COLUMNS,
    EVENT_EXTRA_COLUMNS,
    WriteSummary,
    init_db,
    read_events,
    set_triage,
    table_snapshot,
    write_events,
)
from changekind.tasks.types import Event
from tests.tasks.persist.tables import T0, event_row, make_event, revisions

# --------------------------------------------------------------------------- events


def test_same_events_twice_leave_identical_tables(engine: sa.Engine) -> None:
    batch = [
        make_event("a", "2024-03-01T10:00:00Z"),
        make_event("a", "2024-03-01T11:00:00Z", "AO", "provisional", -3.0),
        make_event("b", "2024-03-01T09:00:00+01:00", "TC", decay=0.7, half_life=6840.0),
        make_event("c", "17.0", "IO", effect_pct=float("nan")),  # numeric grid label
    ]
    first = write_events(engine, "run-1", batch, at=T0)
    before = table_snapshot(engine)
    second = write_events(engine, "run-2", batch, at=T0 + timedelta(hours=1))
    assert first == WriteSummary(new=4)
    assert second == WriteSummary(unchanged=4)
    assert table_snapshot(engine) == before
    assert len(before["series_events"]) == 4
    assert len(before["event_revisions"]) == 4
    row = event_row(engine, "a", "2024-03-01T10:00:00Z")
    assert (row["last_run_id"], row["last_seen"]) == ("run-1", T0)  # untouched by run-2


def test_values_come_back_exactly(engine: sa.Engine) -> None:
    event = make_event("a", "2024-03-01T09:30:00+01:00", "TC", decay=0.7, half_life=6840.0)
    write_events(engine, "run-1", [event], at=T0)
    frame = read_events(engine)
    # The contract is Event.to_record(): same keys, same order, same values.
    assert list(frame.columns[: len(EVENT_COLUMNS)]) == list(event.to_record())
    assert list(frame.columns[len(EVENT_COLUMNS) :]) == list(EVENT_EXTRA_COLUMNS)
    record = frame.iloc[0]
    for key, value in event.to_record().items():
        assert record[key] == value, key
    assert record["effect_pct"] == 0.1 + 0.2 != 0.3
    assert record["se"] == 1 / 3
    assert frame["effect"].dtype == np.float64
    # 09:30 at +01:00 is 08:30 UTC.
    assert record["event_ts"] == pd.Timestamp("2024-03-01T08:30:00Z")
    assert record["first_seen"] == pd.Timestamp(T0)
    assert record["triage_state"] is None


def test_event_times_without_a_zone_are_utc_and_numbers_are_not_times(engine: sa.Engine) -> None:
    write_events(
        engine,
        "run-1",
        [make_event("a", "2024-03-01 10:00:00"), make_event("b", "2.5e3")],
        at=T0,
    )
    stamps = dict(
        zip(read_events(engine)["series_id"], read_events(engine)["event_ts"], strict=True)
    )
    assert stamps["a"] == pd.Timestamp("2024-03-01T10:00:00Z")
    assert pd.isna(stamps["b"])


def test_nan_is_stored_as_null_and_rewrite_is_unchanged(engine: sa.Engine) -> None:
    event = make_event(effect_pct=float("nan"))
    write_events(engine, "run-1", [event], at=T0)
    assert event_row(engine, event.series_id, event.event_time)["effect_pct"] is None
    assert write_events(engine, "run-2", [event], at=T0) == WriteSummary(unchanged=1)


def test_provisional_tc_confirmed_as_ls_is_a_reclassification(engine: sa.Engine) -> None:
    tc = make_event("a", event_type="TC", status="provisional", effect=8.0, decay=0.6)
    ls = make_event("a", event_type="LS", status="confirmed", effect=9.5)
    write_events(engine, "run-1", [tc], at=T0)
    summary = write_events(engine, "run-2", [ls], at=T0 + timedelta(hours=1))
    assert summary == WriteSummary(changed=1)
    log = revisions(engine)
    assert [r["change"] for r in log] == ["new", "reclassified"]
    last = log[-1]
    assert (last["old_type"], last["new_type"]) == ("TC", "LS")
    assert (last["old_status"], last["new_status"]) == ("provisional", "confirmed")
    assert (last["old_effect"], last["new_effect"]) == (8.0, 9.5)
    assert last["run_id"] == "run-2"
    assert set(last["changed_columns"].split(",")) == {
        "event_type",
        "status",
        "effect",
        "decay",
    }
    row = event_row(engine, "a", ls.event_time)
    assert (row["event_type"], row["status"], row["effect"], row["decay"]) == (
        "LS",
        "confirmed",
        9.5,
        None,
    )
    assert (row["first_run_id"], row["last_run_id"]) == ("run-1", "run-2")
    assert (row["first_seen"], row["last_seen"]) == (T0, T0 + timedelta(hours=1))


def test_status_change_alone_is_an_update(engine: sa.Engine) -> None:
    write_events(engine, "run-1", [make_event(status="provisional")], at=T0)
    summary = write_events(engine, "run-2", [make_event(status="confirmed")], at=T0)
    assert summary == WriteSummary(changed=1)
    last = revisions(engine)[-1]
    assert (last["change"], last["changed_columns"]) == ("updated", "status")
    assert (last["old_status"], last["new_status"]) == ("provisional", "confirmed")


def test_retraction_and_return(engine: sa.Engine) -> None:
    kept = make_event("a", "2024-03-01T10:00:00Z")
    gone = make_event("a", "2024-03-01T11:00:00Z", status="provisional")
    write_events(engine, "run-1", [kept, gone], at=T0)

    summary = write_events(
        engine,
        "run-2",
        [kept],
        retract=[("a", gone.event_time), ("a", "2099-01-01T00:00:00Z")],  # 2nd never stored
        at=T0,
    )
    assert summary == WriteSummary(unchanged=1, retracted=1)
    assert event_row(engine, "a", gone.event_time)["status"] == "retracted"
    last = revisions(engine)[-1]
    assert (last["change"], last["old_status"], last["new_status"]) == (
        "retracted",
        "provisional",
        "retracted",
    )
    assert list(read_events(engine)["event_time"]) == [kept.event_time]
    assert list(read_events(engine, include_retracted=True)["status"]) == [
        "confirmed",
        "retracted",
    ]

    before = table_snapshot(engine)
    again = write_events(engine, "run-3", [], retract=[("a", gone.event_time)], at=T0)
    assert again == WriteSummary()
    assert table_snapshot(engine) == before

    back = write_events(engine, "run-4", [gone], at=T0)
    assert back == WriteSummary(changed=1)
    last = revisions(engine)[-1]
    assert (last["change"], last["old_status"], last["new_status"]) == (
        "updated",
        "retracted",
        "provisional",
    )


def test_triage_is_never_overwritten_by_scans(engine: sa.Engine) -> None:
    key = ("a", "2024-03-01T10:00:00Z")
    write_events(engine, "run-1", [make_event(*key, event_type="TC", status="provisional")], at=T0)
    set_triage(engine, *key, "explained", "deploy of release 42", at=T0 + timedelta(minutes=5))
    write_events(engine, "run-2", [make_event(*key, event_type="LS")], at=T0 + timedelta(hours=1))
    write_events(engine, "run-3", [], retract=[key], at=T0 + timedelta(hours=2))
    row = event_row(engine, *key)
    assert row["status"] == "retracted"
    assert (row["triage_state"], row["triage_reason"], row["triage_at"]) == (
        "explained",
        "deploy of release 42",
        T0 + timedelta(minutes=5),
    )
    set_triage(engine, *key, None)
    row = event_row(engine, *key)
    assert (row["triage_state"], row["triage_reason"], row["triage_at"]) == (None, None, None)


@pytest.mark.parametrize(
    ("series_id", "state", "match"),
    [
        (
            "a",
            "ignored",
            r"triage state 'ignored' is not one of acknowledged, dismissed, explained",
        ),
        ("nope", "dismissed", r"no stored event for series 'nope' at '2024-03-01T10:00:00Z'"),
    ],
)
def test_set_triage_errors(engine: sa.Engine, series_id: str, state: str, match: str) -> None:
    write_events(engine, "run-1", [make_event("a")], at=T0)
    with pytest.raises(ConfigError, match=match):
        set_triage(engine, series_id, "2024-03-01T10:00:00Z", state)  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("events", "retract", "match"),
    [
        ([make_event(), make_event()], (), r"holds series 'edge-latency' .* more than once"),
        ([make_event()], [("edge-latency", "2024-03-01T10:00:00Z")], r"both written and retracted"),
        ([make_event(event_type="XX")], (), r"event_type 'XX' is not one of AO, LS, TC, IO"),
        ([make_event(status="retracted")], (), r"status 'retracted' is not one of provisional"),
        ([make_event(t_stat=float("nan"))], (), r"t_stat is missing or NaN"),
        ([make_event(series_id="")], (), r"series_id must be a non-empty text"),
    ],
)
def test_bad_batches_are_refused_before_writing(
    engine: sa.Engine, events: list[Event], retract: Any, match: str
) -> None:
    with pytest.raises(ConfigError, match=match):
        write_events(engine, "run-1", events, retract=retract, at=T0)
    assert table_snapshot(engine)["series_events"] == []


def test_read_events_filters(engine: sa.Engine) -> None:
    write_events(
        engine,
        "run-1",
        [
            make_event("a", "2024-03-01T10:00:00Z"),
            make_event("a", "2024-03-02T10:00:00Z"),
            make_event("b", "2024-03-03T10:00:00Z"),
            make_event("c", "42"),
        ],
        at=T0,
    )
    assert list(read_events(engine)["series_id"]) == ["a", "a", "b", "c"]  # no time: last
    since = read_events(engine, since="2024-03-02T00:00:00Z")
    assert list(zip(since["series_id"], since["event_time"], strict=True)) == [
        ("a", "2024-03-02T10:00:00Z"),
        ("b", "2024-03-03T10:00:00Z"),
    ]
    naive = read_events(engine, since=datetime(2024, 3, 2, 11))  # naive = UTC
    assert list(naive["series_id"]) == ["b"]
    assert list(read_events(engine, series_ids=["b", "c", "zz"])["series_id"]) == ["b", "c"]
    empty = read_events(engine, series_ids=[])
    assert empty.empty and list(empty.columns) == [*EVENT_COLUMNS, *EVENT_EXTRA_COLUMNS]
    with pytest.raises(ConfigError, match=r"since 'yesterday' is not a date-time"):
        read_events(engine, since="yesterday")


def test_functions_take_a_url_too(url: str) -> None:
    init_db(url).dispose()
    assert write_events(url, "run-1", [make_event()], at=T0) == WriteSummary(new=1)
    assert list(read_events(url)["series_id"]) == ["edge-latency"]
