"""Stored incidents (``persist.refresh_incidents``/``read_incidents``), on a real
SQLite file and the real PostgreSQL server.

The fleet and its day are the invented cold-storage cluster of
tests/tasks/incidents/test_incidents.py (a firmware rollout, a rack-wide spike,
unrelated single events).  References: the injected truth (which series each
story touched, which attribute it shares) and the pure grouping
(``group_incidents`` over the same events and labels), which the stored
incidents must equal whatever the order and overlap of the runs that wrote
the events.
"""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime, timedelta

import pandas as pd
import sqlalchemy as sa

from changekind.tasks import persist
from changekind.tasks.incidents import group_incidents
from changekind.tasks.persist.schema import (
    incident_labels,
    incident_members,
    incident_revisions,
    incidents,
)
from changekind.tasks.types import Event, FittedModel
from tests.tasks.incidents.test_incidents import (
    DAY,
    ROLLOUT_FIRMWARE,
    STEP,
    make_events,
    make_labels,
)

T0 = datetime(2031, 5, 7, 1, 0, tzinfo=UTC)


def _events(frame: pd.DataFrame) -> list[Event]:
    out = []
    for r in frame.itertuples(index=False):
        out.append(
            Event(
                series_id=r.series_id,
                position=-1,
                event_time=r.event_time,
                event_type=r.event_type,
                effect=r.effect,
                effect_pct=None if math.isnan(r.effect_pct) else r.effect_pct,
                t_stat=r.t_stat,
                se=1.0,
                type_weights=((r.event_type, 1.0),),
                status="provisional" if r.status == "provisional" else "confirmed",
                decay=None,
                half_life=None,
                level=100.0,
                model="ARIMA(1,0,0)",
            )
        )
    return out


def _models(ids, watermark: pd.Timestamp, engine) -> None:
    models = [
        FittedModel(
            series_id=s,
            order=(1, 0, 0),
            seasonal_order=(0, 0, 0, 0),
            trend="c",
            params=(("const", 1.0), ("ar.L1", 0.5), ("sigma2", 1.0)),
            sigma2=1.0,
            nobs=288,
            method="mle",
            converged=True,
            step_seconds=STEP,
        )
        for s in ids
    ]
    persist.save_models(engine, models, watermarks=dict.fromkeys(ids, watermark.isoformat()))
    persist.set_coverage(engine, analysed_from=dict.fromkeys(ids, DAY.isoformat()))


def _write_day(engine, events: pd.DataFrame, *, until: pd.Timestamp, run: str) -> None:
    """What a run does: the events up to ``until`` (retractions as retractions), watermarks."""
    part = events[events["event_ts"] <= until]
    live = part[part["status"] != "retracted"]
    persist.write_events(engine, run, _events(live), at=T0)
    retracted = part[part["status"] == "retracted"]
    known = persist.read_events(engine, include_retracted=True)
    retracted = retracted[
        ~retracted["event_time"].isin(known["event_time"][known["status"] == "retracted"])
    ]
    if len(retracted):
        persist.write_events(engine, run, _events(retracted), at=T0)
        persist.write_events(
            engine,
            run,
            [],
            retract=list(zip(retracted["series_id"], retracted["event_time"], strict=True)),
            at=T0,
        )
    _models(make_labels().index.tolist(), until, engine)


def _labels_frame() -> pd.DataFrame:
    return make_labels().reset_index()


def _stored_records(engine) -> list[dict]:
    return [
        i.to_record() for i in sorted(persist.read_incidents(engine), key=lambda i: i.incident_id)
    ]


def test_incidents_of_the_day_are_stored_as_the_grouping_gives_them(engine) -> None:
    events, truth = make_events()
    labels = make_labels()
    persist.write_labels(engine, "run-1", _labels_frame(), at=T0)
    end = DAY + pd.Timedelta(days=1)
    _write_day(engine, events, until=end, run="run-1")
    done = persist.refresh_incidents(engine, "run-1", at=T0)
    assert done.counts()["new"] == 2 and len(done.changes) == 2
    stored = persist.read_incidents(engine)
    # Reference: the injected truth.
    by_series = {frozenset(i.series_ids): i for i in stored}
    rollout = by_series[frozenset(truth["rollout"])]
    spike = by_series[frozenset(truth["spike"])]
    assert rollout.shared_labels == {"firmware": ROLLOUT_FIRMWARE}
    assert spike.shared_labels == {"rack": "r3"}
    members = {(m.series_id, m.event_time) for i in stored for m in i.members}
    assert not members & truth["singles"]
    # Reference: the pure grouping over all the events, with the same observed record.
    expected = group_incidents(events, labels, step_seconds=STEP, observed=(DAY, end)).incidents
    assert _stored_records(engine) == [
        i.to_record() for i in sorted(expected, key=lambda i: i.incident_id)
    ]
    # Newest first; the spike (provisional members) is open, the rollout settled
    # only once it lies a margin behind the newest scan.
    assert [i.incident_id for i in stored] == [spike.incident_id, rollout.incident_id]
    states = persist.incident_states(engine)
    assert states[spike.incident_id] == "open"
    with engine.connect() as conn:
        shared = conn.execute(
            sa.select(incident_labels.c.label, incident_labels.c.value).where(
                incident_labels.c.incident_id == rollout.incident_id,
                incident_labels.c.shared.is_(True),
            )
        ).all()
        opened = conn.execute(sa.text("SELECT incident_id FROM open_incidents")).scalars().all()
        head = conn.execute(
            sa.select(incidents.c.shared_labels).where(
                incidents.c.incident_id == rollout.incident_id
            )
        ).scalar_one()
    assert [tuple(r) for r in shared] == [("firmware", ROLLOUT_FIRMWARE)]
    assert json.loads(head) == {"firmware": ROLLOUT_FIRMWARE}
    assert set(opened) == {i for i, s in states.items() if s == "open"}
    # A rerun that changes no event writes nothing.
    before = persist.content_snapshot(engine)
    _write_day(engine, events, until=end, run="run-2")
    again = persist.refresh_incidents(engine, "run-2", at=T0 + timedelta(hours=1))
    assert again.changes == () and again.n_revisions == 0
    assert persist.content_snapshot(engine) == before


def test_overlapping_runs_end_with_the_incidents_of_one_run(url: str, tmp_path) -> None:
    """Scans through the day, then a backfill over an overlapping span, equal one run."""
    events, truth = make_events()
    end = DAY + pd.Timedelta(days=1)
    # One run over the whole day.
    once = persist.init_db(f"sqlite:///{tmp_path / 'once.db'}")
    persist.write_labels(once, "run", _labels_frame(), at=T0)
    _write_day(once, events, until=end, run="run")
    persist.refresh_incidents(once, "run", at=T0)
    expected = _stored_records(once)
    once.dispose()
    # Hourly pieces on the database under test: scans to 11:00 (mid-rollout), to 17:00,
    # then the whole day again (an overlapping backfill), each followed by an update.
    engine = persist.init_db(url)
    try:
        persist.write_labels(engine, "scan", _labels_frame(), at=T0)
        kinds = []
        for k, until in enumerate(
            (DAY + pd.Timedelta(hours=11), DAY + pd.Timedelta(hours=17), end, end)
        ):
            _write_day(engine, events, until=until, run=f"run-{k}")
            done = persist.refresh_incidents(engine, f"run-{k}", at=T0)
            kinds.append(sorted(c.kind for c in done.changes))
        assert _stored_records(engine) == expected
        # Mid-rollout the incident was new, later it grew; the last rerun changed nothing.
        assert kinds[0] == ["new"]
        assert "grown" in kinds[1] and "new" in kinds[1]
        assert kinds[3] == []
        rollout = next(
            i for i in persist.read_incidents(engine) if set(i.series_ids) == truth["rollout"]
        )
        with engine.connect() as conn:
            changes = (
                conn.execute(
                    sa.select(incident_revisions.c.change)
                    .where(incident_revisions.c.incident_id == rollout.incident_id)
                    .order_by(incident_revisions.c.revision_id)
                )
                .scalars()
                .all()
            )
        assert changes[0] == "new" and "grown" in changes
    finally:
        engine.dispose()


def test_retracting_members_shrinks_or_removes_the_incident(engine) -> None:
    events, truth = make_events()
    end = DAY + pd.Timedelta(days=1)
    persist.write_labels(engine, "run-1", _labels_frame(), at=T0)
    _write_day(engine, events, until=end, run="run-1")
    persist.refresh_incidents(engine, "run-1", at=T0)
    spike = next(i for i in persist.read_incidents(engine) if set(i.series_ids) == truth["spike"])
    # All but one member retracted: a lone event is not an incident.
    gone = [m.key for m in spike.members[1:]]
    persist.write_events(engine, "run-2", [], retract=gone, at=T0)
    done = persist.refresh_incidents(engine, "run-2", at=T0)
    assert [(c.kind, c.incident_id) for c in done.changes] == [("gone", spike.incident_id)]
    assert spike.incident_id not in persist.incident_states(engine)
    with engine.connect() as conn:
        left = conn.execute(
            sa.select(sa.func.count()).where(incident_members.c.incident_id == spike.incident_id)
        ).scalar()
    assert left == 0


def test_newly_confirmed_events_are_reported_once(engine) -> None:
    events, _ = make_events()
    end = DAY + pd.Timedelta(days=1)
    persist.write_labels(engine, "run-1", _labels_frame(), at=T0)
    _write_day(engine, events, until=end, run="run-1")
    first = persist.refresh_incidents(engine, "run-1", at=T0)
    live = events[events["status"] == "confirmed"]
    assert {(c.series_id, c.event_time) for c in first.confirmed} == set(
        zip(live["series_id"], live["event_time"], strict=True)
    )
    one = next(c for c in first.confirmed if c.series_id.startswith("vault-r1-02"))
    assert dict(one.labels)["rack"] == "r1"
    # The spike's provisional events become confirmed in a later run: reported then only.
    spike = events[events["status"] == "provisional"].assign(status="confirmed")
    persist.write_events(engine, "run-2", _events(spike), at=T0)
    second = persist.refresh_incidents(engine, "run-2", at=T0)
    assert {(c.series_id, c.event_time) for c in second.confirmed} == set(
        zip(spike["series_id"], spike["event_time"], strict=True)
    )
    assert [c.kind for c in second.changes] == ["changed"]  # its members are no longer provisional
    third = persist.refresh_incidents(engine, "run-3", at=T0)
    assert third.confirmed == () and third.changes == ()
