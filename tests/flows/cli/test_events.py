"""``changekind events`` and ``triage`` on a database written directly (no scan).

The reference is the rows written: each filter's expected set is worked out
from the written events in Python, independently of the SQL.
"""

from __future__ import annotations

import csv
import importlib.util
import io
import json
from datetime import UTC, datetime, timedelta

import pandas as pd
import pytest
from rich.console import Console
from typer.testing import CliRunner

from changekind.flows.cli import app
from changekind.flows.cli.output import events_table
from changekind.tasks import persist
from tests.fresh import run_python
from tests.tasks.persist.tables import make_event

LONG_ID = "eu-west-3/checkout-api/latency-p99-ms/canary-frontend-7"
T0 = datetime(2030, 3, 1, tzinfo=UTC)

# (series, hours after T0, type, status, effect %, half-life seconds, verdict)
WRITTEN = [
    ("disk-queue", 0, "LS", "confirmed", 12.0, None, None),
    ("disk-queue", 5, "AO", "confirmed", -3.0, None, "dismissed"),
    (LONG_ID, 10, "TC", "confirmed", 40.0, 6984.0, "explained"),
    (LONG_ID, 20, "LS", "provisional", -0.5, None, None),
    ("fan-speed", 30, "IO", "confirmed", 7.5, None, "acknowledged"),
    ("fan-speed", 40, "TC", "confirmed", 2.0, 1050.0, None),
]


def _runner() -> CliRunner:
    return CliRunner()


def _invoke(*args: str, env: dict[str, str] | None = None):
    return _runner().invoke(app, list(args), env=env)


def _time(hours: int) -> str:
    return (T0 + timedelta(hours=hours)).isoformat().replace("+00:00", "Z")


@pytest.fixture
def db(tmp_path) -> str:
    url = f"sqlite:///{tmp_path / 'events.db'}"
    persist.init_db(url).dispose()
    events = [
        make_event(
            sid,
            _time(h),
            kind,
            status,
            effect=pct,
            effect_pct=pct,
            half_life=half,
            decay=0.5 if kind == "TC" else None,
            t_stat=4.0 + h / 10,
        )
        for sid, h, kind, status, pct, half, _ in WRITTEN
    ]
    persist.write_events(url, "run-1", events, at=T0)
    for sid, h, _, _, _, _, verdict in WRITTEN:
        if verdict:
            persist.set_triage(url, sid, _time(h), verdict, reason="checked")
    return url


def _json(*args: str) -> list[dict]:
    result = _invoke("events", *args, "--json")
    assert result.exit_code == 0, result.stderr
    return json.loads(result.stdout)


def _keys(records: list[dict]) -> list[tuple[str, str]]:
    return [(r["series_id"], r["event_time"]) for r in records]


def _expected(keep) -> list[tuple[str, str]]:  # newest first
    rows = [w for w in WRITTEN if keep(w)]
    return [(w[0], _time(w[1])) for w in sorted(rows, key=lambda w: -w[1])]


def test_newest_first_by_default_and_oldest_first_on_request(db):
    assert _keys(_json("--db", db)) == _expected(lambda w: True)
    assert _keys(_json("--db", db, "--oldest-first")) == _expected(lambda w: True)[::-1]


@pytest.mark.parametrize(
    ("args", "keep"),
    [
        (["--type", "LS"], lambda w: w[2] == "LS"),
        (["--type", "TC", "--type", "IO"], lambda w: w[2] in ("TC", "IO")),
        (["--status", "provisional"], lambda w: w[3] == "provisional"),
        (["--triage", "none"], lambda w: w[6] is None),
        (
            ["--triage", "dismissed", "--triage", "explained"],
            lambda w: w[6] in ("dismissed", "explained"),
        ),
        (["--min-effect-pct", "7.5"], lambda w: abs(w[4]) >= 7.5),
        (
            ["--since", "2030-03-01T05:00:00Z", "--until", "2030-03-01T23:00:00Z"],
            lambda w: 5 <= w[1] <= 23,
        ),
        (["--until", "2030-03-01T10:00:00"], lambda w: w[1] <= 10),  # naive is UTC
        (["--limit", "2"], lambda w: w[1] >= 30),
        (
            ["--type", "LS", "--triage", "none", "--series", "disk-queue"],
            lambda w: w[2] == "LS" and w[6] is None and w[0] == "disk-queue",
        ),
    ],
)
def test_filters_select_what_was_written(db, args, keep):
    assert _keys(_json("--db", db, *args)) == _expected(keep)


def test_half_life_is_a_number_in_json_and_csv_and_readable_in_the_table(db):
    by_key = {(r["series_id"], r["event_time"]): r for r in _json("--db", db)}
    assert by_key[(LONG_ID, _time(10))]["half_life"] == 6984.0
    assert by_key[("disk-queue", _time(0))]["half_life"] is None
    csv_text = _invoke("events", "--db", db, "--csv", "--type", "TC").stdout
    rows = list(csv.DictReader(io.StringIO(csv_text)))
    assert sorted(float(row["half_life"]) for row in rows) == [1050.0, 6984.0]
    table = _invoke("events", "--db", db, "--type", "TC", env={"COLUMNS": "160"}).stdout
    assert "1.94 h" in table and "17.5 min" in table  # 6984 s and 1050 s


@pytest.mark.parametrize(
    ("args", "said"),
    [
        (["--type", "XX"], "event type 'XX'"),
        (["--status", "open"], "event status 'open'"),
        (["--triage", "maybe"], "triage state 'maybe'"),
        (["--since", "05/03/2030"], "--since '05/03/2030'"),
        (["--until", "2030-03-02", "--since", "2030-03-03"], "before since"),
        (["--limit", "0"], "--limit"),
        (["--min-effect-pct", "-1"], "min_effect_pct"),
        (["--since", "17"], "is a number"),
    ],
)
def test_bad_filters_get_one_clear_line_and_exit_2(db, args, said):
    result = _invoke("events", "--db", db, *args)
    assert result.exit_code == 2
    assert said in result.stderr, result.stderr


def _cells_whole(rendered: str, cells: list[str]) -> None:
    for cell in cells:
        assert cell in rendered, f"{cell!r} cut or missing in:\n{rendered}"


def test_events_table_fits_80_columns_and_cuts_no_cell(db):
    result = _invoke("events", "--db", db, env={"COLUMNS": "80"})
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.splitlines()
    assert max(len(line) for line in lines) <= 80
    frame = persist.read_events(db, newest_first=True)
    # Numbers whole: every effect, and every time, in full.
    _cells_whole(result.stdout, [f"{v:+.4g}" for v in frame["effect"]])
    _cells_whole(result.stdout, ["2030-03-02 16:00", "2030-03-01 00:00"])
    # The long id is shortened in the middle: both ends kept.
    shortened = [line.split()[0] for line in lines if "…" in line]
    assert len(shortened) == 2  # the two events of the long id, and nothing else
    for cell in shortened:
        head, tail = cell.split("…")
        assert LONG_ID.startswith(head) and LONG_ID.endswith(tail) and len(head) >= 5


@pytest.mark.parametrize("width", [50, 64, 80, 100])
def test_events_table_drops_columns_before_cutting_numbers(db, width):
    frame = persist.read_events(db, newest_first=True)
    console = Console(width=width, record=True)
    console.print(events_table(frame, title="events", width=width))
    text = console.export_text()
    assert max(len(line) for line in text.splitlines()) <= width
    _cells_whole(text, [f"{v:+.4g}" for v in frame["effect"]])
    _cells_whole(text, ["2030-03-02 16:00", "2030-03-01 10:00", "2030-03-01 00:00"])
    for kind in ("LS", "AO", "TC", "IO"):
        assert kind in text


READ_ONLY = ["events", "triage", "report", "drill"]
if importlib.util.find_spec("changekind.flows.cli.incidents") is not None:
    READ_ONLY.append("incidents")


@pytest.mark.integration
@pytest.mark.parametrize("command", READ_ONLY)
def test_read_only_commands_do_not_import_prefect(db, tmp_path, command):
    source = tmp_path / "source.csv"
    stamps = pd.date_range(T0 - timedelta(days=2), T0 + timedelta(days=3), freq="h")
    pd.concat(
        pd.DataFrame({"series_id": sid, "timestamp": stamps, "value": 40.0 + 0.0 * stamps.day})
        for sid in sorted({w[0] for w in WRITTEN})
    ).to_csv(source, index=False)
    args = {
        "events": ["events", "--db", db, "--json"],
        "triage": ["triage", "disk-queue", _time(0), "acknowledged", "--db", db],
        "report": ["report", "--db", db, "--source", str(source), "--out", str(tmp_path / "r")],
        "drill": ["drill", "disk-queue", _time(0), "--window", "1h", "--source", str(source)],
        "incidents": ["incidents", "--db", db],
    }[command]
    code = (
        "import sys\n"
        "from typer.testing import CliRunner\n"
        "from changekind.flows.cli import app\n"
        f"r = CliRunner().invoke(app, {args!r})\n"
        "print(r.exit_code, 'prefect' in sys.modules, repr(r.stderr[-300:]))\n"
    )
    done = run_python(code)
    assert done.returncode == 0, done.stderr
    exit_code, imported, stderr = done.stdout.strip().split(" ", 2)
    assert exit_code == "0", stderr
    assert imported == "False"


def test_triage_keeps_every_verdict_and_verdicts_lists_them(db):
    key = ["disk-queue", _time(0)]
    first = _invoke(
        "triage", *key, "explained", "--reason", "change 4411", "--by", "ana", "--db", db
    )
    assert first.exit_code == 0, first.stderr
    second = _invoke(
        "triage", *key, "dismissed", "--reason", "sensor swap", "--by", "raj", "--db", db
    )
    assert second.exit_code == 0, second.stderr
    history = persist.read_triage_history(db, *key)
    assert history["reason"].tolist() == ["change 4411", "sensor swap"]
    shown = _invoke("verdicts", *key, "--db", db, env={"COLUMNS": "80"})
    assert shown.exit_code == 0, shown.stderr
    lines = shown.stdout.splitlines()
    explained = next(line for line in lines if "explained" in line)
    dismissed = next(line for line in lines if "dismissed" in line)
    assert "ana" in explained and "change 4411" in explained
    assert "raj" in dismissed and "sensor swap" in dismissed
    assert lines.index(explained) < lines.index(dismissed)  # oldest first
    # The event's current verdict is the last one.
    assert _keys(_json("--db", db, "--triage", "dismissed", "--series", "disk-queue")) == [
        ("disk-queue", _time(5)),
        ("disk-queue", _time(0)),
    ]
