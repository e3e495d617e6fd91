"""Critical values: one function, the number of tests, heavy tails."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from changekind.tasks.critical import (
    Thresholds,
    check_critical,
    critical_value,
    default_critical,
    fit_tail,
)
from changekind.tasks.detect import analyse_series
from changekind.tasks.search import robust_sigma
from changekind.tasks.simulate import arma_filter

HOURS = pd.date_range("2026-01-01", periods=480, freq="h")


def _t3_ar1(rng: np.random.Generator, *, kick: tuple[int, float] | None = None) -> np.ndarray:
    """480 hourly points of AR(1), phi 0.6, level 50, with Student-t(3)
    innovations scaled to unit variance; ``kick`` (position, size) adds to one
    innovation."""
    shocks = rng.standard_t(3, size=HOURS.size) / math.sqrt(3)
    if kick is not None:
        shocks[kick[0]] += kick[1]
    return arma_filter(shocks, ar=(0.6,)) + 50


def test_critical_value_is_the_bonferroni_bound_over_the_tests():
    # Reference: scipy.stats.norm quantiles.  480 points x 4 types, 0.2 false
    # events expected per clean series.
    assert_allclose(critical_value(4 * 480, 0.2), stats.norm.isf(0.2 / (2 * 1920)), rtol=1e-12)
    assert_allclose(critical_value(4 * 480, 0.2), 3.88, atol=0.005)
    assert critical_value(10, 0.2) == 3.0  # the floor for tiny test counts
    assert default_critical(480) == critical_value(1920)
    # Per unit time: 60 points an hour for a day, one false event a month.
    assert_allclose(critical_value(4 * 60 * 24, 1 / 30), stats.norm.isf(1 / 30 / (2 * 5760)))
    for bad in (0, -1):
        with pytest.raises(ValueError, match="n_tested"):
            critical_value(bad)
    with pytest.raises(ValueError, match="allowance"):
        critical_value(100, 0)


def test_one_check_of_a_user_critical_value():
    assert check_critical(None) is None and check_critical(3.5) == 3.5
    for bad in (0, 1.0, -2, math.nan, 101):
        with pytest.raises(ValueError, match="critical value"):
            check_critical(bad)


def test_tail_fit_tells_gaussian_from_student_t():
    rng = np.random.default_rng(7)
    for _ in range(5):
        e = rng.normal(size=2000)
        e[rng.choice(2000, 10, replace=False)] += 6.0  # a few real events
        assert fit_tail(e, robust_sigma(e)).gaussian
    t3 = rng.standard_t(3, size=4000)
    tail = fit_tail(t3, robust_sigma(t3))
    assert 2.4 < tail.df < 4.0  # the generating df is 3
    # The critical value then sits at the fitted t's quantile (scipy.stats.t).
    q = 0.2 / (2 * 4 * 4000)
    assert_allclose(default_critical(4000, tail=tail), tail.scale * stats.t.isf(q, tail.df))
    assert default_critical(4000, tail=tail) > 3 * default_critical(4000)


def test_heavy_tailed_clean_series_give_few_false_events():
    # AR(1) with Student-t(3) innovations scaled to unit variance, no events:
    # with a Gaussian critical value such series gave about 40 times the false
    # events of Gaussian ones (shared method notes).
    rng = np.random.default_rng(8)
    total = 0
    for _ in range(10):
        result = analyse_series("t3", HOURS, _t3_ar1(rng))
        total += len(result.events)
        assert result.model.tail is not None
    assert total <= 3


def test_tail_index_of_student_t_residuals():
    # Reference: the tail index of a Student t is its degrees of freedom (a
    # textbook property); the samples come from scipy.stats.t.
    rng = np.random.default_rng(21)
    for df in (2.5, 4.0):
        t = stats.t.rvs(df, size=20_000, random_state=rng)
        tail = fit_tail(t, robust_sigma(t))
        assert abs(tail.df - df) < 0.25 * df
        # The scale puts the right share beyond the 2 % point: P(|s T| > X_(k+1)) = (k+1)/m.
        z = np.sort(np.abs(t) / robust_sigma(t))[::-1]
        k = int(0.02 * z.size)
        assert_allclose(2 * stats.t.sf(z[k] / tail.scale, tail.df), (k + 1) / z.size, rtol=1e-3)


def test_each_effect_pattern_gets_its_own_critical_value_under_heavy_tails():
    limits = Thresholds(gaussian=4.0, single=12.0, alpha=3.0)
    # One residual (IO): the single value.  ||h||_3 / ||h||_2 by numpy for the rest.
    assert limits.for_pattern(np.array([1.0])) == 12.0
    ao = np.array([1.0, -0.6])  # an AO's residual pattern under AR(1), phi = 0.6
    expected = 12.0 * np.linalg.norm(ao, 3) / np.linalg.norm(ao, 2)
    assert_allclose(limits.for_pattern(ao), expected)
    assert 4.0 < limits.for_pattern(ao) < 12.0
    # A level shift summed over 2,000 equal weights: 2000^(1/3 - 1/2) * 12 < 4.
    assert limits.for_pattern(np.full(2000, 0.4)) == 4.0
    # along(): the same value as for_pattern on the pattern cut at n - T.
    n = 50
    ls = np.concatenate([[1.0], np.full(n - 1, 0.4)])
    along = limits.along(ls, n)
    for T in (0, 10, 45, 48, 49):
        assert_allclose(along[T], limits.for_pattern(ls[: n - T]))
    assert along[-1] == 12.0  # at the last point a shift is one residual
    # Gaussian tails or a user's value: one number for every pattern.
    assert Thresholds(4.0).along(ls, n) == 4.0 and not Thresholds(4.0).heavy


def test_heavy_tails_keep_level_shifts_findable():
    # AR(1) with Student-t(3) innovations (unit variance), a 5-sigma level
    # shift at 3/4 of 480 hourly points.  Measured: per-pattern critical
    # values found it in 9 of 10 series; holding every type to the
    # single-residual value (the earlier rule) found it in 6.
    rng = np.random.default_rng(5)
    found = 0
    for _ in range(10):
        y = _t3_ar1(rng)
        y[360:] += 5.0 / math.sqrt(1 - 0.36)
        result = analyse_series("t3", HOURS, y)
        found += any(e.event_type == "LS" and abs(e.position - 360) <= 1 for e in result.events)
    assert found >= 8


def test_spread_effects_are_held_to_the_clipped_residual_bound():
    limits = Thresholds(gaussian=4.0, single=12.0, alpha=3.0)
    # rho = max|h| / ||h||_2; the bound CLIP rho + gaussian sqrt(1 - rho^2) (numpy).
    ls = np.array([1.0, 0.4, 0.4, 0.4])
    rho = 1.0 / np.linalg.norm(ls)
    assert_allclose(limits.for_spread(ls), 3.0 * rho + 4.0 * math.sqrt(1 - rho**2))
    assert 4.0 < limits.for_spread(np.full(2000, 0.4)) < 4.07  # far from the end: near Gaussian
    n = 30
    long = np.concatenate([[1.0], np.full(n - 1, 0.4)])
    along = limits.spread_along(long, n)
    for T in (0, 20, 26, 29):
        assert_allclose(along[T], limits.for_spread(long[: n - T]))


def test_a_lone_large_residual_near_the_end_is_not_a_level_shift_under_heavy_tails():
    # AR(1), Student-t(3) innovations, a 12-sigma spike 10 points before the
    # end of 480 hourly points: clipped at 3 sigma for the spread types, it
    # cannot pass for a shift (an AO or IO if anything).
    rng = np.random.default_rng(9)
    for _ in range(8):
        result = analyse_series("t3", HOURS, _t3_ar1(rng, kick=(470, 12.0)))
        assert not [
            e for e in result.events if e.event_type in ("LS", "TC") and abs(e.position - 470) <= 2
        ]


def test_many_real_spikes_are_not_taken_for_a_heavy_tail():
    # Simulated (numpy default_rng, fixed seed): hourly AR(1), phi = 0.5,
    # Gaussian innovations, 80 additive outliers of 6 to 8 innovation sds at
    # distinct positions at least 8 apart among 3,000 points.  The largest
    # residuals are then the spikes' and look like a heavy tail (measured
    # before the shoulder check: tail index 2.05, pulse critical value 160-173,
    # no spike reported); the residuals without them are Gaussian.
    rng = np.random.default_rng(100)
    n, k = 3000, 80
    y = arma_filter(rng.normal(size=n), ar=(0.5,))
    spots = np.sort(rng.choice(np.arange(10, n - 10)[::8], k, replace=False))
    y[spots] += rng.uniform(6, 8, k) * rng.choice([-1, 1], k)
    stamps = pd.date_range("2026-01-01", periods=n, freq="h")
    result = analyse_series("spikes", stamps, y + 100)
    assert result.model.tail is not None and result.model.tail.gaussian
    assert result.pulse_critical is None
    found = {e.position for e in result.events}
    assert len(found & set(spots.tolist())) >= 78  # measured: 80 of 80 at this seed
    assert len(found - set(spots.tolist())) <= 2  # measured: 0
