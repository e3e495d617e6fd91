"""The time rule end to end: naive, aware and numeric timestamps through detect, scan
and the warm path.

One invented series (hourly, AR(1) with phi 0.5 around 40, seeded) carries a
level shift of +8 at point 300 and a spike of +12 at point 390.  It is written
three ways: naive ISO 8601 text, the same instants as text with a +05:30 offset
(an aware source), and the point numbers 0, 1, ... (a numeric axis).  Under the
rule of :mod:`changekind.tasks.timeaxis` (a naive time is UTC), the naive and
the aware source name the same instants; the numeric one the same positions.

Reference: the injected truth (positions 300 and 390) and the standard
library's ``datetime`` for the instants (2030-03-01T00:00Z plus whole hours).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from changekind.flows.scan import scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from changekind.tasks.detect import analyse_series
from changekind.tasks.simulate import arma_filter

SID = "kiln-7/draught"
N, COLD_UNTIL, SHIFT_AT, SPIKE_AT = 420, 360, 300, 390
START = datetime(2030, 3, 1, tzinfo=UTC)
OFFSET = timedelta(hours=5, minutes=30)


def _values() -> np.ndarray:
    y = arma_filter(np.random.default_rng(11).normal(size=N), ar=(0.5,)) + 40.0
    y[SHIFT_AT:] += 8.0
    y[SPIKE_AT] += 12.0
    return y


def _times(kind: str) -> list:
    instants = [START + timedelta(hours=i) for i in range(N)]
    if kind == "naive":
        return [t.replace(tzinfo=None).isoformat() for t in instants]
    if kind == "aware":  # the same instants, written at +05:30
        return [t.astimezone(timezone(OFFSET)).isoformat() for t in instants]
    return list(range(N))


def _instant(i: int) -> datetime:
    return START + timedelta(hours=i)


def test_the_aware_text_is_the_same_instants():
    # Guard on the fixture itself: the +05:30 text names the naive text's UTC instants.
    naive, aware = _times("naive"), _times("aware")
    assert aware[0] == "2030-03-01T05:30:00+05:30" and naive[0] == "2030-03-01T00:00:00"
    assert datetime.fromisoformat(aware[7]) == datetime.fromisoformat(naive[7]).replace(tzinfo=UTC)


def test_detect_places_events_at_the_same_instants_whatever_the_form():
    y = _values()
    found = {}
    for kind in ("naive", "aware", "numeric"):
        result = analyse_series(SID, _times(kind), y)
        found[kind] = {(e.event_type, e.position) for e in result.events}
        if kind == "naive":
            naive_labels = {e.position: e.event_time for e in result.events}
        if kind == "aware":  # labels keep the input's own text, offset included
            for e in result.events:
                assert e.event_time == _times("aware")[e.position]
                assert datetime.fromisoformat(e.event_time) == datetime.fromisoformat(
                    naive_labels[e.position]
                ).replace(tzinfo=UTC)
        if kind == "numeric":
            assert all(e.event_time == str(e.position) for e in result.events)
    # Injected truth: the shift and the spike, wherever the time came from.
    assert {("LS", SHIFT_AT), ("AO", SPIKE_AT)} <= found["naive"]
    assert found["naive"] == found["aware"] == found["numeric"]


def _source(tmp_path: Path, kind: str, until: int) -> Path:
    path = tmp_path / f"{kind}.csv"
    frame = pd.DataFrame({"series_id": SID, "timestamp": _times(kind), "value": _values()})
    frame.iloc[:until].to_csv(path, index=False)
    return path


@pytest.mark.parametrize("kind", ["naive", "aware", "numeric"])
def test_scan_and_the_warm_path_store_the_same_instants(prefect_server, tmp_path, kind):
    db = f"sqlite:///{tmp_path / 'events.db'}"
    options = RunOptions(workers=1)
    path = _source(tmp_path, kind, COLD_UNTIL)
    cold = scan_flow(str(path), db, options)
    assert cold.cold == 1 and cold.series_failed == 0
    path = _source(tmp_path, kind, N)  # 60 more hours arrive, the spike among them
    warm = scan_flow(str(path), db, options)
    assert warm.warm == 1 and warm.cold == 0  # the spike is found by the warm screen
    events = persist.read_events(db)
    got = {(row.event_type, row.event_time) for row in events.itertuples()}
    times = _times(kind)
    assert {("LS", str(times[SHIFT_AT])), ("AO", str(times[SPIKE_AT]))} <= got
    stored = {
        (row.event_type, None if pd.isna(row.event_ts) else row.event_ts.to_pydatetime())
        for row in events.itertuples()
    }
    if kind == "numeric":  # numbers are no instants: nothing is stored as one
        assert {ts for _, ts in stored} == {None}
    else:  # naive text is UTC; the aware text names the same instants
        assert {("LS", _instant(SHIFT_AT)), ("AO", _instant(SPIKE_AT))} <= stored
