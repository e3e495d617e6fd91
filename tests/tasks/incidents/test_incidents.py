"""Fleet incidents: grouping, shared attributes, identity and reconciliation.

The scenario is invented: a cold-storage cluster of 40 nodes on four racks
(``vault-r2-07``), each reporting its commit latency and its journal queue
length every five minutes (80 series).  Labels: ``rack``, ``firmware`` and
``metric``.  Three things happen on one day:

- a firmware rollout: every series on firmware 9.4 (12 nodes, 24 series, 30 %
  of the fleet) steps up within two hours, node by node in a random order;
- a rack-wide spike: every series on rack r3 jumps for one sample at 16:05;
- unrelated single events on other series, hours away from anything else.

The injected truth (which series, when, which direction) is the reference for
the grouping; scipy.stats.hypergeom and statsmodels' Holm adjustment are the
references for the test of shared attributes, with one case worked by hand.
"""

from __future__ import annotations

import itertools
import json
import math
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy.stats import hypergeom
from statsmodels.stats.multitest import multipletests

from changekind.tasks.errors import ConfigError
from changekind.tasks.incidents import (
    MIN_CARRIERS,
    MIN_MEMBER_SHARE,
    TIME_TOLERANCE,
    GroupingRule,
    Incident,
    IncidentSet,
    fleet_labels,
    group_incidents,
    incident_identity,
    label_shares,
    reconcile_incidents,
    update_incidents,
)
from tests.contract import INCIDENT_FIELDS, INCIDENT_MEMBER_FIELDS

STEP = 300.0  # five-minute sampling
DAY = pd.Timestamp("2031-05-06", tz="UTC")  # an invented Tuesday
RACKS = ("r1", "r2", "r3", "r4")
METRICS = ("commit-ms", "journal-len")
ROLLOUT_FIRMWARE = "9.4"
ROLLOUT_START = DAY + pd.Timedelta(hours=10)
SPIKE_AT = DAY + pd.Timedelta(hours=16, minutes=5)


def _node(rack: str, n: int) -> str:
    return f"vault-{rack}-{n:02d}"


def make_labels() -> pd.DataFrame:
    """80 series: 40 nodes x 2 metrics; firmware 9.4 on 12 nodes (3 per rack)."""
    rows = []
    for rack in RACKS:
        for n in range(1, 11):
            firmware = ROLLOUT_FIRMWARE if n in (2, 5, 9) else "9.3"
            for metric in METRICS:
                rows.append(
                    {
                        "series_id": f"{_node(rack, n)}/{metric}",
                        "rack": rack,
                        "firmware": firmware,
                        "metric": metric,
                    }
                )
    return pd.DataFrame(rows).set_index("series_id")


def _row(series_id, ts, event_type, effect, *, pct=None, t=None, status="confirmed"):
    ts = pd.Timestamp(ts)
    return {
        "series_id": series_id,
        "event_time": ts.isoformat(),
        "event_ts": ts,
        "event_type": event_type,
        "effect": float(effect),
        "effect_pct": np.nan if pct is None else float(pct),
        "t_stat": float(t if t is not None else math.copysign(6.0, effect)),
        "status": status,
        "se": 1.0,  # an extra series_events column: ignored
    }


def make_events(seed: int = 20310506) -> tuple[pd.DataFrame, dict[str, set[str]]]:
    """The day's events and the truth: which series each story touched."""
    rng = np.random.default_rng(seed)
    labels = make_labels()
    rows = []
    # The rollout: nodes on 9.4 in a random order, 6 to 10 minutes apart, both metrics
    # stepping up at the node's own sample (or the next one).
    rollout = labels.index[labels["firmware"] == ROLLOUT_FIRMWARE]
    nodes = sorted({s.split("/")[0] for s in rollout})
    rng.shuffle(nodes)
    at = ROLLOUT_START
    for node in nodes:
        for metric in METRICS:
            lag = pd.Timedelta(minutes=5 * int(rng.integers(0, 2)))
            pct = float(rng.uniform(15, 40))
            rows.append(_row(f"{node}/{metric}", at + lag, "LS", pct / 10, pct=pct))
        at += pd.Timedelta(minutes=int(rng.choice([5, 10])))
    # One rollout series also shows a weaker glitch just before its shift: not a second member.
    first = f"{nodes[3]}/commit-ms"
    first_ts = next(r["event_ts"] for r in rows if r["series_id"] == first)
    rows.append(_row(first, first_ts - pd.Timedelta(minutes=5), "AO", 2.0, pct=8.0, t=4.1))
    # A series going the other way during the rollout: not a member.
    rows.append(
        _row(
            f"{_node('r1', 1)}/commit-ms",
            ROLLOUT_START + pd.Timedelta(minutes=40),
            "LS",
            -2.0,
            pct=-12.0,
        )
    )
    # The rack spike: every series of r3 at one sample (AO), some seen as TC.
    spike = labels.index[labels["rack"] == "r3"]
    for sid in spike:
        kind = "TC" if rng.random() < 0.2 else "AO"
        pct = float(rng.uniform(50, 120))
        rows.append(_row(sid, SPIKE_AT, kind, pct / 5, pct=pct, status="provisional"))
    # A retracted event of another rack at the spike: never a member.
    rows.append(
        _row(f"{_node('r4', 4)}/journal-len", SPIKE_AT, "AO", 9.0, pct=60.0, status="retracted")
    )
    # Unrelated single events, hours from anything else and from each other.
    singles = [
        (f"{_node('r1', 3)}/journal-len", DAY + pd.Timedelta(hours=2), "IO", 4.0),
        (f"{_node('r2', 6)}/commit-ms", DAY + pd.Timedelta(hours=5, minutes=35), "TC", -3.0),
        (f"{_node('r4', 8)}/commit-ms", DAY + pd.Timedelta(hours=13), "AO", 7.0),
        (f"{_node('r2', 1)}/journal-len", DAY + pd.Timedelta(hours=20, minutes=10), "LS", 2.5),
    ]
    for sid, ts, kind, effect in singles:
        rows.append(_row(sid, ts, kind, effect, pct=effect * 5))
    truth = {
        "rollout": set(rollout),
        "spike": set(spike),
        "singles": {(sid, pd.Timestamp(ts).isoformat()) for sid, ts, _, _ in singles},
    }
    return pd.DataFrame(rows), truth


@pytest.fixture(scope="module")
def scenario():
    events, truth = make_events()
    labels = make_labels()
    result = group_incidents(events, labels, step_seconds=STEP)
    return events, labels, truth, result


def _find(result: IncidentSet, series: set[str]) -> Incident:
    """The incident with most of ``series`` among its members."""
    return max(result.incidents, key=lambda i: len(set(i.series_ids) & series))


# --------------------------------------------------------------------------- the scenario


def test_rollout_is_one_incident_sharing_its_firmware(scenario):
    events, _, truth, result = scenario
    inc = _find(result, truth["rollout"])
    # Reference: the injected rollout (every series on 9.4, each once).
    assert set(inc.series_ids) == truth["rollout"]
    assert inc.n_series == len(truth["rollout"]) == 24
    assert inc.direction == "up" and inc.quantity == "level"
    assert inc.dominant_type == "LS"
    assert inc.fleet_size == 80
    assert_allclose(inc.share_of_fleet, 24 / 80, rtol=1e-9)
    assert inc.shared_labels == {"firmware": ROLLOUT_FIRMWARE}
    injected = events[events["series_id"].isin(truth["rollout"]) & (events["event_type"] == "LS")]
    assert inc.start == injected["event_ts"].min()
    assert inc.end == injected["event_ts"].max()
    assert_allclose(inc.median_effect_pct, np.median(injected["effect_pct"]), rtol=1e-9)
    fw = next(s for s in inc.labels if s.label == "firmware" and s.value == ROLLOUT_FIRMWARE)
    # 24 of 24 members against 24 of 80 series (30 %) of the fleet.
    assert (fw.members_with, fw.members_known, fw.fleet_with, fw.fleet_known) == (24, 24, 24, 80)
    assert_allclose(fw.fleet_share, 0.3)
    assert_allclose(fw.group_share, 1.0)
    # The racks and metrics of a rollout that touched three nodes per rack are not shared.
    assert not any(s.shared for s in inc.labels if s.label in ("rack", "metric"))


def test_a_series_with_two_events_contributes_its_stronger_one(scenario):
    events, _, truth, result = scenario
    inc = _find(result, truth["rollout"])
    day = events[events["event_ts"] < SPIKE_AT - pd.Timedelta(hours=1)]
    both = day.groupby("series_id").size()
    twice = [s for s in truth["rollout"] if both[s] == 2]
    assert len(twice) == 1
    member = next(m for m in inc.members if m.series_id == twice[0])
    assert member.event_type == "LS" and member.t_stat == 6.0  # the AO had |t| = 4.1


def test_rack_spike_is_another_incident_sharing_its_rack(scenario):
    events, _, truth, result = scenario
    inc = _find(result, truth["spike"])
    assert set(inc.series_ids) == truth["spike"]  # the retracted r4 event is not a member
    assert inc.start == inc.end == SPIKE_AT
    assert inc.shared_labels == {"rack": "r3"}
    assert inc.n_provisional == 20
    spike = events[events["series_id"].isin(truth["spike"]) & (events["event_ts"] == SPIKE_AT)]
    counts = spike["event_type"].value_counts()
    assert dict(inc.type_counts) == counts.to_dict()
    assert inc.dominant_type == counts.idxmax()
    assert_allclose(inc.median_effect_pct, np.median(spike["effect_pct"]), rtol=1e-9)


def test_unrelated_events_join_no_incident(scenario):
    _, _, truth, result = scenario
    assert len(result.incidents) == 2
    members = {k for i in result.incidents for k in i.member_keys}
    assert not members & truth["singles"]
    assert result.n_retracted == 1
    assert result.n_members == 24 + 20


def test_same_incidents_in_any_order(scenario):
    events, labels, _, result = scenario
    for seed in (1, 2, 3):
        shuffled = events.sample(frac=1.0, random_state=seed).reset_index(drop=True)
        again = group_incidents(
            shuffled, labels.sample(frac=1.0, random_state=seed), step_seconds=STEP
        )
        assert again.incidents == result.incidents


def test_incident_id_is_the_anchor_identity(scenario):
    _, _, _, result = scenario
    for inc in result.incidents:
        a = inc.members[0]
        assert a == min(inc.members, key=lambda m: (m.event_ts, m.series_id, m.event_time))
        assert inc.incident_id == incident_identity(
            a.series_id, a.event_time, a.event_ts, inc.quantity, inc.direction
        )
        assert inc.incident_id.startswith(f"{a.event_ts:%Y%m%dT%H%M%SZ}-level-up-")


# --------------------------------------------------------------------------- partial runs


class Store:
    """An in-memory stand-in for the persistence step: events by key, incidents by id."""

    def __init__(self, labels):
        self.labels = labels
        self.events: dict[tuple[str, str], dict] = {}
        self.incidents: dict[str, Incident] = {}
        self.reads: list[tuple[pd.Timestamp, pd.Timestamp]] = []

    def read_events(self, span):
        self.reads.append(span)
        frame = pd.DataFrame(list(self.events.values()), columns=list(_row("x", DAY, "AO", 1)))
        ts = pd.to_datetime(frame["event_ts"], utc=True)
        return frame[(ts >= span[0]) & (ts <= span[1])]

    def observed(self):
        if not self.events:
            return None
        ts = pd.to_datetime(pd.Series([r["event_ts"] for r in self.events.values()]), utc=True)
        return (ts.min(), ts.max())

    def read_incidents(self, span):
        return [i for i in self.incidents.values() if i.start <= span[1] and i.end >= span[0]]

    def run(self, rows: list[dict]):
        """Write a batch of event rows, update the incidents, apply the changes.

        The record is taken to be complete from its first to its last event; what the
        batch changed is its own span and any growth of that record.
        """
        before = self.observed()
        for r in rows:
            self.events[(r["series_id"], r["event_time"])] = r
        observed = self.observed()
        times = pd.to_datetime(pd.Series([r["event_ts"] for r in rows]), utc=True)
        lo, hi = times.min(), times.max()
        if before is not None:
            if observed[0] < before[0]:
                lo = min(lo, observed[0])
                hi = max(hi, before[0])
            if observed[1] > before[1]:
                lo = min(lo, before[1])
                hi = max(hi, observed[1])
        update = update_incidents(
            (lo, hi),
            observed=observed,
            read_events=self.read_events,
            read_incidents=self.read_incidents,
            labels=self.labels,
            step_seconds=STEP,
        )
        for c in update.changes.to_write:
            if c.kind == "gone":
                del self.incidents[c.incident_id]
            else:  # stored as JSON and read back, as a database would
                record = json.loads(json.dumps(c.incident.to_record()))
                self.incidents[c.incident_id] = Incident.from_record(record)
        return update.changes


def _batches(events: pd.DataFrame, edges: list[pd.Timestamp]) -> list[list[dict]]:
    """Overlapping time chunks [edges[i] - 30 min, edges[i + 1]) of the events, as row dicts."""
    out = []
    for lo, hi in itertools.pairwise(edges):
        part = events[
            (events["event_ts"] >= lo - pd.Timedelta(minutes=30)) & (events["event_ts"] < hi)
        ]
        out.append(part.to_dict("records"))
    return out


@pytest.mark.parametrize("reverse", [False, True], ids=["oldest-first", "newest-first"])
def test_same_incidents_after_partial_overlapping_runs(scenario, reverse):
    events, labels, _, result = scenario
    # Chunks cut through the rollout (10:00 to about 12:00) and overlap by 30 minutes.
    edges = [DAY + pd.Timedelta(hours=h) for h in (0, 11, 16, 24)]
    batches = _batches(events, edges)
    store = Store(labels)
    logs = [store.run(b) for b in (reversed(batches) if reverse else batches)]
    assert sorted(store.incidents) == sorted(i.incident_id for i in result.incidents)
    for inc in result.incidents:
        assert store.incidents[inc.incident_id] == inc
    # Running everything again changes nothing.
    again = store.run(events.to_dict("records"))
    assert again.to_write == ()
    assert again.counts()["unchanged"] == 2
    rollout = _find(result, set(result.incidents[0].series_ids)).incident_id
    kinds = [(c.kind, c.incident_id == rollout, c.supersedes) for log in logs for c in log.to_write]
    if not reverse:
        # Later members join: the rollout keeps its id and grows.
        assert ("grown", True, ()) in kinds
    else:
        # The earlier half arrives later: a new anchor, so a new id that grew from the old one.
        grown = [c for log in logs for c in log.to_write if c.incident_id == rollout]
        assert [c.kind for c in grown] == ["grown"]
        (old,) = grown[0].supersedes
        assert old != rollout
        gone = [
            c for log in logs for c in log.to_write if c.incident_id == old and c.kind == "gone"
        ]
        assert gone and gone[0].superseded_by == (rollout,)
        assert not grown[0].removed


def test_retracting_a_member_shrinks_the_incident(scenario):
    events, labels, truth, result = scenario
    store = Store(labels)
    store.run(events.to_dict("records"))
    inc = _find(result, truth["rollout"])
    victim = inc.members[5]
    row = dict(store.events[victim.key], status="retracted")
    changes = store.run([row])
    (change,) = changes.to_write
    assert change.kind == "shrunk" and change.incident_id == inc.incident_id
    assert change.removed == (victim.key,)
    assert change.added == ()
    assert store.incidents[inc.incident_id].n_series == inc.n_series - 1
    assert victim.key not in store.incidents[inc.incident_id].member_keys
    assert not change.notify
    # Retracting the anchor gives a new id; the old one is gone, superseded by it.
    anchor = inc.members[0]
    changes = store.run([dict(store.events[anchor.key], status="retracted")])
    (shrunk,) = changes.of_kind("shrunk")
    (gone,) = changes.of_kind("gone")
    assert gone.incident_id == inc.incident_id
    assert shrunk.supersedes == (inc.incident_id,) and gone.superseded_by == (shrunk.incident_id,)
    assert shrunk.removed == (anchor.key,)
    assert store.incidents[shrunk.incident_id].members[0] == inc.members[1]


def test_incident_that_loses_all_but_one_member_is_gone():
    labels = {"a": {}, "b": {}, "c": {}}
    t = DAY
    rows = [_row(s, t, "AO", 5.0) for s in ("a", "b")]
    store = Store(labels)
    (new,) = store.run(rows).to_write
    assert new.kind == "new" and new.notify
    changes = store.run([dict(rows[1], status="retracted")])
    (gone,) = changes.to_write
    # Both leave: b is retracted, a is a lone event now.
    assert (gone.kind, gone.superseded_by) == ("gone", ())
    assert gone.removed == (("a", t.isoformat()), ("b", t.isoformat()))
    assert store.incidents == {}


def test_status_change_is_a_change_without_notification():
    labels = {"a": {}, "b": {}}
    rows = [_row(s, DAY, "AO", 5.0, status="provisional") for s in ("a", "b")]
    store = Store(labels)
    store.run(rows)
    changes = store.run([dict(rows[0], status="confirmed")])
    (c,) = changes.to_write
    assert c.kind == "changed" and not c.notify
    assert store.incidents[c.incident_id].n_provisional == 1


def test_reconcile_scope_leaves_other_incidents_alone(scenario):
    _, _, truth, result = scenario
    rollout = _find(result, truth["rollout"])
    spike = _find(result, truth["spike"])
    # Only the spike's hour was recomputed, and it found nothing: the rollout is not gone.
    changes = reconcile_incidents([rollout, spike], [], span=(SPIKE_AT, SPIKE_AT))
    assert [(c.kind, c.incident_id) for c in changes.changes] == [("gone", spike.incident_id)]


def test_merge_of_two_stored_incidents():
    labels = {s: {} for s in "abcde"}
    # a, b at 00:00 and d, e at 01:00 (LS); c's LS at 00:30 bridges them (35 min reach).
    early = [_row(s, DAY, "LS", 1.0) for s in "ab"]
    late = [_row(s, DAY + pd.Timedelta(hours=1), "LS", 1.0) for s in "de"]
    bridge = [_row("c", DAY + pd.Timedelta(minutes=30), "LS", 1.0)]
    store = Store(labels)
    store.run(early + late)
    assert len(store.incidents) == 2
    first = min(store.incidents)
    changes = store.run(bridge)
    (grown,) = changes.of_kind("grown")
    (gone,) = changes.of_kind("gone")
    assert grown.incident_id == first and grown.added == (("c", bridge[0]["event_time"]),)
    assert gone.superseded_by == (first,) and grown.supersedes == (gone.incident_id,)
    assert store.incidents[first].n_series == 5


# --------------------------------------------------------------------------- a busy fleet


def make_busy_fleet(seed: int = 6):
    """2,000 series (1,000 nodes x 2 metrics, 50 racks, 4 firmware versions) on one day:
    600 unrelated events at random times, a rollout on 60 series of firmware f3 from
    06:00 over two hours, and a spike on every series of rack k07 at 14:00."""
    rng = np.random.default_rng(seed)
    ids = [f"bus-{n:04d}/{m}" for n in range(1000) for m in ("lat", "depth")]
    node = np.arange(2000) // 2
    labels = pd.DataFrame(
        {"rack": [f"k{n % 50:02d}" for n in node], "firmware": [f"f{n % 4}" for n in node]},
        index=ids,
    )
    rows = []
    chosen = rng.choice(2000, size=600, replace=False)
    for i in chosen:
        at = DAY + pd.Timedelta(minutes=5 * int(rng.integers(0, 288)))
        kind = str(rng.choice(["AO", "LS", "TC", "IO"]))
        effect = float(rng.choice([-1.0, 1.0]) * rng.uniform(1, 4))
        rows.append(_row(ids[i], at, kind, effect, pct=10 * effect))
    f3 = [s for s in ids if labels.loc[s, "firmware"] == "f3"]
    rollout = sorted(rng.choice(f3, size=60, replace=False))
    for k, sid in enumerate(rollout):
        at = DAY + pd.Timedelta(hours=6, minutes=5 * (k * 24 // 60))
        rows.append(_row(sid, at, "LS", 2.0, pct=20.0))
    spike = [s for s in ids if labels.loc[s, "rack"] == "k07"]
    for sid in spike:
        rows.append(_row(sid, DAY + pd.Timedelta(hours=14), "AO", 5.0, pct=60.0))
    events = pd.DataFrame(rows).drop_duplicates(["series_id", "event_time"], keep="last")
    return events.reset_index(drop=True), labels, set(rollout), set(spike)


@pytest.fixture(scope="module")
def busy():
    events, labels, rollout, spike = make_busy_fleet()
    return events, labels, rollout, spike, group_incidents(events, labels, step_seconds=STEP)


def test_busy_fleet_keeps_the_stories_apart(busy):
    _, _, rollout, spike, result = busy
    a, b = _find(result, rollout), _find(result, spike)
    assert a.incident_id != b.incident_id
    # Reference: the injected stories.  Every story series is a member; unrelated events
    # that happen to sit among them can join (a series of rack k07 with an unrelated event
    # at 06:00 joins the rollout with that event), never the other story's events.
    assert rollout <= set(a.series_ids) and spike <= set(b.series_ids)
    spike_at = DAY + pd.Timedelta(hours=14)
    assert all(m.event_ts != spike_at for m in a.members)
    assert all(m.event_ts == spike_at for m in b.members if m.series_id in spike)
    assert a.shared_labels == {"firmware": "f3"}
    assert b.shared_labels == {"rack": "k07"}
    # Unrelated events within one LS link (35 minutes) may open the rollout early.
    assert DAY + pd.Timedelta(hours=5, minutes=25) <= a.start <= DAY + pd.Timedelta(hours=6)


def test_busy_fleet_few_chance_incidents(busy):
    _, _, rollout, spike, result = busy
    # At core_alpha = 0.001 about 0.6 of the 600 unrelated events pass the core test by
    # chance; with their neighbours that is a few members at most.
    stories = {i.incident_id for i in result.incidents if set(i.series_ids) & (rollout | spike)}
    chance = [i for i in result.incidents if i.incident_id not in stories]
    assert sum(i.n_series for i in chance) <= 10


@pytest.mark.parametrize("hours", [10, 12])
def test_busy_fleet_at_its_newest_scan(busy, hours):
    events, labels, rollout, spike, _ = busy
    now = DAY + pd.Timedelta(hours=hours)
    part = events[events["event_ts"] <= now]
    stories = rollout | spike

    def chance_members(observed):
        result = group_incidents(part, labels, step_seconds=STEP, observed=observed)
        found = [i for i in result.incidents if not set(i.series_ids) & stories]
        return result, sum(i.n_series for i in found)

    # The record ends at the newest scan: windows reaching past it are not counted as empty.
    result, chance = chance_members((DAY, now))
    assert chance <= 10
    assert rollout <= set(_find(result, rollout).series_ids)
    # Counted as empty, the unobserved future halves the background there: more chance
    # coincidences pass for incidents (why observed is asked for).
    _, misread = chance_members((DAY, now + pd.Timedelta(days=1)))
    assert misread > chance


def test_plain_chaining_merges_the_stories_of_a_busy_fleet(busy):
    events, labels, rollout, spike, _ = busy
    # With the core test off, unrelated events chain the rollout and the spike together:
    # why the core test is there.
    chained = group_incidents(events, labels, step_seconds=STEP, rule=GroupingRule(core_alpha=1))
    assert _find(chained, rollout).incident_id == _find(chained, spike).incident_id


@pytest.mark.parametrize("reverse", [False, True], ids=["oldest-first", "newest-first"])
def test_busy_fleet_same_incidents_after_partial_runs(busy, reverse):
    events, labels, _, _, result = busy
    edges = [DAY + pd.Timedelta(hours=h) for h in (0, 7, 13, 24)]
    batches = _batches(events, edges)
    store = Store(labels)
    for batch in reversed(batches) if reverse else batches:
        store.run(batch)
    assert store.incidents == result.by_id()


# --------------------------------------------------------------------------- the window rule


def _pair(dt: pd.Timedelta, type_a: str = "LS", type_b: str = "LS", effect_b: float = 1.0):
    return pd.DataFrame([_row("a", DAY, type_a, 1.0), _row("b", DAY + dt, type_b, effect_b)])


@pytest.mark.parametrize(
    ("type_a", "type_b"), [("LS", "LS"), ("AO", "AO"), ("AO", "IO"), ("TC", "LS")]
)
def test_link_reach_is_the_sum_of_the_half_widths(type_a, type_b):
    labels = {"a": {}, "b": {}}
    reach = pd.Timedelta(seconds=(TIME_TOLERANCE[type_a] + TIME_TOLERANCE[type_b]) * STEP)
    at = group_incidents(_pair(reach, type_a, type_b), labels, step_seconds=STEP)
    beyond = group_incidents(
        _pair(reach + pd.Timedelta(seconds=1), type_a, type_b), labels, step_seconds=STEP
    )
    assert len(at.incidents) == 1 and at.incidents[0].n_series == 2
    assert beyond.incidents == ()


def test_window_scales_with_each_series_sampling_interval():
    labels = {"a": {}, "b": {}}
    events = _pair(pd.Timedelta(minutes=50), "AO", "AO")
    # 0.5 sample each side: 5-minute series are 5 minutes apart at most; hourly ones 60.
    assert group_incidents(events, labels, step_seconds=STEP).incidents == ()
    hourly = group_incidents(events, labels, step_seconds=3600.0)
    assert hourly.incidents[0].n_series == 2
    mixed = group_incidents(events, labels, step_seconds={"a": 300.0, "b": 6000.0})
    assert mixed.incidents[0].n_series == 2  # 150 s + 3000 s >= 50 min


def test_chains_join_into_one_incident_in_any_order():
    labels = {s: {} for s in "abc"}
    # a-b and b-c are 30 minutes apart (within the 35-minute LS reach); a-c are 60.
    rows = [_row(s, DAY + pd.Timedelta(minutes=30 * i), "LS", 1.0) for i, s in enumerate("abc")]
    one = group_incidents(pd.DataFrame(rows), labels, step_seconds=STEP)
    assert [i.series_ids for i in one.incidents] == [("a", "b", "c")]
    other = group_incidents(pd.DataFrame(rows[::-1]), labels, step_seconds=STEP)
    assert other.incidents == one.incidents
    # Without b, a and c are two lone events.
    assert group_incidents(pd.DataFrame(rows[::2]), labels, step_seconds=STEP).incidents == ()


def test_direction_and_quantity_must_agree():
    labels = {"a": {}, "b": {}, "c": {}}
    opposite = _pair(pd.Timedelta(0), effect_b=-1.0)
    assert group_incidents(opposite, labels, step_seconds=STEP).incidents == ()
    spread = _pair(pd.Timedelta(0), "LS", "VC")
    assert group_incidents(spread, labels, step_seconds=STEP).incidents == ()
    down = pd.DataFrame([_row(s, DAY, "VC", -0.5) for s in "abc"])
    (inc,) = group_incidents(down, labels, step_seconds=STEP).incidents
    assert (inc.quantity, inc.direction, inc.n_series) == ("spread", "down", 3)


def test_min_series_and_untimed_events():
    labels = {s: {} for s in "abc"}
    rows = [_row(s, DAY, "AO", 1.0) for s in "ab"]
    untimed = dict(_row("c", DAY, "AO", 1.0), event_time="41", event_ts=pd.NaT)
    events = pd.DataFrame([*rows, untimed])
    result = group_incidents(events, labels, step_seconds=STEP)
    assert result.n_untimed == 1 and result.incidents[0].series_ids == ("a", "b")
    assert (
        group_incidents(
            events, labels, step_seconds=STEP, rule=GroupingRule(min_series=3)
        ).incidents
        == ()
    )


def test_naive_times_are_utc():
    labels = {"a": {}, "b": {}}
    aware = _pair(pd.Timedelta(0))
    naive = aware.assign(event_ts=aware["event_ts"].dt.tz_localize(None))
    assert (
        group_incidents(naive, labels, step_seconds=STEP).incidents
        == group_incidents(aware, labels, step_seconds=STEP).incidents
    )


def test_needed_span_covers_what_can_act_on_the_span():
    labels = {"a": {}, "b": {}, "c": {}}
    events = _pair(pd.Timedelta(0), "AO", "AO")
    margin = pd.Timedelta(GroupingRule().margin(STEP * 1e9), unit="ns")
    # (144 + 4 * 3.5) samples of 5 minutes: 13 h 10 min.
    assert margin == pd.Timedelta(hours=13, minutes=10)
    span = (DAY, DAY)
    seen = (DAY - pd.Timedelta(days=1), DAY + pd.Timedelta(days=1))
    result = group_incidents(
        events, labels, step_seconds=STEP, span=span, loaded=span, observed=seen
    )
    assert not result.complete
    assert result.needed == (DAY - margin, DAY + margin)
    again = group_incidents(
        events, labels, step_seconds=STEP, span=span, loaded=result.needed, observed=seen
    )
    assert again.complete and again.incidents == result.incidents
    # A third series joining 30 minutes later widens what must be read by as much.
    later = pd.concat([events, pd.DataFrame([_row("c", DAY + pd.Timedelta(minutes=5), "AO", 1.0)])])
    wide = group_incidents(
        later, labels, step_seconds=STEP, span=span, loaded=result.needed, observed=seen
    )
    assert wide.incidents[0].n_series == 3
    assert wide.needed == (DAY - margin, DAY + pd.Timedelta(minutes=5) + margin)
    # Incidents outside the span asked for are left out.
    off = (DAY + pd.Timedelta(hours=1), DAY + pd.Timedelta(hours=2))
    assert group_incidents(events, labels, step_seconds=STEP, span=off).incidents == ()


# --------------------------------------------------------------------------- shared attributes


def test_hypergeometric_tail_against_scipy(scenario):
    _, labels, truth, result = scenario
    for inc in result.incidents:
        for s in inc.labels:
            # Reference: scipy.stats.hypergeom(M=population, n=carriers, N=draws).sf(k - 1).
            want = hypergeom.sf(s.members_with - 1, s.fleet_known, s.fleet_with, s.members_known)
            assert_allclose(s.p_value, want, rtol=1e-9)
            assert s.members_with >= MIN_CARRIERS
    # Counts against the labels table itself.
    inc = _find(result, truth["spike"])
    r3 = next(s for s in inc.labels if (s.label, s.value) == ("rack", "r3"))
    assert r3.fleet_with == int((labels["rack"] == "r3").sum()) == 20
    assert r3.members_with == r3.members_known == 20


def test_hypergeometric_tail_by_hand():
    # Fleet of 10 series, 4 on firmware x; 3 members, 2 of them on x.
    # P(X >= 2) = [C(4,2) C(6,1) + C(4,3) C(6,0)] / C(10,3) = (6*6 + 4*1) / 120 = 1/3.
    fleet = {f"s{i}": {"firmware": "x" if i < 4 else "y"} for i in range(10)}
    (share,) = label_shares(["s0", "s1", "s7"], fleet, alpha=0.05)
    assert (share.value, share.members_with, share.members_known) == ("x", 2, 3)
    assert_allclose(share.p_value, 1 / 3, rtol=1e-9)
    assert_allclose(share.p_value, (math.comb(4, 2) * 6 + math.comb(4, 3)) / math.comb(10, 3))
    assert not share.shared
    assert share.p_adjusted == share.p_value  # one value tested: nothing to adjust


def test_holm_adjustment_against_statsmodels():
    rng = np.random.default_rng(7)
    # 1,000 series; the first 30 on new firmware; series in trios sharing a chassis.
    fleet = {
        f"s{i:04d}": {
            "rack": f"r{i % 5}",
            "firmware": "new" if i < 30 else "old",
            "chassis": f"c{i // 3}",
        }
        for i in range(1000)
    }
    # 20 series on new firmware (complete chassis c0..c5) and 5 others.
    picked = [*range(20), *rng.choice(np.arange(30, 1000), size=5, replace=False)]
    shares = label_shares([f"s{i:04d}" for i in picked], fleet, alpha=0.01)
    p = np.array([s.p_value for s in shares])
    # Reference: statsmodels.stats.multitest.multipletests(method="holm").
    reject, adjusted, _, _ = multipletests(p, alpha=0.01, method="holm")
    assert_allclose([s.p_adjusted for s in shares], adjusted, rtol=1e-8)
    majority = [s.members_with >= MIN_MEMBER_SHARE * s.members_known for s in shares]
    assert [s.shared for s in shares] == [r and m for r, m in zip(reject, majority, strict=True)]
    # Whole chassis are over-represented (3 of 3) but describe a few members only.
    minority = {s.value for s, r, m in zip(shares, reject, majority, strict=True) if r and not m}
    assert {"c0", "c1", "c2", "c3", "c4", "c5"} <= minority
    assert [(s.label, s.value) for s in shares if s.shared] == [("firmware", "new")]


def test_single_carriers_of_rare_values_are_not_tested():
    # Every series has its own host: one member per host value is not a shared host.
    fleet = {f"h{i}": {"host": f"h{i}", "rack": "r1" if i < 3 else "r2"} for i in range(1000)}
    shares = label_shares(["h0", "h1", "h2"], fleet)
    assert [(s.label, s.value, s.shared) for s in shares] == [("rack", "r1", True)]


def test_unknown_label_values_are_left_out_of_both_counts():
    fleet = {"a": {"rack": "r1"}, "b": {"rack": "r1"}, "c": {"rack": None}, "d": {"rack": "r2"}}
    (share,) = label_shares(["a", "b", "c"], fleet)
    assert (share.members_with, share.members_known, share.fleet_with, share.fleet_known) == (
        2,
        2,
        2,
        3,
    )
    assert_allclose(share.p_value, hypergeom.sf(1, 3, 2, 2))


def test_labels_from_a_frame_with_a_series_column_and_from_a_mapping():
    frame = make_labels().reset_index()
    mapping = {
        r["series_id"]: {k: r[k] for k in ("rack", "firmware", "metric")}
        for r in frame.to_dict("records")
    }
    a, b = fleet_labels(frame), fleet_labels(mapping)
    assert (a.series_ids, a.names, a.values) == (b.series_ids, b.names, b.values)
    assert a.size == 80 and a.names == ("firmware", "metric", "rack")


def test_record_round_trip(scenario):
    _, _, _, result = scenario
    for inc in result.incidents:
        assert Incident.from_record(json.loads(json.dumps(inc.to_record()))) == inc
        record = inc.to_record()
        assert set(record) >= INCIDENT_FIELDS
        assert set(record["members"][0]) >= INCIDENT_MEMBER_FIELDS


# --------------------------------------------------------------------------- bad input


def _good():
    return _pair(pd.Timedelta(0))


@pytest.mark.parametrize(
    ("change", "match"),
    [
        (
            lambda e: e.drop(columns=["event_ts", "status"]),
            r"lacks the column\(s\) event_ts, status",
        ),
        (lambda e: e.assign(event_type=["LS", "XX"]), r"unknown event_type value\(s\) \['XX'\]"),
        (
            lambda e: e.assign(status=["confirmed", "maybe"]),
            r"unknown status value\(s\) \['maybe'\]",
        ),
        (lambda e: e.assign(effect=[1.0, np.nan]), r"missing or infinite effect at series 'b'"),
        (lambda e: e.assign(t_stat=[np.inf, 1.0]), r"missing or infinite t_stat at series 'a'"),
        (lambda e: e.assign(effect=["1", "x"]), r"column effect must hold numbers"),
        (lambda e: e.assign(event_ts=["2031-01-01", "soon"]), r"event_ts must hold date-times"),
        (
            lambda e: e.assign(series_id=["a", "a"], event_time=["t", "t"]),
            r"same \(series_id, event_time\) more than once: series 'a' at 't'",
        ),
        (lambda e: e.assign(series_id=["a", None]), r"without a series_id or event_time"),
        (lambda e: e.assign(series_id=["a", "zz"]), r"labels has no row for series 'zz'"),
        (lambda e: list(e.to_dict("records")), r"must be a pandas DataFrame"),
    ],
)
def test_bad_events(change, match):
    with pytest.raises(ConfigError, match=match):
        group_incidents(change(_good()), {"a": {}, "b": {}}, step_seconds=STEP)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"step_seconds": 0}, r"step_seconds is 0; give the sampling interval"),
        ({"step_seconds": {"a": 300}}, r"no sampling interval for series 'b'"),
        ({"step_seconds": {"a": 300, "b": "x"}}, r"step_seconds of series 'b' is 'x'"),
        ({"step_seconds": STEP, "rule": {"min_series": 3}}, r"rule must be a GroupingRule"),
        (
            {"step_seconds": STEP, "span": (DAY, DAY - pd.Timedelta(1))},
            r"span ends .* before it starts",
        ),
        ({"step_seconds": STEP, "span": (DAY,)}, r"span must be a pair"),
        ({"step_seconds": STEP, "loaded": (DAY, DAY)}, r"loaded needs span"),
        (
            {"step_seconds": STEP, "span": (DAY, DAY), "loaded": (DAY, DAY)},
            r"loaded needs observed",
        ),
        ({"step_seconds": STEP, "observed": ("x", DAY)}, r"observed must be a pair"),
    ],
)
def test_bad_knobs(kwargs, match):
    with pytest.raises(ConfigError, match=match):
        group_incidents(_good(), {"a": {}, "b": {}}, **kwargs)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"min_series": 1}, r"min_series is 1; give a whole number >= 2"),
        ({"alpha": 1.5}, r"alpha is 1.5; give a probability"),
        ({"core_alpha": 0}, r"core_alpha is 0; give a probability"),
        ({"tolerance": {"XX": 1}}, r"unknown type 'XX'"),
        ({"tolerance": {"LS": -1}}, r"tolerance of LS is -1"),
        ({"background": 5}, r"background is 5; give a number of samples above the widest link"),
    ],
)
def test_bad_rules(kwargs, match):
    with pytest.raises(ConfigError, match=match):
        GroupingRule(**kwargs)


def test_rule_completes_tolerances():
    rule = GroupingRule(tolerance={"LS": 1.0})
    assert dict(rule.tolerance) == {**TIME_TOLERANCE, "LS": 1.0}


@pytest.mark.parametrize(
    ("labels", "match"),
    [
        ([("a", "r1")], r"labels must be a DataFrame or a mapping"),
        ({}, r"labels has no series"),
        ({"a": "r1", "b": {}}, r"labels of series 'a' is a str, not a mapping"),
        (
            pd.DataFrame({"series_id": ["a", "a", "b"], "rack": ["r1", "r2", "r1"]}),
            r"labels has two rows for series 'a'",
        ),
    ],
)
def test_bad_labels(labels, match):
    with pytest.raises(ConfigError, match=match):
        group_incidents(_good(), labels, step_seconds=STEP)


def test_bad_reconcile_input(scenario):
    _, _, _, result = scenario
    inc = result.incidents[0]
    with pytest.raises(ConfigError, match=r"list .* twice"):
        reconcile_incidents([inc, inc], result)
    with pytest.raises(ConfigError, match="must hold Incident values"):
        reconcile_incidents([inc.to_record()], result)
    with pytest.raises(ConfigError, match="stored incident record is malformed"):
        Incident.from_record({"incident_id": "x"})
    with pytest.raises(ConfigError, match="members lists a series more than once"):
        label_shares(["a", "a"], {"a": {}})
    changed = replace(inc, median_effect_pct=(inc.median_effect_pct or 0) * (1 + 1e-12))
    assert reconcile_incidents([changed], [inc]).counts()["unchanged"] == 1
