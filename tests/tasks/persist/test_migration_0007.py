"""Migration 0007: ``series_events.half_life`` from readable text to a number.

The reference is unit arithmetic done by hand: 1.94 h = 1.94 * 3600 s =
6984 s, 17.5 min = 1050 s, 250 ms = 0.25 s, 3.2 d = 276480 s; an index-unit
text keeps its number.  Runs on SQLite and on the real PostgreSQL server.
"""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from alembic import command
from alembic.config import Config

from changekind.tasks import persist
from changekind.tasks.persist import migrate, migrations_dir, read_events
from tests.tasks.persist.tables import INITIAL_VIEW_NAMES, VIEW_NAMES, load_migration

_OLD = sa.table(
    "series_events",
    *(
        sa.column(name, sa.Text)
        for name in (
            "series_id",
            "event_time",
            "event_type",
            "type_weights",
            "status",
            "half_life",
            "model",
            "first_run_id",
            "last_run_id",
        )
    ),
    *(sa.column(name, sa.Float) for name in ("effect", "t_stat", "se", "level", "decay")),
    sa.column("event_ts", sa.DateTime(timezone=True)),
    sa.column("first_seen", sa.DateTime(timezone=True)),
    sa.column("last_seen", sa.DateTime(timezone=True)),
)

# (event_time, stored text, seconds expected after the upgrade, text after the downgrade)
CASES = [
    ("2024-03-01T10:00:00Z", "1.94 h", 6984.0, "1.94 h"),
    ("2024-03-01T11:00:00Z", "17.5 min", 1050.0, "17.5 min"),
    ("2024-03-01T12:00:00Z", "250 ms", 0.25, "250 ms"),
    ("2024-03-01T13:00:00Z", "3.2 d", 276480.0, "3.2 d"),
    ("2024-03-01T14:00:00Z", None, None, None),
    ("2024-03-01T15:00:00Z", "not a duration", None, None),
    ("17.0", "12 index units", 12.0, "12 index units"),
]


def _insert_old_rows(engine: sa.Engine) -> None:
    from datetime import UTC, datetime

    now = datetime(2024, 3, 2, tzinfo=UTC)
    rows = []
    for event_time, text, _, _ in CASES:
        numeric = event_time == "17.0"
        rows.append(
            {
                "series_id": "cache-hit-ratio",
                "event_time": event_time,
                "event_ts": None if numeric else datetime.fromisoformat(event_time),
                "event_type": "TC",
                "effect": 2.0,
                "t_stat": 5.0,
                "se": 0.4,
                "type_weights": '{"TC":1.0}',
                "status": "confirmed",
                "decay": 0.7,
                "half_life": text,
                "level": 40.0,
                "model": "ARIMA(1,0,0)",
                "first_run_id": "run-0",
                "last_run_id": "run-0",
                "first_seen": now,
                "last_seen": now,
            }
        )
    with engine.begin() as conn:
        conn.execute(sa.insert(_OLD), rows)


def _stored(engine: sa.Engine) -> dict[str, object]:
    table = sa.table("series_events", sa.column("event_time"), sa.column("half_life"))
    with engine.connect() as conn:
        return dict(conn.execute(sa.select(table.c.event_time, table.c.half_life)).all())


def _downgrade(engine: sa.Engine, revision: str) -> None:
    config = Config()
    config.set_main_option("script_location", str(migrations_dir()))
    with engine.begin() as conn:
        config.attributes["connection"] = conn
        command.downgrade(config, revision)


def test_half_life_texts_become_seconds_and_come_back(url: str) -> None:
    engine = persist.connect(url)
    try:
        migrate(engine, revision="0004")
        _insert_old_rows(engine)
        migrate(engine)
        stored = _stored(engine)
        for event_time, _, seconds, _ in CASES:
            if seconds is None:
                assert stored[event_time] is None, event_time
            else:
                assert stored[event_time] == pytest.approx(seconds, rel=1e-12), event_time
        with engine.connect() as conn:
            assert set(sa.inspect(conn).get_view_names()) == VIEW_NAMES
            kind = {c["name"]: c["type"] for c in sa.inspect(conn).get_columns("series_events")}
        assert isinstance(kind["half_life"], sa.Float)
        # The numbers read back through the package as float64 (NaN for none).
        frame = read_events(engine).set_index("event_time")
        assert frame.loc["2024-03-01T10:00:00Z", "half_life"] == pytest.approx(6984.0)
        assert str(frame["half_life"].dtype) == "float64"

        _downgrade(engine, "0004")
        back = _stored(engine)
        for event_time, _, _, text in CASES:
            assert back[event_time] == text, event_time
        with engine.connect() as conn:
            assert set(sa.inspect(conn).get_view_names()) == INITIAL_VIEW_NAMES
    finally:
        engine.dispose()


@pytest.mark.parametrize(
    ("text", "seconds"),
    [("1.11 h", 3996.0), ("42 s", 42.0), ("2 h", 7200.0), ("inf", None), ("1.5e+03 s", 1500.0)],
)
def test_half_life_text_reader(text: str, seconds: float | None) -> None:
    module = load_migration("0007_half_life_seconds.py")
    got = module.half_life_seconds(text)
    assert got == (None if seconds is None else pytest.approx(seconds))
