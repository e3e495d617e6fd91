"""Naive detectors the engine is compared with, and the statsmodels oracle.

Baselines (no event types; they report positions only):

- ``band_events``: flag ``|y - mean| > 3 sd`` (common practice: the "three
  sigma" rule); a run of consecutive flagged points counts as one event at its
  first point.
- ``esd_events``: Rosner's (1983) generalized ESD many-outlier test on the
  series after a per-phase median profile is removed (seasonal series only)
  and a median/MAD standardization; flagged points are grouped into runs the
  same way.

Oracles (statsmodels' SARIMAX with the true orders, the parameters estimated
by exact likelihood):

- ``oracle_fit``: the true event regressor at the true time
  (observed-information covariance); returns the estimated omega and its
  standard error.  The reference for effect accuracy and detection power.
- ``oracle_type``: one fit per candidate type with that type's regressor at
  the true time; the type with the largest log-likelihood, with the TC decay
  known (0.7) or profiled over a grid and charged one log-likelihood unit.
  The known-time, known-shape likelihood classifier: an optimistic bound on
  the type accuracy any method can reach on a series.

References
----------
Rosner, B. (1983). Percentage points for a generalized ESD many-outlier
procedure. Technometrics 25, 165-172.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, replace

import numpy as np
from scipy import stats
from statsmodels.tools.sm_exceptions import ConvergenceWarning
from statsmodels.tsa.statespace.sarimax import SARIMAX
from threadpoolctl import threadpool_limits

from changekind.tasks.simulate import STUDY_TYPES as EVENT_TYPES
from changekind.tasks.simulate import (
    TC_DELTA,
    ModelSpec,
    SimulatedSeries,
    unit_regressor,
)

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
    llf: float = float("nan")


def _true_model(
    series: SimulatedSeries, event: np.ndarray, *, concentrate_scale: bool = False
) -> SARIMAX:
    """SARIMAX with the true orders on the series less its true profile, ``event`` as a regressor.

    The level enters as a regression column for stationary models (regression
    with ARMA errors, mean parametrization; the level is unknown to any
    method); SARIMAX's ``trend="c"`` is an intercept of the AR recursion
    instead, which converges badly beside a step regressor.  The event column
    is the last exogenous column.
    """
    spec: ModelSpec = series.spec
    y = series.values - series.profile  # the oracle knows the profile
    exog = np.column_stack([np.ones(series.nobs), event]) if spec.d == 0 else event[:, None]
    return SARIMAX(y, exog=exog, order=spec.order, trend="n", concentrate_scale=concentrate_scale)


def _fit_quietly(model: SARIMAX, **fit_kwargs):
    """``model.fit`` with one BLAS thread and statsmodels' start-value warnings silenced.

    statsmodels warns about start values and convergence; the result's
    ``mle_retvals`` carries the convergence flag the callers report instead.
    One BLAS thread: multi-threaded OpenBLAS spins on these tiny state-space
    products and starves parallel workers (the engine does the same).
    """
    with threadpool_limits(limits=1), warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        warnings.filterwarnings("ignore", message="Non-stationary starting", category=UserWarning)
        warnings.filterwarnings("ignore", message="Non-invertible starting", category=UserWarning)
        return model.fit(disp=False, **fit_kwargs)


def _converged(res) -> bool:
    return bool(res.mle_retvals.get("converged", True)) if res.mle_retvals else True


def _check_injected(series: SimulatedSeries, kind: str | None) -> str:
    if kind is None or series.position < 0:
        raise ValueError(f"series {series.series_id!r} is clean; the oracle needs an event")
    return kind


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
    kind = _check_injected(series, event_type or series.event_type)
    # Steps 1 and 2
    event = unit_regressor(kind, series.nobs, series.position, model=series.spec)
    model = _true_model(series, event)
    # Step 3
    res = _fit_quietly(model, cov_type="oim")
    k = list(res.model.param_names).index(res.model.exog_names[-1])  # the event column
    omega = float(np.asarray(res.params)[k])
    se = float(np.sqrt(np.asarray(res.cov_params())[k, k]))
    return OracleFit(omega, se, _converged(res), float(res.llf))


ORACLE_DELTA_GRID: tuple[float, ...] = tuple(round(0.1 * k, 1) for k in range(1, 10))
"""TC decay rates the oracle profiles over when it is not told the decay."""

TC_CHARGE = 1.0
"""Log-likelihood units charged to a TC whose decay is profiled (AIC's charge
for the extra parameter; the engine charges the same)."""


@dataclass(frozen=True, slots=True)
class OracleType:
    """The known-time, known-shape likelihood classifier's verdict on one series.

    ``known``: the type with the largest log-likelihood when the TC decay is
    the true 0.7 (``llf``).  ``profiled``: the same with the TC's
    log-likelihood maximized over ``ORACLE_DELTA_GRID`` (``tc_profile``, best
    at ``tc_delta``) and charged ``TC_CHARGE``; None (and ``tc_profile`` only
    the decay 0.7) when the profile was not computed.  ``converged`` is False
    when any of the fits was not reported converged.
    """

    known: str
    profiled: str | None
    llf: dict[str, float]
    tc_profile: dict[float, float]
    tc_delta: float
    converged: bool

    @property
    def profiled_scores(self) -> dict[str, float]:
        """Log-likelihoods the profiled variant compares (TC: profile maximum less the charge)."""
        out = dict(self.llf)
        out["TC"] = self.tc_profile[self.tc_delta] - TC_CHARGE
        return out


def _argmax(scores: dict[str, float]) -> str:
    """The key with the largest value; ties go to the first in ``EVENT_TYPES`` order."""
    return max(EVENT_TYPES, key=lambda k: (scores[k], -EVENT_TYPES.index(k)))


def oracle_type(
    series: SimulatedSeries, *, profile: bool = True, known_llf: dict[str, float] | None = None
) -> OracleType:
    """Classify an injected series' event by likelihood, told its time and the model orders.

    An optimistic bound on the type accuracy of any method: the time, the
    orders and (in the first variant) the TC decay are given, only the
    parameters are estimated.

    Parameters
    ----------
    series : SimulatedSeries
        An injected series.
    profile : bool, default=True
        Also profile the TC decay (step 4: eight more fits, three times the cost).
    known_llf : dict, optional
        Maximized log-likelihoods already computed for some types by
        ``oracle_fit`` (``OracleFit.llf``, the same estimator; the TC at decay
        0.7); those fits are skipped.  The study passes the true type's, which
        saves one fit per series.

    Notes
    -----
    1. For each type in ``EVENT_TYPES`` build its unit regressor at the true
       time ``T`` (AO pulse, LS step, TC ``0.7**(t - T)``, IO the model's psi
       weights from ``T``; ``simulate.unit_regressor``, as ``oracle_fit``).
    2. Fit the true model with that regressor by exact likelihood (SARIMAX as
       in ``oracle_fit``; sigma^2 concentrated out, which leaves the maximum
       unchanged, and no covariance matrix: only ``llf`` is used; the
       maximized log-likelihoods agree with ``oracle_fit``'s to about 1e-4).
       After the first fit, each fit starts from the previous fit's ARMA
       estimates.
    3. ``known``: the type with the largest ``llf``, equal priors and no
       penalty (every candidate has one effect parameter).
    4. TC profile: refit the TC for every decay in ``ORACLE_DELTA_GRID``
       (0.7 is the fit of step 2), walking outward from 0.7 so each fit starts
       from its neighbour's estimates.  ``profiled``: the largest of the AO,
       LS and IO ``llf`` and the TC profile maximum less ``TC_CHARGE``.
    """
    _check_injected(series, series.event_type)
    n, T, spec = series.nobs, series.position, series.spec

    def fit(event: np.ndarray, previous: np.ndarray | None):
        model = _true_model(series, event, concentrate_scale=True)
        start = None
        if previous is not None:  # exog start values from the model's own OLS
            start = np.array(model.start_params, dtype=float)
            start[model.k_exog :] = previous[model.k_exog :]
        res = _fit_quietly(model, cov_type="none", start_params=start)
        return res, np.asarray(res.params, dtype=float)

    # Steps 1-3
    llf: dict[str, float] = {}
    converged = True
    params: dict[str, np.ndarray] = {}
    previous = None
    given = known_llf or {}
    for kind in EVENT_TYPES:
        if kind in given and not (profile and kind == "TC"):  # the profile starts from its fit
            llf[kind] = float(given[kind])
            continue
        res, previous = fit(unit_regressor(kind, n, T, model=spec), previous)
        llf[kind], params[kind] = float(res.llf), previous
        converged &= _converged(res)
    # Step 4
    tc_llf = {TC_DELTA: llf["TC"]}
    tail = np.arange(n - T, dtype=float)
    below = [d for d in ORACLE_DELTA_GRID if d < TC_DELTA][::-1]
    above = [d for d in ORACLE_DELTA_GRID if d > TC_DELTA]
    for side in (below, above) if profile else ():
        previous = params["TC"]
        for delta in side:
            event = np.zeros(n)
            event[T:] = delta**tail
            res, previous = fit(event, previous)
            tc_llf[delta] = float(res.llf)
            converged &= _converged(res)
    tc_llf = dict(sorted(tc_llf.items()))
    best_delta = max(tc_llf, key=tc_llf.__getitem__)
    out = OracleType(_argmax(llf), None, llf, tc_llf, best_delta, converged)
    if not profile:
        return out
    return replace(out, profiled=_argmax(out.profiled_scores))
