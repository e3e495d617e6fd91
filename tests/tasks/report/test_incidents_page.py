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

import pytest
from PIL import Image

from changekind.tasks.fetch import open_source
from changekind.tasks.report.data import write_stored_report
from tests.flows.incident_fleet import store_incident_fleet
from tests.tasks.test_report import check_page


@pytest.fixture
def stored(tmp_path, sqlite_url):
    source, truth = store_incident_fleet(sqlite_url, tmp_path / "src")
    return {"db": sqlite_url, "spec": open_source(str(source)), "truth": truth}


def test_incidents_get_their_own_page_linked_from_the_report(stored, tmp_path):
    written = write_stored_report(stored["db"], stored["spec"], tmp_path / "r")
    assert written.n_incidents == 2
    page_path = written.incidents_page
    assert page_path is not None and page_path.name == "incidents.html"
    index = written.index.read_text(encoding="utf-8")
    assert 'href="incidents.html"' in index
    # Each event is shown with its series' attributes (the source's latest values).
    section = index[index.index("vault-r2-h2/commit-ms at") :]
    assert "Attributes of the series: firmware = 5.2, rack = r2" in section[:3000]
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
