"""The run summary tells new, changed and already stored events apart (flows/pipeline.py
summarize, flows/cli/output.py print_summary).  The reference is the stored state
given as ``before``: each event's mark is worked out from it by hand."""

from __future__ import annotations

from dataclasses import replace

from rich.console import Console

from changekind.flows.artifacts import run_markdown
from changekind.flows.cli.output import print_summary, summary_record
from changekind.flows.pipeline import nothing_to_do, summarize
from changekind.tasks.batch import SeriesOutcome
from tests.tasks.persist.tables import make_event


def test_strongest_events_are_marked_new_changed_or_seen():
    events = (
        make_event("fan-1", "2030-03-01T10:00:00Z", "LS", t_stat=30.0),  # stored as is
        make_event("fan-1", "2030-03-02T10:00:00Z", "AO", t_stat=-20.0),  # was provisional
        make_event("fan-2", "2030-03-03T10:00:00Z", "TC", t_stat=10.0),  # not stored
    )
    outcome = SeriesOutcome("fan-1", "warm", events=events[:2])
    other = SeriesOutcome("fan-2", "warm", events=events[2:])
    before = {
        ("fan-1", "2030-03-01T10:00:00Z"): ("LS", "confirmed"),
        ("fan-1", "2030-03-02T10:00:00Z"): ("AO", "provisional"),
    }
    summary = summarize("run-9", "scan", [outcome, other], before, 1, 1.0, {})
    assert (summary.events_new, summary.events_changed) == (1, 1)
    assert [e.event_type for e in summary.top_events] == ["LS", "AO", "TC"]  # by |t|
    assert summary.top_changes == ("seen", "changed", "new")
    assert [r["change"] for r in summary_record(summary)["top_events"]] == [
        "seen",
        "changed",
        "new",
    ]
    console = Console(width=80, record=True)
    print_summary(console, summary)
    lines = console.export_text().splitlines()
    assert max(len(line) for line in lines) <= 80
    marks = {
        kind: next(line for line in lines if f"  {kind} " in line).split()[0]
        for kind in ("LS", "AO", "TC")
    }
    assert marks == {"LS": "seen", "AO": "changed", "TC": "new"}


def test_series_with_nothing_to_do_count_as_the_run_record_counts_them():
    # A backfill over a span already done: 28 series were not planned at all
    # (watermark past the span's end), 2 were read and had no new point.  The
    # run record counts all 30 (flows/scan.py: series_total from the summary).
    quiet = [SeriesOutcome(f"fan-{i}", "unchanged", watermark="2030-03-05") for i in (1, 2)]
    summary = summarize("run-3", "backfill", quiet, {}, 1, 1.0, {}, up_to_date=28)
    assert (summary.series_total, summary.series_ok, summary.up_to_date) == (30, 30, 30)
    assert summary.nothing_to_do
    assert summary_record(summary)["up_to_date"] == 30
    markdown = run_markdown(summary)
    assert "| total | 30 |" in markdown and "| up to date (nothing to analyse) | 30 |" in markdown
    assert nothing_to_do("backfill", 30, "2030-03-05") == (
        "nothing to do: span already done (all 30 series were analysed through 2030-03-05 "
        "before this run)"
    )
    console = Console(width=100, record=True)
    print_summary(console, summary)
    assert "30 series (0 cold, 0 warm, 0 failed, 0 deferred, 30 up to date)" in (
        console.export_text()
    )
    # One series with new points: the run did something.
    busy = summarize("run-4", "scan", [*quiet, SeriesOutcome("fan-3", "warm")], {}, 1, 1.0, {})
    assert (busy.series_total, busy.up_to_date, busy.nothing_to_do) == (3, 2, False)


def test_the_artifact_marks_new_changed_and_seen_events_and_holds_the_notes():
    events = (
        make_event("fan-1", "2030-03-01T10:00:00Z", "LS", t_stat=30.0),
        make_event("fan-2", "2030-03-03T10:00:00Z", "TC", t_stat=10.0),
    )
    before = {("fan-1", "2030-03-01T10:00:00Z"): ("LS", "provisional")}
    summary = summarize(
        "run-9", "scan", [SeriesOutcome("fan-1", "warm", events=events)], before, 1, 1.0, {}
    )
    summary = replace(summary, notes=("refits: 1 (age 1)",))
    rows = [line for line in run_markdown(summary).splitlines() if "| fan-" in line]
    assert [row.split("|")[1].strip() for row in rows] == ["changed", "new"]
    assert "- refits: 1 (age 1)" in run_markdown(summary)
