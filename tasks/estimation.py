"""Estimating an ARIMA model of given orders, and using a fitted one.

:func:`estimate` is the single place where statsmodels' state-space estimator
is called (through ``_exact_fit``); :func:`conditional_fit` is the
Hannan-Rissanen regression used inside the loops; :func:`refit` re-estimates a
cached model's coefficients; :func:`filtered_residuals` and
:func:`innovations` turn a fitted model and a series into residuals.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from changekind.tasks.arma import (
    Order,
    SeasonalOrder,
    _arma_polys,
    _long_ar_resid,
    interpolate_missing,
    linear_filter,
    max_ma_root,
    ols,
)
from changekind.tasks.types import Decomposition, FittedModel, round_sig

MAX_ITER = 60
"""Optimizer iterations per estimate (bounded; the result says if it converged)."""


MAX_ROOT = 0.99
"""Largest modulus allowed for an inverse MA root (nearly non-invertible MA
polynomials produce spurious start-up effects in filtered residuals)."""


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
    named, sigma2, llf, n_iter, converged, nobs, aicc = _fit_orders(
        y, order, seasonal_order, trend=trend, exact=exact, start_params=start_params
    )
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


def _fit_orders(
    y: np.ndarray,
    order: Order,
    seasonal_order: SeasonalOrder,
    *,
    trend: str,
    exact: bool,
    start_params,
):
    """One estimate of given orders, exact or Hannan-Rissanen, with its AICc.

    Returns ``(named params, sigma2, llf, n_iter, converged, nobs, aicc)``.
    """
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
    return named, sigma2, llf, n_iter, converged, nobs, aicc


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
        from scipy.optimize import minimize  # here: start-up of commands that fit nothing

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
    from scipy.signal import lfilter  # here: start-up of commands that fit nothing

    e = lfilter(ar, ma, z)[p + s * P :]
    sigma2 = float(np.mean(e * e)) if e.size else 0.0
    if not sigma2 > 0:
        raise EstimationError("zero innovation variance")
    named.append(("sigma2", sigma2))
    llf = -0.5 * e.size * (math.log(2 * math.pi * sigma2) + 1.0)
    return named, sigma2, llf


def _differenced(z: np.ndarray, d: int, D: int, s: int) -> np.ndarray:
    for _ in range(D):
        z = z[s:] - z[:-s]
    for _ in range(d):
        z = np.diff(z)
    return z


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
    named, sigma2, llf, n_iter, converged, nobs, aicc = _fit_orders(
        y,
        model.order,
        model.seasonal_order,
        trend=model.trend,
        exact=exact,
        start_params=arma or None,
    )
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
