"""``changekind report`` options: --sort, --hide-dismissed, --unit, and their errors.

The database is written by the persistence layer with the invented series'
injected events (tests/tasks/report/pair.py) and one verdict; the page is
read back with the standard library's ``html.parser`` (``check_page``).
Reference: the injected truth and the stored verdict.
"""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

from changekind.flows.cli import app
from changekind.flows.cli.report import parse_units
from tests.tasks.report.pair import STAMPS, T_DOWN, T_GLITCH, T_UP, store_pair
from tests.tasks.test_report import check_page

runner = CliRunner()


@pytest.fixture
def stored(tmp_path, sqlite_url):
    source = store_pair(sqlite_url, tmp_path)
    return ["--db", sqlite_url, "--source", str(source)]


def _listed(index) -> list[str]:
    html = index.read_text(encoding="utf-8")
    table = html[html.index('id="list"') : html.index('id="events"')]
    times = [STAMPS[t].isoformat() for t in (T_DOWN, T_UP, T_GLITCH)]
    return sorted((t for t in times if t in table), key=table.index)


def test_sort_hide_dismissed_and_units(stored, tmp_path):
    out = tmp_path / "r"
    args = ["report", *stored, "--out", str(out), "--unit", "broker-*/queue-depth=messages"]
    result = runner.invoke(app, [*args, "--sort", "time"])
    assert result.exit_code == 0, result.output
    check_page(out / "index.html")
    # Newest first, but the dismissed glitch (the newest) last.
    assert _listed(out / "index.html") == [
        STAMPS[T_UP].isoformat(),
        STAMPS[T_DOWN].isoformat(),
        STAMPS[T_GLITCH].isoformat(),
    ]
    result = runner.invoke(app, [*args, "--sort", "t", "--hide-dismissed"])
    assert result.exit_code == 0, result.output
    assert "(1 dismissed left out)" in result.output
    page = check_page(out / "index.html")
    assert len(page.images) == 2 and len(list(out.glob("event-*.png"))) == 2
    assert _listed(out / "index.html") == [STAMPS[T_UP].isoformat(), STAMPS[T_DOWN].isoformat()]


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--sort", "size"], "sort must be one of effect_pct, effect, t, time"),
        (["--unit", "ms"], "is not PATTERN=UNIT"),
        (["--unit", "=ms"], "is not PATTERN=UNIT"),
        (["--unit", "broker-*="], "is not PATTERN=UNIT"),
    ],
)
def test_bad_options_get_one_clear_message(stored, tmp_path, extra, message):
    result = runner.invoke(app, ["report", *stored, "--out", str(tmp_path / "r"), *extra])
    assert result.exit_code == 2, result.output
    assert message in result.output and "Traceback" not in result.output
    assert not (tmp_path / "r").exists()


def test_units_split_at_the_last_equals_sign():
    assert parse_units(["host=a/*=ms", "*/queue-depth = messages"]) == {
        "host=a/*": "ms",
        "*/queue-depth": "messages",
    }


def test_help_names_the_new_options():
    result = runner.invoke(app, ["report", "--help"], terminal_width=100)
    assert result.exit_code == 0
    for option in ("--sort", "--hide-dismissed", "--unit"):
        assert option in result.output
