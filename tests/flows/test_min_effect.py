"""The minimum effect of a run (issue 10, step 2): what is below it is never written.

The invented hourly disk fleet (tests/flows/fleet.py: AR(1) noise of sd 1.15
around 40-64, level shifts of +6 and spikes of +9) gets one more series with
a small lasting shift: +1.2 on a level of 50 (2.4 % of the level, about 1.4
noise sigma), which the engine reports at the default budget because a level
shift's t grows with the points after it.  A scan with ``--min-effect 5%``
must write neither that event nor any revision of it, and keep the large
injected events (all above 13 % of their level).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import sqlalchemy as sa

from changekind.flows.scan import scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from changekind.tasks.simulate import arma_filter
from tests.flows.fleet import make_fleet, write_source

SMALL = "shelf-9/disk-small"
SMALL_AT = 300
SMALL_SIZE = 1.2


def _data():
    data, truth = make_fleet(6, seed=3)
    rng = np.random.default_rng(11)
    stamps = pd.date_range("2026-06-01", periods=24 * 21, freq="h")
    y = 50.0 + arma_filter(rng.normal(size=stamps.size), ar=(0.5,))
    y[SMALL_AT:] += SMALL_SIZE
    small = pd.DataFrame({"series_id": SMALL, "timestamp": stamps, "value": y})
    return pd.concat([data, small], ignore_index=True), truth, stamps[SMALL_AT]


def _scan(tmp_path, name, options, data):
    source = tmp_path / f"{name}-source"
    db = f"sqlite:///{tmp_path / (name + '.db')}"
    write_source(data, source, until="2026-06-19")
    scan_flow(str(source), db, options)
    write_source(data, source)  # two more days: a warm scan
    scan_flow(str(source), db, options)
    events = persist.read_events(db, include_retracted=True)
    with persist.connect(db).connect() as conn:
        revisions = pd.DataFrame(conn.execute(sa.select(persist.event_revisions)).mappings().all())
    return events, revisions


def test_events_below_the_minimum_are_not_written_nor_logged(prefect_server, tmp_path):
    data, truth, small_at = _data()
    plain, _ = _scan(tmp_path, "plain", RunOptions(workers=1), data)
    mine = plain[plain.series_id == SMALL]
    near = (pd.to_datetime(mine.event_time) - small_at).abs() <= pd.Timedelta("3h")
    shifts = mine[near & (mine.event_type == "LS")]
    # Without a floor the small shift is reported, with its size in three units.
    assert len(shifts) == 1, mine
    row = shifts.iloc[0]
    assert abs(row.effect_pct) < 5.0
    assert 0.5 < row.effect / SMALL_SIZE < 1.5
    # Innovation sd 1: the shift is about 1.2 noise sigma.
    assert 0.6 < row.effect_sigma < 2.0
    # An LS lasts from its time to the last point analysed when it was written
    # (never past the data's end), stored in seconds: whole hours on this grid.
    last = pd.Timestamp("2026-06-01") + pd.Timedelta(hours=24 * 21 - 1)
    so_far = (last - pd.to_datetime(row.event_time)).total_seconds()
    assert 3600.0 <= float(row.duration) <= so_far + 3600.0, (row.duration, so_far)
    assert float(row.duration) % 3600.0 == 0.0

    floored, revisions = _scan(tmp_path, "floor", RunOptions(workers=1, min_effect="5%"), data)
    assert (floored.effect_pct.abs() >= 5.0).all(), floored[["series_id", "effect_pct"]]
    assert SMALL not in set(floored.series_id)
    assert revisions.empty or SMALL not in set(revisions.series_id)
    # The large injected events are still there (same rule as the scan tests: 2 h).
    hits = 0
    for t in truth.itertuples():
        got = floored[floored.series_id == t.series_id]
        close = (pd.to_datetime(got.event_time) - t.event_time).abs() <= pd.Timedelta("2h")
        hits += int((got[close].event_type == t.event_type).any())
    assert hits >= len(truth) - 1
