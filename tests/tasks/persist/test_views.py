"""The views for BI tools (infra/views.sql) over the event table.

Reference: the input itself (see this package's ``__init__``).
"""

from __future__ import annotations

import pandas as pd
import sqlalchemy as sa

from changekind.tasks.persist import (
    set_triage,
    write_events,
)
from tests.tasks.persist.tables import T0, make_event

# --------------------------------------------------------------------------- views


def test_views_return_the_expected_rows(engine: sa.Engine) -> None:
    events = [
        # a: two confirmed shifts; the later one is open.  A provisional one later still.
        make_event("a", "2024-03-01T10:00:00Z", "LS", effect=5.0),
        make_event("a", "2024-03-02T23:30:00-02:00", "LS", effect=-4.0),  # 03-03 01:30 UTC
        make_event("a", "2024-03-04T08:00:00Z", "LS", "provisional", 2.0),
        # b: its later shift is dismissed, so the earlier one is open.
        make_event("b", "2024-03-01T05:00:00Z", "LS", effect=7.0),
        make_event("b", "2024-03-03T05:00:00Z", "LS", effect=1.0),
        # c: an outlier and a retracted shift: no open shift.
        make_event("c", "2024-03-01T06:00:00Z", "AO", effect=30.0),
        make_event("c", "2024-03-02T06:00:00Z", "LS", effect=3.0),
    ]
    write_events(engine, "run-1", events, at=T0)
    write_events(engine, "run-2", [], retract=[("c", "2024-03-02T06:00:00Z")], at=T0)
    set_triage(engine, "b", "2024-03-03T05:00:00Z", "dismissed", "sensor swap")
    set_triage(engine, "c", "2024-03-01T06:00:00Z", "acknowledged")

    with engine.connect() as conn:
        if conn.dialect.name == "postgresql":  # the day must not follow the session's zone
            conn.exec_driver_sql("SET TIME ZONE 'Pacific/Auckland'")
        open_ls = conn.exec_driver_sql(
            "SELECT series_id, event_time, effect FROM open_level_shifts ORDER BY series_id"
        ).all()
        daily = conn.exec_driver_sql(
            "SELECT day, event_type, n_events, n_confirmed, n_provisional "
            "FROM daily_event_counts ORDER BY day, event_type"
        ).all()
        triage = conn.exec_driver_sql(
            "SELECT series_id, event_time FROM events_needing_triage ORDER BY series_id, event_time"
        ).all()

    assert [tuple(r) for r in open_ls] == [
        ("a", "2024-03-02T23:30:00-02:00", -4.0),
        ("b", "2024-03-01T05:00:00Z", 7.0),
    ]
    # Expected daily counts from pandas on the input (retracted event left out).
    frame = pd.DataFrame([e.to_record() for e in events[:-1]])
    frame["day"] = pd.to_datetime(frame["event_time"], utc=True, format="ISO8601").dt.strftime(
        "%Y-%m-%d"
    )
    expected = (
        frame.assign(
            conf=frame["status"].eq("confirmed").astype(int),
            prov=frame["status"].eq("provisional").astype(int),
        )
        .groupby(["day", "event_type"])
        .agg(n=("status", "size"), conf=("conf", "sum"), prov=("prov", "sum"))
        .reset_index()
    )
    assert [(str(d), t, int(n), int(c), int(p)) for d, t, n, c, p in daily] == [
        (r.day, r.event_type, r.n, r.conf, r.prov) for r in expected.itertuples()
    ]
    assert [tuple(r) for r in triage] == [
        ("a", "2024-03-01T10:00:00Z"),
        ("a", "2024-03-02T23:30:00-02:00"),
        ("b", "2024-03-01T05:00:00Z"),
    ]
