"""Critical values: the single place the engine's |t| thresholds come from.

An event is reported when its |t| clears the critical value.  Every time point
of a series is tested for several effect types, so the threshold has to grow
with the number of tests for the expected number of false events to stay
fixed: ``critical_value(n_tested, allowance)`` is the Bonferroni bound
``z(1 - allowance / (2 n_tested))``, floored at :data:`MIN_CRITICAL`.
"""

from __future__ import annotations

from scipy.special import ndtri

ALLOWANCE = 0.2
"""Expected number of false events per clean series analysed cold (the
default allowance of :func:`default_critical`)."""

TESTS_PER_POINT = 3
"""Effective number of independent tests at one time point: four types, the TC
profiled over decay rates, strongly correlated with each other.  With one test
per point, clean AR(1) series showed about three times ALLOWANCE false events."""

MIN_CRITICAL = 3.0
"""Floor of the critical value (short series)."""


def critical_value(n_tested: float, allowance: float = ALLOWANCE) -> float:
    """Critical |t| for ``n_tested`` tests sharing an expected ``allowance`` of false events.

    Parameters
    ----------
    n_tested : float
        Number of tests (time points times effect types).  Positive; need not
        be whole (a budget per unit time passes tested points per period).
    allowance : float, default=0.2
        Expected number of false events over those tests, in (0, n_tested).

    Returns
    -------
    float
        ``max(3, z(1 - allowance / (2 n_tested)))`` for Gaussian statistics.
    """
    if not n_tested > 0:
        raise ValueError(f"n_tested must be positive, got {n_tested!r}")
    if not 0 < allowance < n_tested:
        raise ValueError(f"allowance must be in (0, n_tested), got {allowance!r}")
    # norm.isf(q) is -ndtri(q); the ufunc skips scipy.stats' per-call argument
    # checks (0.27 ms, 5 % of a warm series).
    return max(MIN_CRITICAL, -float(ndtri(allowance / (2.0 * n_tested))))


def default_critical(n: int, *, alpha: float = ALLOWANCE) -> float:
    """Default critical value |t| for a series of ``n`` points.

    :func:`critical_value` of ``TESTS_PER_POINT * n`` tests.  Values: n=168 ->
    3.54, 720 -> 3.91, 2880 -> 4.23.
    """
    if n < 1:
        raise ValueError("n must be positive")
    return critical_value(TESTS_PER_POINT * n, alpha)


def check_critical(value: float | None) -> float | None:
    """A user's critical value, or None; raises ValueError naming the bound."""
    if value is None:
        return None
    value = float(value)
    if not 1.0 < value <= 20.0:
        raise ValueError(f"critical value must be in (1, 20], got {value:g}")
    return value
