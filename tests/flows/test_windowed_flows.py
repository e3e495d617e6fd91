"""Windowed mode in the fleet flows: scan and backfill on window summaries.

The invented second-resolution series of tests/tasks/test_window.py (a level
shift, a fading jump and a doubling of the noise at known times) goes through
``scan_flow`` and ``backfill_flow`` with ``window="1min"``: the events land in
series_events with their window bounds, the variance change as ``VC``; the
cached model is the window model and the next scan tests only new windows.
"""

from __future__ import annotations

import re

import pandas as pd
import pytest
from typer.testing import CliRunner

from changekind.flows.cli import app
from changekind.flows.scan import backfill_flow, scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from tests.tasks.test_report import check_page, png_size
from tests.tasks.test_window import LS_AT, SID, START, TC_AT, VC_AT, make_second_series

WINDOWED = RunOptions(workers=2, window="1min")
MINUTE = pd.Timedelta("1min")


@pytest.fixture(scope="module")
def source(tmp_path_factory):
    folder = tmp_path_factory.mktemp("windowed-source")
    make_second_series(2026).to_parquet(folder / "part-0.parquet", index=False)
    return str(folder)


def _events(db: str) -> pd.DataFrame:
    return persist.read_events(db).sort_values("event_time").reset_index(drop=True)


def _at(events: pd.DataFrame, kind: str, when: pd.Timestamp) -> pd.DataFrame:
    """Events of ``kind`` whose window holds ``when`` (or the next window: a half-window shift)."""
    starts = pd.to_datetime(events["window_start"])
    home = when.floor(MINUTE)
    return events[(events["event_type"] == kind) & starts.between(home, home + MINUTE)]


def test_windowed_scans_cold_then_warm_find_ls_tc_and_vc(prefect_server, source, tmp_path):
    db = f"sqlite:///{tmp_path / 'windowed.db'}"
    first = scan_flow(source, db, WINDOWED, until=str(START + pd.Timedelta(hours=36)))
    assert (first.cold, first.warm) == (1, 0)
    model = persist.load_models(db)[SID]
    assert model.window == "min" and model.spread is not None
    assert model.step_seconds == 60.0
    # 'until' closes the last window (35:59-36:00), so it is analysed too.
    assert pd.Timestamp(model.fitted_through) == START + pd.Timedelta(hours=36) - MINUTE
    assert len(_at(_events(db), "LS", LS_AT)) == 1

    second = scan_flow(source, db, WINDOWED, until=str(START + pd.Timedelta(hours=54)))
    assert (second.cold, second.warm) == (0, 1)  # new windows only, against the cached model
    tc = _at(_events(db), "TC", TC_AT)
    assert len(tc) == 1
    assert tc["effect"].iloc[0] == pytest.approx(6.0, rel=0.2)  # injected 6 ms (test_window)

    scan_flow(source, db, WINDOWED)
    events = _events(db)
    vc = _at(events, "VC", VC_AT)
    assert len(vc) == 1, events[["event_time", "event_type", "t_stat"]]
    row = vc.iloc[0]
    assert row["effect_pct"] == pytest.approx(100.0, abs=25.0)  # the noise sd doubles
    assert pd.Timestamp(row["window_end"]) - pd.Timestamp(row["window_start"]) == MINUTE
    assert events["window_start"].notna().all()
    assert not events.duplicated(["series_id", "event_time"]).any()

    snap = persist.content_snapshot(db)
    again = scan_flow(source, db, WINDOWED)  # nothing new: nothing changes
    assert again.cold == again.warm == 0
    assert persist.content_snapshot(db) == snap

    # Another width cannot reuse the 1-minute model: the series is fitted again.
    other = scan_flow(source, db, RunOptions(workers=2, window="2min"))
    assert other.cold == 1
    assert persist.load_models(db)[SID].window == "2min"


def test_windowed_backfill_reports_the_span_and_reruns_identically(
    prefect_server, source, tmp_path
):
    db = f"sqlite:///{tmp_path / 'backfill.db'}"
    start, end = START + pd.Timedelta(days=1), START + pd.Timedelta(days=3)

    report = tmp_path / "report"

    def run(report_dir=None):
        return backfill_flow(
            source,
            start.isoformat(),
            end.isoformat(),
            db,
            chunk="12h",
            warmup="1D",
            options=WINDOWED,
            report_dir=report_dir,
        )

    run(str(report))
    events = _events(db)
    # The flow's report task drew every event of the run, the VC on the window spreads.
    page = check_page(report / "index.html")
    pictures = sorted(p.name for p in report.glob("event-*.png"))
    assert len(pictures) == len(events) == len(page.images)
    assert any("variance change (VC)" in text for text in page.text)
    for name in pictures:
        assert min(png_size(report / name)) >= 250
    assert (pd.to_datetime(events["event_time"]) >= start).all()
    for kind, when in (("LS", LS_AT), ("TC", TC_AT), ("VC", VC_AT)):
        assert len(_at(events, kind, when)) == 1, (kind, events[["event_time", "event_type"]])
    snap = persist.content_snapshot(db)
    rerun = run()
    assert rerun.events_new == rerun.events_changed == rerun.events_retracted == 0
    assert persist.content_snapshot(db) == snap


@pytest.mark.parametrize(
    ("window", "message"),
    [
        ("fortnightly", r"window 'fortnightly' is not a duration"),
        ("15", r"window '15' has no unit"),
        ("1MS", r"calendar offset \(MS\) without a fixed length"),
    ],
)
def test_scan_refuses_a_bad_window_with_one_line(source, tmp_path, window, message):
    result = CliRunner().invoke(
        app,
        ["scan", "--source", source, "--db", f"sqlite:///{tmp_path / 'x.db'}", "--window", window],
    )
    assert result.exit_code == 2
    assert "Traceback" not in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert re.search(message, result.output), result.output
