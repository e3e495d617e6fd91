"""The run summary tells new, changed and already stored events apart (flows/pipeline.py
summarize, flows/cli/output.py print_summary).  The reference is the stored state
given as ``before``: each event's mark is worked out from it by hand."""

from __future__ import annotations

from rich.console import Console

from changekind.flows.cli.output import print_summary, summary_record
from changekind.flows.pipeline import summarize
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
