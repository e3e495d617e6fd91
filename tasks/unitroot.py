"""How many differences a series needs: KPSS, told apart from a level shift.

:func:`choose_d` differences (d = 1) when the KPSS test rejects level
stationarity and neither one step in the mean (Zivot-Andrews' unit-root test
with one break in the intercept) nor a step that fits better than a trend
explains the rejection.  ``_without_step`` removes the best single step before
the order choice.
"""

from __future__ import annotations

import math

import numpy as np

from changekind.tasks.arma import interpolate_missing, ols

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
    """A step in mean explains the levels about as well as a linear trend, or better.

    Autoregressions z_t = c + g X_t + sum a_i z_(t-i) with X a step at the best
    split or a linear trend: the model here has no trend term, so a trending
    series is differenced even when a break test rejects a unit root (a
    trend-stationary series rejects it too).  Measured: simulated AR(1) with a
    5-sigma shift +44 to +81 log-RSS units for the step, AR(0.5) plus a trend
    -47 to -62, UKDriverDeaths (log) -0.16 (a near-tie, see STEP_TREND_AIC).
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
    # Equal parameter counts: the AIC difference is n log(RSS_step / RSS_trend).
    return t.size * math.log(rss[0] / rss[1]) <= STEP_TREND_AIC


STEP_TREND_AIC = 2.0
"""The trend is preferred to the step only when its AIC is lower by more than
this (a difference under 2 is no real support either way; Burnham and
Anderson 2002, common practice, from memory).  Measured: simulated shifts and
trends differ by 44 to 81 units, so only near-ties move; UKDriverDeaths (log)
with the moving-average trend of the decomposition is one: -0.16 (step
slightly worse), +0.3 with the earlier rolling-median trend."""


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
