"""The fleet flows end to end: scan, backfill, refit, idempotency, crash and resume."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from dataclasses import replace
from pathlib import Path

import pandas as pd
import pytest

from changekind.flows.pipeline import plan_works
from changekind.flows.scan import backfill_flow, refit_flow, scan_flow, split_span
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from changekind.tasks.batch import AnalysisOptions, plan_batches
from changekind.tasks.errors import ConfigError
from changekind.tasks.types import Event
from tests.flows.faults import subprocess_env
from tests.flows.fleet import found_in, make_fleet, write_source

OPTIONS = RunOptions(workers=2)


def _events(db: str) -> pd.DataFrame:
    return persist.read_events(db).sort_values(["series_id", "event_time"]).reset_index(drop=True)


# -- pure planning -------------------------------------------------------------------


def test_split_span_into_chunks():
    chunks, warm = split_span("2026-06-01", "2026-06-20", "7D", "2D")
    assert chunks == [
        ("2026-06-01T00:00:00", "2026-06-08T00:00:00"),
        ("2026-06-08T00:00:00", "2026-06-15T00:00:00"),
        ("2026-06-15T00:00:00", "2026-06-20T00:00:00"),
    ]
    assert warm == "2026-05-30T00:00:00"
    assert split_span("0", "250", "100", "50") == ([(0, 100), (100, 200), (200, 250)], -50)
    with pytest.raises(ConfigError, match="start < end"):
        split_span("2026-06-10", "2026-06-01", "7D", "1D")
    with pytest.raises(ConfigError, match="not understood"):
        split_span("2026-06-01", "2026-06-10", "a week", "1D")


def test_plan_batches_sizes_by_cost():
    from changekind.tasks.batch import SeriesWork
    from changekind.tasks.types import FittedModel

    model = FittedModel(
        "x", (1, 0, 0), (0, 0, 0, 0), "c", (("sigma2", 1.0),), 1.0, 100, "mle", True
    )
    cold = [SeriesWork(f"c{i}") for i in range(45)]
    warm = [SeriesWork(f"w{i}", model, "2026-01-01") for i in range(1200)]

    def sizes(works, **kw):
        return [len(b) for b in plan_batches(works, **kw)]

    # 10 s / 0.2 s = 50 cold; 10 s / 8 ms = 1,250 warm: one batch each on one worker.
    assert sizes(cold + warm) == [45, 1200]
    # Two workers: each group in an even number of equal batches, none left over.
    assert sizes(cold + warm, workers=2) == [23, 22, 600, 600]
    # 4 s: 20 cold (3 batches, rounded up to 4 for two workers), 500 warm (3 -> 4).
    assert sizes(cold + warm, target_seconds=4.0, workers=2) == [12, 12, 12, 9] + [300] * 4
    assert sizes(warm, target_seconds=1.0) == [120] * 10  # 125 a batch -> 10 batches
    # The cap: at most 2,500 series a batch however long the target.
    many = warm * 5
    assert sizes(many, target_seconds=100.0, workers=2) == [1500] * 4
    assert sizes(cold[:3], workers=4) == [1, 1, 1]  # never an empty batch


def test_plan_works_warm_after_watermark_and_skip_when_done():
    from changekind.tasks.types import FittedModel

    model = FittedModel(
        "a",
        (1, 0, 0),
        (0, 0, 0, 0),
        "c",
        (("sigma2", 1.0),),
        1.0,
        100,
        "mle",
        True,
        step_seconds=3600,
    )
    works = plan_works(
        ["a", "b"],
        models={"a": model},
        watermarks={"a": "2026-06-10T00:00:00"},
        known={},
        options=AnalysisOptions(context_points=25),
        time_kind="datetime",
    )
    assert [w.series_id for w in works] == ["a", "b"]
    # White noise needs no memory: the 24 points up to the watermark are read (MIN_CONTEXT).
    assert works[0].start == pd.Timestamp("2026-06-09T01:00:00") and not works[0].refit
    assert works[1].model is None and works[1].refit

    def plan_a(model_a, *, known=None, options=None, **kw):
        """plan_works for series "a" alone, its watermark at 2026-06-10T00:00."""
        return plan_works(
            ["a"],
            models={"a": model_a},
            watermarks={"a": "2026-06-10T00:00:00"},
            known=known or {},
            options=options or AnalysisOptions(),
            time_kind="datetime",
            **kw,
        )

    # An MA(1) with theta -0.9: pi_k = 0.9^k stays above 1e-10 past 25 lags, so the cap holds.
    ma = replace(model, order=(0, 0, 1), params=(("ma.L1", -0.9), ("sigma2", 1.0)))
    (long,) = plan_a(ma, options=AnalysisOptions(context_points=25))
    assert long.start == pd.Timestamp("2026-06-09T00:00:00")
    # A provisional event older than the watermark is read with its own memory before it.
    seen = Event(
        series_id="a",
        position=0,
        event_time="2026-06-09T20:00:00",
        event_type="TC",
        effect=3.0,
        effect_pct=10.0,
        t_stat=4.2,
        se=0.7,
        type_weights=(("TC", 1.0),),
        status="provisional",
        decay=0.5,
        half_life=3600.0,
        level=30.0,
        model="",
    )
    (back,) = plan_a(model, known={"a": (seen,)}, options=AnalysisOptions(context_points=25))
    assert back.start == pd.Timestamp("2026-06-08T21:00:00")
    done = plan_a(model, end="2026-06-10T00:30:00")
    assert [w.series_id for w in done] == ["a"]  # the 00:00 point is tested; 00:30 may hold more
    past = plan_a(model, end="2026-06-10T00:00:00")
    assert past == []


# -- flows -----------------------------------------------------------------------------


@pytest.fixture
def fleet(tmp_path: Path):
    data, truth = make_fleet(9)
    return data, truth, tmp_path / "source"


def _scan_twice(db: str, data, source: Path) -> None:
    write_source(data, source, until="2026-06-19")
    first = scan_flow(str(source), db, OPTIONS)
    assert first.cold == first.series_total - first.series_failed - first.deferred
    write_source(data, source)  # two more days arrive
    second = scan_flow(str(source), db, OPTIONS)
    assert second.warm >= 1
    snap = persist.content_snapshot(db)
    third = scan_flow(str(source), db, OPTIONS)  # nothing new: nothing changes
    assert third.cold == third.warm == 0
    assert third.events_new == third.events_changed == third.events_retracted == 0
    assert persist.content_snapshot(db) == snap


def test_scan_finds_events_and_a_repeated_scan_changes_nothing(prefect_server, fleet, tmp_path):
    data, truth, source = fleet
    db = f"sqlite:///{tmp_path / 'scan.db'}"
    _scan_twice(db, data, source)
    events = _events(db)
    assert found_in(events, truth) >= len(truth) - 1
    # The constant series landed in series_failures, not in a failed run.
    with persist.connect(db).connect() as conn:
        failures = conn.execute(persist.series_failures.select()).fetchall()
        runs = conn.execute(persist.scan_runs.select()).fetchall()
    assert {f.series_id for f in failures} == {"shelf-x/stuck"}
    assert "constant" in failures[0].message
    assert all(r.status == "completed" for r in runs) and len(runs) == 3


@pytest.mark.postgres
def test_repeated_scan_on_postgresql(prefect_server, fleet, pg_url):
    data, truth, source = fleet
    _scan_twice(pg_url, data, source)
    assert found_in(_events(pg_url), truth) >= len(truth) - 1


@pytest.mark.multirun
def test_overlapping_backfills_do_not_duplicate_or_lose_events(prefect_server, fleet, tmp_path):
    data, truth, source = fleet
    write_source(data, source)
    db = f"sqlite:///{tmp_path / 'overlap.db'}"

    def both() -> None:
        backfill_flow(
            str(source), "2026-06-05", "2026-06-15", db, chunk="5D", warmup="4D", options=OPTIONS
        )
        # Overlaps the first by five days.
        backfill_flow(
            str(source), "2026-06-10", "2026-06-22", db, chunk="5D", warmup="4D", options=OPTIONS
        )

    both()
    first = persist.content_snapshot(db)
    events = _events(db)
    assert not events.duplicated(["series_id", "event_time"]).any()
    assert (pd.to_datetime(events.event_time) >= pd.Timestamp("2026-06-05")).all()
    inside = truth[truth.event_time >= pd.Timestamp("2026-06-05")]
    assert found_in(events, inside) >= len(inside) - 1
    both()  # the same two overlapping backfills again: nothing changes
    assert persist.content_snapshot(db) == first
    whole = backfill_flow(
        str(source), "2026-06-05", "2026-06-22", db, chunk="5D", warmup="4D", options=OPTIONS
    )
    assert whole.events_new == whole.events_changed == whole.events_retracted == 0
    assert persist.content_snapshot(db) == first


def test_refit_reestimates_and_keeps_events(prefect_server, fleet, tmp_path):
    data, truth, source = fleet
    write_source(data, source)
    db = f"sqlite:///{tmp_path / 'refit.db'}"
    scan_flow(str(source), db, OPTIONS)
    before = persist.load_models(db)
    summary = refit_flow(str(source), db, OPTIONS, series=["shelf-0/disk-0", "shelf-0/disk-1"])
    assert summary.cold == 2 and summary.series_total == 2
    after = persist.load_models(db)
    assert after["shelf-0/disk-0"].order == before["shelf-0/disk-0"].order
    assert after.keys() == before.keys()
    assert found_in(_events(db), truth) >= len(truth) - 1


_BACKFILL = textwrap.dedent(
    """
    import sys
    from changekind.flows.scan import backfill_flow
    from changekind.flows.settings import RunOptions
    backfill_flow(sys.argv[1], "2026-06-03", "2026-06-22", sys.argv[2], chunk="1D",
                  warmup="2D", options=RunOptions(workers=1, batch_seconds=0.5))
    """
)


def _backfill_process(source: Path, db: str, home: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-c", _BACKFILL, str(source), db],
        env=subprocess_env(home),
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )


@pytest.mark.integration
def test_backfill_killed_midway_then_rerun_matches_an_uninterrupted_run(fleet, tmp_path):
    data, _, source = fleet
    write_source(data, source)
    home = tmp_path / "prefect-home"
    whole = f"sqlite:///{tmp_path / 'whole.db'}"
    crashed = f"sqlite:///{tmp_path / 'crashed.db'}"
    assert _backfill_process(source, whole, home).wait(timeout=900) == 0
    proc = _backfill_process(source, crashed, home)
    # Kill it (SIGKILL: no clean-up of any kind) once a few batches are written.
    deadline = time.monotonic() + 600
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            with persist.connect(crashed).connect() as conn:
                written = conn.execute(persist.series_models.select()).fetchall()
        except Exception:  # not created yet
            written = []
        if len(written) >= 4 and any(r.watermark and r.watermark > "2026-06-06" for r in written):
            break
        time.sleep(0.2)
    assert proc.poll() is None, "the backfill finished before it could be killed"
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(timeout=60)
    with persist.connect(crashed).connect() as conn:
        status = [r.status for r in conn.execute(persist.scan_runs.select())]
    assert status == ["running"]  # it really died mid-way
    assert persist.content_snapshot(crashed) != persist.content_snapshot(whole)
    assert _backfill_process(source, crashed, home).wait(timeout=900) == 0
    assert persist.content_snapshot(crashed) == persist.content_snapshot(whole)


def test_merged_duplicate_timestamps_are_counted_in_the_run_summary(prefect_server, tmp_path):
    """Duplicates are merged by their median (regularize); the run now says how many."""
    data, _ = make_fleet(3)
    twice = data[(data.series_id == "shelf-0/disk-1")].iloc[[5, 6, 6]]
    source = write_source(pd.concat([data, twice], ignore_index=True), tmp_path / "source")
    summary = scan_flow(str(source), f"sqlite:///{tmp_path / 'dups.db'}", OPTIONS)
    (note,) = [n for n in summary.notes if "duplicate" in n]
    assert note.startswith("3 duplicate timestamp(s) in 1 series") and "shelf-0/disk-1" in note
    runs = persist.table_snapshot(f"sqlite:///{tmp_path / 'dups.db'}")["scan_runs"]
    assert "3 duplicate timestamp(s)" in runs[0][-1]  # the run record says so too


def test_a_flow_refused_on_its_configuration_records_the_run(prefect_server, tmp_path):
    # A deployment's run does not pass the CLI's checks: a source that is gone
    # is found inside the flow, and its run still gets a record saying why.
    from changekind.tasks.errors import SourceError

    db = f"sqlite:///{tmp_path / 'refused.db'}"
    gone = tmp_path / "gone"
    with pytest.raises(SourceError) as raised:
        scan_flow(str(gone), db, OPTIONS)
    runs = persist.table_snapshot(db)["scan_runs"]
    assert len(runs) == 1
    run_id, kind, status, message = runs[0][0], runs[0][1], runs[0][4], runs[0][-1]
    assert (kind, status) == ("scan", "failed")
    assert message == f"not run: {raised.value}" and str(gone) in message
    assert len(run_id) == 36  # the flow run's id (a UUID)
