"""Triage history (tasks/persist/events.py set_triage, read_triage_history), migration
0007 and the view ``events_by_verdict``.  The reference is the verdicts given, in
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


def test_migration_0007_copies_existing_verdicts_and_downgrades(url: str) -> None:
    engine = persist.connect(url)
    try:
        migrate(engine, revision="0006")
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
            command.downgrade(config, "0006")
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
