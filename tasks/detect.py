"""Find and classify interventions in one series: the cold procedure.

:func:`detect_events` is the Chen & Liu (1993) procedure on a decomposed
series; :func:`analyse_series` runs the whole engine on raw observations.
Its parts live beside it: the effect shapes in changekind.tasks.effects, the
per-time statistic search in changekind.tasks.search, recurring patterns in
changekind.tasks.patterns, critical values in changekind.tasks.critical, the
warm path on new points in changekind.tasks.screen.
"""

from __future__ import annotations

from collections.abc import Sequence
from contextlib import suppress
from dataclasses import replace

import numpy as np

from changekind.tasks.arma import pi_weights, psi_weights
from changekind.tasks.budget import DEFAULT_BUDGET, Spend, WorkBudget
from changekind.tasks.critical import ALLOWANCE as ALPHA
from changekind.tasks.critical import (
    Thresholds,
    check_budget,
    check_critical,
    default_critical,
    fit_tail,
    heavy_note,
    series_thresholds,
)
from changekind.tasks.decompose import decompose, regularize
from changekind.tasks.effects import EFFECTS
from changekind.tasks.estimation import EstimationError, filtered_residuals, refit
from changekind.tasks.fit import choose_model
from changekind.tasks.patterns import MAX_PATTERNS, absorb_pattern, find_period, regular_period
from changekind.tasks.results import detection_result
from changekind.tasks.screen import known_effects, reestimate, screen_new_points
from changekind.tasks.search import (
    LS_MARGIN,
    Candidate,
    Support,
    design,
    inner_loop,
    joint,
    residual_patterns,
    robust_sigma,
    weights_for,
)
from changekind.tasks.search import tau_all as _tau
from changekind.tasks.threads import single_blas_thread
from changekind.tasks.types import (
    Decomposition,
    DetectionResult,
    FittedModel,
    Pattern,
    ResidualTail,
)

MAX_OUTER = 4
"""Bound on the outer (re-estimation) passes."""

MAX_FINAL = 4
"""Bound on the final stage's pruning and reclassification rounds (plus one per event)."""

EXACT_MAX_NOBS = 2_000
"""Longest series given an exact maximum-likelihood fit in the final stage.
Longer series keep the Hannan-Rissanen estimate (method ``"hr"``): it differs
from the exact one by O(1/n), while a state-space fit costs about 0.3 ms a
point (0.41 s at 1,440 points, 2.9 s at 10,080; shared method notes)."""


@single_blas_thread
def analyse_series(
    series_id: str,
    timestamps,
    values,
    *,
    periods: Sequence[int] | None = None,
    critical: float | None = None,
    budget: WorkBudget | None = None,
    false_budget: float | None = None,
) -> DetectionResult:
    """Run the whole engine on one series' raw observations.

    regularize -> decompose -> detect_events.  Raises the SeriesError
    subclasses of :func:`~changekind.tasks.decompose.regularize` on bad input.
    """
    series = regularize(series_id, timestamps, values)
    return detect_events(
        decompose(series, periods=periods),
        critical=critical,
        budget=budget,
        false_budget=false_budget,
    )


@single_blas_thread
def detect_events(
    decomp: Decomposition,
    *,
    model: FittedModel | None = None,
    critical: float | None = None,
    max_outer: int = MAX_OUTER,
    budget: WorkBudget | None = None,
    false_budget: float | None = None,
) -> DetectionResult:
    """Joint estimation of ARIMA parameters and intervention effects.

    Parameters
    ----------
    decomp : Decomposition
    model : FittedModel, optional
        Starting model (for example from the cache); chosen if absent.
    critical : float, optional
        Critical |t| (in (1, 100]); default
        :func:`~changekind.tasks.critical.default_critical` of the series
        length and the residuals' tail (changekind.tasks.critical.fit_tail).
    max_outer : int, default=4
        Bound on the outer (re-estimation) loop.
    budget : WorkBudget, optional
        Work allowed on this series (default
        :data:`~changekind.tasks.budget.DEFAULT_BUDGET`); when it runs out the
        engine keeps what it has, sets ``budget_spent`` and says so in the
        notes.
    false_budget : float, optional
        Expected false events per clean series per 30 days of data: the
        default critical value then comes from the spacing
        (:func:`~changekind.tasks.critical.budget_critical`), not the length,
        so repeated scans spend one budget.  Ignored with ``critical`` and for
        series without a time axis.

    Returns
    -------
    DetectionResult

    Notes
    -----
    Seasonality is the decomposition's (changekind.tasks.decompose); the ARIMA
    model carries at most a short seasonal AR term, so every filter below is
    O(n).  Only the final stage makes an exact likelihood fit (counted in
    ``n_fits``).

    1. Recurring patterns: spikes or flushes at a fixed spacing (at least
       four) are a pattern, not events: the spacing joins the seasonal
       periods, the series is decomposed again and the pattern reported.
       Checked before the search and again on the events of each outer pass.
    2. Outer loop (bounded, stops when an event set repeats): residuals are
       pi(B) applied to the series under the current model (a linear filter);
       sigma is their robust scale.  After the first pass's search (at the
       Gaussian critical value) the tail of the residuals without its events
       is described (a quantile-matched Student t) and the default critical
       value set from it and the number of tests (changekind.tasks.critical).
       a. Search: for every time and type the effect estimate
          omega(T) = sum h_k e_(T+k) / sum h_k^2 and tau = omega sqrt(sum h_k^2)
          / sigma (changekind.tasks.search); the largest |tau| above the
          critical value is taken, its effect removed from the residuals, and
          the search repeated.
       b. Joint stage: all candidates estimated together by least squares on
          the residuals; the weakest below the critical value dropped.
       c. The model is re-estimated (Hannan-Rissanen regressions) on the
          series with the effects removed (orders and differencing chosen
          again on the first pass).
    3. Final stage: one exact maximum-likelihood fit of the model on the
       series with the effects removed (series up to EXACT_MAX_NOBS points),
       then the effects estimated jointly with the mean by least squares on
       the filtered series (t from the model's sigma); the weakest effect
       below the critical value dropped, repeatedly.
    4. Types: at each event, with every other effect removed, the support of
       each type is its likelihood gain tau^2 / 2 (TC charged one unit for its
       decay, which is refined continuously); weights are these relative
       likelihoods under equal priors.  An event whose best-supported type is
       not its current one is reclassified and step 3's regression repeated.
    5. Events with too few points after them to tell the types apart are
       provisional; the others confirmed.

    References
    ----------
    Chen, C. and Liu, L.-M. (1993). Joint estimation of model parameters and
    outlier effects in time series. JASA 88(421), 284-297.
    Box, G. E. P. and Tiao, G. C. (1975). Intervention analysis with
    applications to economic and environmental problems. JASA 70(349), 70-79.
    """
    series = decomp.series
    n = series.nobs
    given = check_critical(critical)
    false_budget = check_budget(false_budget)
    step = series.step_seconds if series.is_datetime else None

    def default(tail: ResidualTail | None) -> Thresholds:
        return series_thresholds(
            n,
            step_seconds=step,
            business_days=series.business_days,
            false_budget=false_budget,
            tail=tail,
        )

    crit = default(None) if given is None else Thresholds(given)
    tail = None
    spend = Spend(budget or DEFAULT_BUDGET)
    notes: list[str] = []
    patterns: list[Pattern] = []
    n_fits = 0

    # Step 1: recurring patterns before anything is fitted.
    period = find_period(decomp.adjusted, crit.gaussian)
    if period is not None and period not in decomp.periods:
        decomp, pattern = absorb_pattern(decomp, period)
        patterns.append(pattern)

    y = decomp.adjusted
    if model is None:
        current = choose_model(decomp, exact=False).model
    else:
        current = model
    seen: list[frozenset[tuple[int, str]]] = []
    cands: list[Candidate] = []
    previous = current
    converged = False
    n_iter = 0
    # Step 2: outer loop.
    for n_iter in range(1, max_outer + 1):
        if spend.out_of_time():
            spend.stop(f"outer pass {n_iter}")
            break
        e, w, sigma = residuals(y, current)
        if sigma is None:
            notes.append("residuals are all zero: the seasonal pattern explains the series")
            cands = []
            converged = True
            break
        pi = pi_weights(current, n)
        # Step 2a-b: search and joint estimate.
        found, capped = inner_loop(
            e, w, pi, sigma, crit, current.n_start, max_inner=spend.budget.events
        )
        if capped:
            spend.stop(f"the search of pass {n_iter} ({spend.budget.events} events)")
            if seen:  # a re-estimated model that explodes the search: keep the last pass
                notes.append(f"pass {n_iter} ran away; the events of pass {n_iter - 1} are kept")
                current = previous
                break
        found = joint(e, w, pi, sigma, crit, found, base=_mean_pattern(current, pi))
        if tail is None:  # the tail of the residuals without this pass's events
            clean = e - design(found, pi, n) @ np.array([c.omega for c in found]) * w
            # Pulses found at the Gaussian value may be the tail itself; shifts are not.
            pulses = sum(1 for c in found if not EFFECTS[c.kind].lasting)
            tail = fit_tail(
                clean[w > 0], sigma, raw=e[w > 0], removed=pulses, searched=crit.gaussian
            )
            if given is None:
                crit = default(tail)
        spikes = [c.position for c in found if EFFECTS[c.kind].pulse_like]
        period = regular_period(spikes, n)
        if period is not None and len(patterns) < MAX_PATTERNS and period not in decomp.periods:
            decomp, pattern = absorb_pattern(decomp, period)
            patterns.append(pattern)
            y = decomp.adjusted
            current = choose_model(decomp, exact=False).model
            seen.clear()
            continue
        key = frozenset((c.position, c.kind) for c in found)
        cands = found
        if seen and key == seen[-1]:
            converged = True
            break
        if key in seen:
            notes.append(f"event set cycled after {n_iter} passes; the last set is kept")
            converged = True
            break
        seen.append(key)
        if not found:  # nothing to remove: re-estimating would change nothing
            converged = True
            break
        # Step 2c: re-estimate without the effects.
        previous = current
        adjusted = y - total_effect(n, found, psi_weights(current, n))
        if len(seen) == 1:  # orders and differencing chosen again once, without the effects
            current = choose_model(decomp, y=adjusted, start=current, exact=False).model
        else:
            with suppress(EstimationError):  # else the current coefficients stay
                current = refit(adjusted, current, exact=False).model
    else:
        notes.append(f"outer loop stopped at its bound of {max_outer} passes")

    # Steps 3-4: final estimate and classification.
    final_model, cands, support, final_notes, fits = _final_stage(y, current, cands, crit, spend)
    n_fits += fits
    notes.extend(final_notes)
    final_model = replace(
        final_model,
        tail=tail,
        periods=decomp.periods,
        profiles=tuple(tuple(float(v) for v in prof) for prof in decomp.profiles),
    )
    if final_model.fallback:
        notes.append(final_model.fallback)
    if crit.heavy:
        notes.append(heavy_note(crit))
    notes.extend(spend.notes())
    return detection_result(
        series,
        final_model,
        cands,
        support,
        crit,
        converged=converged,
        n_iter=n_iter,
        patterns=patterns,
        notes=notes,
        n_fits=n_fits,
        budget_spent=bool(spend.spent_at),
    )


# -- stages ------------------------------------------------------------------------


def residuals(y: np.ndarray, model: FittedModel) -> tuple[np.ndarray, np.ndarray, float | None]:
    """Filtered residuals (0 where missing or in the start-up), weights and the robust sigma."""
    e = filtered_residuals(y, model)
    w = (~np.isnan(e)).astype(float)
    w[: model.n_start] = 0.0
    e = np.where(w > 0, e, 0.0)
    core = e[w > 0]
    if core.size == 0:
        return e, w, None
    sigma = robust_sigma(core)
    tiny = 1e-12 * (1.0 + float(np.nanmax(np.abs(y))))
    if not sigma > tiny:
        sigma = float(np.std(core))
        if not sigma > tiny:
            return e, w, None
    return e, w, sigma


def total_effect(n: int, cands: Sequence[Candidate], psi: np.ndarray) -> np.ndarray:
    """Series-space sum of the candidates' effects."""
    total = np.zeros(n)
    for c in cands:
        total[c.position :] += c.omega * c.path(n - c.position, psi)
    return total


def _final_stage(
    y: np.ndarray, model: FittedModel, cands: list[Candidate], crit: Thresholds, spend: Spend
) -> tuple[FittedModel, list[Candidate], Support, list[str], int]:
    """Exact fit, joint regression with pruning, and reclassification (steps 3-4).

    Returns the final model, the events, their type support, notes and the
    number of exact fits made.
    """
    notes: list[str] = []
    n = y.size
    n_fits = 0
    # Step 3: one exact fit on the series with the effects removed (estimated
    # jointly with the mean first: a shift estimated against a fixed mean is
    # biased towards zero).
    if n <= EXACT_MAX_NOBS:
        if cands:
            e, w, sigma = residuals(y, model)
            if sigma is not None:
                pi = pi_weights(model, n)
                cands = joint(e, w, pi, sigma, 0.0, cands, base=_mean_pattern(model, pi))
        if spend.can_fit():
            adjusted = y - total_effect(n, cands, psi_weights(model, n))
            n_fits += 1
            spend.fits += 1
            try:
                model = refit(adjusted, model, exact=True).model
            except EstimationError as exc:
                notes.append(f"exact fit failed ({exc}); the regression estimate is kept")
        else:
            spend.stop("the exact fit")
    cands = list(cands)
    e, w, robust = residuals(y, model)
    if not cands or robust is None:
        return model, [], [], notes, n_fits
    sigma = model.sigma
    pi = pi_weights(model, n)
    base = _mean_pattern(model, pi)
    ls_from = model.n_start + LS_MARGIN
    support: Support = []
    for _ in range(MAX_FINAL + len(cands)):
        cands = joint(e, w, pi, sigma, crit, cands, base=base)
        if not cands:
            break
        e_clean = e - (design(cands, pi, n) @ np.array([c.omega for c in cands])) * w
        support = weights_for(e_clean, w, pi, sigma, cands, ls_from=ls_from, refine=False)
        changed = _reclassify(cands, support)
        if changed is None:
            break
        if spend.out_of_time():
            spend.stop("the final reclassification")
            break
        cands = changed
    else:
        notes.append("final stage stopped at its bound")
    support = []
    if cands:  # the reported weights, with the TC decay refined continuously
        e_clean = e - (design(cands, pi, n) @ np.array([c.omega for c in cands])) * w
        support = weights_for(e_clean, w, pi, sigma, cands, ls_from=ls_from)
    return model, cands, support, notes, n_fits


def _mean_pattern(model: FittedModel, pi: np.ndarray) -> np.ndarray | None:
    """The residual pattern of the model's mean (a level from the first point), if it has one."""
    return np.cumsum(pi)[:, None] if model.trend == "c" else None


def _reclassify(cands: list[Candidate], support: Support) -> list[Candidate] | None:
    """Candidates with types re-chosen by support; None if nothing changed."""
    changed = False
    out = []
    for c, (weights, delta) in zip(cands, support, strict=True):
        best = max(weights, key=weights.get)
        decays = EFFECTS[best].decays
        if best != c.kind and weights[best] > weights[c.kind]:
            out.append(replace(c, kind=best, delta=delta if decays else None))
            changed = True
        elif EFFECTS[c.kind].decays and delta is not None and abs(delta - (c.delta or 0)) > 0.02:
            out.append(replace(c, delta=delta))
            changed = True
        else:
            out.append(c)
    return out if changed else None


# -- names other modules import from here (kept for the shell; to be removed once
#    callers import from their new homes: screen, critical, effects, search) -----
# ALPHA, default_critical (critical), known_effects, reestimate,
# screen_new_points (screen), residual_patterns, _tau (search), series_shape.


def series_shape(kind: str, length: int, *, delta: float | None = None, psi=None) -> np.ndarray:
    """Series-space path of a unit effect of ``kind`` (see changekind.tasks.effects)."""
    return EFFECTS[kind].path(length, delta=delta, psi=psi)


__all__ = [
    "ALPHA",
    "MAX_OUTER",
    "_tau",
    "analyse_series",
    "default_critical",
    "detect_events",
    "known_effects",
    "reestimate",
    "residual_patterns",
    "screen_new_points",
    "series_shape",
]
