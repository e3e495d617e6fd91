"""Bounded cost: effect registry, work budget, business days, recurring shapes, warm scale."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from changekind.tasks.arma import pi_weights, psi_weights
from changekind.tasks.budget import WorkBudget
from changekind.tasks.decompose import regularize
from changekind.tasks.detect import analyse_series
from changekind.tasks.effects import EFFECTS, TC_DECAY
from changekind.tasks.screen import screen_new_points
from changekind.tasks.simulate import arma_filter


def _ar1(rng, n, phi=0.5):
    return arma_filter(rng.normal(size=n), ar=(phi,))


def test_each_effect_filtered_by_pi_is_its_residual_pattern():
    # Box and Tiao (1975): the residual signature of an effect is pi(B) applied
    # to its series path; checked here with scipy's lfilter as the filter.
    rng = np.random.default_rng(1)
    stamps = pd.date_range("2026-01-01", periods=300, freq="h")
    model = analyse_series("m", stamps, _ar1(rng, 300) + 10).model
    n = 80
    pi, psi = pi_weights(model, n), psi_weights(model, n)
    for kind in ("AO", "LS", "TC", "IO"):
        path = EFFECTS[kind].path(n, delta=0.6, psi=psi)
        filtered = np.convolve(path, pi)[:n]  # pi(B) applied to the path
        assert_allclose(EFFECTS[kind].pattern(pi, delta=0.6), filtered, atol=1e-9)
    assert_allclose(EFFECTS["TC"].path(3), [1.0, TC_DECAY, TC_DECAY**2])
    with pytest.raises(ValueError, match="psi"):
        EFFECTS["IO"].path(5)


def test_a_spent_budget_keeps_what_it_has_and_says_so():
    rng = np.random.default_rng(2)
    n = 600
    y = _ar1(rng, n) + 20
    y[[90, 230, 310, 470, 520]] += 9.0  # irregular: regular spikes are a pattern
    stamps = pd.date_range("2026-01-01", periods=n, freq="h")
    full = analyse_series("b", stamps, y)
    assert not full.budget_spent and {90, 230, 310, 470, 520} <= {e.position for e in full.events}
    tight = analyse_series("b", stamps, y, budget=WorkBudget(events=2, exact_fits=0))
    assert tight.budget_spent and tight.n_fits == 0
    assert any("work budget spent" in note for note in tight.notes)
    assert 1 <= len(tight.events) <= len(full.events)
    with pytest.raises(ValueError, match="work budget"):
        WorkBudget(seconds=0)


def test_business_day_data_is_analysed_on_weekdays():
    rng = np.random.default_rng(3)
    days = pd.bdate_range("2020-01-06", periods=700)
    y = 100 + np.cumsum(rng.normal(size=700))
    y[400] += 12.0
    series = regularize("idx", days, y)
    assert series.business_days and series.nobs == 700 and series.n_missing == 0
    result = analyse_series("idx", days, y)
    assert result.model.business_days and result.n_missing == 0
    hits = [e for e in result.events if e.event_time == days[400].isoformat()]
    assert len(hits) == 1 and hits[0].event_type == "AO"
    # The warm path places the grid by weekdays too: the known spike is not found again.
    context = regularize("idx", days[300:], y[300:])
    warm = screen_new_points(result.model, context, 20, known=result.events)
    assert warm.events == ()
    # Calendar-day data keeps its calendar grid.
    assert not regularize(
        "cal", pd.date_range("2020-01-06", periods=60, freq="D"), y[:60]
    ).business_days


def test_a_sawtooth_is_one_pattern_and_a_staircase_is_level_shifts():
    rng = np.random.default_rng(4)
    n = 2000
    stamps = pd.date_range("2026-01-01", periods=n, freq="h")
    saw = 10.0 * (np.arange(n) % 50) / 50 + 0.2 * rng.normal(size=n)
    result = analyse_series("saw", stamps, saw)
    assert [p.period for p in result.patterns] == [50]
    assert len(result.events) <= 2
    stairs = 5.0 * (np.arange(n) // 100) + _ar1(rng, n, 0.3)
    result = analyse_series("stairs", stamps, stairs)
    assert result.patterns == ()
    shifts = {e.position for e in result.events if e.event_type == "LS"}
    assert len(shifts & set(range(100, n, 100))) >= 15  # of 19 steps of 5 noise sigma
    assert len(result.events) <= 21


def test_warm_residual_scale_is_a_typed_field():
    rng = np.random.default_rng(5)
    stamps = pd.date_range("2026-03-01", periods=600, freq="min")
    y = _ar1(rng, 600) + 5
    cold = analyse_series("w", stamps[:540], y[:540])
    warm = screen_new_points(cold.model, regularize("w", stamps[300:], y[300:]), 60)
    assert warm.resid_scale is not None and 0.6 < warm.resid_scale < 1.4
    noisy = y.copy()
    noisy[540:] += 3.0 * rng.normal(size=60)
    louder = screen_new_points(cold.model, regularize("w", stamps[300:], noisy[300:]), 60)
    assert louder.resid_scale > 2.0
