"""Triage history (tasks/persist/events.py set_triage, read_triage_history), migration
0008 and the view ``events_by_verdict``.  The reference is the verdicts given, in
order; runs on SQLite and on the real PostgreSQL server."""

from __future__ import annotations

from datetime import timedelta

import sqlalchemy as sa
from alembic import command
from alembic.config import Config

from changekind.tasks import persist
from changekind.tasks.persist import migrate, migrations_dir, read_triage_history, set_triage
from tests.tasks.persist.tables import T0, insert_legacy_event, make_event

KEY = ("edge-latency", "2024-03-01T10:00:00Z")


def test_a_second_verdict_keeps_the_first_ones_reason(engine: sa.Engine) -> None:
    persist.write_events(engine, "run-1", [make_event()], at=T0)
    set_triage(engine, *KEY, "explained", "change 4411: new cache tier", by="ana", at=T0)
    set_triage(
        engine,
        *KEY,
        "dismissed",
        "sensor swap, not the cache",
        by="raj",
        at=T0 + timedelta(hours=2),
    )
    set_triage(engine, *KEY, None, by="ana", at=T0 + timedelta(hours=3))
    history = read_triage_history(engine, *KEY)
    assert history["state"].tolist() == ["explained", "dismissed", None]
    assert history["reason"].tolist() == [
        "change 4411: new cache tier",
        "sensor swap, not the cache",
        None,
    ]
    assert history["decided_by"].tolist() == ["ana", "raj", "ana"]
    assert history["decided_at"].tolist() == [T0, T0 + timedelta(hours=2), T0 + timedelta(hours=3)]
    row = persist.read_events(engine).iloc[0]
    assert row["triage_state"] is None  # cleared: the current verdict is none


def test_events_by_verdict_lists_the_current_verdicts(engine: sa.Engine) -> None:
    events = [
        make_event("a", "2024-03-01T10:00:00Z"),
        make_event("b", "2024-03-01T11:00:00Z", "AO"),
        make_event("c", "2024-03-01T12:00:00Z", "TC"),
    ]
    persist.write_events(engine, "run-1", events, at=T0)
    persist.write_events(engine, "run-2", [], retract=[("c", "2024-03-01T12:00:00Z")], at=T0)
    set_triage(engine, "a", "2024-03-01T10:00:00Z", "explained", "rollout", at=T0)
    set_triage(engine, "a", "2024-03-01T10:00:00Z", "acknowledged", at=T0)
    with engine.connect() as conn:
        rows = conn.execute(
            sa.text("SELECT verdict, series_id FROM events_by_verdict ORDER BY series_id")
        ).all()
    assert [tuple(r) for r in rows] == [("acknowledged", "a"), ("none", "b")]  # c retracted


def test_migration_0008_copies_existing_verdicts_and_downgrades(url: str) -> None:
    engine = persist.connect(url)
    try:
        migrate(engine, revision="0007")
        with engine.begin() as conn:
            insert_legacy_event(conn)
            insert_legacy_event(conn, "2024-03-02T10:00:00Z")
            conn.execute(
                sa.text(
                    "UPDATE series_events SET triage_state = 'dismissed', "
                    "triage_reason = 'planned', triage_at = :t WHERE event_time = :e"
                ),
                {"t": T0, "e": KEY[1]},
            )
        migrate(engine)
        history = read_triage_history(engine, *KEY)
        assert history[["state", "reason", "decided_by"]].values.tolist() == [
            ["dismissed", "planned", None]
        ]
        assert history["decided_at"].tolist() == [T0]
        assert read_triage_history(engine, KEY[0], "2024-03-02T10:00:00Z").empty
        config = Config()
        config.set_main_option("script_location", str(migrations_dir()))
        with engine.begin() as conn:
            config.attributes["connection"] = conn
            command.downgrade(config, "0007")
        with engine.connect() as conn:
            inspector = sa.inspect(conn)
            assert "triage_history" not in inspector.get_table_names()
            assert "events_by_verdict" not in inspector.get_view_names()
            state = conn.execute(
                sa.text("SELECT triage_state FROM series_events WHERE event_time = :e"),
                {"e": KEY[1]},
            ).scalar()
        assert state == "dismissed"
    finally:
        engine.dispose()


def test_level_shifts_in_force_nets_every_open_shift(engine: sa.Engine) -> None:
    """Expected rows worked out by hand from the shifts written: a series that
    shifted -1.4 and later +1.4 is back at its reference level (net 0)."""
    events = [
        make_event("flat", "2024-03-01T10:00:00Z", effect=-1.4, level=36.8),
        make_event("flat", "2024-03-02T10:00:00Z", effect=1.4, level=35.4),
        make_event("up", "2024-03-01T10:00:00Z", effect=5.0, level=50.0),
        make_event("up", "2024-03-02T10:00:00Z", effect=2.5, level=55.0),
        make_event("up", "2024-03-03T10:00:00Z", effect=9.0, level=57.5),  # dismissed below
        make_event("up", "2024-03-04T10:00:00Z", effect=1.0, level=57.5, status="provisional"),
        make_event("spike", "2024-03-01T10:00:00Z", "AO", effect=30.0),
    ]
    persist.write_events(engine, "run-1", events, at=T0)
    set_triage(engine, "up", "2024-03-03T10:00:00Z", "dismissed", "sensor swap")
    with engine.connect() as conn:
        rows = conn.execute(
            sa.text(
                "SELECT series_id, n_shifts, net_effect, net_pct, reference_level, since_time, "
                "latest_time, latest_effect FROM level_shifts_in_force ORDER BY series_id"
            )
        ).all()
        latest = dict(
            conn.execute(sa.text("SELECT series_id, effect FROM open_level_shifts")).all()
        )
    got = {r[0]: r[1:] for r in rows}
    assert set(got) == {"flat", "up"}
    n, net, pct, ref, since, last_time, last_effect = got["flat"]
    assert (n, since, last_time, last_effect) == (
        2,
        "2024-03-01T10:00:00Z",
        "2024-03-02T10:00:00Z",
        1.4,
    )
    assert abs(net) < 1e-12 and abs(pct) < 1e-10 and ref == 36.8
    n, net, pct, ref, since, last_time, last_effect = got["up"]
    assert (n, net, ref, since, last_time, last_effect) == (
        2,
        7.5,
        50.0,
        "2024-03-01T10:00:00Z",
        "2024-03-02T10:00:00Z",
        2.5,
    )
    assert abs(pct - 15.0) < 1e-12  # 100 * 7.5 / 50
    assert latest == {"flat": 1.4, "up": 2.5}  # the latest alone says +1.4 for "flat"
