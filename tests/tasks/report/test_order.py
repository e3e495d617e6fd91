"""The order of a report's list: by size or evidence or time, dismissed events last.

Reference: each order's definition (module notes of changekind.tasks.report.order)
applied by Python's ``sorted`` to plain tuples built here from the events'
fields, independently of the code under test; and the order must not depend
on the order the events came in (every permutation of the input).
"""

from __future__ import annotations

import itertools
import math

import pandas as pd
import pytest

from changekind.tasks.errors import ConfigError
from changekind.tasks.report import SORT_ORDERS, Verdict, summarize_events
from changekind.tasks.report.order import DEFAULT_SORT, order_events
from tests.tasks.report.pair import pair_event

BASE = pd.Timestamp("2031-05-04T00:00:00Z")


def _event(sid: str, hours: float, effect: float, pct: float | None, t: float):
    e = pair_event(0, "LS", effect, t)
    fields = {name: getattr(e, name) for name in e.__slots__}
    fields.update(
        series_id=sid,
        event_time=(BASE + pd.Timedelta(hours=hours)).isoformat(),
        effect_pct=pct,
    )
    return type(e)(**fields)


EVENTS = [
    _event("a", 1, effect=1.4, pct=3.8, t=9.3),  # tiny long shift, large t
    _event("b", 2, effect=-30.0, pct=-60.0, t=-4.5),  # big spike, modest t
    _event("c", 3, effect=5.0, pct=None, t=6.0),  # level near zero: no percentage
    _event("d", 4, effect=30.0, pct=60.0, t=4.5),  # ties b on |effect| and |pct| and |t|
    _event("e", 5, effect=-2.0, pct=-12.0, t=7.7),
]


def _expected(events, sort):
    def magnitude(value):
        return (1, 0.0) if value is None or not math.isfinite(value) else (0, -abs(value))

    main = {
        "effect_pct": lambda e: magnitude(e.effect_pct),
        "effect": lambda e: magnitude(e.effect),
        "t": lambda e: magnitude(e.t_stat),
        "time": lambda e: (0, -pd.Timestamp(e.event_time).value),
    }[sort]
    ranked = sorted(events, key=lambda e: (main(e), -abs(e.t_stat), e.series_id, e.event_time))
    return [e.series_id for e in ranked]


@pytest.mark.parametrize("sort", list(SORT_ORDERS))
def test_each_order_follows_its_definition_whatever_the_input_order(sort):
    expected = _expected(EVENTS, sort)
    for perm in itertools.permutations(EVENTS):
        got = [perm[i].series_id for i in order_events(list(perm), sort=sort)]
        assert got == expected, perm


def test_the_orders_put_what_matters_first():
    # By size the big spike (b, d) leads; by |t| the tiny shift (a) would have.
    assert _ids("effect_pct")[:2] == ["b", "d"] and _ids("effect_pct")[-1] == "c"
    assert _ids("t")[0] == "a"
    assert _ids("effect")[:3] == ["b", "d", "c"]
    assert _ids("time") == ["e", "d", "c", "b", "a"]
    assert DEFAULT_SORT == "effect_pct"


def _ids(sort, verdicts=None):
    return [EVENTS[i].series_id for i in order_events(EVENTS, sort=sort, verdicts=verdicts)]


@pytest.mark.parametrize("sort", list(SORT_ORDERS))
def test_dismissed_events_never_rank_first(sort):
    first = _ids(sort)[0]
    first_event = next(e for e in EVENTS if e.series_id == first)
    verdicts = {(first_event.series_id, first_event.event_time): Verdict("dismissed", "noise")}
    ranked = _ids(sort, verdicts)
    assert ranked[-1] == first and ranked[:-1] == [s for s in _ids(sort) if s != first]
    # Other verdicts do not move an event.
    kept = {(first_event.series_id, first_event.event_time): Verdict("explained", "rollout")}
    assert _ids(sort, kept) == _ids(sort)
    summary = summarize_events(EVENTS, sort=sort, verdicts=verdicts)
    assert summary.n_dismissed == 1 and EVENTS[summary.order[-1]].series_id == first


def test_an_unknown_order_is_refused_with_the_choices():
    with pytest.raises(ConfigError, match="sort must be one of effect_pct, effect, t, time"):
        order_events(EVENTS, sort="size")
