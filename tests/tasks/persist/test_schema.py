"""The schema and its migrations (tasks/persist/schema.py, engines.py).

Reference: the input itself (see this package's ``__init__``).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
import sqlalchemy as sa
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.config import Config
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory

from changekind.tasks import persist
from changekind.tasks.persist import (
    VERSION_TABLE,
    init_db,
    metadata,
    migrate,
    migrations_dir,
    table_snapshot,
    write_events,
)
from tests.tasks.persist.tables import (
    T0,
    VIEW_NAMES,
    VIEWS_0001,
    insert_legacy_event,
    load_migration,
    make_event,
    normalized,
    view_definitions,
    views_sql,
)

# --------------------------------------------------------------------------- schema


def test_migrations_build_exactly_the_metadata(engine: sa.Engine) -> None:
    with engine.connect() as conn:
        context = MigrationContext.configure(
            conn, opts={"compare_type": True, "version_table": VERSION_TABLE}
        )
        assert compare_metadata(context, metadata) == []
        assert (
            context.get_current_revision()
            == ScriptDirectory(str(migrations_dir())).get_current_head()
        )
        inspector = sa.inspect(conn)
        assert set(inspector.get_view_names()) == VIEW_NAMES
        assert set(inspector.get_table_names()) == {t.name for t in metadata.sorted_tables} | {
            VERSION_TABLE
        }


def test_schema_comparison_can_fail(engine: sa.Engine) -> None:
    """The check above is not vacuous: a MetaData with one more column differs."""
    drifted = sa.MetaData()
    for table in metadata.sorted_tables:
        table.to_metadata(drifted)
    drifted.tables["scan_runs"].append_column(sa.Column("extra", sa.Integer))
    with engine.connect() as conn:
        context = MigrationContext.configure(
            conn, opts={"compare_type": True, "version_table": VERSION_TABLE}
        )
        diff = compare_metadata(context, drifted)
    assert [(d[0], d[2], d[3].name) for d in diff] == [("add_column", "scan_runs", "extra")]


def test_migrate_again_is_a_no_op_and_cwd_does_not_matter(
    engine: sa.Engine, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    write_events(engine, "run-1", [make_event()], at=T0)
    before = table_snapshot(engine)
    monkeypatch.chdir(tmp_path)  # the script folder is found from the package, not the cwd
    migrate(engine)
    assert table_snapshot(engine) == before


def _alembic(engine: sa.Engine, action: str, revision: str) -> None:
    config = Config()
    config.set_main_option("script_location", str(migrations_dir()))
    with engine.begin() as conn:
        config.attributes["connection"] = conn
        getattr(command, action)(config, revision)


def test_migration_0002_keeps_rows_and_admits_variance_changes(url: str) -> None:
    """0001 -> 0002 keeps events, revisions, triage and views; VC rows pass; downgrade undoes it."""
    engine = persist.connect(url)
    try:
        migrate(engine, revision="0001")
        # Today's table definition does not apply at 0001: rows written column by column.
        with engine.begin() as conn:
            insert_legacy_event(conn)
            conn.execute(
                sa.text(
                    "UPDATE series_events SET triage_state = 'explained', "
                    "triage_reason = 'rollout', triage_at = :t"
                ),
                {"t": T0},
            )
        with pytest.raises(sa.exc.IntegrityError), engine.begin() as conn:  # 0001 refuses VC
            insert_legacy_event(conn, "2024-03-02T10:00:00Z", "VC")
        before = table_snapshot(engine)
        migrate(engine, revision="0002")
        assert table_snapshot(engine) == before
        with engine.connect() as conn:
            assert set(sa.inspect(conn).get_view_names()) == VIEWS_0001
            assert conn.execute(sa.text("SELECT COUNT(*) FROM open_level_shifts")).scalar() == 1
        with engine.begin() as conn:
            insert_legacy_event(conn, "2024-03-02T10:00:00Z", "VC")
        with engine.connect() as conn:
            kinds = conn.execute(sa.text("SELECT event_type FROM series_events")).scalars().all()
        assert sorted(kinds) == ["LS", "VC"]
        _alembic(engine, "downgrade", "0001")
        with engine.connect() as conn:
            kinds = conn.execute(sa.text("SELECT event_type FROM series_events")).scalars().all()
        assert kinds == ["LS"]
    finally:
        engine.dispose()


def test_migration_0003_keeps_rows_and_admits_abandoned_runs(url: str) -> None:
    """0002 -> 0003: models, runs and views kept; new columns NULL; 'abandoned' allowed."""
    engine = persist.connect(url)
    try:
        migrate(engine, revision="0002")
        with engine.begin() as conn:
            insert_legacy_event(conn)
            conn.execute(
                sa.text(
                    "INSERT INTO scan_runs (run_id, kind, status, series_total, series_ok, "
                    "series_failed, events_new, events_changed, events_retracted, started_at) "
                    "VALUES ('old', 'scan', 'running', 0, 0, 0, 0, 0, 0, :t)"
                ),
                {"t": T0},
            )
            conn.execute(
                sa.text(
                    "INSERT INTO series_models (series_id, model_json, arima_order, sigma2, nobs, "
                    "fitted_at, watermark) VALUES ('s', '{}', '(1,0,0)(0,0,0,0)', 1.0, 10, :t, 'w')"
                ),
                {"t": T0},
            )
            with pytest.raises(sa.exc.IntegrityError), conn.begin_nested():
                conn.execute(sa.text("UPDATE scan_runs SET status = 'abandoned'"))
        migrate(engine)
        assert persist.load_coverage(engine) == {"s": persist.Coverage(None, "w", None)}
        assert persist.close_stale_runs(engine, "new", at=T0) == ["old"]
        runs = table_snapshot(engine)["scan_runs"]
        assert [(r[0], r[4]) for r in runs] == [("old", "abandoned")]
        assert "closed by run new" in runs[0][-1]
        with engine.connect() as conn:
            assert set(sa.inspect(conn).get_view_names()) == VIEW_NAMES
        _alembic(engine, "downgrade", "0002")
        with engine.connect() as conn:
            assert conn.execute(sa.text("SELECT status FROM scan_runs")).scalar() == "failed"
            assert "run_locks" not in sa.inspect(conn).get_table_names()
            assert conn.execute(sa.text("SELECT watermark FROM series_models")).scalar() == "w"
    finally:
        engine.dispose()


def test_downgrade_removes_tables_and_views(url: str) -> None:
    engine = init_db(url)
    try:
        config = Config()
        config.set_main_option("script_location", str(migrations_dir()))
        with engine.begin() as conn:
            config.attributes["connection"] = conn
            command.downgrade(config, "base")
        with engine.connect() as conn:
            inspector = sa.inspect(conn)
            assert inspector.get_view_names() == []
            assert set(inspector.get_table_names()) == {VERSION_TABLE}
    finally:
        engine.dispose()


@pytest.mark.parametrize("dialect", ["sqlite", "postgresql"])
def test_views_sql_is_the_migration_text(dialect: str) -> None:
    statements = [
        sql
        for name in (
            "0001_initial_schema.py",
            "0005_series_labels_and_incidents.py",
            "0006_effect_size_columns.py",
        )
        for sql in load_migration(name).view_statements(dialect)
    ]
    statements += [
        load_migration("0008_triage_history.py").VIEW,
        load_migration("0009_level_shifts_in_force.py").VIEW,
    ]
    # later revisions' statements replace earlier ones of the same view
    expected = {
        re.search(r"CREATE VIEW (\w+)", sql).group(1): normalized(sql.rstrip(";"))  # type: ignore[union-attr]
        for sql in statements
    }
    assert {name: normalized(sql) for name, sql in views_sql(dialect).items()} == expected


def test_views_sql_builds_the_same_views_as_the_migrations(engine: sa.Engine) -> None:
    """Re-create the views from infra/views.sql: the database keeps the same definitions."""
    with engine.begin() as conn:
        migrated = view_definitions(conn)
        for name in migrated:
            conn.exec_driver_sql(f"DROP VIEW {name}")
        for sql in views_sql(conn.dialect.name).values():
            conn.exec_driver_sql(sql)
        rebuilt = view_definitions(conn)
    assert set(migrated) == VIEW_NAMES
    assert rebuilt == migrated


def test_migration_0010_adds_the_run_source_and_keeps_runs(url: str) -> None:
    """0009 -> 0010: earlier runs kept with no source; downgrade drops only the columns."""
    engine = persist.connect(url)
    try:
        migrate(engine, revision="0009")
        with engine.begin() as conn:
            conn.execute(
                sa.text(
                    "INSERT INTO scan_runs (run_id, kind, status, series_total, series_ok, "
                    "series_failed, events_new, events_changed, events_retracted, started_at, "
                    "message) VALUES ('old', 'scan', 'completed', 3, 3, 0, 1, 0, 0, :t, 'm')"
                ),
                {"t": T0},
            )
        migrate(engine)
        assert persist.latest_source(engine) is None  # the old run recorded none
        persist.start_run(engine, "new", "scan", None, None, source="/data/fleet", at=T0)
        latest = persist.latest_source(engine)
        assert latest is not None and (latest.run_id, latest.source) == ("new", "/data/fleet")
        _alembic(engine, "downgrade", "0009")
        with engine.connect() as conn:
            columns = {c["name"] for c in sa.inspect(conn).get_columns("scan_runs")}
            rows = conn.execute(
                sa.text("SELECT run_id, series_total, message FROM scan_runs ORDER BY run_id")
            ).all()
            assert set(sa.inspect(conn).get_view_names()) == VIEW_NAMES
        assert "source" not in columns and "source_columns" not in columns
        assert [tuple(r) for r in rows] == [("new", 0, None), ("old", 3, "m")]
    finally:
        engine.dispose()
