"""The application: --version, database URLs as hosting services write them, help text."""

from __future__ import annotations

import importlib.metadata
import re

import pytest
import sqlalchemy as sa
from typer.testing import CliRunner

from changekind.flows.cli import app
from changekind.tasks import persist
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


@pytest.mark.parametrize(
    "args",
    [
        ["events", "--since", "05/03/2030"],
        ["events", "--until", "05/03/2030"],
        ["report", "--since", "05/03/2030", "--source", "{source}", "--out", "{out}"],
        ["backfill", "--source", "{source}", "--start", "05/03/2030", "--end", "2030-03-09"],
    ],
)
def test_an_ambiguous_date_is_refused_with_a_clear_message(tmp_path, args):
    """'05/03/2030' reads as 5 March or 3 May: every command refuses it (ISO 8601 only)."""
    source = tmp_path / "s.csv"
    source.write_text("series_id,timestamp,value\na,2030-03-01T00:00:00Z,1.0\n")
    db = f"sqlite:///{tmp_path / 'x.db'}"
    persist.init_db(db).dispose()
    filled = [a.format(source=source, out=tmp_path / "out") for a in args]
    result = CliRunner().invoke(app, [*filled, "--db", db])
    assert result.exit_code == 2, result.stdout + result.stderr
    assert "'05/03/2030'" in result.stderr and "ambiguous" in result.stderr, result.stderr
