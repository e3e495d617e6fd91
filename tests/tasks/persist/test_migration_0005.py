"""Migration 0005: the tables of series labels and incidents, and their views.

Rows written at revision 0004 must come through 0005 unchanged, the new
tables start empty, and a downgrade to 0004 removes exactly what 0005 added.
"""

from __future__ import annotations

import sqlalchemy as sa

from changekind.tasks import persist
from tests.tasks.persist.tables import insert_legacy_event

NEW_TABLES = {
    "series_labels",
    "series_label_changes",
    "incidents",
    "incident_members",
    "incident_labels",
    "incident_revisions",
    "incident_sync",
}


def test_migration_0005_adds_tables_and_views_and_keeps_rows(url: str) -> None:
    engine = persist.connect(url)
    try:
        persist.migrate(engine, revision="0004")
        # Today's event table (half_life a number since 0007) does not apply at
        # 0004: rows written with the columns every revision has.
        with engine.begin() as conn:
            for hour in range(3):
                insert_legacy_event(conn, f"2024-03-01T1{hour}:00:00Z")
        before = persist.table_snapshot(engine)
        persist.migrate(engine, revision="0005")  # 0006 adds event columns of its own
        after = persist.table_snapshot(engine)
        assert {k: v for k, v in after.items() if k not in NEW_TABLES} == before
        assert {k: after[k] for k in NEW_TABLES} == {k: [] for k in NEW_TABLES}
        with engine.connect() as conn:
            views = set(sa.inspect(conn).get_view_names())
        assert {"open_incidents", "event_labels"} <= views
        from alembic import command

        from changekind.tasks.persist.engines import _alembic_config

        config = _alembic_config()

        with engine.begin() as conn:
            config.attributes["connection"] = conn
            command.downgrade(config, "0004")
        with engine.connect() as conn:
            tables = set(sa.inspect(conn).get_table_names())
            views = set(sa.inspect(conn).get_view_names())
        assert not tables & NEW_TABLES
        assert not views & {"open_incidents", "event_labels"}
        assert persist.table_snapshot(engine) == before
    finally:
        engine.dispose()
