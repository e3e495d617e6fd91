"""The incidents page of the report, from a real database and source.

The source is the invented fleet of tests/flows/incident_fleet.py (Parquet);
the database holds, written by the persistence layer, the injected events
themselves (the rollout's level shifts at each host's upgrade hour, the rack
spike), the series' models and their labels; the incidents come from
``refresh_incidents``.  References: the injected truth (members, shared
attribute) and the page read back with the standard library's HTML parser
(``check_page`` of tests/tasks/test_report.py); the picture's size follows
from the panel grid (8 members: 4 columns x 2 rows of 3.1 x 1.9 inches, plus
half an inch of title, at 100 dpi).
"""

from __future__ import annotations

import pandas as pd
import pytest
from PIL import Image

from changekind.tasks import incident_store as store
from changekind.tasks import persist
from changekind.tasks.fetch import open_source
from changekind.tasks.report.data import write_stored_report
from changekind.tasks.types import Event, FittedModel
from tests.flows.incident_fleet import SPIKE_AT, make_incident_fleet, write_source
from tests.tasks.test_report import check_page


def _event(sid: str, at: pd.Timestamp, kind: str, effect: float) -> Event:
    return Event(
        series_id=sid,
        position=-1,
        event_time=at.isoformat(),
        event_type=kind,
        effect=effect,
        effect_pct=100 * effect / 50,
        t_stat=effect / 1.15,
        se=1.15,
        type_weights=((kind, 1.0),),
        status="confirmed",
        decay=None,
        half_life=None,
        level=50.0,
        model="ARIMA(1,0,0)",
    )


@pytest.fixture
def stored(tmp_path, sqlite_url):
    data, truth = make_incident_fleet()
    source = write_source(data, tmp_path / "src")
    events = []
    for sid in sorted(truth["rollout"]):
        rows = data[data["series_id"] == sid]
        at = rows.loc[rows["firmware"].eq("5.2").idxmax(), "timestamp"]
        events.append(_event(sid, at, "LS", 9.2))
    events += [_event(sid, SPIKE_AT, "AO", 11.5) for sid in sorted(truth["spike"])]
    ids = sorted(data["series_id"].unique())
    persist.init_db(sqlite_url).dispose()
    persist.write_events(sqlite_url, "run-1", events)
    models = [
        FittedModel(
            sid,
            (1, 0, 0),
            (0, 0, 0, 0),
            "c",
            (("sigma2", 1.3),),
            1.3,
            288,
            "mle",
            True,
            step_seconds=3600.0,
        )
        for sid in ids
    ]
    end = data["timestamp"].max().isoformat()
    persist.save_models(sqlite_url, models, watermarks=dict.fromkeys(ids, end))
    last = data.sort_values("timestamp").groupby("series_id").tail(1)
    store.write_labels(sqlite_url, "run-1", last[["series_id", "rack", "firmware"]])
    store.refresh_incidents(sqlite_url, "run-1")
    return {"db": sqlite_url, "spec": open_source(str(source)), "truth": truth}


def test_incidents_get_their_own_page_linked_from_the_report(stored, tmp_path):
    written = write_stored_report(stored["db"], stored["spec"], tmp_path / "r")
    assert written.n_incidents == 2
    page_path = written.incidents_page
    assert page_path is not None and page_path.name == "incidents.html"
    assert 'href="incidents.html"' in written.index.read_text(encoding="utf-8")
    page = check_page(page_path)
    html = page_path.read_text(encoding="utf-8")
    # Newest first: the rack spike (day 10) before the rollout (day 8).
    assert html.index("rack = r3") < html.index("firmware = 5.2")
    text = " ".join(page.text)
    assert "8 of 24 series" in text and "6 of 24 series" in text
    for sid in stored["truth"]["rollout"] | stored["truth"]["spike"]:
        assert sid in html
    assert len(page.images) == 2
    rollout_png = tmp_path / "r" / "incident-0002.png"
    with Image.open(rollout_png) as img:
        assert img.size == (round(4 * 3.1 * 100), round((2 * 1.9 + 0.5) * 100))
    with Image.open(tmp_path / "r" / "incident-0001.png") as img:  # 6 members: 4 + 2 panels
        assert img.size == (round(4 * 3.1 * 100), round((2 * 1.9 + 0.5) * 100))


def test_a_run_report_shows_only_incidents_with_its_events(stored, tmp_path):
    written = write_stored_report(
        stored["db"], stored["spec"], tmp_path / "r", series=["vault-r1-h1/commit-ms"]
    )
    assert written.n_incidents == 0 and written.incidents_page is None
    assert "incidents.html" not in written.index.read_text(encoding="utf-8")
