"""Database fixtures shared by the tests.

``sqlite_url``
    A SQLite file in the test's ``tmp_path`` (created on first connection).
``pg_url``
    A fresh, empty schema on the real PostgreSQL server (default
    ``postgresql+psycopg://postgres@127.0.0.1:5432/test``; set
    ``CHANGEKIND_TEST_PG_URL`` to use another), reached through ``search_path``
    and dropped after the test.  When the server cannot be reached the test is
    skipped with the reason, except under ``CI=true``, where it fails: CI must
    run the PostgreSQL tests.

Markers (pyproject.toml): ``integration`` for tests that start processes,
servers or clusters (subprocess, Dask, deployment, crash and fault tests);
``multirun`` for tests that run whole fleet flows several times and compare
them; ``slow`` for the Monte Carlo checks of the engine.  The unit tier is
``-m "not slow and not integration and not multirun"``; ``.ci/run`` runs every
tier.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
import sqlalchemy as sa
from sqlalchemy.pool import NullPool

SLOW_FILES = ("test_montecarlo_small.py",)
"""Monte Carlo test files, marked ``slow`` here by name (the engine's own test
files are kept as they are while the engine is restructured)."""


def pytest_collection_modifyitems(items: list[pytest.Item]) -> None:
    for item in items:
        if item.path.name in SLOW_FILES:
            item.add_marker(pytest.mark.slow)


PG_BASE_URL = os.environ.get(
    "CHANGEKIND_TEST_PG_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)


@pytest.fixture
def sqlite_url(tmp_path: Path) -> str:
    """URL of a SQLite database file in ``tmp_path``."""
    return f"sqlite:///{tmp_path / 'changekind.db'}"


def _absent(reason: str) -> None:
    if os.environ.get("CI", "").strip().lower() == "true":
        pytest.fail(f"{reason} (CI=true: the PostgreSQL tests must run here)")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def _pg_server() -> Iterator[sa.Engine | str]:
    """An engine on the PostgreSQL server, or the reason there is none."""
    try:
        import psycopg  # noqa: F401
    except ImportError:
        yield "psycopg (PostgreSQL driver) is not installed; pip install 'changekind[dev]'"
        return
    url = sa.make_url(PG_BASE_URL)
    engine = sa.create_engine(url, poolclass=NullPool, connect_args={"connect_timeout": 3})
    try:
        with engine.connect() as conn:
            conn.execute(sa.text("SELECT 1"))
    except sa.exc.OperationalError as exc:
        engine.dispose()
        first = str(exc.orig).splitlines()[0] if exc.orig else str(exc)
        yield (
            f"PostgreSQL is not reachable at {url.render_as_string(hide_password=True)} "
            f"({first}); start it or set CHANGEKIND_TEST_PG_URL"
        )
        return
    yield engine
    engine.dispose()


@pytest.fixture
def pg_url_factory(_pg_server: sa.Engine | str) -> Iterator[Callable[..., str]]:
    """Make URLs of fresh schemas on the PostgreSQL server (all dropped afterwards).

    ``make(application_name=None)``: the name marks the URL's connections in
    ``pg_stat_activity`` (the fault tests terminate exactly those).
    """
    if isinstance(_pg_server, str):
        _absent(_pg_server)
    assert isinstance(_pg_server, sa.Engine)
    schemas: list[str] = []

    def make(application_name: str | None = None) -> str:
        schema = f"changekind_test_{uuid.uuid4().hex[:12]}"
        with _pg_server.begin() as conn:
            conn.execute(sa.text(f'CREATE SCHEMA "{schema}"'))
        schemas.append(schema)
        query = {"options": f"-csearch_path={schema}"}
        if application_name is not None:
            query["application_name"] = application_name
        return _pg_server.url.update_query_dict(query).render_as_string(hide_password=False)

    try:
        yield make
    finally:
        with _pg_server.begin() as conn:
            for schema in schemas:
                conn.execute(sa.text(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE'))


@pytest.fixture
def pg_url(pg_url_factory: Callable[..., str]) -> str:
    """URL of a fresh schema on the PostgreSQL server, dropped afterwards."""
    return pg_url_factory()
