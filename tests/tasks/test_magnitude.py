"""tasks/magnitude.py: the minimum effect a run writes (issue 10, step 2).

The floors are checked against events whose sizes are set by hand, each unit
against its own Event field; the fleet-level check that a filtered event is
neither written nor logged is in tests/flows/test_min_effect.py.
"""

from __future__ import annotations

import math
from dataclasses import replace

import pytest

from changekind.tasks.magnitude import MinEffect, keep_effects, parse_min_effect
from changekind.tasks.types import Event

BASE = Event(
    series_id="gw-2/queue",
    position=10,
    event_time="2031-05-04T12:10:00",
    event_type="LS",
    effect=1.4,
    effect_pct=3.8,
    t_stat=9.3,
    se=0.15,
    type_weights=(("AO", 0.0), ("LS", 1.0), ("TC", 0.0), ("IO", 0.0)),
    status="confirmed",
    decay=None,
    half_life=None,
    level=36.8,
    model="ARIMA(1,0,0)",
    effect_sigma=1.9,
)


@pytest.mark.parametrize(
    ("text", "value", "unit"),
    [
        ("5%", 5.0, "pct"),
        (" 2.5 % ", 2.5, "pct"),
        ("2sigma", 2.0, "sigma"),
        ("2 SIGMA", 2.0, "sigma"),
        ("1.5σ", 1.5, "sigma"),
        ("3sd", 3.0, "sigma"),
        ("3.5", 3.5, "units"),
        ("0", 0.0, "units"),
        ("1e-3", 0.001, "units"),
    ],
)
def test_parse(text, value, unit):
    floor = parse_min_effect(text)
    assert floor == MinEffect(value, unit)
    assert parse_min_effect(floor.text) == floor


@pytest.mark.parametrize("text", ["-5%", "five", "5 percent", "%", "2sigmas", "nan"])
def test_bad_text_names_the_forms(text):
    with pytest.raises(ValueError, match=r"5%.*2sigma.*3\.5"):
        parse_min_effect(text)


def test_none_and_empty_mean_no_floor():
    assert parse_min_effect(None) is None
    assert parse_min_effect("  ") is None
    assert keep_effects([BASE], None) == (BASE,)


def test_each_unit_reads_its_own_field():
    small_pct = parse_min_effect("5%")  # 3.8 % of the level: below
    assert not small_pct.passes(BASE)
    assert small_pct.passes(replace(BASE, effect=-2.0, effect_pct=-5.4))  # |effect| counts
    assert parse_min_effect("1.5sigma").passes(BASE)  # 1.9 sigma
    assert not parse_min_effect("2sigma").passes(BASE)
    assert parse_min_effect("1.4").passes(BASE)  # equal passes
    assert not parse_min_effect("1.41").passes(BASE)


def test_an_event_without_the_measure_is_kept():
    no_pct = replace(BASE, effect_pct=None)
    assert parse_min_effect("50%").passes(no_pct)
    assert parse_min_effect("9sigma").passes(replace(BASE, effect_sigma=None))
    assert parse_min_effect("9sigma").passes(replace(BASE, effect_sigma=math.nan))


def test_keep_effects_filters_in_order():
    big = replace(BASE, event_time="2031-05-04T13:00:00", effect=9.0, effect_pct=24.0)
    assert keep_effects([BASE, big], parse_min_effect("5%")) == (big,)
