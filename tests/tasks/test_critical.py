"""Critical values: one function, the number of tests, heavy tails."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats
from scipy.signal import lfilter

from changekind.tasks.critical import (
    check_critical,
    critical_value,
    default_critical,
    fit_tail,
)
from changekind.tasks.detect import analyse_series
from changekind.tasks.search import robust_sigma


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
    stamps = pd.date_range("2026-01-01", periods=480, freq="h")
    total = 0
    for _ in range(10):
        shocks = rng.standard_t(3, size=480) / math.sqrt(3)
        result = analyse_series("t3", stamps, lfilter([1.0], [1.0, -0.6], shocks) + 50)
        total += len(result.events)
        assert result.model.tail is not None
    assert total <= 3
