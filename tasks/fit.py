"""Choose and estimate an ARIMA model for a seasonally adjusted series.

The public function is :func:`fit_model`; :func:`estimate` is the single place
where statsmodels' state-space estimator is called, and :func:`innovations`,
:func:`pi_weights`, :func:`psi_weights` turn a fitted model into what the
detection step needs.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
from scipy.optimize import minimize
from scipy.signal import lfilter

from changekind.tasks.threads import single_blas_thread
from changekind.tasks.types import Decomposition, FittedModel, round_sig

MAX_SEASONAL_LAG = 12
"""Longest season given a seasonal AR term automatically (monthly data's 12,
quarterly 4, the business week's 5, the week of daily data's 7).  A seasonal
term at lag s makes the state vector about s long and each Kalman step costs
O(s^2): with s = 48 a half-hourly series of 4,032 points took minutes where
s = 0 takes milliseconds.  Longer seasons are left to the deterministic
profiles of decompose()."""

MAX_ITER = 60
"""Optimizer iterations per estimate (bounded; the result says if it converged)."""

MAX_ROOT = 0.99
"""Largest modulus allowed for an inverse MA root (nearly non-invertible MA
polynomials produce spurious start-up effects in filtered residuals)."""

OUTLIER_Z = 4.0
"""Robust z above which a point is set aside for the first, robust estimate."""

Order = tuple[int, int, int]
SeasonalOrder = tuple[int, int, int, int]


@dataclass(frozen=True, slots=True)
class Estimate:
    """One estimate of an ARIMA model: the model, its log-likelihood and its cost.

    ``llf`` is the exact Gaussian log-likelihood when ``exact`` (a state-space
    maximum-likelihood fit), else the conditional one of the Hannan-Rissanen
    regression.  ``n_fits`` counts the exact likelihood fits made to reach it
    (fallbacks included); ``n_iter`` the optimizer iterations of the last one.
    """

    model: FittedModel
    llf: float
    n_iter: int
    exact: bool
    n_fits: int = 0


class EstimationError(RuntimeError):
    """statsmodels could not produce a usable estimate (internal; triggers a fallback)."""


@single_blas_thread
def fit_model(
    decomp: Decomposition,
    *,
    order: Order | None = None,
    seasonal_order: SeasonalOrder | None = None,
    max_p: int = 3,
    max_q: int = 2,
    robust: bool = True,
    y: np.ndarray | None = None,
    start: FittedModel | None = None,
    exact: bool = True,
) -> FittedModel:
    """Choose and estimate an ARIMA model for the seasonally adjusted series.

    The model of :func:`choose_model` (see there for parameters and steps).
    """
    return choose_model(
        decomp,
        order=order,
        seasonal_order=seasonal_order,
        max_p=max_p,
        max_q=max_q,
        robust=robust,
        y=y,
        start=start,
        exact=exact,
    ).model


def choose_model(
    decomp: Decomposition,
    *,
    order: Order | None = None,
    seasonal_order: SeasonalOrder | None = None,
    max_p: int = 3,
    max_q: int = 2,
    robust: bool = True,
    y: np.ndarray | None = None,
    start: FittedModel | None = None,
    exact: bool = True,
) -> Estimate:
    """Choose and estimate an ARIMA model for the seasonally adjusted series.

    Parameters
    ----------
    decomp : Decomposition
        Its ``adjusted`` series is modelled (unless ``y`` is given).
    order, seasonal_order : tuple, optional
        Fixed orders ``(p, d, q)`` and ``(P, D, Q, s)``; skips the selection.
    max_p, max_q : int, default=3, 2
        Largest non-seasonal orders tried.
    robust : bool, default=True
        Set points with a robust residual z above 4 aside (as missing) for the
        estimate, so one spike does not distort the coefficients.
    y : ndarray of shape (nobs,), optional
        A version of the adjusted series to model instead (for example with
        detected effects removed).
    start : FittedModel, optional
        An earlier estimate; when the chosen orders are its orders, its
        parameters start the optimizer (fewer iterations).
    exact : bool, default=True
        Estimate by exact maximum likelihood (state space, counted in
        ``n_fits``); False keeps the Hannan-Rissanen estimate, which costs
        one regression.

    Returns
    -------
    Estimate
        Its model is always usable; ``model.fallback`` says if a simpler model
        had to be taken.

    Notes
    -----
    1. Robust first pass: long-autoregression residuals of the differenced
       series, points with |z| > 4 (median/MAD scale) set aside; for d = 0 the
       largest single step in mean is removed as well when BIC prefers it (an
       unmodelled level shift inflates the AR coefficients and invites MA
       terms).
    2. d in {0, 1}: see :func:`choose_d` (a break-aware unit-root decision);
       an undifferenced choice whose AR root reaches 0.98 is differenced.
    3. Orders by BIC over p <= max_p, q <= max_q (and a seasonal AR term at the
       longest season up to MAX_SEASONAL_LAG points) using Hannan-Rissanen
       regressions, which cost microseconds.
    4. Estimate: the Hannan-Rissanen coefficients, then (``exact``) the exact
       Gaussian likelihood of the differenced series (SARIMAX with simple
       differencing, Kalman filter, missing values allowed) started from them.
       On failure, non-convergence, a non-stationary AR part or an MA root of
       modulus >= 0.99: the same with q = 0, then (1, d, 0), then (0, d, 0);
       last, a robust baseline (median and MAD), which needs no optimizer.

    References
    ----------
    Hannan, E. J. and Rissanen, J. (1982). Recursive estimation of mixed
    autoregressive-moving average order. Biometrika 69(1).
    """
    values = decomp.adjusted if y is None else np.asarray(y, dtype=float)
    # Step 1: robust first pass.
    clean = values.copy()
    d_given = None if order is None else order[1]
    if robust:
        d0 = d_given if d_given is not None else choose_d(values)
        if d0 == 0 and order is None:
            clean = _without_step(clean)
        clean[_outlying(clean, d0)] = np.nan

    # Steps 2-3: orders.
    if order is not None:
        chosen: Order = tuple(order)  # type: ignore[assignment]
        seasonal: SeasonalOrder = tuple(seasonal_order) if seasonal_order else (0, 0, 0, 0)  # type: ignore[assignment]
        method = "given"
    else:
        d = choose_d(clean)
        seasons = [p for p in decomp.periods if p <= MAX_SEASONAL_LAG] or [
            p for p in _natural_lags(decomp) if p <= MAX_SEASONAL_LAG
        ]
        season = max(seasons) if seasons else 0
        chosen, seasonal, _ = select_orders(clean, d, season=season, max_p=max_p, max_q=max_q)
        if d == 0 and _near_unit_root(clean, chosen, seasonal):
            d = 1  # an AR root at the unit circle is a unit root: difference instead
            chosen, seasonal, _ = select_orders(clean, d, season=season, max_p=max_p, max_q=max_q)
        method = "mle" if exact else "hr"
    trend = "c" if chosen[1] + seasonal[1] == 0 else "n"

    # Step 4: estimate, with the fallback chain.
    reasons: list[str] = []
    n_fits = 0
    chain = _fallbacks(chosen, seasonal)
    for candidate, cand_seasonal in chain:
        warm = None
        if start is not None and (start.order, start.seasonal_order) == (candidate, cand_seasonal):
            warm = [v for k, v in start.params if k not in ("const", "sigma2")] or None
        try:
            est = estimate(
                decomp,
                clean,
                candidate,
                cand_seasonal,
                trend=trend,
                start_params=warm,
                exact=exact,
                method=method,
                values=values,
            )
        except EstimationError as exc:
            n_fits += int(exact)
            reasons.append(f"{_name(candidate, cand_seasonal)}: {exc}")
            continue
        n_fits += est.n_fits
        if not est.model.converged and (candidate, cand_seasonal) != chain[-1]:
            reasons.append(f"{_name(candidate, cand_seasonal)}: did not converge")
            continue
        fallback = f"simpler model ({'; '.join(reasons)})" if reasons else None
        return replace(est, model=replace(est.model, fallback=fallback), n_fits=n_fits)
    model = robust_baseline(decomp, chosen[1], values, reason="; ".join(reasons))
    return Estimate(model=model, llf=float("nan"), n_iter=0, exact=False, n_fits=n_fits)


def estimate(
    decomp: Decomposition,
    y: np.ndarray,
    order: Order,
    seasonal_order: SeasonalOrder,
    *,
    trend: str,
    start_params: Sequence[float] | None = None,
    exact: bool = True,
    method: str | None = None,
    values: np.ndarray | None = None,
) -> Estimate:
    """Estimate an ARIMA model of fixed orders.

    Parameters
    ----------
    decomp : Decomposition
        The series the model belongs to (its grid and seasonal profiles).
    y : ndarray of shape (nobs,)
        The adjusted series to model; may hold NaN.
    order, seasonal_order : tuple
    trend : {"c", "n"}
        ``"c"`` estimates a mean, ``"n"`` none.
    start_params : sequence of float, optional
        ARMA starting values for the exact fit (default: the Hannan-Rissanen
        estimate).
    exact : bool, default=True
        Exact maximum likelihood (one counted fit); False: the Hannan-Rissanen
        regression estimate only.
    method : str, optional
        The ``method`` recorded on the model (default ``"mle"`` or ``"hr"``).
    values : ndarray, optional
        The values fingerprinted on the model (default ``y``).

    Raises
    ------
    EstimationError
        No usable estimate (non-finite, non-stationary or non-invertible).
    """
    y = np.asarray(y, dtype=float)
    values = y if values is None else values
    if exact:
        named, sigma2, llf, n_iter, converged = _exact_fit(
            y, order, seasonal_order, trend=trend, start_params=start_params
        )
    else:
        named, sigma2, llf = conditional_fit(y, order, seasonal_order, trend=trend)
        n_iter, converged = 0, True
    nobs = int(np.sum(~np.isnan(y)))
    k = len(named)
    aicc = -2 * llf + 2 * k + (2 * k * (k + 1) / max(nobs - k - 1, 1))
    model = _to_model(
        decomp,
        order=tuple(order),  # type: ignore[arg-type]
        seasonal_order=tuple(seasonal_order),  # type: ignore[arg-type]
        trend=trend,
        params=tuple(named),
        sigma2=sigma2,
        nobs=nobs,
        method=method or ("mle" if exact else "hr"),
        converged=converged,
        aicc=aicc,
        values=values,
    )
    return Estimate(model=model, llf=float(llf), n_iter=n_iter, exact=exact, n_fits=int(exact))


def _exact_fit(
    y: np.ndarray,
    order: Order,
    seasonal_order: SeasonalOrder,
    *,
    trend: str,
    start_params: Sequence[float] | None,
) -> tuple[list[tuple[str, float]], float, float, int, bool]:
    """Exact maximum likelihood with statsmodels' SARIMAX (the one place it is fitted)."""
    from statsmodels.tsa.statespace.sarimax import SARIMAX

    if order[0] + order[2] + seasonal_order[0] + seasonal_order[2] == 0 and trend == "n":
        # Nothing to optimize: the differenced series is the innovations.
        named, sigma2, llf = conditional_fit(y, order, seasonal_order, trend=trend)
        return named, sigma2, llf, 0, True
    n = y.size
    model_kw = dict(
        order=order,
        seasonal_order=seasonal_order,
        trend="n",
        simple_differencing=True,
        concentrate_scale=True,
        enforce_stationarity=True,
        enforce_invertibility=True,
    )
    exog = np.ones((n, 1)) if trend == "c" else None
    try:
        model = SARIMAX(y, exog=exog, **model_kw)
        start = _exact_start(model, y, order, seasonal_order, trend, start_params)
        # The likelihood maximized directly (scipy's L-BFGS-B over statsmodels'
        # unconstrained parameters) rather than by ``model.fit``: fit warns on
        # most calls, and silencing warnings is not safe in threads.
        found = minimize(
            lambda x: -model.loglike(x, transformed=False),
            model.untransform_params(start),
            method="L-BFGS-B",
            options={"maxiter": MAX_ITER},
        )
        params = np.asarray(model.transform_params(found.x), dtype=float)
        res = model.filter(params)
    except (ValueError, np.linalg.LinAlgError, IndexError, OverflowError) as exc:
        raise EstimationError(str(exc) or type(exc).__name__) from exc
    if not np.all(np.isfinite(params)) or not np.isfinite(res.llf):
        raise EstimationError("non-finite estimate")
    sigma2 = float(res.scale)
    if not sigma2 > 0:
        raise EstimationError("zero innovation variance")
    names = list(model.param_names)
    named: list[tuple[str, float]] = []
    offset = 0
    if trend == "c":
        named.append(("const", float(params[0])))
        offset = 1
    named.extend((name, float(v)) for name, v in zip(names[offset:], params[offset:], strict=True))
    named.append(("sigma2", sigma2))
    if max_ma_root(named) >= MAX_ROOT and order[2] + seasonal_order[2] > 0:
        raise EstimationError("MA root on the unit circle")
    return named, sigma2, float(res.llf), int(found.nit), bool(found.success)


def _exact_start(
    model,
    y: np.ndarray,
    order: Order,
    seasonal_order: SeasonalOrder,
    trend: str,
    given: Sequence[float] | None,
) -> np.ndarray:
    """Starting values in ``model.param_names`` order: given ARMA values, else the
    Hannan-Rissanen estimate, else zeros (a stationary, invertible start)."""
    names = list(model.param_names)
    arma_names = names[1:] if trend == "c" else names
    arma = None
    if given is not None and len(given) == len(arma_names):
        arma = np.asarray(given, dtype=float)
    else:
        try:
            named = dict(conditional_fit(y, order, seasonal_order, trend=trend)[0])
            arma = np.array([named.get(k, 0.0) for k in arma_names])
        except EstimationError:
            arma = np.zeros(len(arma_names))
    if trend == "c":
        return np.r_[float(np.nanmean(y)), arma]
    return arma


def conditional_fit(
    y: np.ndarray, order: Order, seasonal_order: SeasonalOrder, *, trend: str
) -> tuple[list[tuple[str, float]], float, float]:
    """Hannan-Rissanen estimate of an ARIMA model (no likelihood optimization).

    Returns the named parameters (statsmodels' names, ``sigma2`` last), sigma2
    and the conditional Gaussian log-likelihood.

    Notes
    -----
    1. Difference (d, D), fill missing points by interpolation, subtract the
       mean (``trend="c"``).  2. Residuals of a long autoregression.  3. One
       least-squares regression of z_t on its own lags (1..p, and s for a
       seasonal AR term) and the lagged long-AR residuals (1..q).  4. Refuse a
       non-stationary AR part or an MA root of modulus >= 0.99.  5. sigma2
       from the model's filtered residuals after the start-up points.

    References
    ----------
    Hannan, E. J. and Rissanen, J. (1982). Recursive estimation of mixed
    autoregressive-moving average order. Biometrika 69(1).
    """
    p, d, q = order
    P, D, Q, s = seasonal_order
    if Q or (P and not s) or P > 1:
        raise EstimationError("the regression estimate has no seasonal MA term")
    z = _differenced(interpolate_missing(y), d, D, s)
    mean = float(np.mean(z)) if trend == "c" else 0.0
    z = z - mean
    n = z.size
    m = int(min(max(10 * math.log10(max(n, 10)), p + q + 2), n // 4))
    start = m + max(p, q, 1) + (s * P if P else 0)
    if n - start < 10 + p + q + P:
        raise EstimationError("too few points for the regression estimate")
    target = z[start:]
    cols = [z[start - i : n - i] for i in range(1, p + 1)]
    if P:
        cols.append(z[start - s : n - s])
    if q:
        resid = _long_ar_resid(z, m)
        cols += [resid[start - j : n - j] for j in range(1, q + 1)]
    coef = ols(np.column_stack(cols), target) if cols else np.empty(0)
    named: list[tuple[str, float]] = [("const", mean)] if trend == "c" else []
    named += [(f"ar.L{i}", float(coef[i - 1])) for i in range(1, p + 1)]
    named += [(f"ma.L{j}", float(coef[p + P + j - 1])) for j in range(1, q + 1)]
    if P:
        named.append((f"ar.S.L{s}", float(coef[p])))
    ar_poly = np.r_[1.0, -coef[:p]]
    # np.roots drops leading zeros: an AR part estimated as exactly zero has no root.
    roots = np.roots(ar_poly[::-1]) if p else np.empty(0)
    if roots.size and np.max(np.abs(roots) ** -1) >= 1.0:
        raise EstimationError("non-stationary AR part")
    if P and abs(coef[p]) >= 1.0:
        raise EstimationError("non-stationary seasonal AR part")
    if q and max_ma_root(named) >= MAX_ROOT:
        raise EstimationError("MA root on the unit circle")
    if not np.all(np.isfinite(coef)):
        raise EstimationError("non-finite estimate")
    ar, ma = _arma_polys(dict(named), order, seasonal_order)
    e = lfilter(ar, ma, z)[p + s * P :]
    sigma2 = float(np.mean(e * e)) if e.size else 0.0
    if not sigma2 > 0:
        raise EstimationError("zero innovation variance")
    named.append(("sigma2", sigma2))
    llf = -0.5 * e.size * (math.log(2 * math.pi * sigma2) + 1.0)
    return named, sigma2, llf


NEAR_UNIT = 0.98
"""An undifferenced model whose largest AR root has at least this modulus is
refitted differenced (measured: a staircase of 19 level shifts, three not yet
removed, gave AR(1) = 0.9999 with d = 0, under which a level shift's residual
pattern all but vanishes)."""


def _near_unit_root(y: np.ndarray, order: Order, seasonal: SeasonalOrder) -> bool:
    if order[0] == 0:
        return False
    try:
        named, _, _ = conditional_fit(y, order, seasonal, trend="c")
    except EstimationError:
        return True  # a non-stationary AR estimate
    coefs = [dict(named).get(f"ar.L{i}", 0.0) for i in range(1, order[0] + 1)]
    roots = np.roots(np.r_[1.0, -np.asarray(coefs)])
    return bool(roots.size) and float(np.max(np.abs(roots))) >= NEAR_UNIT


def _differenced(z: np.ndarray, d: int, D: int, s: int) -> np.ndarray:
    for _ in range(D):
        z = z[s:] - z[:-s]
    for _ in range(d):
        z = np.diff(z)
    return z


def _arma_polys(
    params: dict[str, float], order: Order, seasonal_order: SeasonalOrder
) -> tuple[np.ndarray, np.ndarray]:
    """AR and MA polynomials of the stationary part (no differencing), lag 0 first."""
    p, _, q = order
    P, _, Q, s = seasonal_order
    ar = np.array([1.0] + [-params.get(f"ar.L{i}", 0.0) for i in range(1, p + 1)])
    ma = np.array([1.0] + [params.get(f"ma.L{i}", 0.0) for i in range(1, q + 1)])
    if s:
        sar = np.zeros(s * P + 1)
        sar[0] = 1.0
        for i in range(1, P + 1):
            sar[i * s] = -params.get(f"ar.S.L{i * s}", 0.0)
        sma = np.zeros(s * Q + 1)
        sma[0] = 1.0
        for i in range(1, Q + 1):
            sma[i * s] = params.get(f"ma.S.L{i * s}", 0.0)
        ar = np.convolve(ar, sar)
        ma = np.convolve(ma, sma)
    return ar, ma


def filtered_residuals(y: np.ndarray, model: FittedModel) -> np.ndarray:
    """Residuals pi(B) (y - mean) of the model, by linear filtering (O(n)).

    The series is differenced first (so its level never enters the filter),
    missing points are interpolated for the filter and are NaN in the result,
    as are the d + sD points lost to differencing.  Start-up values assume
    zero pre-sample deviations and shocks; callers give the first
    d + sD + p + sP points no weight.
    """
    y = np.asarray(y, dtype=float)
    _, d, _ = model.order
    _, D, _, s = model.seasonal_order
    params = model.param_dict
    z = _differenced(interpolate_missing(y), d, D, s) - params.get("const", 0.0)
    ar, ma = _arma_polys(params, model.order, model.seasonal_order)
    out = np.full(y.size, np.nan)
    out[y.size - z.size :] = linear_filter(ar, ma, z)
    out[np.isnan(y)] = np.nan
    return out


def refit(y: np.ndarray, model: FittedModel, *, exact: bool) -> Estimate:
    """The model's coefficients estimated again on ``y``, its orders and grid kept.

    ``exact``: one exact maximum-likelihood fit started from the model's
    coefficients (counted in ``n_fits``); else the Hannan-Rissanen estimate.
    Raises EstimationError when no usable estimate comes out.
    """
    y = np.asarray(y, dtype=float)
    arma = [v for k, v in model.params if k not in ("const", "sigma2")]
    if exact:
        named, sigma2, llf, n_iter, converged = _exact_fit(
            y, model.order, model.seasonal_order, trend=model.trend, start_params=arma or None
        )
    else:
        named, sigma2, llf = conditional_fit(
            y, model.order, model.seasonal_order, trend=model.trend
        )
        n_iter, converged = 0, True
    nobs = int(np.sum(~np.isnan(y)))
    k = len(named)
    aicc = -2 * llf + 2 * k + (2 * k * (k + 1) / max(nobs - k - 1, 1))
    new = replace(
        model,
        params=tuple((k, round_sig(v)) for k, v in named),
        sigma2=round_sig(sigma2),
        nobs=nobs,
        method="mle" if exact else "hr",
        converged=converged,
        aicc=aicc if math.isfinite(aicc) else None,
        fingerprint=fingerprint(y),
    )
    return Estimate(model=new, llf=llf, n_iter=n_iter, exact=exact, n_fits=int(exact))


ZA_CRITICAL = -4.80
"""5 % critical value of the unit-root t statistic with one break in the
intercept (Zivot and Andrews 1992, Table 2; from memory)."""


def choose_d(y: np.ndarray) -> int:
    """Differencing order in {0, 1}.

    Differenced when the KPSS test rejects level stationarity at 5 % and a
    unit-root test that allows one break in the mean does not reject: one level
    shift makes a stationary series look integrated to KPSS (shared method
    notes: 30 of 30 series), while a random walk or a trend stays
    non-stationary with or without the break.

    Notes
    -----
    1. KPSS does not reject level stationarity: d = 0.
    2. The Zivot-Andrews regression dz_t = c + g S_t + b z_(t-1) +
       sum a_i dz_(t-i) at the best single split in mean (cheap, slightly
       conservative) rejects the unit root (t(b) < -4.80): d = 0.
    3. Series up to ZA_MAX_NOBS points whose levels a step explains at least
       as well as a linear trend: statsmodels' ``zivot_andrews`` (minimum over
       all break points, lags by AIC) rejects at 5 %: d = 0.
       (UKDriverDeaths, log, seasonally adjusted: step 2 gives t = -4.17,
       step 3 -5.28, p = 0.01.)
    4. Otherwise d = 1.

    References
    ----------
    Zivot, E. and Andrews, D. W. K. (1992). Further evidence on the great
    crash, the oil-price shock, and the unit-root hypothesis. Journal of
    Business and Economic Statistics 10(3), 251-270.
    """
    z = interpolate_missing(y)
    if z.size < 12 or np.ptp(z) == 0:
        return 0
    if not _unit_root(z):
        return 0
    if _break_unit_root_t(z) < ZA_CRITICAL:
        return 0
    if z.size <= ZA_MAX_NOBS and _step_beats_trend(z) and _zivot_andrews_rejects(z):
        return 0
    return 1


def _step_beats_trend(z: np.ndarray, lags: int = 2) -> bool:
    """A step in mean explains the levels at least as well as a linear trend.

    Autoregressions z_t = c + g X_t + sum a_i z_(t-i) with X a step at the best
    split or a linear trend: the model here has no trend term, so a trending
    series is differenced even when a break test rejects a unit root (a
    trend-stationary series rejects it too).  Measured: simulated AR(1) with a
    5-sigma shift +44 to +81 log-RSS units for the step, AR(0.5) plus a trend
    -47 to -62, UKDriverDeaths (log) +0.3.
    """
    n = z.size
    split = _best_split(z)
    t = np.arange(lags, n)
    base = [np.ones(t.size)] + [z[t - i] for i in range(1, lags + 1)]
    rss = []
    for extra in ((t >= split).astype(float), t.astype(float)):
        X = np.column_stack([*base, extra])
        r = z[t] - X @ ols(X, z[t])
        rss.append(float(r @ r))
    return rss[0] <= rss[1]


ZA_MAX_NOBS = 1000
"""Longest series given statsmodels' full Zivot-Andrews test (every break
point, lags by AIC): it costs about 0.2 s at 500 points and 1.6 s at 1,000
(measured here), so longer series keep the single-split test alone."""


def _zivot_andrews_rejects(z: np.ndarray) -> bool:
    """statsmodels' Zivot-Andrews test (break in the intercept) rejects a unit root at 5 %."""
    from statsmodels.tsa.stattools import zivot_andrews

    try:  # it raises no warning (checked with -W always), so no catch_warnings here
        _, pvalue, *_ = zivot_andrews(z, regression="c", autolag="AIC")
    except (ValueError, np.linalg.LinAlgError, OverflowError):
        return False
    return bool(np.isfinite(pvalue) and pvalue < 0.05)


def _break_unit_root_t(z: np.ndarray, lags: int = 2) -> float:
    """t statistic of b in dz_t = c + g S_t + b z_(t-1) + sum a_i dz_(t-i)."""
    n = z.size
    split = _best_split(z)
    dz = np.diff(z)
    t = np.arange(lags + 1, n)
    X = np.column_stack(
        [np.ones(t.size), (t >= split).astype(float), z[t - 1]]
        + [dz[t - 1 - i] for i in range(1, lags + 1)]
    )
    target = dz[t - 1]
    try:
        inv = np.linalg.inv(X.T @ X)
    except np.linalg.LinAlgError:
        return 0.0
    coef = inv @ (X.T @ target)
    resid = target - X @ coef
    s2 = float(resid @ resid) / max(t.size - X.shape[1], 1)
    se = math.sqrt(max(s2 * inv[2, 2], 1e-300))
    return float(coef[2] / se)


def _best_split(z: np.ndarray) -> int:
    """Where a single break in mean fits best (least squares, by cumulative sums)."""
    n = z.size
    c = np.cumsum(z)
    c2 = np.cumsum(z * z)
    k = np.arange(1, n)  # split after k points
    left = c2[k - 1] - c[k - 1] ** 2 / k
    right = (c2[-1] - c2[k - 1]) - (c[-1] - c[k - 1]) ** 2 / (n - k)
    return int(k[np.argmin(left + right)])


def _remove_step(z: np.ndarray) -> np.ndarray:
    """``z`` minus its best single break in mean."""
    split = _best_split(z)
    out = z.copy()
    out[:split] -= z[:split].mean()
    out[split:] -= z[split:].mean()
    return out


def _without_step(y: np.ndarray, lags: int = 2) -> np.ndarray:
    """``y`` with its largest step in mean removed when an autoregression wants it.

    The step is removed when, in z_t = c + g S_t + r z_(t-1) + sum a_i dz_(t-i),
    BIC prefers including S_t; comparing autoregressions means autocorrelation
    alone does not pass for a shift.
    """
    ok = ~np.isnan(y)
    z = y[ok]
    n = z.size
    if n < 20:
        return y
    split = _best_split(z)
    dz = np.diff(z)
    t = np.arange(lags + 1, n)
    base = [np.ones(t.size), z[t - 1]] + [dz[t - 1 - i] for i in range(1, lags + 1)]
    target = z[t]
    bics = []
    for X in (np.column_stack(base), np.column_stack([*base, (t >= split).astype(float)])):
        rss = float(np.sum((target - X @ ols(X, target)) ** 2))
        bics.append(t.size * math.log(max(rss, 1e-300) / t.size) + X.shape[1] * math.log(t.size))
    if bics[1] >= bics[0]:
        return y
    out = y.copy()
    out[ok] = _remove_step(z) + z.mean()
    return out


KPSS_5PCT = 0.463
"""5 % critical value of the KPSS level-stationarity statistic (Kwiatkowski et
al. 1992, Table 1; the value statsmodels' ``kpss`` tabulates)."""


def _unit_root(z: np.ndarray) -> int:
    """1 when the KPSS test rejects level stationarity at 5 %, else 0."""
    return 1 if kpss_stat(z) > KPSS_5PCT else 0


def kpss_stat(z: np.ndarray) -> float:
    """The KPSS level-stationarity statistic with statsmodels' automatic lags.

    The same statistic as ``statsmodels.tsa.stattools.kpss(z, "c", nlags="auto")``
    (a test checks the two agree), computed here because that function warns
    (InterpolationWarning, FutureWarning) on most calls, and silencing warnings
    with ``warnings.catch_warnings`` is not safe in threads: the batch runs
    series in threads, and an interleaved exit leaves the process's warning
    filters changed.

    References
    ----------
    Kwiatkowski, D., Phillips, P. C. B., Schmidt, P. and Shin, Y. (1992).
    Testing the null hypothesis of stationarity against the alternative of a
    unit root. Journal of Econometrics 54, 159-178.
    Hobijn, B., Franses, P. H. and Ooms, M. (1998). Generalisations of the
    KPSS-test for stationarity. Econometric Institute Report 9802/A (the
    automatic lag).
    """
    resid = np.asarray(z, dtype=float) - np.mean(z)
    n = resid.size
    # Hobijn et al. (1998) lag, as statsmodels' _kpss_autolag.
    covlags = int(n ** (2.0 / 9.0))
    s0 = float(resid @ resid) / n
    s1 = 0.0
    for i in range(1, covlags + 1):
        prod = float(resid[i:] @ resid[: n - i]) / (n / 2.0)
        s0 += prod
        s1 += i * prod
    gamma = 1.1447 * ((s1 / s0) ** 2) ** (1.0 / 3.0) if s0 else 0.0
    lags = min(int(gamma * n ** (1.0 / 3.0)), n - 1)
    # Long-run variance with Bartlett weights.
    var = float(resid @ resid)
    for i in range(1, lags + 1):
        var += 2.0 * (1.0 - i / (lags + 1.0)) * float(resid[i:] @ resid[: n - i])
    var /= n
    if not var > 0:
        return 0.0
    eta = float(np.sum(np.cumsum(resid) ** 2)) / n**2
    return eta / var


def select_orders(
    y: np.ndarray, d: int, *, season: int = 0, max_p: int = 3, max_q: int = 2
) -> tuple[Order, SeasonalOrder, float]:
    """Orders by BIC from Hannan-Rissanen regressions on the differenced series.

    BIC rather than AIC: it prefers the parsimonious model, and an over-fitted
    ARMA absorbs part of an event's signature.  Returns the order, the seasonal
    order and the chosen regression's BIC (comparable only within one call).
    """
    z = interpolate_missing(y)
    if d:
        z = np.diff(z, n=d)
    z = z - z.mean()
    n = z.size
    m = int(min(max(10 * math.log10(max(n, 10)), max_p + max_q + 2), n // 4))
    resid = _long_ar_resid(z, m)
    seasonal_options = [0, 1] if season >= 2 and n >= 4 * season else [0]
    start = m + max(max_p, max_q) + (season + max_p if 1 in seasonal_options else 0)
    N = n - start
    if N < 10:
        return (0, d, 0), (0, 0, 0, 0), float("nan")
    target = z[start:]
    best: tuple[float, Order, SeasonalOrder] | None = None
    for P in seasonal_options:
        for p in range(max_p + 1):
            for q in range(max_q + 1):
                cols = [z[start - i : n - i] for i in range(1, p + 1)]
                if P:
                    cols += [z[start - season - i : n - season - i] for i in range(0, p + 1)]
                cols += [resid[start - j : n - j] for j in range(1, q + 1)]
                if cols:
                    X = np.column_stack(cols)
                    rss = float(np.sum((target - X @ ols(X, target)) ** 2))
                else:
                    rss = float(np.sum(target**2))
                k = len(cols) + 1 + (1 if d == 0 else 0)
                bic = N * math.log(max(rss, 1e-300) / N) + k * math.log(N)
                if best is None or bic < best[0] - 1e-9:
                    best = (bic, (p, d, q), (P, 0, 0, season) if P else (0, 0, 0, 0))
    assert best is not None
    return best[1], best[2], best[0]


def robust_baseline(
    decomp: Decomposition, d: int, values: np.ndarray, *, reason: str
) -> FittedModel:
    """The last fallback: white noise around the median (d=0) or a random walk (d=1).

    Location and scale are the median and the normalized MAD, so no optimizer
    is involved and the result always exists.
    """
    z = values[~np.isnan(values)]
    if d:
        z = np.diff(z)
    scale = 1.4826 * float(np.median(np.abs(z - np.median(z))))
    if not scale > 0:
        scale = float(np.std(z)) or 1e-12
    params: list[tuple[str, float]] = []
    if d == 0:
        params.append(("const", float(np.median(z))))
    params.append(("sigma2", scale**2))
    return _to_model(
        decomp,
        order=(0, d, 0),
        seasonal_order=(0, 0, 0, 0),
        trend="c" if d == 0 else "n",
        params=tuple(params),
        sigma2=scale**2,
        nobs=int(z.size),
        method="baseline",
        converged=True,
        aicc=float("nan"),
        values=values,
        fallback=f"robust baseline ({reason or 'no model could be estimated'})",
    )


def polynomials(model: FittedModel) -> tuple[np.ndarray, np.ndarray]:
    """Full AR polynomial (with differencing) and MA polynomial, lag-0 first.

    statsmodels' sign convention: phi(B) = 1 - phi_1 B - ..., theta(B) = 1 + theta_1 B + ...
    """
    params = dict(model.params)
    p, d, q = model.order
    P, D, Q, s = model.seasonal_order
    ar = np.array([1.0] + [-params.get(f"ar.L{i}", 0.0) for i in range(1, p + 1)])
    ma = np.array([1.0] + [params.get(f"ma.L{i}", 0.0) for i in range(1, q + 1)])
    if s:
        sar = np.zeros(s * P + 1)
        sar[0] = 1.0
        for i in range(1, P + 1):
            sar[i * s] = -params.get(f"ar.S.L{i * s}", 0.0)
        sma = np.zeros(s * Q + 1)
        sma[0] = 1.0
        for i in range(1, Q + 1):
            sma[i * s] = params.get(f"ma.S.L{i * s}", 0.0)
        ar = np.convolve(ar, sar)
        ma = np.convolve(ma, sma)
        for _ in range(D):
            seas_diff = np.zeros(s + 1)
            seas_diff[0], seas_diff[s] = 1.0, -1.0
            ar = np.convolve(ar, seas_diff)
    for _ in range(d):
        ar = np.convolve(ar, [1.0, -1.0])
    return ar, ma


def linear_filter(b: np.ndarray, a: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``scipy.signal.lfilter(b, a, x)`` (zero initial state), with a fast path
    for a pure polynomial (``a == [1]``: a pure AR model's pi(B)), where lfilter
    takes a slow general route."""
    if len(a) == 1:
        return np.convolve(x, np.asarray(b, dtype=float) / a[0])[: len(x)]
    return lfilter(b, a, x)


def pi_weights(model: FittedModel, n: int) -> np.ndarray:
    """Coefficients of pi(B) = phi(B) alpha(B) / theta(B), lag 0 first (pi_0 = 1)."""
    ar, ma = polynomials(model)
    impulse = np.zeros(n)
    impulse[0] = 1.0
    return linear_filter(ar, ma, impulse)  # no MA part: the AR polynomial itself


def psi_weights(model: FittedModel, n: int) -> np.ndarray:
    """Coefficients of psi(B) = theta(B) / (phi(B) alpha(B)), lag 0 first."""
    ar, ma = polynomials(model)
    impulse = np.zeros(n)
    impulse[0] = 1.0
    return lfilter(ma, ar, impulse)


def max_ma_root(params: Sequence[tuple[str, float]]) -> float:
    """Largest modulus of the inverse roots of the non-seasonal MA polynomial."""
    named = dict(params)
    coefs = [named[k] for k in sorted(named, key=_lag_key) if k.startswith("ma.L")]
    if not coefs:
        return 0.0
    roots = np.roots(np.r_[1.0, coefs])
    return float(np.max(np.abs(roots))) if roots.size else 0.0


def innovations(y: np.ndarray, model: FittedModel) -> np.ndarray:
    """One-step prediction errors of ``y`` under ``model``, scaled to variance sigma2.

    Kalman-filter innovations of the differenced series, standardized by their
    own variance and multiplied by sigma, so start-up points (where the
    prediction is uncertain) do not look like large shocks.  NaN where ``y`` is
    missing and for the first d + sD points (lost to differencing).
    """
    from statsmodels.tsa.statespace.sarimax import SARIMAX

    params = dict(model.params)
    dev = np.asarray(y, dtype=float) - params.get("const", 0.0)
    arma = [v for k, v in model.params if k not in ("const", "sigma2")]
    sigma2 = params["sigma2"]
    if not arma and model.order[1] == 0 and model.seasonal_order[1] == 0:
        return dev
    kw = dict(order=model.order, seasonal_order=model.seasonal_order, trend="n")
    try:  # filtering with given parameters warns about nothing: no catch_warnings
        res = SARIMAX(dev, simple_differencing=True, **kw).filter(np.r_[arma, sigma2])
    except (ValueError, np.linalg.LinAlgError):  # parameters outside the stationary region
        free = dict(enforce_stationarity=False, enforce_invertibility=False)
        res = SARIMAX(dev, simple_differencing=True, **kw, **free).filter(np.r_[arma, sigma2])
    err = np.asarray(res.forecasts_error[0], dtype=float)
    var = np.asarray(res.forecasts_error_cov[0, 0], dtype=float)
    out = np.full(dev.size, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        out[dev.size - err.size :] = err / np.sqrt(var) * math.sqrt(sigma2)
    out[np.isnan(y)] = np.nan
    return out


def fingerprint(values: np.ndarray) -> str:
    """Short stable hash of a series' values (NaN-aware), to tell if data changed."""
    arr = np.ascontiguousarray(np.round(np.asarray(values, dtype=float), 10))
    return hashlib.blake2b(arr.tobytes(), digest_size=8).hexdigest()


# -- helpers -----------------------------------------------------------------


def _to_model(
    decomp: Decomposition,
    *,
    order: Order,
    seasonal_order: SeasonalOrder,
    trend: str,
    params: tuple[tuple[str, float], ...],
    sigma2: float,
    nobs: int,
    method: str,
    converged: bool,
    aicc: float,
    values: np.ndarray,
    fallback: str | None = None,
) -> FittedModel:
    series = decomp.series
    return FittedModel(
        series_id=series.series_id,
        order=order,
        seasonal_order=seasonal_order,
        trend=trend,
        params=tuple((k, round_sig(v)) for k, v in params),
        sigma2=round_sig(sigma2),
        nobs=nobs,
        method=method,
        converged=converged,
        fallback=fallback,
        aicc=aicc if math.isfinite(aicc) else None,
        periods=decomp.periods,
        profiles=tuple(tuple(float(v) for v in prof) for prof in decomp.profiles),
        anchor=series.label(0) if series.nobs else None,
        step_seconds=series.step_seconds,
        fitted_through=series.label(series.nobs - 1) if series.nobs else None,
        fingerprint=fingerprint(values),
        business_days=series.business_days,
    )


def _fallbacks(order: Order, seasonal: SeasonalOrder) -> list[tuple[Order, SeasonalOrder]]:
    p, d, _ = order
    chain = [(order, seasonal)]
    if seasonal != (0, 0, 0, 0) and seasonal[1] == 0:
        chain.append((order, (0, 0, 0, 0)))
    for alt in ((p, d, 0), (min(p, 1), d, 0), (0, d, 0)):
        nxt = (alt, seasonal if seasonal[1] else (0, 0, 0, 0))
        if nxt not in chain:
            chain.append(nxt)
    return chain


def _name(order: Order, seasonal: SeasonalOrder) -> str:
    p, d, q = order
    P, D, Q, s = seasonal
    return f"ARIMA({p},{d},{q})" + (f"({P},{D},{Q}){s}" if s else "")


def _lag_key(name: str) -> int:
    digits = "".join(ch for ch in name if ch.isdigit())
    return int(digits) if digits else 0


def interpolate_missing(y: np.ndarray) -> np.ndarray:
    """Linear interpolation over missing values (zeros if none is observed).

    For the tests, the order search and the warm path's linear filter only;
    estimation itself lets the Kalman filter skip missing values.
    """
    y = np.asarray(y, dtype=float)
    ok = ~np.isnan(y)
    if ok.all():
        return y
    if not ok.any():
        return np.zeros_like(y)
    idx = np.arange(y.size)
    return np.interp(idx, idx[ok], y[ok])


def _long_ar_resid(z: np.ndarray, m: int) -> np.ndarray:
    """Residuals of a long autoregression AR(m) by least squares (zeros for t < m)."""
    n = z.size
    resid = np.zeros(n)
    if m < 1 or n <= 2 * m:
        resid[:] = z
        return resid
    X = np.column_stack([z[m - i : n - i] for i in range(1, m + 1)])
    resid[m:] = z[m:] - X @ ols(X, z[m:])
    return resid


def ols(X: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Least-squares coefficients by the normal equations (SVD-based lstsq as fallback).

    The regressions here are small and well conditioned; the normal equations
    cost a fraction of LAPACK's SVD solver.
    """
    try:
        return np.linalg.solve(X.T @ X, X.T @ y)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(X, y, rcond=None)[0]


def _outlying(y: np.ndarray, d: int) -> np.ndarray:
    """Positions whose long-AR residual has a robust |z| above OUTLIER_Z."""
    z = interpolate_missing(y)
    base = np.diff(z, n=d) if d else z - np.median(z)
    m = int(min(max(10 * math.log10(max(base.size, 10)), 4), base.size // 4))
    resid = _long_ar_resid(base - base.mean(), m)
    core = resid[m:]
    scale = 1.4826 * float(np.median(np.abs(core - np.median(core)))) if core.size else 0.0
    mask = np.zeros(y.size, dtype=bool)
    if not scale > 0:
        return mask
    flagged = np.flatnonzero(np.abs(resid) > OUTLIER_Z * scale) + d
    flagged = flagged[flagged < y.size]
    mask[flagged] = True
    return mask & ~np.isnan(y)


def _natural_lags(decomp: Decomposition) -> tuple[int, ...]:
    from changekind.tasks.decompose import BUSINESS_PERIODS, natural_periods

    series = decomp.series
    natural = BUSINESS_PERIODS if series.business_days else natural_periods(series.step_seconds)
    return tuple(p for p in natural if series.nobs >= 4 * p)
