"""The warm path: new points of a series tested against its cached model.

:func:`screen_new_points` filters the newest points through the cached
model's pi(B) (no estimation) and runs the residual search on them only;
:func:`reestimate` is the light refit after a confirmed lasting step;
:func:`known_effects` removes the effects of events already reported.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

import numpy as np
import pandas as pd

from changekind.tasks.arma import (
    interpolate_missing,
    linear_filter,
    pi_weights,
    polynomials,
    psi_weights,
)
from changekind.tasks.critical import Thresholds, check_budget, check_critical, series_thresholds
from changekind.tasks.decompose import profile_at
from changekind.tasks.effects import EFFECTS
from changekind.tasks.estimation import EstimationError, refit
from changekind.tasks.results import detection_result
from changekind.tasks.search import design, inner_loop, joint, robust_sigma, weights_for
from changekind.tasks.threads import single_blas_thread
from changekind.tasks.types import DetectionResult, Event, FittedModel, RegularSeries


@single_blas_thread
def screen_new_points(
    model: FittedModel,
    series: RegularSeries,
    n_new: int,
    *,
    known: Sequence[Event] = (),
    critical: float | None = None,
    false_budget: float | None = None,
) -> DetectionResult:
    """Test only the newest points of a series against a cached model.

    Parameters
    ----------
    model : FittedModel
        The cached model; nothing is re-estimated.
    series : RegularSeries
        Context (at least the model's memory) followed by the new points; its
        grid must match the model's (same spacing, profiles anchored by time).
    n_new : int
        How many of the last points are new and may carry events.
    known : sequence of Event, default=()
        Events already reported for this series (at any earlier time, inside
        the context or before it); their effects are removed first, so a level
        shift found last week is not found again today.
    critical : float, optional
        Default: with ``false_budget``, the budget's critical value at the
        model's spacing and residual tail
        (:func:`~changekind.tasks.critical.budget_critical`: each new point
        spends the budget's per-point share, so hourly scans over 30 days
        spend one budget); without, ``default_critical`` of the model's
        estimation length (which every scan spends again).
    false_budget : float, optional
        Expected false events per clean series per 30 days.

    Returns
    -------
    DetectionResult
        Events among the new points (effects estimated jointly on the filtered
        residuals, with the cached sigma), the model unchanged, and in
        ``resid_scale`` the robust scale of the new points' residuals over
        the cached sigma (None for fewer than five).

    Notes
    -----
    Residuals are pi(B) applied to the seasonally adjusted context (a linear
    filter, no Kalman filter and no optimizer), so testing costs milliseconds.
    Missing points are interpolated for the filter and carry no weight.
    """
    n = series.nobs
    if not 0 < n_new <= n:
        raise ValueError(f"n_new must be in 1..{n}")
    given = check_critical(critical)
    if given is None:
        crit = series_thresholds(
            model.nobs,
            step_seconds=model.step_seconds if series.is_datetime else None,
            business_days=model.business_days,
            false_budget=check_budget(false_budget),
            tail=model.tail,
        )
    else:
        crit = Thresholds(given)
    y = series.values - _seasonal_for(model, series) - known_effects(model, series, known)
    params = model.param_dict
    dev = y - params.get("const", 0.0)
    w = (~np.isnan(dev)).astype(float)
    filled = interpolate_missing(dev)
    ar, ma = polynomials(model)
    e = linear_filter(ar, ma, filled) * w
    start = n - n_new
    sigma = model.sigma
    pi = pi_weights(model, n)
    found, _ = inner_loop(e, w, pi, sigma, crit, start, ls_from=start)
    found = joint(e, w, pi, sigma, crit, found)
    e_clean = e - (design(found, pi, n) @ np.array([c.omega for c in found])) * w if found else e
    support = weights_for(e_clean, w, pi, sigma, found, ls_from=start)
    tested = e[start:][w[start:] > 0]
    scale = None
    if tested.size >= 5:
        # The efficient robust scale: a MAD of 60 points has the noise of a
        # variance from about 22, which set off the drift test for 5 % of the
        # series of a clean fleet (tests/benchmarks/bench_fleet.py).
        scale = float(f"{robust_sigma(tested) / sigma:.4g}")
    return detection_result(
        series, model, found, support, crit, converged=True, n_iter=1, resid_scale=scale
    )


@single_blas_thread
def reestimate(
    model: FittedModel, series: RegularSeries, known: Sequence[Event] = ()
) -> FittedModel:
    """The cached model's coefficients estimated again, its orders and seasonal profile kept.

    Parameters
    ----------
    model : FittedModel
        The cached model (its orders, trend, profiles and grid are kept).
    series : RegularSeries
        The series' history on the model's grid.
    known : sequence of Event
        The series' events; their effects (in the cached model's shapes) are
        removed before estimating, as the outer loop of :func:`detect_events`
        removes them.

    Returns
    -------
    FittedModel
        One exact maximum-likelihood fit of the same orders from the cached
        coefficients (``method`` ``"mle"``), fitted through the series' last
        point; the cached model unchanged (with a ``fallback`` note) when that
        fit fails.

    Notes
    -----
    The light refit of the fleet scan after a confirmed level shift: one
    likelihood fit instead of the order search and joint event estimation of
    a cold analysis (about a fifth of its cost on 540 minute points).  The
    events found are not estimated again; stale models (by age or variance
    drift) get the full analysis.
    """
    y = series.values - _seasonal_for(model, series) - known_effects(model, series, known)
    try:
        fitted = refit(y, model, exact=True).model
    except EstimationError:
        return replace(model, fallback="re-estimation failed; the cached coefficients are kept")
    return replace(fitted, fallback=None, fitted_through=series.label(series.nobs - 1))


def known_effects(model: FittedModel, series: RegularSeries, known: Sequence[Event]) -> np.ndarray:
    """Series-space effect of earlier events on a series' grid (by time, not position)."""
    n = series.nobs
    total = np.zeros(n)
    if not known:
        return total
    offsets_of = _grid_offsets(series, model.step_seconds)
    psi = None
    for ev in known:
        k = offsets_of(ev.event_time)
        if k is None:
            continue
        first = max(0, -k)  # first grid point at or after the event
        if first >= n:
            continue
        lags = np.arange(first + k, n + k)
        effect = EFFECTS[ev.event_type]
        if effect.single_point and lags[0] > 0:
            continue  # a pulse before the series starts
        if effect.needs_psi and (psi is None or lags.max() >= psi.size):
            psi = psi_weights(model, int(max(lags.max() + 1, n)))
        shape = effect.path(int(lags.max()) + 1, delta=ev.decay, psi=psi)[lags]
        total[first:] += ev.effect * shape
    return total


def _grid_offsets(series: RegularSeries, step_seconds: float | None):
    """A function: event time text -> offset (in grid steps) of series point 0 from it."""
    step = step_seconds or series.step_seconds
    if series.is_datetime:
        first = series.index[0]

        def offset(label: str) -> int | None:
            try:
                when = pd.Timestamp(label)
            except (ValueError, TypeError):
                return None
            if when.tz is None and first.tz is not None:  # a naive time is UTC (timeaxis)
                when = when.tz_localize("UTC").tz_convert(first.tz)
            elif when.tz is not None and first.tz is None:
                when = when.tz_convert("UTC").tz_localize(None)
            if series.business_days:
                return _weekdays_between(when, first)
            return round((first - when).total_seconds() / step)

        return offset
    first_value = float(series.index[0])

    def numeric_offset(label: str) -> int | None:
        try:
            return round((first_value - float(label)) / step)
        except (ValueError, TypeError):
            return None

    return numeric_offset


def _seasonal_for(model: FittedModel, series: RegularSeries) -> np.ndarray:
    """The cached seasonal profiles evaluated on a series' grid (anchored by time)."""
    if not model.periods:
        return np.zeros(series.nobs)
    if series.is_datetime and model.anchor is not None and model.step_seconds:
        anchor = pd.Timestamp(model.anchor)
        idx = series.index
        if idx.tz is not None and anchor.tz is None:  # a naive time is UTC (timeaxis)
            anchor = anchor.tz_localize("UTC").tz_convert(idx.tz)
        elif idx.tz is None and anchor.tz is not None:
            anchor = anchor.tz_convert("UTC").tz_localize(None)
        if model.business_days:
            offsets = -_weekdays_between(idx, anchor)
        else:
            offsets = np.rint((idx - anchor).total_seconds().to_numpy() / model.step_seconds)
    else:
        base = float(model.anchor) if model.anchor is not None else float(series.index[0])
        offsets = np.rint((series.index.to_numpy(dtype=float) - base) / (model.step_seconds or 1.0))
    return profile_at(model.profiles, model.periods, offsets.astype(np.int64))


def _weekdays_between(start, end):
    """Weekdays from ``start`` up to ``end`` (negative when ``end`` is earlier): grid
    offsets on a business-day grid (changekind.tasks.decompose.regularize)."""
    a = np.asarray(pd.DatetimeIndex(np.atleast_1d(start)).tz_localize(None), dtype="datetime64[D]")
    b = np.asarray(pd.DatetimeIndex(np.atleast_1d(end)).tz_localize(None), dtype="datetime64[D]")
    out = np.busday_count(a, b)
    return int(out[0]) if np.ndim(start) == 0 and np.ndim(end) == 0 else out
