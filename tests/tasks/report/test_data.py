"""Gathering a report from a real database: verdicts, dismissed events, neighbours, units.

The database is a SQLite file written by the persistence layer with the
invented series' injected events (tests/tasks/report/pair.py) and a verdict
recorded by ``persist.set_triage``; the source is the series as a CSV file.

References
----------
- The injected truth: which events exist, where, and the compensating shift
  nine hours before the up-shift.
- The database itself, read back through ``persist.read_events``: the
  report's verdict column must show the stored triage columns.
- HTML: the standard library's ``html.parser`` reads the page
  (``check_page`` of tests/tasks/test_report.py).
"""

from __future__ import annotations

import pandas as pd
import pytest

from changekind.tasks import persist
from changekind.tasks.fetch import open_source
from changekind.tasks.report.data import (
    build_views,
    stored_neighbours,
    unit_of,
    write_stored_report,
)
from changekind.tasks.report.views import event_from_record, verdict_from_record
from tests.tasks.report.pair import (
    SERIES,
    STAMPS,
    T_DOWN,
    T_GLITCH,
    T_UP,
    pair_events,
    pair_model,
    store_pair,
)
from tests.tasks.test_report import check_page


@pytest.fixture
def stored(tmp_path, sqlite_url):
    """The pair's events and model in a database, the glitch dismissed; the source as CSV."""
    source = store_pair(sqlite_url, tmp_path)
    glitch = STAMPS[T_GLITCH].isoformat()
    return {"db": sqlite_url, "spec": open_source(str(source)), "glitch": glitch}


def test_verdicts_come_from_the_triage_columns(stored):
    frame = persist.read_events(stored["db"])
    verdicts = {
        row["event_time"]: verdict_from_record(row) for row in frame.to_dict(orient="records")
    }
    glitch = verdicts[stored["glitch"]]
    assert (glitch.state, glitch.reason, glitch.dismissed) == (
        "dismissed",
        "metrics agent restart",
        True,
    )
    assert pd.Timestamp(glitch.at) <= pd.Timestamp.now(tz="UTC")  # set_triage's time: now
    assert verdicts[STAMPS[T_UP].isoformat()] is None


def test_the_report_shows_verdicts_and_lists_the_dismissed_glitch_last(stored, tmp_path):
    # The glitch has the largest |effect %| and |t|: without its verdict it would be first.
    written = write_stored_report(stored["db"], stored["spec"], tmp_path / "r")
    page = check_page(written.index)
    html = written.index.read_text(encoding="utf-8")
    list_table = html[html.index('id="list"') : html.index('id="events"')]
    order = [list_table.index(STAMPS[t].isoformat()) for t in (T_UP, T_DOWN, T_GLITCH)]
    assert order == sorted(order)  # |-3.5 %| ties |3.5 %|: larger |t| (9.3) first
    assert "dismissed: metrics agent restart" in list_table
    assert 'class="dismissed"' in list_table
    assert written.n_events == 3 and written.drawn == 3 and written.n_hidden == 0
    assert len(page.images) == 3
    text = " ".join(page.text)
    assert "1 dismissed event listed last." in text and "No verdict yet." in text


def test_hide_dismissed_leaves_the_glitch_out(stored, tmp_path):
    written = write_stored_report(
        stored["db"], stored["spec"], tmp_path / "r", hide_dismissed=True, sort="t"
    )
    page = check_page(written.index)
    text = " ".join(page.text)
    assert written.n_events == 2 and written.n_hidden == 1 and len(page.images) == 2
    assert stored["glitch"] not in text and "left out (1)" in text
    assert "largest |t| first" in text


def test_neighbours_come_from_the_database_whatever_the_selection(stored):
    # Select the up-shift only (since its time): its picture must still show the
    # down-shift nine hours earlier, which is not in the selection.
    since = STAMPS[T_UP].isoformat()
    frame = persist.read_events(stored["db"], since=since)
    selected = [event_from_record(r) for r in frame.to_dict(orient="records")]
    assert [e.event_time for e in selected] == [since, stored["glitch"]]
    neighbours = stored_neighbours(stored["db"], [SERIES])
    assert [e.event_time for e in neighbours[SERIES]] == [
        STAMPS[t].isoformat() for t in (T_DOWN, T_UP, T_GLITCH)
    ]
    views = build_views(stored["spec"], selected, {SERIES: pair_model()}, neighbours=neighbours)
    up = views[0]
    shown = pd.to_datetime(pd.Series(up.timestamps), utc=True)
    assert shown.iloc[0] == STAMPS[T_DOWN - 24] and shown.iloc[-1] == STAMPS[T_UP + 96]
    assert STAMPS[T_DOWN] in set(shown)


def test_units_by_exact_id_then_by_the_first_matching_pattern(stored, tmp_path):
    units = {"*/queue-*": "messages", SERIES: "msgs", "broker-*": "items"}
    assert unit_of(SERIES, units) == "msgs"
    assert unit_of("broker-9/queue-depth", units) == "messages"
    assert unit_of("broker-9/lag", units) == "items"
    assert unit_of("other", units) is None and unit_of(SERIES, None) is None
    views = build_views(
        stored["spec"],
        pair_events()[:1],
        {SERIES: pair_model()},
        units={"broker-*": "messages"},
    )
    assert views[0].unit == "messages"


def test_an_unknown_sort_is_refused_before_anything_is_read(tmp_path):
    from changekind.tasks.errors import ConfigError

    with pytest.raises(ConfigError, match="sort must be one of"):
        write_stored_report(
            f"sqlite:///{tmp_path / 'none.db'}", None, tmp_path / "r", sort="biggest"
        )
    assert not (tmp_path / "r").exists() and not (tmp_path / "none.db").exists()
