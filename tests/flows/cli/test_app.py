"""The application: --version, database URLs as hosting services write them, help text."""

from __future__ import annotations

import importlib.metadata
import re

import pytest
import sqlalchemy as sa
from typer.testing import CliRunner

from changekind.flows.cli import app
from changekind.tasks.persist.engines import _parse_url, our_driver


def test_version_prints_the_installed_version():
    result = CliRunner().invoke(app, ["--version"])
    assert result.exit_code == 0
    assert result.stdout.strip() == f"changekind {importlib.metadata.version('changekind')}"


@pytest.mark.parametrize(
    ("given", "driver"),
    [
        ("postgres://u@127.0.0.1/db", "postgresql+psycopg"),
        ("postgresql://u@127.0.0.1/db", "postgresql+psycopg"),
        ("postgres+psycopg://u@127.0.0.1/db", "postgresql+psycopg"),
        ("postgresql+psycopg://u@127.0.0.1/db", "postgresql+psycopg"),
        ("sqlite:///x.db", "sqlite"),
    ],
)
def test_postgres_urls_mean_postgresql_with_our_driver(given, driver):
    assert _parse_url(given).drivername == driver
    assert our_driver(sa.make_url(given)).drivername == driver


def test_postgres_url_reaches_the_real_server(pg_url):
    url = pg_url.replace("postgresql+psycopg://", "postgres://", 1)
    assert url.startswith("postgres://")
    result = CliRunner().invoke(app, ["events", "--db", url])
    assert result.exit_code == 2
    assert "holds no changekind tables" in result.stderr  # connected, and said what is missing


@pytest.mark.parametrize("command", ["events", "report", "triage", "scan", "backfill", "detect"])
def test_help_has_no_placeholder_types_and_dollar_environment_names(command):
    result = CliRunner().invoke(app, [command, "--help"], env={"COLUMNS": "200"})
    assert result.exit_code == 0
    text = result.stdout
    assert not re.search(r"<(bool|str|int|float|path)>", text, re.I), text
    assert not re.search(r"(?<![$\w])CHANGEKIND_[A-Z_]+", text), text
    assert "every series in the source" not in text or command != "events"
