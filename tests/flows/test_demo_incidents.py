"""The demo fleet's attributes and its firmware rollout as an incident.

References: the injected truth of the invented fleet (which controllers the
rollout reached and when), from which the attributes are checked row by row;
the grouping of the injected events themselves (every truth row as a stored
event) must give the rollout as one incident sharing firmware 7.3.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from changekind.flows.demo import score_rollout_incident, with_labels
from changekind.tasks.incidents import TIME_TOLERANCE, group_incidents
from changekind.tasks.simulate import NEW_FIRMWARE, OLD_FIRMWARE, make_demo_fleet


@pytest.fixture(scope="module")
def fleet():
    return make_demo_fleet(np.random.default_rng(2031), n_controllers=24, days=8)


def test_attributes_follow_the_rollout(fleet):
    rows = with_labels(fleet.data, fleet.labels)
    assert list(rows.columns) == ["series_id", "timestamp", "value", "rack", "firmware"]
    assert len(rows) == len(fleet.data)
    pd.testing.assert_frame_equal(rows[["series_id", "timestamp", "value"]], fleet.data)
    rollout = fleet.truth[fleet.truth["note"].str.startswith("firmware")]
    assert set(rollout["series_id"]) == fleet.rollout_series and len(rollout) == 5
    for sid, t0 in zip(rollout["series_id"], rollout["event_time"], strict=True):
        controller = sid.rsplit("/", 1)[0]
        mine = rows[rows["series_id"].str.startswith(controller + "/")]  # both metrics
        assert (mine.loc[mine["timestamp"] < t0, "firmware"] == OLD_FIRMWARE).all()
        assert (mine.loc[mine["timestamp"] >= t0, "firmware"] == NEW_FIRMWARE).all()
    others = rows[
        ~rows["series_id"]
        .str.rsplit("/", n=1)
        .str[0]
        .isin({s.rsplit("/", 1)[0] for s in fleet.rollout_series})
    ]
    assert (others["firmware"] == OLD_FIRMWARE).all()
    racks = rows.groupby("series_id")["rack"].unique()
    assert racks["array-04/ctl-a/queue-depth"].tolist() == ["rk2"]
    assert racks["array-03/ctl-b/write-latency-ms"].tolist() == ["rk1"]


def test_the_injected_rollout_is_one_incident_sharing_the_new_firmware(fleet):
    truth = fleet.truth
    level = fleet.data.groupby("series_id")["value"].mean()
    events = pd.DataFrame(
        {
            "series_id": truth["series_id"],
            "event_time": truth["event_time"].map(pd.Timestamp.isoformat),
            "event_ts": truth["event_time"],
            "event_type": truth["event_type"],
            "effect": truth["effect"],
            "effect_pct": 100 * truth["effect"] / level[truth["series_id"]].to_numpy(),
            "t_stat": 6.0 * np.sign(truth["effect"]),
            "status": "confirmed",
        }
    )
    latest = with_labels(fleet.data, fleet.labels).groupby("series_id").tail(1)
    labels = latest.set_index("series_id")[["rack", "firmware"]]
    found = group_incidents(events, labels, step_seconds=fleet.step.total_seconds()).incidents
    score = score_rollout_incident(found, fleet.rollout_series)
    # Other stories' events that move the level up within a link of a rollout step
    # (half-widths of both types, TIME_TOLERANCE) join it: in this fleet the port fault
    # of array-04/ctl-b at 02:30, at the very time of the second upgrade.
    steps = truth[truth["series_id"].isin(fleet.rollout_series)]
    link = {t: (TIME_TOLERANCE[t] + TIME_TOLERANCE["LS"]) * fleet.step for t in TIME_TOLERANCE}
    near = {
        r.series_id
        for r in truth.itertuples()
        if r.series_id not in fleet.rollout_series
        and r.effect > 0
        and (steps["event_time"] - r.event_time).abs().min() <= link[r.event_type]
    }
    assert near == {"array-04/ctl-b/queue-depth"}
    best = next(i for i in found if i.incident_id == score.incident_id)
    assert set(best.series_ids) == fleet.rollout_series | near
    assert (score.n_found, score.n_rollout, score.n_other) == (5, 5, len(near))
    assert score.firmware_shared and dict(score.shared) == {"firmware": NEW_FIRMWARE}
    assert score.other_incidents == 0
    assert "5 of the rollout's 5 series" in score.words()
    assert score_rollout_incident([], fleet.rollout_series).incident_id is None


@pytest.mark.slow
def test_the_demo_finds_the_rollout_as_an_incident(prefect_server, tmp_path):
    """The whole demo (engine, flows, incidents, report) on 16 controllers over 5 days, 4
    of them on the rollout: the incident holding the rollout's series shares firmware 7.3
    (the injected events alone group so: no other story's event falls within a link).

    Reference: the injected truth (truth.csv and the fleet's rollout series)."""
    import json

    from typer.testing import CliRunner

    from changekind.flows.cli import app

    out = tmp_path / "demo"
    args = ["demo", "--controllers", "16", "--days", "5", "--seed", "2031", "--out", str(out)]
    result = CliRunner().invoke(app, args)
    assert result.exit_code in (0, 1), result.stderr
    fleet = make_demo_fleet(np.random.default_rng(2031), n_controllers=16, days=5)
    records = json.loads((out / "incidents.json").read_text())
    best = max(
        records, key=lambda r: len({m["series_id"] for m in r["members"]} & fleet.rollout_series)
    )
    found = {m["series_id"] for m in best["members"]} & fleet.rollout_series
    assert len(fleet.rollout_series) == 4
    assert len(found) >= 3  # the engine may miss one small shift (4-8 sd, one day of history)
    assert best["shared_labels"].get("firmware") == NEW_FIRMWARE
    assert f"{len(found)} of the rollout's 4 series in incident {best['incident_id']}" in (
        result.stdout
    )
    page = (out / "report" / "incidents.html").read_text(encoding="utf-8")
    assert best["incident_id"] in page and "firmware = 7.3" in page
