"""Choose an ARIMA model for a seasonally adjusted series.

The public function is :func:`fit_model`; :func:`choose_model` is the order
choice behind it (differencing by :mod:`changekind.tasks.unitroot`, orders by
:func:`select_orders`, estimates by :mod:`changekind.tasks.estimation`, and the
:func:`robust_baseline` when nothing can be estimated).  The filters a fitted
model gives are in :mod:`changekind.tasks.arma`.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from changekind.tasks.arma import Order, SeasonalOrder, _long_ar_resid, interpolate_missing, ols
from changekind.tasks.estimation import (
    Estimate,
    EstimationError,
    _to_model,
    conditional_fit,
    estimate,
)
from changekind.tasks.threads import single_blas_thread
from changekind.tasks.types import Decomposition, FittedModel
from changekind.tasks.unitroot import _without_step, choose_d

MAX_SEASONAL_LAG = 12
"""Longest season given a seasonal AR term automatically (monthly data's 12,
quarterly 4, the business week's 5, the week of daily data's 7).  A seasonal
term at lag s makes the state vector about s long and each Kalman step costs
O(s^2): with s = 48 a half-hourly series of 4,032 points took minutes where
s = 0 takes milliseconds.  Longer seasons are left to the deterministic
profiles of decompose()."""


OUTLIER_Z = 4.0
"""Robust z above which a point is set aside for the first, robust estimate."""


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
