"""Naive detectors the engine is compared with, and the statsmodels oracle.

Baselines (no event types; they report positions only):

- ``band_events``: flag ``|y - mean| > 3 sd`` (common practice: the "three
  sigma" rule); a run of consecutive flagged points counts as one event at its
  first point.
- ``esd_events``: Rosner's (1983) generalized ESD many-outlier test on the
  series after a per-phase median profile is removed (seasonal series only)
  and a median/MAD standardization; flagged points are grouped into runs the
  same way.

Oracle: ``oracle_fit`` fits statsmodels' SARIMAX with the true orders and the
true event regressor at the true time (observed-information covariance) and
returns the estimated omega.  It is the reference for effect accuracy.

References
----------
Rosner, B. (1983). Percentage points for a generalized ESD many-outlier
procedure. Technometrics 25, 165-172.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats
from statsmodels.tools.sm_exceptions import ConvergenceWarning
from statsmodels.tsa.statespace.sarimax import SARIMAX
from threadpoolctl import threadpool_limits

from tests.benchmarks.simulate import ModelSpec, SimulatedSeries, unit_regressor

MAD_SCALE = 1.4826  # MAD of a normal sample / its sd (common practice constant)


def runs_to_events(flags: np.ndarray) -> tuple[int, ...]:
    """First position of each run of consecutive True values."""
    flags = np.asarray(flags, dtype=bool)
    if flags.size == 0:
        return ()
    starts = flags & ~np.r_[False, flags[:-1]]
    return tuple(int(i) for i in np.flatnonzero(starts))


def band_events(values: np.ndarray, *, k: float = 3.0) -> tuple[int, ...]:
    """Positions flagged by a ``mean +/- k sd`` band, one per run of flagged points.

    Parameters
    ----------
    values : numpy.ndarray of shape (n,)
    k : float, default=3.0
        Half-width of the band in sample sds.
    """
    y = np.asarray(values, dtype=float)
    sd = float(np.std(y, ddof=1))
    if sd == 0.0:
        return ()
    return runs_to_events(np.abs(y - y.mean()) > k * sd)


def esd_critical_values(n: int, max_outliers: int, *, alpha: float = 0.05) -> np.ndarray:
    """Rosner's critical values ``lambda_1 .. lambda_r`` for a sample of ``n``.

    ``lambda_i = (n - i) t_{p, n-i-1} / sqrt((n - i - 1 + t^2)(n - i + 1))`` with
    ``p = 1 - alpha / (2 (n - i + 1))`` (Rosner 1983, eq. for the approximate
    percentage points).
    """
    i = np.arange(1, max_outliers + 1, dtype=float)
    p = 1.0 - alpha / (2.0 * (n - i + 1.0))
    t = stats.t.ppf(p, n - i - 1.0)
    return (n - i) * t / np.sqrt((n - i - 1.0 + t**2) * (n - i + 1.0))


@dataclass(frozen=True, slots=True)
class EsdResult:
    """Outcome of a generalized ESD test.

    ``statistics[i-1]`` is ``R_i`` and ``critical[i-1]`` is ``lambda_i``;
    ``candidates[i-1]`` is the position removed at step ``i``; the first
    ``n_outliers`` candidates are declared outliers.
    """

    statistics: np.ndarray
    critical: np.ndarray
    candidates: tuple[int, ...]
    n_outliers: int

    @property
    def outliers(self) -> tuple[int, ...]:
        return self.candidates[: self.n_outliers]


def generalized_esd(
    values: np.ndarray, *, max_outliers: int = 10, alpha: float = 0.05
) -> EsdResult:
    """Rosner's generalized ESD test for up to ``max_outliers`` outliers.

    Notes
    -----
    1. For ``i = 1..r``: ``R_i = max |x - mean| / sd`` over the points not yet
       removed (sd with ``n - 1``); remove the point attaining it.
    2. ``lambda_i`` from ``esd_critical_values``.
    3. The number of outliers is the largest ``i`` with ``R_i > lambda_i``.
    """
    x = np.asarray(values, dtype=float)
    n = x.size
    r = int(min(max_outliers, n - 3))
    if r < 1:
        raise ValueError(f"generalized ESD needs at least 4 points, got {n}")
    keep = np.ones(n, dtype=bool)
    stat = np.zeros(r)
    cand: list[int] = []
    # Step 1
    for i in range(r):
        sub = x[keep]
        sd = sub.std(ddof=1)
        dev = np.where(keep, np.abs(x - sub.mean()), -np.inf)
        j = int(np.argmax(dev))
        stat[i] = dev[j] / sd if sd > 0 else 0.0
        cand.append(j)
        keep[j] = False
    # Step 2
    lam = esd_critical_values(n, r, alpha=alpha)
    # Step 3
    above = np.flatnonzero(stat > lam)
    n_out = int(above[-1] + 1) if above.size else 0
    return EsdResult(stat, lam, tuple(cand), n_out)


def robust_standardize(values: np.ndarray, *, period: int = 0) -> np.ndarray:
    """Remove a per-phase median profile (if ``period``) and scale by median and MAD.

    Phase ``j`` is every point with ``position % period == j``.
    """
    y = np.asarray(values, dtype=float).copy()
    if period:
        phase = np.arange(y.size) % period
        for j in range(period):
            y[phase == j] -= np.median(y[phase == j])
    med = np.median(y)
    mad = MAD_SCALE * np.median(np.abs(y - med))
    return (y - med) / mad if mad > 0 else y - med


def esd_events(
    values: np.ndarray, *, period: int = 0, max_outliers: int = 10, alpha: float = 0.05
) -> tuple[int, ...]:
    """Generalized ESD outliers of the robustly deseasonalized series, one per run.

    Rosner's statistic is invariant to the affine median/MAD scaling; the
    scaling only puts every series on one readable scale.
    """
    z = robust_standardize(values, period=period)
    flagged = np.zeros(z.size, dtype=bool)
    flagged[list(generalized_esd(z, max_outliers=max_outliers, alpha=alpha).outliers)] = True
    return runs_to_events(flagged)


@dataclass(frozen=True, slots=True)
class OracleFit:
    """Omega estimated by SARIMAX with the true model and the true regressor."""

    omega: float
    se: float
    converged: bool


def oracle_fit(series: SimulatedSeries, *, event_type: str | None = None) -> OracleFit:
    """Fit the true model with the true regressor at the true time.

    Parameters
    ----------
    series : SimulatedSeries
        An injected series (``series.event_type`` not None).
    event_type : str, optional
        Regressor type to fit; default the true one.

    Notes
    -----
    1. Subtract the true daily profile (the oracle knows it).
    2. SARIMAX with the true ``(p, d, q)``; a constant regression column for
       stationary models (the level is unknown to any method); the event's unit
       regressor as the other exogenous column (TC with delta 0.7; IO as ``psi(B)`` applied to the
       pulse with the true psi weights).
    3. Fit by exact likelihood, ``cov_type="oim"`` (the OPG default understates
       pulse t statistics; see the project's method notes).
    """
    kind = event_type or series.event_type
    if kind is None or series.position < 0:
        raise ValueError(f"series {series.series_id!r} is clean; the oracle needs an event")
    spec: ModelSpec = series.spec
    # Step 1
    y = series.values - series.profile
    # Step 2.  The level enters as a regression column (regression with ARMA
    # errors, mean parametrization); SARIMAX's trend="c" is an intercept of the
    # AR recursion instead, which converges badly beside a step regressor.
    event = unit_regressor(kind, series.nobs, series.position, model=spec)
    exog = np.column_stack([np.ones(series.nobs), event]) if spec.d == 0 else event[:, None]
    model = SARIMAX(y, exog=exog, order=spec.order, trend="n")
    # Step 3.  Narrow: statsmodels warns about start values and convergence; the
    # result's mle_retvals carries the convergence flag we report instead.
    # One BLAS thread: multi-threaded OpenBLAS spins on these tiny state-space
    # products and starves parallel workers (the engine does the same).
    with threadpool_limits(limits=1), warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        warnings.filterwarnings("ignore", message="Non-stationary starting", category=UserWarning)
        warnings.filterwarnings("ignore", message="Non-invertible starting", category=UserWarning)
        res = model.fit(disp=False, cov_type="oim")
    k = list(res.model.param_names).index(res.model.exog_names[-1])  # the event column
    omega = float(np.asarray(res.params)[k])
    se = float(np.sqrt(np.asarray(res.cov_params())[k, k]))
    converged = bool(res.mle_retvals.get("converged", True)) if res.mle_retvals else True
    return OracleFit(omega, se, converged)
