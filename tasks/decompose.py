"""Put a series on a regular grid and remove its seasonal profile.

Two pure steps:

- :func:`regularize` turns raw ``(timestamp, value)`` pairs into a
  :class:`~changekind.tasks.types.RegularSeries` (sorted, duplicates resolved,
  gaps as NaN, spacing inferred) or raises a :class:`SeriesError` that names the
  series and the problem.
- :func:`decompose` chooses seasonal periods and removes a robust seasonal
  profile, leaving the trend (and therefore every level shift) in what the
  ARIMA model sees.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd

from changekind.tasks.errors import (
    AllMissingError,
    ConstantSeriesError,
    NonFiniteError,
    NonNumericError,
    SeriesError,
    TimestampError,
    TooShortError,
)
from changekind.tasks.timeaxis import parse_times
from changekind.tasks.types import Decomposition, RegularSeries, StampLabels

MAX_MAGNITUDE = 1e150
"""Largest |value| analysed: sums of squares of larger values overflow float64
(about 1.8e308), so a value beyond it is refused by name instead of turning
the fit into NaN.  A wrapped 64-bit counter (about 1.8e19) is far below it and
is analysed (it shows as an AO)."""

MIN_POINTS = 24
"""Fewest observed points the engine analyses (an ARIMA with a few terms and a
test statistic per point needs a couple of dozen; common practice, not a law)."""

MAX_GRID_RATIO = 50
"""A grid may hold at most this many slots per observed point (else the
timestamps are too irregular to have a spacing)."""

MIN_CYCLES_AUTO = 3
"""Full cycles of history needed before a period is chosen automatically."""

MIN_CYCLES_GIVEN = 2
"""Full cycles needed for a period the user asks for."""

MIN_SHARE = 0.10
"""Share of the detrended variance a profile must explain to be kept when
chosen automatically (our own threshold).  It must also be at least twice the
share a profile of pure noise reaches: a per-phase median of k cycles has
variance about (pi/2)/k of the noise's, so that share is 1.57/k."""

MAX_PERIOD = 10_080
"""Longest period considered (a week of minute data)."""

_DAY = 86_400.0
_CYCLES = (_DAY, 7 * _DAY, 365.25 * _DAY)


def regularize(series_id: str, timestamps, values) -> RegularSeries:
    """Put raw observations of one series on a regular grid.

    Parameters
    ----------
    series_id : str
        Name used in results and error messages.
    timestamps : array-like of shape (nobs,)
        Datetimes, ISO strings, or numbers (a unitless numeric grid).
    values : array-like of shape (nobs,)
        Numbers; missing values (None, NaN) are allowed.

    Returns
    -------
    RegularSeries

    Raises
    ------
    NonNumericError, NonFiniteError, TimestampError, AllMissingError,
    TooShortError, ConstantSeriesError
        Each names the series and says what to do.

    Notes
    -----
    1. Values must be numbers or missing; infinities are rejected.
    2. Timestamps must all parse (datetimes, ISO text, or plain numbers).
    3. Sort by time.  4. The spacing is the median gap between distinct
    timestamps, rounded to a clean unit so small jitter snaps to the grid;
    monthly, quarterly and yearly data use calendar months.  5. Each timestamp
    goes to its nearest grid slot; observations that share a slot are resolved
    by their median (the first one's timestamp text is kept).
    6. Slots with no observation are missing values.

    Business-day data (daily, with almost no observation on Saturdays and
    Sundays) is put on a grid of weekdays (``business_days=True``): a
    calendar-day grid would be 2/7 missing and carry a spurious weekly cycle.
    Holidays stay gaps.
    """
    # Step 1: values.
    if len(values) != len(timestamps):
        raise SeriesError(series_id, "timestamps and values have different lengths")
    vals = check_values(series_id, values, timestamps)

    # Step 2: timestamps (labels None: each stamp's own ISO text, made on demand).
    stamps, labels, tz = _parse_timestamps(series_id, timestamps)

    # Step 3: sort.
    if stamps.size > 1 and not np.all(stamps[1:] >= stamps[:-1]):
        order = np.argsort(stamps, kind="stable")
        stamps, vals = stamps[order], vals[order]
        if labels is not None:
            labels = [labels[i] for i in order]
    is_time = stamps.dtype.kind == "M"
    ticks = stamps.view("i8").astype(float) if is_time else stamps.astype(np.float64)

    # Step 4: spacing.
    business = False
    distinct = np.unique(ticks)
    if distinct.size < 2:
        raise TimestampError(series_id, "needs at least two distinct timestamps to infer a spacing")
    step = float(np.median(np.diff(distinct)))
    months = _calendar_months(step) if is_time else 0
    if months:
        stamp_index = pd.DatetimeIndex(stamps)
        month_no = stamp_index.year * 12 + stamp_index.month - 1
        slot = np.asarray((month_no - month_no[0]) // months, dtype=np.int64)
        step = months * _MONTH_NS
    else:
        step = _nice_step(step, is_time)
        if step <= 0:
            raise TimestampError(series_id, "timestamps have no positive spacing")
        # Step 5: snap each timestamp to its nearest grid slot (business-day
        # data: its slot among the weekdays, so weekends are no gaps).
        business = is_time and step == _DAY_NS and _business_days(stamps)
        if business:
            slot = _business_slots(stamps)
        else:
            slot = np.rint((ticks - ticks[0]) / step).astype(np.int64)
    size = int(slot[-1]) + 1
    if size > MAX_GRID_RATIO * max(distinct.size, 1) and size > 10_000:
        raise TimestampError(
            series_id,
            f"timestamps are too irregular for a grid (median spacing {step:g} would need "
            f"{size} slots for {distinct.size} timestamps); resample the series first",
        )
    # Observations sharing a slot are resolved by their median.
    # A slot's label is its first observation's timestamp text.
    grid = np.full(size, np.nan)
    if slot.size < 2 or np.all(np.diff(slot) > 0):  # no shared slot: no grouping needed
        grid[slot] = vals
        n_duplicates = 0
        slots, first = slot, np.arange(slot.size)
    else:
        frame = pd.DataFrame({"slot": slot, "value": vals})
        grouped = frame.groupby("slot", sort=True)["value"]
        medians = grouped.median()
        n_duplicates = int((grouped.size() - 1).sum())
        grid[medians.index.to_numpy()] = medians.to_numpy()
        slots, first = np.unique(slot, return_index=True)
    grid_labels: Sequence[str | None]
    if labels is None:
        given = np.full(size, np.datetime64("NaT"), dtype="datetime64[ns]")
        given[slots] = stamps[first]
        grid_labels = StampLabels(given)
    else:
        listed: list[str | None] = [None] * size
        for s, i in zip(slots.tolist(), first.tolist(), strict=True):
            listed[s] = labels[i]
        grid_labels = tuple(listed)

    # Step 6: the regular index.
    if is_time:
        start = pd.Timestamp(stamps[0])
        delta = pd.Timedelta(round(step), unit="ns")
        if months:
            start = start.normalize().replace(day=1)
            index: pd.Index = pd.date_range(start, periods=size, freq=pd.DateOffset(months=months))
        elif business:
            first_day = stamps[0].astype("datetime64[D]")
            days = np.busday_offset(first_day, np.arange(size), roll="forward")
            index = pd.DatetimeIndex(days.astype("datetime64[ns]") + (stamps[0] - first_day))
        else:
            index = pd.DatetimeIndex(start + delta * np.arange(size))
        if tz is not None:
            index = index.tz_localize("UTC").tz_convert(tz)
        step_value: pd.Timedelta | float = delta
    else:
        index = pd.Index(float(stamps[0]) + step * np.arange(size))
        step_value = step

    series = RegularSeries(
        series_id, index, grid, step_value, grid_labels, n_duplicates, business_days=business
    )
    check_series(series)
    return series


_DAY_NS = 86_400e9

WEEKEND_SHARE = 0.02
"""Largest share of observations on Saturdays and Sundays for daily data to be
taken as business-day data (our own threshold)."""


def _business_days(stamps: np.ndarray) -> bool:
    """Daily stamps with (almost) no weekend observation, over at least three weeks."""
    days = stamps.astype("datetime64[D]")
    if days.size < 15 or (days[-1] - days[0]).astype(int) < 21:
        return False
    weekend = ~np.is_busday(days)
    return float(weekend.mean()) <= WEEKEND_SHARE


def _business_slots(stamps: np.ndarray) -> np.ndarray:
    """Weekday index of each stamp from the first (a weekend stamp joins the next Monday)."""
    days = stamps.astype("datetime64[D]")
    return np.busday_count(days[0], days).astype(np.int64)


def check_values(series_id: str, values, timestamps=None) -> np.ndarray:
    """Values as float64: numbers or missing (None, NaN, empty or NaN-like text).

    The one check of a series' values, for :func:`regularize` and the window
    summaries.

    Raises
    ------
    NonNumericError, NonFiniteError
        Naming the first bad value (and its timestamp, when ``timestamps`` is
        given): text that is not a number, infinities, or sizes beyond
        ``MAX_MAGNITUDE``.
    """
    raw = pd.Series(values).reset_index(drop=True)
    if pd.api.types.is_numeric_dtype(raw.dtype) and not pd.api.types.is_bool_dtype(raw.dtype):
        vals = raw.to_numpy(dtype=float, na_value=np.nan)  # the common case: nothing to parse
    else:
        numeric = pd.to_numeric(raw, errors="coerce").astype(float)
        bad = numeric.isna() & raw.notna() & ~_is_nan_like(raw)
        if bad.any():
            first = raw[bad].iloc[0]
            raise NonNumericError(
                series_id,
                f"{int(bad.sum())} value(s) are not numbers (first: {first!r}); "
                "clean the value column or mark missing samples as empty",
            )
        vals = numeric.to_numpy(dtype=float)

    def at(where: int) -> str:
        return "" if timestamps is None else f" at {timestamps[where]!r}"

    if np.isinf(vals).any():
        where = int(np.flatnonzero(np.isinf(vals))[0])
        first = f" (first{at(where)})" if timestamps is not None else ""
        raise NonFiniteError(
            series_id,
            f"{int(np.isinf(vals).sum())} value(s) are infinite{first}; "
            "leave a missing sample empty instead of writing inf",
        )
    huge = np.abs(vals) > MAX_MAGNITUDE
    if huge.any():
        where = int(np.flatnonzero(huge)[0])
        raise NonFiniteError(
            series_id,
            f"{int(huge.sum())} value(s) are beyond {MAX_MAGNITUDE:g} in size (first: "
            f"{vals[where]:g}{at(where)}), too large to analyse; check the "
            "source for a unit or encoding error, or leave such samples empty",
        )
    return vals


def check_series(series: RegularSeries) -> None:
    """Raise if a regular series is unusable: all missing, too short or constant."""
    observed = series.values[~np.isnan(series.values)]
    if observed.size == 0:
        raise AllMissingError(series.series_id, "every value is missing; check the value column")
    if observed.size < MIN_POINTS:
        raise TooShortError(
            series.series_id,
            f"only {observed.size} observed point(s); at least {MIN_POINTS} are needed for any "
            "model (wait for more history)",
        )
    if np.ptp(observed) == 0:
        raise ConstantSeriesError(
            series.series_id,
            f"every observed value equals {observed[0]:g}; a constant series has nothing to detect",
        )


BUSINESS_PERIODS = (5, 261)
"""Week and year of a business-day grid (261 weekdays a year on average)."""


def natural_periods(step_seconds: float) -> tuple[int, ...]:
    """Whole-number periods of the day, week and year for a grid spacing.

    Monthly and quarterly grids (spacing of 28–31 or 89–92 days) give 12 and 4.
    """
    if step_seconds <= 0:
        return ()
    days = step_seconds / _DAY
    if 28 <= days <= 31:
        return (12,)
    if 89 <= days <= 92:
        return (4,)
    out = []
    for cycle in _CYCLES:
        if cycle > 300 * _DAY and step_seconds < _DAY:
            continue  # a yearly profile only for daily or coarser data
        ratio = cycle / step_seconds
        period = round(ratio)
        if 2 <= period <= MAX_PERIOD and abs(ratio - period) <= 0.01 * ratio:
            out.append(period)
    return tuple(out)


def decompose(
    series: RegularSeries,
    *,
    periods: Sequence[int] | None = None,
    extra_periods: Sequence[int] = (),
) -> Decomposition:
    """Remove a robust seasonal profile, keeping trend and level shifts.

    Parameters
    ----------
    series : RegularSeries
    periods : sequence of int, optional
        Seasonal periods in grid points, chosen by the user.  Each must have at
        least two full cycles of history.  ``None`` (default) chooses them from
        the spacing: day, week and year cycles with at least three full cycles
        whose profile explains at least 10 % of the detrended variance, and twice
        what noise alone would (see ``MIN_SHARE``).  An empty
        sequence means no seasonal adjustment.
    extra_periods : sequence of int, default=()
        Periods found in the data (recurring spikes), kept without the variance
        test.

    Returns
    -------
    Decomposition

    Notes
    -----
    Classical decomposition (a moving-average trend, then per-phase medians
    in place of means), one period at a time, shortest first:

    1. trend = centred moving average over one cycle (:func:`cycle_mean`,
       the classical 2 x 12 average for a monthly period; the trend and its
       level shifts are *not* removed from the series);
    2. profile[j] = median over cycles of (series - trend) at phase j, centred to
       mean zero;
    3. subtract the profile and continue with the next period.
    """
    n = series.nobs
    if periods is None:
        natural = BUSINESS_PERIODS if series.business_days else natural_periods(series.step_seconds)
        candidates = [p for p in natural if n >= MIN_CYCLES_AUTO * p]
        automatic = True
    else:
        candidates = [int(p) for p in periods]
        automatic = False
        for p in candidates:
            if p < 2:
                raise SeriesError(series.series_id, f"season {p} must be at least 2 points")
            if n < MIN_CYCLES_GIVEN * p:
                raise SeriesError(
                    series.series_id,
                    f"season {p} needs at least {MIN_CYCLES_GIVEN * p} points "
                    f"({MIN_CYCLES_GIVEN} full cycles); the series has {n}",
                )
    # (period, must earn its keep, smooth the profile); found patterns stay sharp
    work = {p: (automatic, True) for p in candidates}
    work.update({int(p): (False, False) for p in extra_periods})

    remainder = series.values.astype(float).copy()
    seasonal = np.zeros(n)
    kept: list[int] = []
    profiles: list[np.ndarray] = []
    phase_base = np.arange(n)
    for period, (must_earn, smooth) in sorted(work.items()):  # shortest first
        profile, share = seasonal_profile(remainder, period, smooth=smooth)
        cycles = n // period
        if must_earn and share < max(MIN_SHARE, 2 * (math.pi / 2) / cycles):
            continue
        component = profile[phase_base % period]
        remainder = remainder - component
        seasonal += component
        kept.append(period)
        profiles.append(profile)
    return Decomposition(
        series=series,
        periods=tuple(kept),
        profiles=tuple(profiles),
        seasonal=seasonal,
        adjusted=series.values - seasonal,
    )


SMOOTH_FROM = 48
"""Profiles of this many phases or more are smoothed across neighbouring phases."""


def seasonal_profile(
    y: np.ndarray, period: int, *, smooth: bool = True
) -> tuple[np.ndarray, float]:
    """Robust zero-mean profile of ``y`` at ``period`` and the variance share it explains.

    Parameters
    ----------
    y : ndarray of shape (nobs,)
        May hold NaN.
    period : int
    smooth : bool, default=True
        For periods of 48 phases or more, average the per-phase medians over a
        circular window of about 1/24 of the period (13 phases for 288).  A
        median of 14 daily values per phase carries a third of the noise's
        standard deviation into every day; subtracting that noise added false
        events (on an invented clean fleet of 24 five-minute series over 14
        days: 8 false events unsmoothed, 2 smoothed).  Recurring spikes found
        in the data are kept sharp (``smooth=False``).

    Returns
    -------
    profile : ndarray of shape (period,)
    share : float
        var(profile at each point) / var(y - trend), over observed points.
    """
    trend = cycle_mean(y, period)
    dev = y - trend
    phases = np.arange(y.size) % period
    ok = ~np.isnan(dev)
    frame = pd.DataFrame({"phase": phases[ok], "dev": dev[ok]})
    med = frame.groupby("phase")["dev"].median().reindex(range(period))
    profile = med.to_numpy(dtype=float)
    if np.isnan(profile).any():  # a phase never observed: carry a neighbour
        profile = pd.Series(profile).interpolate(limit_direction="both").to_numpy()
        profile = np.nan_to_num(profile)
    if smooth and period >= SMOOTH_FROM:
        width = (period // 48) * 2 + 1
        padded = np.r_[profile[-width:], profile, profile[:width]]
        profile = np.convolve(padded, np.ones(width) / width, mode="same")[width:-width]
    profile = profile - profile.mean()
    total = float(np.var(dev[ok])) if ok.any() else 0.0
    explained = float(np.var(profile[phases[ok]])) if ok.any() else 0.0
    share = explained / total if total > 0 else 0.0
    return profile, share


def cycle_mean(y: np.ndarray, period: int) -> np.ndarray:
    """Centred moving average over one full cycle: the classical decomposition's trend.

    Parameters
    ----------
    y : ndarray of shape (nobs,)
        May hold NaN.
    period : int
        Cycle length in points (at least 2).

    Returns
    -------
    ndarray of shape (nobs,)
        For an odd period the centred mean of ``period`` points; for an even
        one the 2 x period moving average (weights 1/2 at both ends, so every
        phase counts once), as statsmodels' ``seasonal_decompose`` computes its
        trend.  NaN for the half cycle at each end, and where fewer than half
        of a window's points are observed (a partly observed window is the
        mean of its observed points).

    Notes
    -----
    A full cycle averages the seasonal profile out exactly, so the trend
    carries none of it and the per-phase deviations are the profile plus
    noise.  A centred rolling median over one cycle (used before) is not
    free of the profile: the median of one cycle of a skewed profile is not
    its mean.  Measured on fpp2 ``elecequip`` at the default critical value
    (3.66): no event with the rolling median; the 2008-09 collapse as an LS
    at 2009-01 (t = -3.92) with this average.
    """
    values = pd.Series(np.asarray(y, dtype=float))
    n, half = values.size, period // 2
    trend = np.full(n, np.nan)
    if n <= 2 * half:
        return trend
    # Sums and observed counts over the windows y[t-p+1..t] ending at each t.
    box = values.rolling(period, min_periods=1).sum().to_numpy()
    seen = values.notna().astype(float).rolling(period, min_periods=1).sum().to_numpy()
    if period % 2 == 1:  # the window centred at t ends at t + half
        total, count = box[2 * half :], seen[2 * half :]
    else:  # the 2 x p average: the windows ending at t + half - 1 and t + half
        total = 0.5 * (box[2 * half - 1 : -1] + box[2 * half :])
        count = 0.5 * (seen[2 * half - 1 : -1] + seen[2 * half :])
    with np.errstate(invalid="ignore", divide="ignore"):
        trend[half : n - half] = np.where(count >= 0.5 * period, total / count, np.nan)
    return trend


def profile_at(
    profiles: Sequence[Sequence[float]], periods: Sequence[int], offsets: np.ndarray
) -> np.ndarray:
    """Seasonal value at grid offsets (points since the profiles' anchor)."""
    out = np.zeros(offsets.size)
    for period, profile in zip(periods, profiles, strict=True):
        out += np.asarray(profile, dtype=float)[np.mod(offsets, period)]
    return out


_MONTH_NS = 365.2425 / 12 * 86_400e9
_UNITS_NS = (86_400e9, 3_600e9, 60e9, 1e9, 1e6, 1e3, 1.0)


def _calendar_months(step_ns: float) -> int:
    """Months per step for monthly, quarterly and yearly spacing, else 0."""
    days = step_ns / 86_400e9
    for months, low, high in ((1, 27.5, 31.5), (3, 88.5, 92.5), (12, 364.5, 366.5)):
        if low <= days <= high:
            return months
    return 0


def _nice_step(step: float, is_time: bool) -> float:
    """Round a median spacing so sub-percent jitter snaps to a clean value.

    Datetime spacings (in ns) go to a whole number of the coarsest unit (day,
    hour, minute, second, ms, µs, ns) that lands within 2 % of the median;
    numeric ones to three significant digits.
    """
    if not is_time:
        return float(f"{step:.3g}")
    for unit in _UNITS_NS:
        if unit <= 1.02 * step:
            rounded = round(step / unit) * unit
            if abs(rounded - step) <= 0.02 * step:
                return rounded
    return max(round(step), 1)


def _whole_seconds(stamps: np.ndarray) -> bool:
    """Zone-less stamps on whole seconds: their numpy ISO text is their isoformat()."""
    return not np.isnat(stamps).any() and bool((stamps.view("i8") % 1_000_000_000 == 0).all())


def _is_nan_like(values: pd.Series) -> pd.Series:
    """True where a value is an empty or NaN-like text (counted as missing)."""
    text = values.astype(str).str.strip().str.lower()
    return text.isin(["", "nan", "na", "null", "none"])


def _parse_timestamps(series_id: str, timestamps) -> tuple[np.ndarray, list[str] | None, object]:
    """Parse timestamps to UTC-naive datetime64[ns] (float for numeric grids).

    Returns the parsed stamps, their text as given (None when that text is each
    stamp's own ISO form, for zone-less whole-second date-times: the labels are
    then made on demand), and the time zone (or None).  The rules (a naive time
    is UTC, ISO 8601 text only, all-number text is a numeric axis, nothing
    outside the nanosecond range) are :func:`~changekind.tasks.timeaxis.parse_times`'.
    """
    dtype = getattr(timestamps, "dtype", None)
    if isinstance(dtype, np.dtype) and dtype == np.dtype("datetime64[ns]"):  # the common case
        stamps = np.asarray(timestamps)
        if np.isnat(stamps).any():
            raise TimestampError(
                series_id,
                f"{int(np.isnat(stamps).sum())} timestamp(s) are missing; every row needs one",
            )
        if _whole_seconds(stamps):
            return stamps, None, None
        return stamps, [pd.Timestamp(t).isoformat() for t in stamps], None
    parsed = parse_times(series_id, timestamps)
    labels = list(parsed.texts) if parsed.texts is not None else None
    if not parsed.axis.is_datetime:
        if labels is None:
            labels = [parsed.label(i) for i in range(len(parsed))]
        return parsed.instants, labels, None
    stamps = parsed.utc_naive()
    zone = parsed.axis.zone
    if labels is None and (zone is not None or not _whole_seconds(stamps)):
        labels = [parsed.label(i) for i in range(len(parsed))]
    return stamps, labels, zone
