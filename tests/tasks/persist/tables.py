"""The databases and the rows of the persistence tests."""

from __future__ import annotations

import importlib.util
import math
import re
from datetime import UTC, datetime
from types import ModuleType
from typing import Any

import pytest
import sqlalchemy as sa

from changekind.tasks import persist
from changekind.tasks.persist import (
    init_db,
    migrations_dir,
)
from changekind.tasks.types import Event, FittedModel

T0 = datetime(2024, 3, 1, 12, 0, tzinfo=UTC)
VIEWS_0001 = {"open_level_shifts", "daily_event_counts", "events_needing_triage"}
INITIAL_VIEW_NAMES = VIEWS_0001
"""The views of revisions 0001 to 0004."""
VIEWS_0005 = VIEWS_0001 | {"open_incidents", "event_labels"}
VIEW_NAMES = VIEWS_0005 | {"events_by_verdict", "level_shifts_in_force"}
"""The views of the newest revision."""


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def url(request: pytest.FixtureRequest) -> str:
    return request.getfixturevalue("sqlite_url" if request.param == "sqlite" else "pg_url")


@pytest.fixture
def engine(url: str):
    eng = init_db(url)
    yield eng
    eng.dispose()


def make_event(
    series_id: str = "edge-latency",
    event_time: str = "2024-03-01T10:00:00Z",
    event_type: str = "LS",
    status: str = "confirmed",
    effect: float = 12.5,
    **changes: Any,
) -> Event:
    values: dict[str, Any] = {
        "series_id": series_id,
        "position": 100,
        "event_time": event_time,
        "event_type": event_type,
        "effect": effect,
        "effect_pct": 0.1 + 0.2,  # not exactly 0.3: checks bit-exact storage
        "effect_sigma": 12.5 / 1.7,
        "t_stat": 7.25,
        "se": 1 / 3,
        "type_weights": (("AO", 0.01), ("LS", 0.9), ("TC", 0.08), ("IO", 0.01)),
        "status": status,
        "decay": None,
        "half_life": None,
        "duration": 302_400.0,  # 3.5 days in seconds
        "level": 125.0,
        "model": "ARIMA(1,0,0) mean=125 ar.L1=0.6 sigma=1.7",
        "window_start": "2024-02-01T00:00:00Z",
        "window_end": "2024-03-01T11:00:00Z",
    }
    values.update(changes)
    return Event(**values)


def make_model(series_id: str = "edge-latency", **changes: Any) -> FittedModel:
    values: dict[str, Any] = {
        "series_id": series_id,
        "order": (1, 0, 1),
        "seasonal_order": (0, 1, 1, 24),
        "trend": "c",
        "params": (("const", 0.1 + 0.2), ("ar.L1", 0.62), ("ma.L1", -1 / 3), ("sigma2", 2.5)),
        "sigma2": 2.5,
        "nobs": 720,
        "method": "mle",
        "converged": True,
        "fallback": None,
        "aicc": 1234.5678901234,
        "periods": (24, 168),
        "profiles": ((0.5, -0.5), (1e-300, -2.0, math.pi)),
        "anchor": "2024-02-01T00:00:00Z",
        "step_seconds": 3600.0,
        "fitted_through": "2024-03-01T11:00:00Z",
        "fingerprint": "a1b2c3",
    }
    values.update(changes)
    return FittedModel(**values)


def revisions(engine: sa.Engine) -> list[dict[str, Any]]:
    with engine.connect() as conn:
        query = sa.select(persist.event_revisions).order_by(persist.event_revisions.c.revision_id)
        return [dict(r) for r in conn.execute(query).mappings()]


def event_row(engine: sa.Engine, series_id: str, event_time: str) -> dict[str, Any]:
    """One stored event row, with the columns the database has at its revision."""
    table = persist.series_events
    with engine.connect() as conn:
        have = {c["name"] for c in sa.inspect(conn).get_columns("series_events")}
        query = sa.select(*[c for c in table.c if c.name in have]).where(
            table.c.series_id == series_id, table.c.event_time == event_time
        )
        return dict(conn.execute(query).mappings().one())


def load_migration(name: str) -> ModuleType:
    path = migrations_dir() / "versions" / name
    spec = importlib.util.spec_from_file_location(f"changekind_migration_{path.stem}", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def views_sql(dialect: str) -> dict[str, str]:
    """CREATE VIEW statements of ``infra/views.sql`` for ``dialect``, by view name."""
    text = (migrations_dir().parent / "views.sql").read_text(encoding="utf-8")
    out: dict[str, str] = {}
    for block in re.split(r"^-- view: ", text, flags=re.MULTILINE)[1:]:
        header, _, body = block.partition("\n")
        match = re.fullmatch(r"(\w+) \(([\w, ]+)\)", header.strip())
        assert match, f"bad view header {header!r} in views.sql"
        if dialect in [d.strip() for d in match.group(2).split(",")]:
            sql = "\n".join(line for line in body.splitlines() if not line.startswith("--"))
            out[match.group(1)] = sql.strip().rstrip(";").strip()
    return out


def normalized(sql: str) -> str:
    return " ".join(sql.split())


def view_definitions(conn: sa.Connection) -> dict[str, str]:
    if conn.dialect.name == "sqlite":
        rows = conn.exec_driver_sql("SELECT name, sql FROM sqlite_master WHERE type = 'view'")
    else:
        rows = conn.exec_driver_sql(
            "SELECT viewname, pg_get_viewdef(viewname::regclass, true) FROM pg_views "
            "WHERE schemaname = current_schema()"
        )
    return {name: normalized(sql) for name, sql in rows}


LEGACY_EVENTS = sa.table(
    "series_events",
    *(
        sa.column(name, sa.Text)
        for name in (
            "series_id",
            "event_time",
            "event_type",
            "type_weights",
            "status",
            "model",
            "first_run_id",
            "last_run_id",
        )
    ),
    *(sa.column(name, sa.Float) for name in ("effect", "t_stat", "se", "level")),
    sa.column("event_ts", sa.DateTime(timezone=True)),
    sa.column("first_seen", sa.DateTime(timezone=True)),
    sa.column("last_seen", sa.DateTime(timezone=True)),
)
"""The columns of ``series_events`` every revision has (to write rows at an old
revision, where today's table definition does not apply)."""


def insert_legacy_event(
    conn: sa.Connection, event_time: str = "2024-03-01T10:00:00Z", event_type: str = "LS"
) -> None:
    """One event of series ``edge-latency`` written with the columns of every revision."""
    conn.execute(
        sa.insert(LEGACY_EVENTS),
        [
            {
                "series_id": "edge-latency",
                "event_time": event_time,
                "event_ts": datetime.fromisoformat(event_time),
                "event_type": event_type,
                "effect": 12.5,
                "t_stat": 7.25,
                "se": 1 / 3,
                "type_weights": '{"LS":1.0}',
                "status": "confirmed",
                "level": 125.0,
                "model": "ARIMA(1,0,0)",
                "first_run_id": "run-1",
                "last_run_id": "run-1",
                "first_seen": T0,
                "last_seen": T0,
            }
        ],
    )
