"""Fault injection: an operator's bad day, and what the tables say afterwards.

Each test injects one fault into a run over the invented fleet of
tests/flows/fleet.py (hourly AR(1) series with known shifts and spikes) and
compares the tables with an uninterrupted run's on everything that was good
(the reference is the same run without the fault, on a fresh database); the
run records must say what happened.  Faults: SIGKILL of a backfill mid-chunk
(with worker processes), PostgreSQL connections terminated mid-scan, a
PostgreSQL outage of 6 s, a SQLite file locked by another writer, a corrupt
Parquet part, and a CSV source with a bad cell, a ragged row, a row without
a series id and an empty file among good series; and two runs started
together on one database.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pandas as pd
import pytest
import sqlalchemy as sa

from changekind.flows.pipeline import progress_hook
from changekind.flows.scan import backfill_flow, scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from changekind.tasks.errors import RunBusyError
from tests.conftest import PG_BASE_URL
from tests.flows import faults
from tests.flows.fleet import make_fleet, write_source

pytestmark = pytest.mark.integration

# One series a batch, one batch at a time: a run writes many small transactions.
FINE = RunOptions(workers=1, batch_seconds=0.05, wait_seconds=0)


@pytest.fixture(scope="module")
def fleet():
    data, _ = make_fleet(9)
    return data


@pytest.fixture(scope="module")
def source(fleet, tmp_path_factory) -> Path:
    return write_source(fleet, tmp_path_factory.mktemp("faults") / "source")


@contextmanager
def after_first_write(action, *, ready: threading.Event | None = None) -> Iterator[threading.Event]:
    """Start ``action`` in a thread once the run has written its first batch.

    With ``ready``, the run goes on only once the action has set it (the fault is in place).
    """
    fired = threading.Event()
    threads: list[threading.Thread] = []

    def hook(done: int, total: int, what: str) -> None:
        if not fired.is_set():
            fired.set()
            thread = threading.Thread(target=action, daemon=True)
            thread.start()
            threads.append(thread)
            if ready is not None:
                ready.wait(timeout=30)

    token = progress_hook.set(hook)
    try:
        yield fired
    finally:
        progress_hook.reset(token)
        for thread in threads:
            thread.join(timeout=60)


# -- the database goes away -------------------------------------------------------------


@pytest.mark.postgres
def test_connections_terminated_mid_scan_are_survived(prefect_server, source, pg_url_factory):
    name = f"ck-fault-{uuid.uuid4().hex[:8]}"
    db = pg_url_factory(application_name=name)
    reference = pg_url_factory()
    scan_flow(str(source), reference, FINE)
    admin = sa.create_engine(PG_BASE_URL, poolclass=sa.pool.NullPool)
    killed: list[int] = []

    def storm() -> None:
        with faults.repeatedly(
            lambda: faults.terminate_backends(admin, name), every=0.05, seconds=3.0
        ) as results:
            time.sleep(3.0)
        killed.extend(results)

    with after_first_write(storm) as fired:
        summary = scan_flow(str(source), db, FINE)
    admin.dispose()
    assert fired.is_set() and sum(killed) >= 1  # connections really were terminated
    assert summary.series_ok == 9 and summary.series_failed == 1  # the constant series
    assert faults.good_state(db) == faults.good_state(reference)
    (run,) = faults.runs(db)
    assert run["status"] == "completed" and run["series_ok"] == 9


@pytest.mark.postgres
def test_a_six_second_database_outage_mid_scan_is_survived(prefect_server, source, pg_url_factory):
    reference = pg_url_factory()
    scan_flow(str(source), reference, FINE)
    target = sa.make_url(PG_BASE_URL)
    proxy = faults.FlakyProxy((target.host or "127.0.0.1", target.port or 5432))
    try:
        db = faults.via_proxy(pg_url_factory(), proxy.port)
        t0 = time.monotonic()
        with after_first_write(lambda: proxy.outage(6.0)) as fired:
            summary = scan_flow(str(source), db, FINE)
        took = time.monotonic() - t0
    finally:
        proxy.close()
    assert fired.is_set() and proxy.outages == 1
    assert took >= 6.0  # the run waited the outage out
    assert summary.series_ok == 9
    direct = sa.make_url(db).set(host=target.host, port=target.port)
    direct_url = direct.render_as_string(hide_password=False)
    assert faults.good_state(direct_url) == faults.good_state(reference)
    (run,) = faults.runs(direct_url)
    assert run["status"] == "completed"


def test_a_locked_sqlite_file_mid_scan_is_survived(prefect_server, source, tmp_path, monkeypatch):
    reference = f"sqlite:///{tmp_path / 'reference.db'}"
    scan_flow(str(source), reference, FINE)
    path = tmp_path / "locked.db"
    db = f"sqlite:///{path}"
    # Writers wait 0.5 s for the lock instead of 30, so the lock outlasts the wait.
    monkeypatch.setattr(persist.engines, "SQLITE_BUSY_TIMEOUT_SECONDS", 0.5)
    held = []

    def hold() -> None:
        conn = sqlite3.connect(path, timeout=30)
        conn.execute("BEGIN EXCLUSIVE")
        held.append(time.monotonic())
        time.sleep(4.0)
        conn.rollback()
        conn.close()

    with after_first_write(hold) as fired:
        summary = scan_flow(str(source), db, FINE)
    assert fired.is_set() and held
    assert summary.series_ok == 9
    assert faults.good_state(db) == faults.good_state(reference)
    (run,) = faults.runs(db)
    assert run["status"] == "completed"


def test_a_database_gone_for_good_fails_the_run_with_exit_3_and_the_next_run_closes_it(
    prefect_server, fleet, tmp_path, monkeypatch
):
    """Beyond the retries the run fails part-way (exit 3, not 2); what it wrote stays."""
    from typer.testing import CliRunner

    from changekind.flows.cli import app

    src = write_source(fleet, tmp_path / "src")
    path = tmp_path / "gone.db"
    db = f"sqlite:///{path}"
    monkeypatch.setattr(persist.engines, "SQLITE_BUSY_TIMEOUT_SECONDS", 0.2)
    stop, locked = threading.Event(), threading.Event()

    def hold() -> None:  # a writer that never lets go
        conn = sqlite3.connect(path, timeout=30)
        conn.execute("BEGIN EXCLUSIVE")
        locked.set()
        stop.wait(120)
        conn.rollback()
        conn.close()

    def scan(*extra: str):  # two workers: two batches, the second written after the lock
        return CliRunner().invoke(
            app, ["scan", "--source", str(src), "--db", db, "--workers", "2", *extra]
        )

    from changekind.flows import records

    real = records.write_outcomes

    def write_then_lock(*args, **kwargs):  # the CLI draws its own progress: hook the writer
        written = real(*args, **kwargs)
        if not locked.is_set():
            threading.Thread(target=hold, daemon=True).start()
            locked.wait(timeout=30)
        return written

    monkeypatch.setattr(records, "write_outcomes", write_then_lock)
    try:
        result = scan()
    finally:
        stop.set()
    monkeypatch.setattr(records, "write_outcomes", real)
    assert result.exit_code == 3, result.output
    assert "failed" in result.output and "run it again" in result.output
    written = persist.content_snapshot(db)["series_models"]
    assert 1 <= len(written) < 9  # part-way
    after = scan()
    assert after.exit_code == 1  # the constant series, as always
    statuses = sorted(r["status"] for r in faults.runs(db))
    assert statuses in (["abandoned", "completed"], ["completed", "failed"])
    reference = f"sqlite:///{tmp_path / 'ref.db'}"
    scan_flow(str(src), reference, FINE)
    assert faults.good_state(db) == faults.good_state(reference)


# -- bad parts of a source ----------------------------------------------------------------


def test_a_corrupt_parquet_part_costs_only_its_own_series(prefect_server, fleet, tmp_path):
    parts = tmp_path / "parts"
    parts.mkdir()
    for i, (_sid, rows) in enumerate(fleet.groupby("series_id", sort=True)):
        rows.to_parquet(parts / f"part-{i}.parquet", index=False)
    bad = parts / "part-3.parquet"
    lost = sorted(fleet.series_id.unique())[3]
    good = parts.parent / "good"
    good.mkdir()
    for f in parts.iterdir():
        if f != bad:
            (good / f.name).write_bytes(f.read_bytes())
    bad.write_bytes(bad.read_bytes()[:300])  # truncated mid-file
    db = f"sqlite:///{tmp_path / 'corrupt.db'}"
    reference = f"sqlite:///{tmp_path / 'reference.db'}"
    summary = scan_flow(str(parts), db, FINE)
    scan_flow(str(good), reference, FINE)
    assert faults.good_state(db) == faults.good_state(reference)
    assert lost not in {row[0] for row in faults.good_state(db)["models"]}
    assert len(summary.problems) == 1 and "part-3.parquet" in summary.problems[0]
    (problem,) = faults.problems(db)
    assert problem["location"] == str(bad) and "not readable as Parquet" in problem["problem"]


def test_bad_rows_cells_and_an_empty_file_cost_no_good_series(prefect_server, fleet, tmp_path):
    """A CSV folder with a cell that is not a number, a ragged row, a row without a
    series id and an empty file: every good series is analysed as on clean data."""
    text = fleet.assign(timestamp=fleet.timestamp.dt.strftime("%Y-%m-%dT%H:%M:%S"))
    clean, dirty = tmp_path / "clean", tmp_path / "dirty"
    clean.mkdir()
    dirty.mkdir()
    victim = text.index[(text.series_id == "shelf-0/disk-1")][100]
    when = text.loc[victim, "timestamp"]
    blanked = text.copy()
    blanked.loc[victim, "value"] = None  # the reference: that cell missing
    blanked.to_csv(clean / "fleet.csv", index=False)
    lines = text.to_csv(index=False).splitlines()
    lines[victim + 1] = f"shelf-0/disk-1,{when},n/a?"  # line victim + 2 of the file
    lines.insert(50, "shelf-0/disk-0,2026-06-01T00:30:00,1.0,7")  # ragged
    lines.insert(60, ",2026-06-01T00:30:00,5.0")  # no series id
    (dirty / "fleet.csv").write_text("\n".join(lines) + "\n")
    (dirty / "late.csv").write_text("")
    db = f"sqlite:///{tmp_path / 'dirty.db'}"
    reference = f"sqlite:///{tmp_path / 'clean.db'}"
    summary = scan_flow(str(dirty), db, FINE)
    scan_flow(str(clean), reference, FINE)
    assert faults.good_state(db) == faults.good_state(reference)
    assert summary.series_ok == 9  # no series lost to its bad neighbours
    found = {
        (Path(p["location"]).name, p["row_number"], p["series_id"]) for p in faults.problems(db)
    }
    assert ("late.csv", None, None) in found  # the empty file
    assert ("fleet.csv", 51, None) in found  # the ragged row (line 51)
    assert ("fleet.csv", 61, None) in found  # the row without a series id
    cell = [p for p in faults.problems(db) if p["series_id"] == "shelf-0/disk-1"]
    assert len(cell) == 1 and "'n/a?'" in cell[0]["problem"] and when in cell[0]["problem"]
    assert len(summary.problems) == 4


# -- runs left behind, runs at once ---------------------------------------------------------

# The console script, as operators run it (with worker processes, `python -m` would
# make the workers import the CLI module as their main module).
_CLI = [str(Path(sys.executable).with_name("changekind"))]


def _backfill_cli(source: Path, db: str, home: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [
            *_CLI,
            "backfill",
            "--source",
            str(source),
            "--db",
            db,
            "--start",
            "2026-06-03",
            "--end",
            "2026-06-22",
            "--chunk",
            "1D",
            "--warmup",
            "2D",
            "--runner",
            "processes",
            "--workers",
            "2",
            "--wait",
            "0",
        ],
        env=faults.subprocess_env(home),
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )


def test_a_backfill_killed_mid_chunk_leaves_no_process_and_its_run_is_closed(source, tmp_path):
    home = tmp_path / "prefect-home"
    whole = f"sqlite:///{tmp_path / 'whole.db'}"
    crashed = f"sqlite:///{tmp_path / 'crashed.db'}"
    done = _backfill_cli(source, whole, home)
    assert done.wait(timeout=900) == 1, done.stdout.read().decode()  # 1: the constant series
    proc = _backfill_cli(source, crashed, home)
    tree: dict[int, bytes] = {}
    deadline = time.monotonic() + 600
    while time.monotonic() < deadline and proc.poll() is None:
        tree.update(faults.descendants(proc.pid))
        try:
            marks = [r[8] for r in persist.table_snapshot(crashed).get("series_models", [])]
        except Exception:  # not created yet
            marks = []
        if len(marks) >= 4 and any(m and m > "2026-06-06" for m in marks):
            break
        time.sleep(0.2)
    assert proc.poll() is None, "the backfill finished before it could be killed"
    tree.update(faults.descendants(proc.pid))
    servers = [p for p in tree if "uvicorn" in faults.command_line(p)]
    assert len(servers) == 1, servers  # the workers share the run's one Prefect server
    os.kill(proc.pid, signal.SIGKILL)  # the main process only, as `kill -9 PID` does
    proc.wait(timeout=60)
    # Its children (Prefect's server, the two workers, the resource tracker) go too.
    assert len(tree) >= 3, tree
    deadline = time.monotonic() + 30
    while faults.still_running(tree) and time.monotonic() < deadline:
        time.sleep(0.5)
    assert faults.still_running(tree) == []
    assert [r["status"] for r in faults.runs(crashed)] == ["running"]
    again = _backfill_cli(source, crashed, home)
    output = again.communicate(timeout=900)[0].decode()
    assert again.returncode == 1, output
    assert "abandoned" in output  # the summary's note names the closed run
    statuses = sorted(r["status"] for r in faults.runs(crashed))
    assert statuses == ["abandoned", "completed"]
    assert persist.content_snapshot(crashed) == persist.content_snapshot(whole)


def test_a_second_run_on_the_same_database_waits_or_says_why_it_stops(
    prefect_server, source, tmp_path
):
    from changekind.tasks.runlock import RunLock

    db = f"sqlite:///{tmp_path / 'busy.db'}"
    persist.migrate(db)
    with RunLock(db, "holder-run", "backfill"):
        with pytest.raises(RunBusyError, match=r"backfill run holder-run .* is using the database"):
            scan_flow(str(source), db, FINE)
        refused = [r for r in faults.runs(db) if r["run_id"] != "holder-run"]
        assert [r["status"] for r in refused] == ["failed"]
        assert "one fleet run at a time" in refused[0]["message"]
        assert persist.content_snapshot(db)["series_models"] == []  # it wrote nothing
        from typer.testing import CliRunner

        from changekind.flows.cli import app

        cli = CliRunner().invoke(
            app, ["scan", "--source", str(source), "--db", db, "--wait", "0", "--workers", "1"]
        )
        assert cli.exit_code == 4, cli.output  # another run holds the database
        assert "scan not run: backfill run holder-run" in cli.output
    # Released: a run that waits gets its turn.
    lock = RunLock(db, "holder-2", "scan")
    lock.acquire()
    threading.Timer(3.0, lock.release).start()
    t0 = time.monotonic()
    summary = scan_flow(str(source), db, RunOptions(workers=1, wait_seconds=60))
    assert time.monotonic() - t0 >= 2.5 and summary.series_ok == 9


@pytest.mark.postgres
def test_two_runs_at_once_on_postgresql_never_double_the_revision_log(
    prefect_server, source, pg_url_factory
):
    """A second backfill started while the first is writing stops, saying why; the
    revision log holds each new event once (two runs at once used to log them twice)."""
    db = pg_url_factory()
    writing, second_done = threading.Event(), threading.Event()

    def backfill():
        span = ("2026-06-05", "2026-06-21")
        return backfill_flow(str(source), *span, db, chunk="4D", warmup="3D", options=FINE)

    results: dict[str, object] = {}

    def first() -> None:
        def hook(done: int, total: int, what: str) -> None:
            if not writing.is_set():
                writing.set()
                second_done.wait(timeout=120)  # hold the database while the second tries

        token = progress_hook.set(hook)
        try:
            results["first"] = backfill()
        finally:
            progress_hook.reset(token)

    thread = threading.Thread(target=first)
    thread.start()
    assert writing.wait(timeout=300)
    try:
        with pytest.raises(RunBusyError, match=r"backfill run .* is using the database"):
            backfill()
    finally:
        second_done.set()
        thread.join(timeout=600)
    assert results["first"].events_new > 0
    revisions = persist.content_snapshot(db)["event_revisions"]
    news = pd.Series([(r[0], r[1]) for r in revisions if r[2] == "new"])
    assert len(news) == results["first"].events_new and not news.duplicated().any()
    statuses = sorted(r["status"] for r in faults.runs(db))
    assert statuses == ["completed", "failed"]


def test_a_part_damaged_past_its_footer_costs_only_its_own_series(prefect_server, fleet, tmp_path):
    """The footer reads, a data page does not: found only when the batch reads it."""
    import pyarrow.parquet as pq

    parts = tmp_path / "parts"
    parts.mkdir()
    ids = sorted(fleet.series_id.unique())
    for i, sid in enumerate(ids):
        fleet[fleet.series_id == sid].to_parquet(parts / f"part-{i}.parquet", index=False)
    good = tmp_path / "good"
    good.mkdir()
    for i in range(len(ids)):
        if i != 2:
            (good / f"part-{i}.parquet").write_bytes((parts / f"part-{i}.parquet").read_bytes())
    damaged = parts / "part-2.parquet"
    raw = bytearray(damaged.read_bytes())
    page = pq.ParquetFile(damaged).metadata.row_group(0).column(2).data_page_offset
    raw[page : page + 64] = b"\xff" * 64  # the value column's page header
    damaged.write_bytes(bytes(raw))
    pq.read_schema(damaged)  # the footer still reads: open_source cannot tell
    db = f"sqlite:///{tmp_path / 'damaged.db'}"
    reference = f"sqlite:///{tmp_path / 'reference.db'}"
    one_batch = RunOptions(workers=1, wait_seconds=0)  # every series read together
    summary = scan_flow(str(parts), db, one_batch)
    scan_flow(str(good), reference, one_batch)
    assert summary.batches == 1
    others = set(ids) - {ids[2]}
    assert faults.good_state(db, others) == faults.good_state(reference, others)
    assert ids[2] in {sid for sid, stage, _ in summary.failures if stage == "read"}
    assert ids[2] not in {row[0] for row in faults.good_state(db)["models"]}  # no gap analysed
    named = {(Path(p["location"]).name, p["series_id"]) for p in faults.problems(db)}
    assert ("part-2.parquet", None) in named and ("part-2.parquet", ids[2]) in named
