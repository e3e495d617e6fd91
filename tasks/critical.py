"""Critical values: the single place the engine's |t| thresholds come from.

An event is reported when its |t| clears the critical value.  Every time point
of a series is tested for four effect types, so the threshold grows with the
number of tests for the expected number of false events to stay fixed:
``critical_value(n_tested, allowance)`` is the Bonferroni bound at which
``n_tested`` tests share an expected ``allowance`` of false events.

Heavy tails.  The bound assumes Gaussian residuals; with heavier tails a
single residual (the IO statistic, and nearly so the AO and TC ones) exceeds
a Gaussian bound far more often (shared method notes: about 40 times the false
events with Student-t(3) innovations).  :func:`fit_tail` describes the
residuals' own tail by a Student t whose tail mass beyond 3 robust sigma
matches the residuals' (a tail-matched t, our construction from the Student t
quantile function; any estimate of the tail index would serve), and
:func:`critical_value` then takes the larger of the Gaussian bound and that t's
quantile at the same tail probability.

References
----------
Chen, C. and Liu, L.-M. (1993). Joint estimation of model parameters and
outlier effects in time series. JASA 88(421), 284-297 (critical values grow
with the series length; their tables are for Gaussian series).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import ndtri

from changekind.tasks.types import ResidualTail

ALLOWANCE = 0.2
"""Expected number of false events per clean series analysed cold (the
default allowance of :func:`default_critical`)."""

TYPES_TESTED = 4
"""Tests at one time point: AO, LS, TC (profiled over decay rates) and IO."""

MIN_CRITICAL = 3.0
"""Floor of the critical value (short series)."""

CRITICAL_RANGE = (1.0, 100.0)
"""Critical values a user may set: above 1, at most 100 (the one check of a
user's value, :func:`check_critical`, used by detect, the CLI and the fleet
settings)."""

TAIL_Q = 0.95
"""The quantile of |residual| that describes the tail: far enough out to see the
tail's shape, with 5 % of the points beyond it, so real events on 1 % of the
points move it by about 5 % (measured: at 0.975, 19 level shifts among 2,000
points made the tails look heavy)."""

TAIL_GUARD = 3.09
"""Tails count as heavier than Gaussian only when the quantile ratio exceeds
the Gaussian one by more than this many of its standard errors (one-sided
0.1 %): neither sampling noise nor a few real spikes among Gaussian
residuals make the tails heavy (ten 6-sigma spikes among 2,000 points did at
2.33)."""

GAUSSIAN_DF = 30.0
"""A fitted t with at least this many degrees of freedom is taken as Gaussian:
extrapolating a t fitted at the 95 % quantile out to the 1e-6 tail is only
trusted where the tail is clearly heavy (measured: Gaussian residuals of
30,000 points gave df 55 and would have raised the critical value from 4.8 to
5.3)."""

FAR = 3.5
"""Heavy tails also need residuals beyond 3.5 sigma: at least two, and more
than the Poisson 99.9 % quantile of the Gaussian expectation (measured: the
195 residuals of fpp2 elecequip have a heavy shoulder, ratio 2.23, but none
beyond 3.1 sigma; a t fitted to the shoulder put the critical value at 14.6)."""

MIN_DF = 2.05
"""Smallest degrees of freedom fitted (a variance must exist)."""


def critical_value(
    n_tested: float, allowance: float = ALLOWANCE, *, tail: ResidualTail | None = None
) -> float:
    """Critical |t| for ``n_tested`` tests sharing an expected ``allowance`` of false events.

    Parameters
    ----------
    n_tested : float
        Number of tests (time points times effect types).  Positive; need not
        be whole (a budget per unit time passes tested points per period).
    allowance : float, default=0.2
        Expected number of false events over those tests, in (0, n_tested).
    tail : ResidualTail, optional
        The residuals' tail (:func:`fit_tail`); Gaussian when absent.

    Returns
    -------
    float
        ``max(3, z(1 - q), scale * t_df(1 - q))`` with ``q = allowance / (2
        n_tested)``: the Bonferroni bound, raised to the fitted t's quantile
        when the residuals' tails are heavy.  Values (Gaussian): 480 points
        (1,920 tests) -> 3.88; 2,880 points -> 4.29.
    """
    if not n_tested > 0:
        raise ValueError(f"n_tested must be positive, got {n_tested!r}")
    if not 0 < allowance < n_tested:
        raise ValueError(f"allowance must be in (0, n_tested), got {allowance!r}")
    q = allowance / (2.0 * n_tested)
    # norm.isf(q) is -ndtri(q); the ufunc skips scipy.stats' per-call argument
    # checks (0.27 ms, 5 % of a warm series).
    value = max(MIN_CRITICAL, -float(ndtri(q)))
    if tail is not None and not tail.gaussian:
        from scipy.special import stdtrit

        value = max(value, tail.scale * -float(stdtrit(tail.df, q)))
    return value


def default_critical(
    n: int, *, alpha: float = ALLOWANCE, tail: ResidualTail | None = None
) -> float:
    """Default critical value |t| for a series of ``n`` points: ``critical_value(4 n)``."""
    if n < 1:
        raise ValueError("n must be positive")
    return critical_value(TYPES_TESTED * n, alpha, tail=tail)


def check_critical(value: float | None) -> float | None:
    """A user's critical value, or None; raises ValueError naming the accepted range."""
    if value is None:
        return None
    value = float(value)
    low, high = CRITICAL_RANGE
    if not (math.isfinite(value) and low < value <= high):
        raise ValueError(
            f"critical value {value:g} is not usable; give a number of standard errors "
            f"above {low:g} and at most {high:g} such as 3.5 (or leave it out for the "
            "default, which grows with the series length)"
        )
    return value


def fit_tail(
    resid: np.ndarray, sigma: float, *, raw: np.ndarray | None = None, removed: int = 0
) -> ResidualTail:
    """The tail of residuals in units of the engine's robust ``sigma``.

    Parameters
    ----------
    resid : ndarray
        Residuals (finite values are used).
    sigma : float
        The engine's robust residual scale.
    raw : ndarray, optional
        The same residuals before detected events were removed, where the far
        tail is counted (default ``resid``): removing the events found at a
        Gaussian critical value removes exactly the far tail of a heavy-tailed
        series.
    removed : int, default=0
        How many events were removed from ``resid``: they still count as
        beyond the 95 % quantile (the quantile is read at the level that
        leaves 5 % of the points, removed ones included, above it).

    Returns
    -------
    ResidualTail
        ``df = inf`` (Gaussian) unless the residuals' tail is measurably
        heavier; else the Student t (location 0) with the residuals' ratio of
        the 95 % to the 75 % quantile of |z|.

    Notes
    -----
    1. z = resid / sigma; r = Q_0.95(|z|) / Q_0.75(|z|) (1.70 for Gaussian z).
    2. Gaussian unless r exceeds 1.70 by more than 3.09 of its standard errors
       (the asymptotic variance of a sample quantile, p (1 - p) / (m f(q)^2)),
       some residuals lie beyond 3.5 sigma (FAR), and the fitted df (step 3)
       is below 30.
    3. Else df in [2.05, 500] solves t_df.ppf(0.975) / t_df.ppf(0.875) = r
       (a quantile-matched t; the ratio falls as df grows), and the scale is
       Q_0.75(|z|) / t_df.ppf(0.75).
    The t's own maximum-likelihood fit (scipy.stats.t.fit) was tried first:
    three 6-sigma events among 480 Gaussian residuals gave df = 7 and a
    critical value of 6.5 instead of 3.9, and it costs 0.1-2.5 s; the quantile
    match ignores a few events and costs a sort.
    """
    from scipy import stats
    from scipy.optimize import brentq

    z = np.abs(np.asarray(resid, dtype=float))
    z = z[np.isfinite(z)]
    m = z.size
    gaussian = ResidualTail(df=math.inf, scale=1.0, nobs=m, method=TAIL_METHOD)
    if m < 40 or not sigma > 0:
        return gaussian
    z = z / sigma
    beyond_hi = max((1 - TAIL_Q) * m - removed, 1.0)
    q_hi, q_mid = np.quantile(z, [1 - beyond_hi / m, 0.75])
    if not q_mid > 0:
        return gaussian
    ratio = float(q_hi / q_mid)
    # Step 2: the Gaussian ratio and its sampling noise (the high quantile dominates).
    g_hi, g_mid = float(stats.norm.isf((1 - TAIL_Q) / 2)), float(stats.norm.isf(0.125))
    density = 2.0 * float(stats.norm.pdf(g_hi))
    se = math.sqrt(TAIL_Q * (1 - TAIL_Q) / m) / density / g_mid
    if ratio <= g_hi / g_mid + TAIL_GUARD * se:
        return gaussian
    # The shoulder alone is not a tail: some residuals must reach far out too.
    far = z if raw is None else np.abs(np.asarray(raw, dtype=float)) / sigma
    beyond = int(np.count_nonzero(far[np.isfinite(far)] > FAR))
    if beyond < max(2, stats.poisson.ppf(0.999, m * 2 * stats.norm.sf(FAR))):
        return gaussian
    hi_p = 1 - (1 - TAIL_Q) / 2

    def excess(df: float) -> float:
        return float(stats.t.ppf(hi_p, df) / stats.t.ppf(0.875, df)) - ratio

    if excess(500.0) >= 0:
        return gaussian
    df = MIN_DF if excess(MIN_DF) <= 0 else float(brentq(excess, MIN_DF, 500.0, xtol=1e-3))
    if df >= GAUSSIAN_DF:
        return gaussian
    scale = float(q_mid) / float(stats.t.ppf(0.875, df))
    return ResidualTail(df=round(df, 4), scale=round(scale, 6), nobs=m, method=TAIL_METHOD)


TAIL_METHOD = "t matched to |z| quantiles 0.95/0.75"
