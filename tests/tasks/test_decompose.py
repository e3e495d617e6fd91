"""regularize() and decompose(): the grid, the duplicate rule, the seasonal profile."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from changekind.tasks.decompose import MIN_POINTS, decompose, natural_periods, regularize
from changekind.tasks.errors import (
    AllMissingError,
    ConstantSeriesError,
    NonFiniteError,
    NonNumericError,
    SeriesError,
    TimestampError,
    TooShortError,
)


def test_regularize_sorts_fills_gaps_and_keeps_input_text():
    stamps = ["2026-05-01 00:10", "2026-05-01 00:00", "2026-05-01 00:05", "2026-05-01 00:25"]
    stamps += [f"2026-05-01 {h:02d}:{m:02d}" for h in (1, 2) for m in range(0, 60, 5)]
    values = np.arange(len(stamps), dtype=float)
    s = regularize("disk-1", stamps, values)
    assert s.step == pd.Timedelta("5min")
    assert s.labels[0] == "2026-05-01 00:00"  # the text as given, not a reformatted time
    assert s.values[0] == 1.0 and s.values[2] == 0.0
    # 00:15 and 00:20 were never reported: gaps on the grid
    assert np.isnan(s.values[3]) and np.isnan(s.values[4])
    assert s.labels[3] is None and s.label(3) == "2026-05-01T00:15:00"
    assert s.nobs == 12 * 3  # 00:00 .. 02:55 on a five-minute grid


def test_duplicates_resolved_by_median_and_jitter_snaps_to_grid():
    base = pd.date_range("2026-05-01", periods=40, freq="1s")
    jitter = pd.to_timedelta(np.random.default_rng(0).uniform(-0.2, 0.2, 40), unit="s")
    stamps = [*list(base + jitter), base[10], base[10]]
    values = [*list(np.ones(40)), 7.0, 10.0]
    values[0] = 2.0
    s = regularize("fan", pd.Series(stamps), values)
    assert s.step == pd.Timedelta("1s")
    assert s.nobs == 40 and s.n_duplicates == 2
    assert s.values[10] == 7.0  # median of 1, 7, 10


def test_monthly_data_uses_calendar_months():
    stamps = pd.date_range("1949-01-01", periods=144, freq="MS")
    s = regularize("m", stamps, np.arange(144.0))
    assert s.nobs == 144 and s.n_missing == 0
    assert s.index[-1] == pd.Timestamp("1960-12-01")
    assert natural_periods(s.step_seconds) == (12,)


def test_numeric_timestamps_are_a_unitless_grid():
    s = regularize("years", np.arange(1871, 1971), np.arange(100.0) % 7)
    assert s.step == 1.0 and s.label(28) == "1899"
    assert not s.is_datetime


def test_natural_periods_follow_the_spacing():
    assert natural_periods(3600) == (24, 168)
    assert natural_periods(300) == (288, 2016)
    assert natural_periods(60) == (1440, 10080)
    assert natural_periods(86400) == (7, 365)
    assert natural_periods(0.001) == ()


@pytest.mark.parametrize(
    ("timestamps", "values", "error", "match"),
    [
        (range(30), ["1.0"] * 29 + ["fast"], NonNumericError, "not numbers.*'fast'"),
        (range(30), [1.0] * 29 + [np.inf], NonFiniteError, "infinite"),
        # float64 overflows when such values are squared (the fit turned them into NaN)
        (range(30), [1.0] * 29 + [1e300], NonFiniteError, "1e\\+300 at 29.*too large"),
        (range(30), [np.nan] * 30, AllMissingError, "every value is missing"),
        (range(10), np.arange(10.0), TooShortError, f"at least {MIN_POINTS}"),
        (range(30), [4.2] * 30, ConstantSeriesError, "every observed value equals 4.2"),
        (
            ["2026-01-01"] * 29 + ["yesterday"],
            np.arange(30.0),
            TimestampError,
            "not ISO 8601.*'yesterday'",
        ),
        ([5] * 30, np.arange(30.0), TimestampError, "two distinct timestamps"),
        ([0, 1, 2, 10**7, *list(range(3, 29))], np.arange(30.0), TimestampError, "too irregular"),
    ],
)
def test_bad_input_names_the_series_and_the_problem(timestamps, values, error, match):
    with pytest.raises(error, match=match) as info:
        regularize("ctl-7/latency", list(timestamps), values)
    assert "ctl-7/latency" in str(info.value)
    assert isinstance(info.value, SeriesError) and isinstance(info.value, ValueError)


def test_a_wrapped_64_bit_counter_is_analysed_not_refused():
    # 2**64 (about 1.8e19) is what a wrapped unsigned counter shows: far below the limit.
    values = np.ones(30)
    values[7] = 2.0**64
    series = regularize("ctl-7/ops", list(range(30)), values)
    assert series.values[7] == 2.0**64


def test_missing_timestamps_are_rejected():
    stamps = pd.Series(pd.date_range("2026-01-01", periods=30, freq="h"))
    stamps[3] = pd.NaT
    with pytest.raises(TimestampError, match="missing"):
        regularize("x", stamps, np.arange(30.0))


def test_profile_recovered_and_level_shift_left_in_the_adjusted_series():
    rng = np.random.default_rng(1)
    n = 24 * 21
    phase = np.arange(n) % 24
    daily = 3.0 * np.sin(2 * np.pi * phase / 24)
    y = 100 + daily + rng.normal(scale=0.5, size=n)
    y[300:] += 8.0  # a level shift must not end up in the seasonal part
    s = regularize("h", pd.date_range("2026-01-01", periods=n, freq="h"), y)
    d = decompose(s)
    assert d.periods == (24,)  # the weekly profile of noise does not earn its keep
    error = d.profiles[0] - (daily[:24] - daily[:24].mean())
    assert np.sqrt(np.mean(error**2)) < 0.2 and np.abs(error).max() < 0.5
    before = d.adjusted[200:290].mean()
    after = d.adjusted[310:400].mean()
    assert_allclose(after - before, 8.0, atol=0.4)
    assert_allclose(d.recompose(), y)


def test_user_periods_need_two_cycles():
    s = regularize("x", np.arange(100), np.random.default_rng(2).normal(size=100))
    assert decompose(s, periods=[10]).periods == (10,)
    with pytest.raises(SeriesError, match="season 60 needs at least 120 points"):
        decompose(s, periods=[60])
    assert decompose(s, periods=[]).periods == ()


def test_long_profiles_are_smoothed_and_found_patterns_are_not():
    rng = np.random.default_rng(4)
    n = 288 * 14  # two weeks of five-minute points
    phase = np.arange(n) % 288
    truth = 2.0 * np.cos(2 * np.pi * phase / 288)
    y = truth + rng.normal(size=n)
    from changekind.tasks.decompose import seasonal_profile

    sharp, _ = seasonal_profile(y, 288, smooth=False)
    smooth, _ = seasonal_profile(y, 288)
    target = truth[:288] - truth[:288].mean()

    def rms(p):
        return float(np.sqrt(np.mean((p - target) ** 2)))

    # Per-phase medians of 14 values: error about 1.25 / sqrt(14) = 0.33 of the
    # noise sd; averaging 13 neighbouring phases cuts it about 3.6-fold.
    assert 0.25 < rms(sharp) < 0.42
    assert rms(smooth) < 0.5 * rms(sharp)
    spikes = np.zeros(n)
    spikes[5::288] = 10.0
    series = regularize("p", pd.date_range("2026-01-01", periods=n, freq="5min"), y + spikes)
    kept = decompose(series, periods=[], extra_periods=[288])
    assert kept.profiles[0][5] > 8.0  # a recurring spike is not smeared over its neighbours


def test_local_times_across_a_clock_change_parse_to_one_grid():
    stamps = pd.date_range("2026-03-29", periods=300, freq="min", tz="Europe/Paris")
    text = [t.isoformat() for t in stamps]  # +01:00, then +02:00 after 02:00
    s = regularize("dst", text, np.random.default_rng(0).normal(size=300))
    assert s.nobs == 300 and s.n_missing == 0 and s.step == pd.Timedelta("1min")
    assert s.labels[0] == "2026-03-29T00:00:00+01:00"


@pytest.mark.parametrize(
    "stamps",
    [
        pd.date_range("2026-01-01", periods=50, freq="h"),
        pd.date_range("2026-01-01", periods=50, freq="250ms"),
        pd.date_range("2026-01-01", periods=50, freq="min", tz="UTC"),
    ],
)
def test_labels_of_typed_times_are_their_isoformat(stamps):
    s = regularize("iso", pd.Series(stamps), np.arange(50.0))
    assert list(s.labels) == [t.isoformat() for t in stamps]


def test_typed_times_out_of_order_with_gaps_and_duplicates_label_each_slot_once():
    """Labels made on demand (zone-less whole seconds) follow the documented rules.

    Reference: pandas' Timestamp.isoformat for the text; the first observation
    of a slot gives its label, a gap has none.
    """
    grid = pd.date_range("2026-02-01", periods=40, freq="min")
    keep = np.r_[0:10, 12:40]  # two missing minutes
    stamps = np.r_[grid[keep], grid[5:6]]  # minute 5 twice
    values = np.r_[np.arange(38.0), 100.0]
    order = np.random.default_rng(3).permutation(stamps.size)
    s = regularize("lazy", pd.Series(stamps[order]), values[order])
    expected = [t.isoformat() for t in grid]
    expected[10] = expected[11] = None
    assert list(s.labels) == expected
    assert s.values[5] == np.median([5.0, 100.0]) and s.n_duplicates == 1
    assert s.label(10) == grid[10].isoformat()  # a gap quotes the grid time
    tail = s.tail(31)
    assert list(tail.labels) == expected[-31:] and tail.label(0) == grid[9].isoformat()


def test_nullable_numbers_are_values_and_their_missing_ones_gaps():
    # Reference: the same numbers as a plain float64 array with NaN where pandas has NA.
    raw = np.random.default_rng(4).normal(size=48)
    plain = raw.copy()
    plain[[3, 17]] = np.nan
    nullable = pd.Series(raw, dtype="Float64")
    nullable[[3, 17]] = pd.NA
    stamps = pd.date_range("2030-01-01", periods=48, freq="h")
    got = regularize("s", stamps, nullable)
    assert_allclose(got.values, regularize("s", stamps, plain).values, equal_nan=True)
    assert got.n_missing == 2


@pytest.mark.parametrize("period", [4, 7, 12, 24])
def test_seasonal_trend_is_the_classical_moving_average_of_statsmodels(period):
    # Oracle: statsmodels.tsa.seasonal.seasonal_decompose (additive), whose
    # trend is the centred moving average over one cycle (2 x period for an
    # even period) and NaN for half a cycle at each end.
    from statsmodels.tsa.seasonal import seasonal_decompose

    from changekind.tasks.decompose import cycle_mean, seasonal_profile

    rng = np.random.default_rng(period)
    n = 10 * period + 3
    phase = np.arange(n) % period
    wave = 2.0 * np.sin(2 * np.pi * phase / period) + (phase == 1)
    y = 5.0 + 0.05 * np.arange(n) + wave + rng.normal(scale=0.3, size=n)
    oracle = seasonal_decompose(y, period=period, model="additive")
    trend = cycle_mean(y, period)
    assert_allclose(trend, oracle.trend, rtol=0, atol=1e-10)  # NaN in the same places
    # Seasonal: ours takes per-phase medians where statsmodels takes means, so
    # the two agree to within the noise of a median of about 10 values
    # (noise sd 0.3; tolerance ours), and exactly without noise.
    profile, _ = seasonal_profile(y, period, smooth=False)
    assert_allclose(profile, oracle.seasonal[:period], atol=0.25)
    clean = 5.0 + 0.05 * np.arange(n) + wave
    exact, _ = seasonal_profile(clean, period, smooth=False)
    assert_allclose(exact, seasonal_decompose(clean, period=period).seasonal[:period], atol=1e-10)


def test_moving_average_trend_tolerates_gaps():
    from changekind.tasks.decompose import cycle_mean

    y = np.arange(60.0)
    y[20:23] = np.nan
    trend = cycle_mean(y, 12)
    assert np.isnan(trend[:6]).all() and np.isnan(trend[-6:]).all()
    assert_allclose(trend[29:-6], np.arange(29.0, 54.0))  # windows clear of the gap: the line
    # A window over the gap: the 2 x 12 weights over its observed points.
    weights = np.r_[0.5, np.ones(11), 0.5]
    window = y[14:27]
    seen = ~np.isnan(window)
    assert_allclose(trend[20], np.sum(weights[seen] * window[seen]) / weights[seen].sum())
    y[10:40] = np.nan
    assert np.isnan(cycle_mean(y, 12)[25])  # fewer than half of the window observed
