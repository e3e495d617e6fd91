"""Find and classify interventions: joint estimation of model and effects.

:func:`detect_events` is the Chen & Liu (1993) procedure on a decomposed
series, with the additions described in its docstring; :func:`analyse_series`
runs the whole engine on raw observations; :func:`screen_new_points` tests only
the newest points of a series against a cached model (no estimation).

Effect shapes, for an effect omega at time T (pi(B) = phi(B) alpha(B) / theta(B)
and psi(B) = 1 / pi(B)):

======  ==============================  ==========================
type    in the series                   in the residuals e = pi(B) y
======  ==============================  ==========================
AO      omega at T only                 omega pi(B) I_T
LS      omega from T on                 omega pi(B) / (1 - B) I_T
TC      omega delta^(t-T) from T on     omega pi(B) / (1 - delta B) I_T
IO      omega psi_(t-T) from T on       omega I_T
======  ==============================  ==========================
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from scipy.special import ndtr, ndtri

from changekind.tasks.decompose import decompose, profile_at, regularize
from changekind.tasks.fit import (
    Estimate,
    EstimationError,
    estimate,
    fit_model,
    innovations,
    interpolate_missing,
    linear_filter,
    pi_weights,
    polynomials,
    psi_weights,
)
from changekind.tasks.threads import single_blas_thread
from changekind.tasks.types import (
    EVENT_TYPES,
    Decomposition,
    DetectionResult,
    Event,
    FittedModel,
    Pattern,
    RegularSeries,
    format_duration,
    round_sig,
)
from changekind.tasks.wrappers import TaskSpec, lazy_task

ALPHA = 0.2
"""Expected number of false events per clean series that the default critical
value aims at (see default_critical)."""

TESTS_PER_POINT = 3
"""Effective number of independent tests at one time point: four types, the TC
profiled over decay rates, strongly correlated with each other.  With one test
per point, clean AR(1) series showed about three times ALPHA false events."""

MIN_CRITICAL = 3.0
"""Floor of the default critical value (short series)."""

DELTA_GRID = (0.2, 0.35, 0.5, 0.6, 0.7, 0.8, 0.9)
"""TC decay rates profiled during the search; the final decay is refined
continuously in (0.05, 0.95)."""

TC_PENALTY = 1.0
"""Log-likelihood units charged to a TC for its estimated decay (AIC's charge
for one parameter) when the types are compared."""

SETTLE = 8
"""An event with fewer observations after it than this (or than two decay
half-lives of a TC) is provisional: the types still look alike there."""

LS_MARGIN = 2
"""Points after the first testable one before a level shift may be placed."""

MAX_OUTER = 4
MAX_INNER = 60
MAX_FINAL = 4
MAX_PATTERNS = 2
MIN_PATTERN_REPEATS = 4


@dataclass(frozen=True, slots=True)
class _Candidate:
    position: int
    kind: str
    delta: float | None = None
    omega: float = 0.0
    t: float = 0.0


def default_critical(n: int, *, alpha: float = ALPHA) -> float:
    """Default critical value |t| for a series of ``n`` points.

    ``C(n) = z(1 - alpha / (2 m n))``, floored at 3: a Bonferroni bound over the
    n time points with m = 3 effective tests per point, so the expected number
    of false events in a clean series stays about ``alpha`` (0.2) whatever its
    length, and false events per 1,000 clean points fall as series grow (about
    0.4 at n = 480).  The Monte Carlo study in tests/benchmarks measures the
    rate actually reached.  Values: n=168 -> 3.54, 720 -> 3.91, 2880 -> 4.23.
    """
    if n < 1:
        raise ValueError("n must be positive")
    # norm.isf(q) is -ndtri(q); the ufunc skips scipy.stats' per-call argument
    # checks (0.27 ms, 5 % of a warm series).
    return max(MIN_CRITICAL, -float(ndtri(alpha / (2.0 * TESTS_PER_POINT * n))))


@single_blas_thread
def analyse_series(
    series_id: str,
    timestamps,
    values,
    *,
    periods: Sequence[int] | None = None,
    critical: float | None = None,
) -> DetectionResult:
    """Run the whole engine on one series' raw observations.

    regularize -> decompose -> detect_events.  Raises the SeriesError
    subclasses of :func:`~changekind.tasks.decompose.regularize` on bad input.
    """
    series = regularize(series_id, timestamps, values)
    return detect_events(decompose(series, periods=periods), critical=critical)


@single_blas_thread
def detect_events(
    decomp: Decomposition,
    *,
    model: FittedModel | None = None,
    critical: float | None = None,
    max_outer: int = MAX_OUTER,
) -> DetectionResult:
    """Joint estimation of ARIMA parameters and intervention effects.

    Parameters
    ----------
    decomp : Decomposition
    model : FittedModel, optional
        Starting model (for example from the cache); chosen and fitted if absent.
    critical : float, optional
        Critical |t|; default :func:`default_critical` of the series length.
    max_outer : int, default=4
        Bound on the outer (re-estimation) loop.

    Returns
    -------
    DetectionResult

    Notes
    -----
    1. Recurring spikes: spikes at a fixed spacing (at least four) are a
       pattern, not events: the spacing joins the seasonal periods, the series
       is decomposed again and the pattern reported.  Checked before the
       search and again on the events of each outer pass.
    2. Outer loop (bounded, stops when an event set repeats): residuals are the
       Kalman one-step errors of the series under the current model; sigma is
       their normalized MAD.
       a. Inner loop: for every time and type the effect estimate
          omega(T) = sum h_k e_(T+k) / sum h_k^2 and tau = omega sqrt(sum h_k^2)
          / sigma (all times at once by FFT cross-correlation; TC profiled over
          a grid of decay rates); the largest |tau| above the critical value is
          taken, its effect removed from the residuals, and the search repeated.
       b. Joint stage: all candidates estimated together by regression on the
          residuals; the weakest below the critical value dropped, repeatedly.
       c. The model is re-estimated on the series with the effects removed
          (orders and differencing chosen again on the first pass).
    3. Final stage: one maximum-likelihood estimate of the model with all
       effects as regressors (t from the approximate Hessian); the weakest
       effect below the critical value dropped and the estimate repeated.
    4. Types: at each event, with every other effect removed, the support of
       each type is its likelihood gain tau^2 / 2 (TC charged one unit for its
       decay, which is refined continuously); weights are these relative
       likelihoods under equal priors.  An event whose best-supported type is
       not its current one is reclassified and step 3 repeated (bounded).
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
    crit = default_critical(n) if critical is None else float(critical)
    if not crit > 0:
        raise ValueError("critical value must be positive")
    notes: list[str] = []
    patterns: list[Pattern] = []

    # Step 1: recurring spikes before anything is fitted.
    period = _spike_period(decomp.adjusted, crit)
    if period is not None and period not in decomp.periods:
        decomp, pattern = _absorb_pattern(decomp, period)
        patterns.append(pattern)

    y = decomp.adjusted
    current: FittedModel | Estimate = model if model is not None else fit_model(decomp)
    seen: list[frozenset[tuple[int, str]]] = []
    cands: list[_Candidate] = []
    converged = False
    n_iter = 0
    # Step 2: outer loop.
    for n_iter in range(1, max_outer + 1):
        e, w, sigma = _residuals(y, current)
        if sigma is None:
            notes.append("residuals are all zero: the seasonal pattern explains the series")
            cands = []
            converged = True
            break
        pi = pi_weights(current, n)
        start = _n_start(current)
        found = _inner_loop(e, w, pi, sigma, crit, start)
        found = _joint(e, w, pi, sigma, crit, found)
        spikes = [c.position for c in found if c.kind in ("AO", "IO")]
        period = _regular_period(spikes, n)
        if period is not None and len(patterns) < MAX_PATTERNS and period not in decomp.periods:
            decomp, pattern = _absorb_pattern(decomp, period)
            patterns.append(pattern)
            y = decomp.adjusted
            current = fit_model(decomp)
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
        adjusted = y - _total_effect(n, found, psi_weights(current, n))
        if len(seen) == 1:  # orders and differencing chosen again once, without the effects
            current = fit_model(decomp, y=adjusted, start=current)
        else:
            current = _refit(adjusted, current)
    else:
        notes.append(f"outer loop stopped at its bound of {max_outer} passes")

    # Steps 3-4: final joint estimate and classification.
    fitted, cands, support, final_notes = _final_stage(y, current, cands, crit)
    notes.extend(final_notes)
    final_model = _as_model(decomp, fitted, current)
    events = tuple(
        _to_event(series, final_model, c, weights, delta)
        for c, (weights, delta) in zip(cands, support, strict=True)
    )
    if isinstance(current, FittedModel) and current.fallback:
        notes.append(current.fallback)
    return DetectionResult(
        series_id=series.series_id,
        events=events,
        model=final_model,
        critical=crit,
        nobs=n,
        n_missing=series.n_missing,
        converged=converged,
        n_iter=n_iter,
        patterns=tuple(patterns),
        notes=tuple(notes),
    )


@single_blas_thread
def screen_new_points(
    model: FittedModel,
    series: RegularSeries,
    n_new: int,
    *,
    known: Sequence[Event] = (),
    critical: float | None = None,
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
        Default: :func:`default_critical` of the model's estimation length.

    Returns
    -------
    DetectionResult
        Events among the new points (effects estimated jointly on the filtered
        residuals, with the cached sigma), the model unchanged.

    Notes
    -----
    Residuals are pi(B) applied to the seasonally adjusted context (a linear
    filter, no Kalman filter and no optimizer), so testing costs milliseconds.
    Missing points are interpolated for the filter and carry no weight.
    """
    n = series.nobs
    if not 0 < n_new <= n:
        raise ValueError(f"n_new must be in 1..{n}")
    crit = default_critical(model.nobs) if critical is None else float(critical)
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
    found = _inner_loop(e, w, pi, sigma, crit, start, ls_from=start)
    found = _joint(e, w, pi, sigma, crit, found)
    e_clean = e - (_design(found, pi, n) @ np.array([c.omega for c in found])) * w if found else e
    support = _weights_for(e_clean, w, pi, sigma, found, ls_from=start)
    events = tuple(
        _to_event(series, model, c, weights, delta)
        for c, (weights, delta) in zip(found, support, strict=True)
    )
    tested = e[start:][w[start:] > 0]
    notes = ()
    if tested.size >= 5:
        # The efficient robust scale: a MAD of 60 points has the noise of a
        # variance from about 22, which set off the drift test for 5 % of the
        # series of a clean fleet (tests/benchmarks/bench_fleet.py).
        notes = (f"resid_scale={robust_sigma(tested) / sigma:.4g}",)
    return DetectionResult(
        series_id=series.series_id,
        events=events,
        model=model,
        critical=crit,
        nobs=n,
        n_missing=series.n_missing,
        converged=True,
        n_iter=1,
        patterns=(),
        notes=notes,
    )


# -- residual-space statistics ---------------------------------------------------


def residual_patterns(pi: np.ndarray, *, deltas: Sequence[float] = DELTA_GRID) -> dict:
    """Residual-space signature h of a unit effect of each type (lag 0 first).

    Returns a dict type -> array; ``"TC"`` maps to a dict delta -> array.
    """
    from scipy.signal import lfilter

    n = pi.size
    io = np.zeros(n)
    io[0] = 1.0
    if n <= DIRECT_TAIL:
        # h_delta[k] = sum_j delta^(k-j) pi[j]: one product for every decay.
        pad = np.zeros(2 * n - 1)
        pad[n - 1 :] = pi
        lower = np.lib.stride_tricks.sliding_window_view(pad, n)[:, ::-1]  # [k, j] = pi[k - j]
        powers = np.power.outer(np.asarray(deltas, dtype=float), np.arange(n)).T  # [j, d] = d^j
        tcs = lower @ powers
        tc = {d: tcs[:, i] for i, d in enumerate(deltas)}
    else:
        tc = {d: lfilter([1.0], [1.0, -d], pi) for d in deltas}
    return {"AO": pi, "LS": np.cumsum(pi), "IO": io, "TC": tc}


def _tau(
    e: np.ndarray, w: np.ndarray, pats: dict, sigma: float, start: int = 0
) -> dict[str, tuple[np.ndarray, np.ndarray, np.ndarray | None]]:
    """omega(T), tau(T) (and the best TC delta) for every time and type.

    Times before ``start`` are NaN when only a short tail is tested (a warm
    screen): the sums over the tail are then direct products, cheaper than
    the FFT correlations that serve a whole series.
    """
    n = e.size
    H = np.column_stack([pats["AO"], pats["LS"], *pats["TC"].values()])
    if _direct_tail(n, start):
        num, den = _tail_sums(e * w, w, H, start)
    else:
        num, den = _fft_sums(e * w, w, H)
    den = np.where(den > 1e-12, den, np.nan)
    omega = num / den
    tau = omega * np.sqrt(den) / sigma
    if start:
        omega[:start] = np.nan
        tau[:start] = np.nan
    out: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray | None]] = {}
    io = e * w
    io_tau = np.where(w > 0, io / sigma, np.nan)
    if start:
        io_tau[:start] = np.nan
    out["IO"] = (io, io_tau, None)
    for j, kind in enumerate(("AO", "LS")):
        out[kind] = (omega[:, j], tau[:, j], None)
    # The TC: the decay whose |tau| is largest, time by time (first on ties).
    tc_abs = _zero_nan(np.abs(tau[:, 2:]))
    pick = np.argmax(tc_abs, axis=1)
    rows = np.arange(n)
    grid = np.fromiter(pats["TC"], dtype=float)
    out["TC"] = (omega[rows, 2 + pick], tau[rows, 2 + pick], grid[pick])
    return out


DIRECT_TAIL = 256
"""Longest tested tail whose statistics are summed directly rather than by FFT."""


def _direct_tail(n: int, start: int) -> bool:
    """Only a short tail from ``start`` is tested: direct sums, patterns that long."""
    return start > 0 and n - start <= DIRECT_TAIL


def _fft_sums(x: np.ndarray, w: np.ndarray, H: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """sum_k h[k] x[T+k] and sum_k h[k]^2 w[T+k] for every T and column h of H."""
    n = x.size
    size = 1 << math.ceil(math.log2(2 * n))
    X = np.fft.rfft(x, size)
    HF = np.conj(np.fft.rfft(H, size, axis=0))
    num = np.fft.irfft(X[:, None] * HF, size, axis=0)[:n]
    if w.min() < 1:
        WF = np.fft.rfft(w, size)
        H2 = np.conj(np.fft.rfft(H * H, size, axis=0))
        den = np.fft.irfft(WF[:, None] * H2, size, axis=0)[:n]
    else:
        den = np.cumsum(H * H, axis=0)[::-1]
    return num, den


def _tail_sums(
    x: np.ndarray, w: np.ndarray, H: np.ndarray, start: int
) -> tuple[np.ndarray, np.ndarray]:
    """The sums of :func:`_fft_sums` for T >= start only (rows before are zero)."""
    n = x.size
    m = n - start
    pad = np.zeros(2 * m - 1)
    pad[:m] = x[start:]
    A = np.lib.stride_tricks.sliding_window_view(pad, m)  # A[i, k] = x[start + i + k]
    Hm = H[:m]
    num = np.zeros((n, H.shape[1]))
    den = np.zeros((n, H.shape[1]))
    num[start:] = A @ Hm
    if w.min() < 1:
        pad[:m] = w[start:]
        den[start:] = np.lib.stride_tricks.sliding_window_view(pad, m) @ (Hm * Hm)
    else:
        den[start:] = np.cumsum(Hm * Hm, axis=0)[::-1]
    return num, den


def _zero_nan(x: np.ndarray) -> np.ndarray:
    """NaN as 0 (np.nan_to_num without its per-call overhead; values here are finite)."""
    return np.where(np.isnan(x), 0.0, x)


def _scores(taus: dict, where: np.ndarray | int) -> dict[str, np.ndarray]:
    """Log-likelihood support tau^2/2 (TC charged TC_PENALTY) at positions."""
    out = {}
    for kind in EVENT_TYPES:
        t = _zero_nan(taus[kind][1][where])
        out[kind] = 0.5 * t * t - (TC_PENALTY if kind == "TC" else 0.0)
    return out


def _inner_loop(
    e: np.ndarray,
    w: np.ndarray,
    pi: np.ndarray,
    sigma: float,
    crit: float,
    start: int,
    *,
    ls_from: int | None = None,
    max_inner: int = MAX_INNER,
) -> list[_Candidate]:
    """Detect effects one at a time, removing each from the residuals (step 2a).

    ``ls_from`` is the first time a level shift may be placed (default two
    points after ``start``): a step at the very start of the data is the mean
    itself, and one a point later is an AO at the start.
    """
    n = e.size
    # A short tested tail needs the patterns only as far as the tail reaches.
    reach = n - start if _direct_tail(n, start) else n
    pats = residual_patterns(pi[:reach])
    e = e.copy()
    allowed = (w > 0) & (np.arange(n) >= start)
    ls_from = start + LS_MARGIN if ls_from is None else ls_from
    found: list[_Candidate] = []
    for _ in range(max_inner):
        taus = _tau(e, w, pats, sigma, start)
        taus["LS"][1][:ls_from] = np.nan
        stacked = np.vstack([np.abs(_zero_nan(taus[k][1])) for k in EVENT_TYPES])
        best_abs = np.where(allowed, stacked.max(axis=0), 0.0)
        T = int(np.argmax(best_abs))
        if best_abs[T] < crit:
            break
        scores = _scores(taus, T)
        kind = max(EVENT_TYPES, key=lambda k: scores[k])
        if abs(float(taus[kind][1][T])) < crit:  # penalized TC won on score only
            kind = EVENT_TYPES[int(np.argmax(stacked[:, T]))]
        omega = float(taus[kind][0][T])
        delta = float(taus["TC"][2][T]) if kind == "TC" else None
        h = pats["IO"] if kind == "IO" else (_tc(pi, delta) if kind == "TC" else pats[kind])
        e[T:] -= omega * h[: n - T] * w[T:]
        found.append(_Candidate(T, kind, delta, omega, float(taus[kind][1][T])))
        allowed[T] = False
    return found


def _joint(
    e: np.ndarray,
    w: np.ndarray,
    pi: np.ndarray,
    sigma: float,
    crit: float,
    cands: list[_Candidate],
) -> list[_Candidate]:
    """Estimate all candidates together; drop the weakest below ``crit`` (step 2b)."""
    cands = list(cands)
    while cands:
        X = _design(cands, pi, e.size) * w[:, None]
        try:
            inv = np.linalg.inv(X.T @ X)
        except np.linalg.LinAlgError:
            inv = np.linalg.pinv(X.T @ X)
        coef = inv @ (X.T @ (e * w))
        se = sigma * np.sqrt(np.clip(np.diag(inv), 1e-300, None))
        t = coef / se
        weakest = int(np.argmin(np.abs(t)))
        if abs(t[weakest]) >= crit:
            pairs = zip(cands, coef, t, strict=True)
            return [replace(c, omega=float(o), t=float(tt)) for c, o, tt in pairs]
        del cands[weakest]
    return []


def _design(cands: Sequence[_Candidate], pi: np.ndarray, n: int) -> np.ndarray:
    """Residual-space regressors of candidates, one column each."""
    X = np.zeros((n, len(cands)))
    for j, c in enumerate(cands):
        X[c.position :, j] = _shape_resid(c, pi)[: n - c.position]
    return X


def _shape_resid(c: _Candidate, pi: np.ndarray) -> np.ndarray:
    if c.kind == "IO":
        h = np.zeros(pi.size)
        h[0] = 1.0
        return h
    if c.kind == "AO":
        return pi
    if c.kind == "LS":
        return np.cumsum(pi)
    return _tc(pi, c.delta or 0.7)


def _tc(pi: np.ndarray, delta: float | None) -> np.ndarray:
    from scipy.signal import lfilter

    return lfilter([1.0], [1.0, -(delta if delta is not None else 0.7)], pi)


# -- series-space effects ----------------------------------------------------------


def series_shape(kind: str, length: int, *, delta: float | None = None, psi=None) -> np.ndarray:
    """Series-space path of a unit effect of ``kind`` over ``length`` points from T."""
    k = np.arange(length)
    if kind == "AO":
        return (k == 0).astype(float)
    if kind == "LS":
        return np.ones(length)
    if kind == "TC":
        return (delta if delta is not None else 0.7) ** k
    if psi is None:
        raise ValueError("an IO's shape needs the model's psi weights")
    return np.asarray(psi[:length], dtype=float)


def _exog(cands: Sequence[_Candidate], n: int, psi: np.ndarray) -> np.ndarray:
    X = np.zeros((n, len(cands)))
    for j, c in enumerate(cands):
        X[c.position :, j] = series_shape(c.kind, n - c.position, delta=c.delta, psi=psi)
    return X


def _total_effect(n: int, cands: Sequence[_Candidate], psi: np.ndarray) -> np.ndarray:
    if not cands:
        return np.zeros(n)
    return _exog(cands, n, psi) @ np.array([c.omega for c in cands])


# -- stages ------------------------------------------------------------------------


def _residuals(
    y: np.ndarray, model: FittedModel | Estimate
) -> tuple[np.ndarray, np.ndarray, float | None]:
    """Residuals (0 where missing), observation weights and the robust sigma."""
    e = innovations(y, model)
    w = (~np.isnan(e)).astype(float)
    start = _n_start(model)
    w[:start] = np.where(w[:start] > 0, 1.0, 0.0)
    core = e[start:][w[start:] > 0]
    e = np.nan_to_num(e)
    if core.size == 0:
        return e, w, None
    sigma = robust_sigma(core)
    tiny = 1e-12 * (1.0 + float(np.nanmax(np.abs(y))))
    if not sigma > tiny:
        sigma = float(np.std(core))
        if not sigma > tiny:
            return e, w, None
    return e, w, sigma


_TRIM = 3.0
_TRIM_SD = math.sqrt(
    1 - 2 * _TRIM * math.exp(-0.5 * _TRIM**2) / math.sqrt(2 * math.pi) / (2 * ndtr(_TRIM) - 1)
)


def robust_sigma(e: np.ndarray) -> float:
    """Residual scale that outliers do not inflate.

    The normalized MAD first (breakdown 50 %, but only 37 % efficient: its own
    noise, about 8 % at 480 points, adds false events), then the standard
    deviation of the residuals within 3 MADs of the median, corrected for the
    truncation (about 95 % efficient under normality).
    """
    centre = float(np.median(e))
    mad = 1.4826 * float(np.median(np.abs(e - centre)))
    if not mad > 0:
        return mad
    kept = e[np.abs(e - centre) <= _TRIM * mad]
    return float(np.sqrt(np.mean((kept - centre) ** 2))) / _TRIM_SD


def _n_start(model: FittedModel | Estimate) -> int:
    p, d, _ = model.order
    P, D, _, s = model.seasonal_order
    return d + s * D + p + s * P


def _refit(y: np.ndarray, current: FittedModel | Estimate) -> FittedModel | Estimate:
    arma = [v for k, v in current.params if k not in ("const", "sigma2")]
    try:
        return estimate(
            y, current.order, current.seasonal_order, trend=current.trend, start_params=arma or None
        )
    except EstimationError:
        return current


Support = list[tuple[dict[str, float], float | None]]


def _final_stage(
    y: np.ndarray, model: FittedModel | Estimate, cands: list[_Candidate], crit: float
) -> tuple[FittedModel | Estimate, list[_Candidate], Support, list[str]]:
    """Joint MLE of model and effects, pruning and reclassification (steps 3-4).

    Returns the final estimate, the events, their type support and notes.
    """
    notes: list[str] = []
    n = y.size
    cands = list(cands)
    fitted: FittedModel | Estimate = model
    support: Support | None = None
    for _ in range(MAX_FINAL + len(cands)):
        if not cands:
            break
        psi = psi_weights(fitted, n)
        X = _exog(cands, n, psi)
        arma = [v for k, v in fitted.params if k not in ("const", "sigma2")]
        try:
            est = estimate(
                y,
                fitted.order,
                fitted.seasonal_order,
                trend=fitted.trend,
                exog=X,
                start_params=arma or None,
                with_se=True,
            )
        except EstimationError as exc:
            notes.append(f"final estimate failed ({exc}); effects from the residual regression")
            break
        t = est.beta / np.where(est.beta_se > 0, est.beta_se, np.nan)
        t = np.nan_to_num(t)
        cands = [
            replace(c, omega=float(b), t=float(tt))
            for c, b, tt in zip(cands, est.beta, t, strict=True)
        ]
        fitted = est
        weakest = int(np.argmin(np.abs(t)))
        if abs(t[weakest]) < crit:
            del cands[weakest]
            continue
        support = _support(y, est, cands)
        changed = _reclassify(cands, support)
        if changed is None:
            break
        cands, support = changed, None
    else:
        notes.append("final stage stopped at its bound")
    if not cands and isinstance(fitted, Estimate) and fitted.beta.size:
        fitted = _refit(y, fitted)
    if support is None or len(support) != len(cands):
        support = _support(y, fitted, cands)
    return fitted, cands, support, notes


def _reclassify(cands: list[_Candidate], support: Support) -> list[_Candidate] | None:
    """Candidates with types re-chosen by support; None if nothing changed."""
    changed = False
    out = []
    for c, (weights, delta) in zip(cands, support, strict=True):
        best = max(weights, key=weights.get)
        if best != c.kind and weights[best] > weights[c.kind]:
            out.append(replace(c, kind=best, delta=delta if best == "TC" else None))
            changed = True
        elif c.kind == "TC" and delta is not None and abs(delta - (c.delta or 0)) > 0.02:
            out.append(replace(c, delta=delta))
            changed = True
        else:
            out.append(c)
    return out if changed else None


def _support(y: np.ndarray, model: FittedModel | Estimate, cands: Sequence[_Candidate]) -> Support:
    """Type weights (and refined TC decay) for each candidate, others removed."""
    if not cands:
        return []
    n = y.size
    psi = psi_weights(model, n)
    e, w, sigma = _residuals(y - _total_effect(n, cands, psi), model)
    ls_from = _n_start(model) + LS_MARGIN
    return _weights_for(
        e, w, pi_weights(model, n), sigma or model_sigma(model), cands, ls_from=ls_from
    )


def _weights_for(
    e_clean: np.ndarray,
    w: np.ndarray,
    pi: np.ndarray,
    sigma: float,
    cands: Sequence[_Candidate],
    *,
    ls_from: int,
) -> Support:
    """Support of each type at each candidate, from residuals with every effect removed."""
    n = e_clean.size
    out = []
    for c in cands:
        own = np.zeros(n)  # put this candidate's own effect back
        own[c.position :] = c.omega * _shape_resid(c, pi)[: n - c.position]
        ls_ok = c.position >= ls_from
        out.append(_weights_at(e_clean + own * w, w, pi, sigma, c.position, ls_ok=ls_ok))
    return out


def model_sigma(model: FittedModel | Estimate) -> float:
    return math.sqrt(model.sigma2)


def _weights_at(
    e: np.ndarray, w: np.ndarray, pi: np.ndarray, sigma: float, T: int, *, ls_ok: bool = True
) -> tuple[dict[str, float], float | None]:
    n = e.size
    seg_e = e[T:] * w[T:]
    seg_w = w[T:]

    def tau_for(h: np.ndarray) -> float:
        h = h[: n - T]
        den = float(np.sum(h * h * seg_w))
        return float(np.dot(h, seg_e)) / math.sqrt(den) / sigma if den > 1e-12 else 0.0

    taus = {
        "AO": tau_for(pi),
        "LS": tau_for(np.cumsum(pi)) if ls_ok else 0.0,
        "IO": float(seg_e[0]) / sigma,
    }
    from scipy.optimize import minimize_scalar  # here: a screen with no event never needs it

    res = minimize_scalar(
        lambda d: -abs(tau_for(_tc(pi[: n - T], d))),
        bounds=(0.05, 0.95),
        method="bounded",
        options={"xatol": 1e-3},
    )
    delta = float(res.x)
    taus["TC"] = tau_for(_tc(pi[: n - T], delta))
    scores = {k: 0.5 * taus[k] ** 2 - (TC_PENALTY if k == "TC" else 0.0) for k in EVENT_TYPES}
    top = max(scores.values())
    raw = {k: math.exp(v - top) for k, v in scores.items()}
    total = sum(raw.values())
    return {k: raw[k] / total for k in EVENT_TYPES}, delta


# -- results -----------------------------------------------------------------------


def _as_model(
    decomp: Decomposition, fitted: FittedModel | Estimate, start: FittedModel | Estimate
) -> FittedModel:
    """The final estimate in the cacheable form (effects excluded)."""
    from changekind.tasks.fit import fingerprint

    if isinstance(fitted, FittedModel):
        return fitted
    base = start if isinstance(start, FittedModel) else None
    series = decomp.series
    return FittedModel(
        series_id=series.series_id,
        order=fitted.order,
        seasonal_order=fitted.seasonal_order,
        trend=fitted.trend,
        params=tuple((k, round_sig(v)) for k, v in fitted.params),
        sigma2=round_sig(fitted.sigma2),
        nobs=fitted.nobs,
        method="mle",
        converged=fitted.converged,
        fallback=base.fallback if base else None,
        aicc=fitted.aicc if math.isfinite(fitted.aicc) else None,
        periods=decomp.periods,
        profiles=tuple(tuple(float(v) for v in prof) for prof in decomp.profiles),
        anchor=series.label(0),
        step_seconds=series.step_seconds,
        fitted_through=series.label(series.nobs - 1),
        fingerprint=fingerprint(decomp.adjusted),
    )


def _to_event(
    series: RegularSeries,
    model: FittedModel,
    c: _Candidate,
    weights: dict[str, float],
    refined_delta: float | None,
) -> Event:
    n = series.nobs
    delta = c.delta if c.delta is not None else refined_delta
    after = n - 1 - c.position
    half_steps = math.log(0.5) / math.log(delta) if c.kind == "TC" and delta else None
    settle = max(SETTLE, 2 * half_steps if half_steps else 0)
    level = _local_level(series.values, c.position)
    pct = 100.0 * c.omega / level if abs(level) > 1e-9 * (1 + abs(c.omega)) else None
    effect, t_stat = round_sig(c.omega), round_sig(c.t)
    return Event(
        series_id=series.series_id,
        position=c.position,
        event_time=series.label(c.position),
        event_type=c.kind,  # type: ignore[arg-type]
        effect=effect,
        effect_pct=None if pct is None else round_sig(pct),
        t_stat=t_stat,
        se=round_sig(abs(effect / t_stat)) if t_stat else float("nan"),
        type_weights=tuple((k, round(weights[k], 4)) for k in EVENT_TYPES),
        status="provisional" if after < settle else "confirmed",
        decay=round(delta, 4) if c.kind == "TC" and delta is not None else None,
        half_life=_half_life(series, half_steps),
        level=round_sig(level),
        model=model.spec(),
    )


def _local_level(values: np.ndarray, T: int, window: int = 24) -> float:
    before = values[max(0, T - window) : T]
    before = before[~np.isnan(before)]
    if before.size == 0:
        after = values[T + 1 : T + 1 + window]
        before = after[~np.isnan(after)]
    return float(np.median(before)) if before.size else float("nan")


def _half_life(series: RegularSeries, steps: float | None) -> str | None:
    if steps is None:
        return None
    if series.is_datetime:
        return format_duration(steps * series.step_seconds)
    return f"{steps * series.step_seconds:.3g} index units"


# -- recurring spikes --------------------------------------------------------------


def _spike_period(y: np.ndarray, crit: float) -> int | None:
    """Spacing of recurring single-point spikes, if the spikes are regular."""
    s = pd.Series(y)
    dev = (s - s.rolling(5, center=True, min_periods=1).median()).to_numpy()
    ok = ~np.isnan(dev)
    core = dev[ok]
    if core.size < 8:
        return None
    scale = 1.4826 * float(np.median(np.abs(core - np.median(core))))
    if scale > 0:
        spikes = np.flatnonzero(ok & (np.abs(np.nan_to_num(dev)) > crit * scale))
    else:
        spikes = np.flatnonzero(ok & (np.nan_to_num(dev) != 0))
    return _regular_period(list(spikes), y.size)


def _regular_period(positions: Sequence[int], n: int) -> int | None:
    """The common spacing of at least four positions on one phase, if any."""
    pos = np.unique(np.asarray(positions, dtype=int))
    if pos.size < MIN_PATTERN_REPEATS:
        return None
    gaps = np.diff(pos)
    period = int(np.median(gaps))
    if period < 2 or n < 3 * period:
        return None
    on_phase = np.mean((pos - pos[0]) % period == 0)
    multiples = np.mean(gaps % period == 0)
    enough = pos.size >= max(MIN_PATTERN_REPEATS, 0.5 * n / period)
    if on_phase >= 0.8 and multiples >= 0.8 and enough:
        return period
    return None


def _absorb_pattern(decomp: Decomposition, period: int) -> tuple[Decomposition, Pattern]:
    series = decomp.series
    new = decompose(series, periods=list(decomp.periods), extra_periods=(period,))
    profile = new.profiles[new.periods.index(period)]
    when = (
        format_duration(period * series.step_seconds)
        if series.is_datetime
        else f"{period * series.step_seconds:g} index units"
    )
    pattern = Pattern(
        period=period,
        period_time=when,
        occurrences=int(series.nobs // period),
        amplitude=float(np.max(np.abs(profile))),
    )
    return new, pattern


# -- warm path helpers ---------------------------------------------------------------


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
    from changekind.tasks.fit import fingerprint

    y = series.values - _seasonal_for(model, series) - known_effects(model, series, known)
    fitted = _refit(y, model)
    if fitted is model:
        return replace(model, fallback="re-estimation failed; the cached coefficients are kept")
    return replace(
        model,
        params=tuple((k, round_sig(v)) for k, v in fitted.params),
        sigma2=round_sig(fitted.sigma2),
        nobs=fitted.nobs,
        method="mle",
        converged=fitted.converged,
        fallback=None,
        aicc=fitted.aicc if math.isfinite(fitted.aicc) else None,
        fitted_through=series.label(series.nobs - 1),
        fingerprint=fingerprint(y),
    )


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
        if ev.event_type == "IO":
            if psi is None:
                psi = psi_weights(model, int(max(lags.max() + 1, n)))
            if lags.max() >= psi.size:
                psi = psi_weights(model, int(lags.max() + 1))
            shape = psi[lags]
        elif ev.event_type == "AO":
            shape = (lags == 0).astype(float)
        elif ev.event_type == "LS":
            shape = np.ones(lags.size)
        else:
            shape = (ev.decay if ev.decay is not None else 0.7) ** lags
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
            if when.tz is None and first.tz is not None:
                when = when.tz_localize(first.tz)
            elif when.tz is not None and first.tz is None:
                when = when.tz_convert("UTC").tz_localize(None)
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
        if idx.tz is not None and anchor.tz is None:
            anchor = anchor.tz_localize(idx.tz)
        elif idx.tz is None and anchor.tz is not None:
            anchor = anchor.tz_convert("UTC").tz_localize(None)
        offsets = np.rint((idx - anchor).total_seconds().to_numpy() / model.step_seconds)
    else:
        base = float(model.anchor) if model.anchor is not None else float(series.index[0])
        offsets = np.rint((series.index.to_numpy(dtype=float) - base) / (model.step_seconds or 1.0))
    return profile_at(model.profiles, model.periods, offsets.astype(np.int64))


_TASKS: dict[str, TaskSpec] = {
    "detect_task": (detect_events, {"name": "detect"}),
    "screen_task": (screen_new_points, {"name": "screen-new-points"}),
}


def __getattr__(name: str):
    return lazy_task(__name__, name, _TASKS)
