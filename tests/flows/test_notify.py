"""The Prefect events of a run and the example automations that route them.

References: Prefect's own models.  The automation file must validate as
Prefect's ``AutomationCore`` (what ``prefect automation create --from-file``
accepts) and its triggers, evaluated by the Prefect server's own
``EventTrigger.covers``, must take the events flows/notify.py builds for a
large incident or level shift and leave small ones alone.  The incidents are
those of the invented fleet of tests/tasks/test_incidents.py.
"""

from __future__ import annotations

import uuid
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path

import pytest
import yaml
from prefect.events.schemas.automations import AutomationCore
from prefect.server.events.schemas.automations import EventTrigger
from prefect.server.events.schemas.events import ReceivedEvent

from changekind.flows.notify import (
    confirmed_event,
    incident_event,
    run_events,
    size_band,
)
from changekind.tasks.incidents import IncidentChange, group_incidents
from changekind.tasks.persist import ConfirmedEvent, IncidentRefresh
from tests.tasks.incidents.test_incidents import STEP, make_events, make_labels

AUTOMATIONS = Path(__file__).resolve().parents[2] / "infra" / "automation-incidents.yaml"


@pytest.fixture(scope="module")
def rollout():
    events, truth = make_events()
    found = group_incidents(events, make_labels(), step_seconds=STEP).incidents
    return max(found, key=lambda i: len(set(i.series_ids) & truth["rollout"]))


def _received(kwargs) -> ReceivedEvent:
    return ReceivedEvent(
        occurred=datetime.now(UTC),
        event=kwargs["event"],
        resource=kwargs["resource"],
        related=kwargs.get("related", []),
        payload=kwargs["payload"],
        id=uuid.uuid4(),
    )


def _automations() -> list[dict]:
    return yaml.safe_load(AUTOMATIONS.read_text(encoding="utf-8"))["automations"]


@pytest.mark.parametrize(
    ("pct", "band"),
    [
        (None, "unknown"),
        (0.5, "under-1pct"),
        (-1.0, "1-5pct"),
        (19.99, "5-20pct"),
        (-20, "20pct-plus"),
    ],
)
def test_size_bands(pct, band):
    assert size_band(pct) == band


def test_incident_event_carries_what_an_automation_filters_on(rollout):
    change = IncidentChange("new", rollout.incident_id, rollout, None, added=rollout.member_keys)
    kw = incident_event(change, run_id="r1")
    assert kw["event"] == "changekind.incident.new"
    res = kw["resource"]
    assert res["prefect.resource.id"] == f"changekind.incident.{rollout.incident_id}"
    assert res["changekind.label.firmware"] == "9.4"
    assert res["changekind.dominant-type"] == "LS"
    assert res["changekind.n-series"] == "24"
    assert res["changekind.size"] == size_band(rollout.median_effect_pct) == "20pct-plus"
    assert len(kw["related"]) == 24
    assert kw["payload"]["members"] == rollout.to_record()["members"]
    assert kw["payload"]["run_id"] == "r1"
    with pytest.raises(ValueError, match="only new and grown"):
        incident_event(replace(change, kind="shrunk"))


def test_confirmed_events_below_the_minimum_are_not_announced(rollout):
    small = ConfirmedEvent(
        "a/x", "2031-05-06T10:00:00+00:00", "LS", 1.0, 2.0, 5.0, (("rack", "r1"),)
    )
    large = replace(small, series_id="b/x", effect_pct=30.0)
    none = replace(small, series_id="c/x", effect_pct=None)
    grown = IncidentChange("grown", rollout.incident_id, rollout, rollout, added=())
    gone = IncidentChange("gone", "x", None, rollout)
    refresh = IncidentRefresh(changes=(grown, gone), confirmed=(small, large, none))
    names = [
        (e["event"], e["resource"]["prefect.resource.id"])
        for e in run_events(refresh, min_effect_pct=5.0)
    ]
    assert names == [
        ("changekind.incident.grown", f"changekind.incident.{rollout.incident_id}"),
        ("changekind.event.confirmed", "changekind.series.b/x"),
    ]
    assert len(run_events(refresh, min_effect_pct=0.0)) == 4  # the one without a % too
    assert confirmed_event(large)["resource"]["changekind.label.rack"] == "r1"


def test_the_example_automations_are_valid_and_match_the_events(rollout):
    autos = _automations()
    assert len(autos) == 2
    for auto in autos:
        AutomationCore.model_validate(auto)  # what `prefect automation create` checks
    incidents, shifts = (EventTrigger.model_validate(a["trigger"]) for a in autos)
    change = IncidentChange("grown", rollout.incident_id, rollout, rollout)
    assert incidents.covers(_received(incident_event(change)))
    small = replace(rollout, median_effect_pct=3.0)
    assert not incidents.covers(
        _received(incident_event(IncidentChange("new", small.incident_id, small, None)))
    )
    ls = ConfirmedEvent("a/x", "2031-05-06T10:00:00+00:00", "LS", 9.0, 25.0, 8.0)
    assert shifts.covers(_received(confirmed_event(ls)))
    assert not shifts.covers(_received(confirmed_event(replace(ls, event_type="AO"))))
    assert not shifts.covers(_received(confirmed_event(replace(ls, effect_pct=12.0))))
    assert not shifts.covers(_received(incident_event(change)))
