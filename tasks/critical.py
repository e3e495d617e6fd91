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
residuals' own tail: a Student t with the residuals' tail index (a trimmed
Hill estimate) scaled to their largest 2 %, and :func:`critical_value` then
takes the larger of the Gaussian bound and that t's quantile at the same tail
probability (Weissman's extrapolation of the largest residuals).  That is the
critical value of one residual (the IO statistic); statistics that sum many
residuals (a level shift far from the end) are near Gaussian, and
:class:`Thresholds` gives each effect pattern its own.

References
----------
Chen, C. and Liu, L.-M. (1993). Joint estimation of model parameters and
outlier effects in time series. JASA 88(421), 284-297 (critical values grow
with the series length; their tables are for Gaussian series).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtri

from changekind.tasks.effects import EFFECTS
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
"""A tail index of at least this is taken as Gaussian (measured with scipy: a
t with 30 degrees of freedom, scale-matched to the Gaussian at the upper 1 %
point, is 17 % above it at 1e-6; with 12 degrees of freedom 55 %)."""

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


FALSE_BUDGET = 0.5
"""Default false-alarm budget: expected false events per clean series per
BUDGET_DAYS of data, whatever the scan schedule (the README's table gives the
smallest effect it lets through at minute, 5-minute and hourly spacing)."""

BUDGET_DAYS = 30.0
"""The period the false-alarm budget is stated for."""

BUDGET_RANGE = (1e-4, 100.0)
"""False-alarm budgets a user may set (expected false events per series per 30 days)."""

SECONDS_PER_DAY = 86_400.0
BUSINESS_DAYS_PER_WEEK = 5.0


def points_per_period(step_seconds: float, *, business_days: bool = False) -> float:
    """Points of a series with this spacing in ``BUDGET_DAYS`` (30) days."""
    if not (math.isfinite(step_seconds) and step_seconds > 0):
        raise ValueError(f"step_seconds must be positive, got {step_seconds!r}")
    days = BUDGET_DAYS * (BUSINESS_DAYS_PER_WEEK / 7.0 if business_days else 1.0)
    return days * SECONDS_PER_DAY / step_seconds


def budget_critical(
    step_seconds: float,
    false_budget: float = FALSE_BUDGET,
    *,
    business_days: bool = False,
    tail: ResidualTail | None = None,
) -> float:
    """Critical |t| that spends ``false_budget`` false events per series per 30 days.

    Parameters
    ----------
    step_seconds : float
        The series' spacing in seconds (one business day on a business-day grid).
    false_budget : float, default=0.5
        Expected false events per clean series per 30 days of its data.
    business_days : bool, default=False
        The grid holds weekdays only (about 21.4 points per 30 days).
    tail : ResidualTail, optional
        The residuals' tail (:func:`fit_tail`); Gaussian when absent.

    Returns
    -------
    float
        ``critical_value(4 P, false_budget, tail=tail)`` with ``P`` the points
        per 30 days: every tested point spends the same allowance
        ``false_budget / P``, so a cold analysis of a month of data and a month
        of hourly warm scans of the same series spend the same budget; the
        value does not depend on the series' length or the scan schedule.
        Gaussian values at 0.5: 4.82 (minute), 4.50 (5-minute), 3.75 (hourly).
    """
    check_budget(false_budget)
    points = points_per_period(step_seconds, business_days=business_days)
    n_tested = TYPES_TESTED * points
    # A spacing so coarse that the budget exceeds the tests in 30 days (weeks,
    # months): every test at the budget's ceiling (half the tests false).
    allowance = min(false_budget, 0.5 * n_tested)
    return critical_value(n_tested, allowance, tail=tail)


def check_budget(value: float | None) -> float | None:
    """A user's false-alarm budget, or None; raises ValueError naming the accepted range."""
    if value is None:
        return None
    value = float(value)
    low, high = BUDGET_RANGE
    if not (math.isfinite(value) and low <= value <= high):
        raise ValueError(
            f"false-alarm budget {value:g} is not usable; give the expected false events per "
            f"series per {BUDGET_DAYS:g} days, from {low:g} to {high:g}, such as 0.5"
        )
    return value


def series_critical(
    n: int,
    *,
    step_seconds: float | None = None,
    business_days: bool = False,
    false_budget: float | None = None,
    tail: ResidualTail | None = None,
) -> float:
    """The default critical value of one analysis: by the budget or by the length.

    With a false-alarm budget and a time axis (``step_seconds``), the budget's
    :func:`budget_critical`; else :func:`default_critical` of the ``n`` points
    analysed (an allowance of 0.2 false events per analysis: a one-off analysis
    of a file, or a series without times).
    """
    if false_budget is not None and step_seconds:
        return budget_critical(step_seconds, false_budget, business_days=business_days, tail=tail)
    return default_critical(n, tail=tail)


def series_thresholds(
    n: int,
    *,
    step_seconds: float | None = None,
    business_days: bool = False,
    false_budget: float | None = None,
    tail: ResidualTail | None = None,
) -> Thresholds:
    """:func:`series_critical` for Gaussian residuals and for the residuals' own tail."""
    kw = dict(step_seconds=step_seconds, business_days=business_days, false_budget=false_budget)
    gaussian = series_critical(n, **kw)
    if tail is None or tail.gaussian:
        return Thresholds(gaussian)
    return Thresholds(gaussian, series_critical(n, **kw, tail=tail), float(tail.df))


CLIP = 3.0
"""Under heavy tails, level shifts and temporary changes are tested on
residuals clipped at this many sigma (Huber's clipping of residuals, common
practice in robust regression): one huge residual then cannot pass for a shift,
while a real shift, which moves many residuals by a few sigma, loses little."""

SPREAD_TYPES = tuple(kind for kind, effect in EFFECTS.items() if effect.clipped)
"""The effect types tested on clipped residuals when the tails are heavy."""


def heavy_note(limits: Thresholds) -> str:
    """The result note that says how heavy tails raised the critical values."""
    return (
        f"heavy-tailed residuals (tail index {limits.alpha:.3g}): a single-point event needs "
        f"|t| >= {limits.single:.2f}, effects spread over many points {limits.gaussian:.2f}"
    )


@dataclass(frozen=True, slots=True)
class Thresholds:
    """Critical |t| of each effect pattern: one number for Gaussian residuals.

    With heavy-tailed residuals a statistic tau = sum_j h_j e_(T+j) /
    (sigma ||h||_2) exceeds a level c mostly through one large residual (the
    single-big-jump behaviour of sums of heavy-tailed variables; Embrechts,
    Klueppelberg and Mikosch 1997, Modelling Extremal Events, section 1.3,
    from memory).  For a tail P(|e| > x) ~ C x^-alpha that gives
    P(|tau| > c) ~ C (c ||h||_2 / ||h||_alpha)^-alpha, so the pattern's
    critical value is ``single * ||h||_alpha / ||h||_2``, never below the
    Gaussian one: ``single`` for the IO (one residual), a little less for an
    AO.  Level shifts and temporary changes are instead tested on residuals
    clipped at ``CLIP`` sigma (:meth:`for_spread`): summed over many points
    they keep the Gaussian value, while one residual too small to be an IO
    but large enough to move a sum cannot make a shift.

    Attributes
    ----------
    gaussian : float
        The critical value for Gaussian residuals (and for every pattern when
        the tails are Gaussian or the value was given by the user).
    single : float
        The critical value of one residual (the IO statistic); ``gaussian``
        when the tails are Gaussian.
    alpha : float
        The residuals' tail index (inf: Gaussian).
    """

    gaussian: float
    single: float | None = None
    alpha: float = math.inf

    @property
    def heavy(self) -> bool:
        return self.single is not None and self.single > self.gaussian

    @property
    def pulse(self) -> float:
        """The largest critical value any pattern gets (a single residual's)."""
        return self.single if self.heavy else self.gaussian

    def for_pattern(self, h: np.ndarray) -> float:
        """Critical |t| of one effect whose residual pattern is ``h``."""
        if not self.heavy:
            return self.gaussian
        a = np.abs(np.asarray(h, dtype=float))
        l2 = math.sqrt(float(np.dot(a, a)))
        if not l2 > 0:
            return self.gaussian
        la = float(np.sum((a / l2) ** self.alpha)) ** (1.0 / self.alpha)
        return max(self.gaussian, self.single * la)

    def for_spread(self, h: np.ndarray) -> float:
        """Critical |t| of a spread effect (LS, TC) tested on clipped residuals.

        Under heavy tails the spread types are tested on residuals clipped at
        ``CLIP`` sigma (:data:`CLIP`), so one residual adds at most CLIP
        |h_j| / ||h||_2 to the statistic: the value is
        ``max(gaussian, CLIP rho + gaussian sqrt(1 - rho^2))`` with rho =
        max |h| / ||h||_2 (a shift at the last point, rho = 1, cannot clear it).
        """
        if not self.heavy:
            return self.gaussian
        a = np.abs(np.asarray(h, dtype=float))
        l2 = math.sqrt(float(np.dot(a, a)))
        rho = float(a.max()) / l2 if l2 > 0 else 1.0
        return self._spread(rho)

    def spread_along(self, h: np.ndarray, n: int) -> np.ndarray | float:
        """:meth:`for_spread` at every time T of an n-point series, pattern cut at n - T."""
        if not self.heavy:
            return self.gaussian
        a = np.abs(np.asarray(h, dtype=float))
        if not a.size or not a.max() > 0:
            return self.gaussian
        l2 = np.sqrt(np.cumsum(a * a))
        peak = np.maximum.accumulate(a)
        length = np.minimum(n - np.arange(n), a.size) - 1
        rho = np.where(l2[length] > 0, peak[length] / np.where(l2[length] > 0, l2[length], 1), 1.0)
        return self._spread(rho)

    def _spread(self, rho):
        rho = np.clip(rho, 0.0, 1.0)
        return np.maximum(self.gaussian, CLIP * rho + self.gaussian * np.sqrt(1.0 - rho * rho))

    def along(self, h: np.ndarray, n: int) -> np.ndarray | float:
        """Critical |t| at every time T of an n-point series for pattern ``h`` cut at n - T.

        A float (the Gaussian value) when the tails are Gaussian.
        """
        if not self.heavy:
            return self.gaussian
        a = np.abs(np.asarray(h, dtype=float))
        peak = float(a.max()) if a.size else 0.0
        if not peak > 0:
            return self.gaussian
        a = a / peak  # |h|^alpha without overflow
        l2 = np.sqrt(np.cumsum(a * a))
        la = np.cumsum(a**self.alpha) ** (1.0 / self.alpha)
        length = np.minimum(n - np.arange(n), a.size) - 1  # the cut pattern's last index
        ratio = np.where(l2[length] > 0, la[length] / l2[length], 1.0)
        return np.maximum(self.gaussian, self.single * ratio)


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
    resid: np.ndarray,
    sigma: float,
    *,
    raw: np.ndarray | None = None,
    removed: int = 0,
    searched: float = FAR,
) -> ResidualTail:
    """The tail of residuals in units of the engine's robust ``sigma``.

    Parameters
    ----------
    resid : ndarray
        Residuals with the events found so far removed (finite values are used).
    sigma : float
        The engine's robust residual scale.
    raw : ndarray, optional
        The same residuals before detected events were removed (default
        ``resid``): the far tail is read there, since removing the events found
        at a Gaussian critical value removes exactly the far tail of a
        heavy-tailed series.
    removed : int, default=0
        How many pulse-like events were removed: the largest ``removed``
        values of ``raw`` are trimmed from the tail-index estimate (they may be
        real events, not the tail).
    searched : float, default=3.5
        The critical value the removed events were found at: residuals
        below it are in ``resid`` as they came (step 4 reads them).

    Returns
    -------
    ResidualTail
        ``df = inf`` (Gaussian) unless the residuals' tail is measurably
        heavier; else a Student t (location 0) with the residuals' own tail
        index as ``df`` and the scale that puts the right share of points
        beyond the tail's threshold.

    Notes
    -----
    1. Gaussian unless, on z = resid / sigma, the ratio r = Q_0.95(|z|) /
       Q_0.75(|z|) (1.70 for Gaussian z) exceeds 1.70 by more than 3.09 of its
       standard errors (the asymptotic variance of a sample quantile), and
       more residuals lie beyond 3.5 sigma (FAR) than a Gaussian sample of
       this size reaches with probability 0.999.
    2. The tail index alpha is the trimmed Hill estimate (Hill 1975;
       trimming as in Bhattacharya, Kallitsis and Stoev 2019) on the largest
       ``TAIL_SHARE`` of |raw| / sigma, the k0 largest trimmed: k0 is
       ``removed``, or more when more residuals are beyond 3.5 sigma only
       in ``raw`` (the found events pushed them there):
       alpha = (k - k0) / (sum_{i=k0+2..k} log(X_(i) / X_(k+1)) + (k0 + 1)
       log(X_(k0+1) / X_(k+1))).  Gaussian when alpha >= GAUSSIAN_DF.
    3. The scale s makes P(|s T_alpha| > X_(k+1)) = (k + 1) / m, so the
       critical value s * t_alpha.isf(q) is Weissman's (1978) extrapolation
       of the k + 1 largest residuals to the tail probability q, with the t's
       body below it.
    4. Gaussian after all when the residuals without the found events do not
       bear the fitted tail out: the count of |z| between 2.5 (SHOULDER) and
       ``searched`` is Poisson-likelier under the Gaussian than under the
       fitted t by more than SHOULDER_LLR.  Many real spikes among Gaussian
       residuals make the largest residuals look like a heavy tail (80
       spikes of 6-8 sigma among 3,000 AR(1) points: Hill index 2.05 and a
       pulse critical value of 160-173, so none of them was reported) while
       the band holds the Gaussian count (measured: all but 2 of 640 spikes
       found over 8 series after this step).
    Measured, and why not the earlier choices: a t whose 0.95/0.75 quantile
    ratio matches the residuals' (the shoulder) gave fpp2 elecdemand df 3.1
    and a critical value of 25 to 78, while its 17,518 residuals reach only 8
    sigma (Hill index there about 8); the t's maximum-likelihood fit
    (scipy.stats.t.fit) gave df 7 for three 6-sigma events among 480
    Gaussian residuals and costs 0.1-2.5 s.

    References
    ----------
    Hill, B. M. (1975). A simple general approach to inference about the tail
    of a distribution. Annals of Statistics 3(5), 1163-1174.
    Weissman, I. (1978). Estimation of parameters and large quantiles based
    on the k largest observations. JASA 73(364), 812-815.
    Bhattacharya, S., Kallitsis, M. and Stoev, S. (2019). Data-adaptive
    trimming of the Hill estimator and detection of outliers in the extremes
    of heavy-tailed data. Electronic Journal of Statistics 13(1), 1872-1925.
    (Bibliographic details from memory.)
    """
    from scipy import stats

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
    # Step 1: the Gaussian ratio and its sampling noise (the high quantile dominates).
    g_hi, g_mid = float(stats.norm.isf((1 - TAIL_Q) / 2)), float(stats.norm.isf(0.125))
    density = 2.0 * float(stats.norm.pdf(g_hi))
    se = math.sqrt(TAIL_Q * (1 - TAIL_Q) / m) / density / g_mid
    if ratio <= g_hi / g_mid + TAIL_GUARD * se:
        return gaussian
    # The shoulder alone is not a tail: some residuals must reach far out too.
    far = z if raw is None else np.abs(np.asarray(raw, dtype=float)) / sigma
    beyond = int(np.count_nonzero(far > FAR))
    if beyond < max(2, stats.poisson.ppf(0.999, m * 2 * stats.norm.sf(FAR))):
        return gaussian
    # Residuals beyond FAR that only the found events put there are trimmed too.
    pushed = (
        0 if raw is None else int(np.count_nonzero((far > FAR) & ~(np.abs(resid) > FAR * sigma)))
    )
    far = far[np.isfinite(far)]
    # Step 2: the trimmed Hill index on the largest TAIL_SHARE of the raw residuals.
    top = np.sort(far)[::-1]
    hill = _trimmed_hill(top, max(removed, pushed))
    if hill is None:
        return gaussian
    alpha, k = hill
    if alpha >= GAUSSIAN_DF:
        return gaussian
    # Step 3: the scale that puts (k + 1) / m of the points beyond X_(k+1).
    scale = float(top[k]) / float(stats.t.isf((k + 1) / (2.0 * top.size), alpha))
    # Step 4: the residuals without the found events must bear the tail out.
    if _shoulder_support(z, alpha, scale, searched) < -SHOULDER_LLR:
        return gaussian
    df = round(float(alpha), 4)
    return ResidualTail(df=df, scale=round(scale, 6), nobs=m, method=TAIL_METHOD)


SHOULDER = 2.5
"""Lower edge of the band of |residual| / sigma (without the found events)
where the fitted tail and the Gaussian are compared (:func:`_shoulder_support`);
the upper edge is the critical value the events were found at, so finding them
does not empty the band.  A t(3) scaled to the robust sigma puts about 3.5
times the Gaussian share between 2.5 and 3.9 (scipy.stats)."""

SHOULDER_LLR = 4.5
"""The fitted tail is refused when the Gaussian explains the band's count
better by more than this log-likelihood (a likelihood ratio of 90).
Measured on hourly AR(1) series of 480 points (first-pass critical value
3.88): with Student-t(3) innovations and no events, 294 of 300 series reached
this step and one fell below (-5.54; the rest -2.1 to +21.5), and one more in
the Monte Carlo's 800 t(3) series (-4.74, 19 false events); with 15 or 30
spikes of 6-8 sigma among Gaussian points, 68 of 73 series that reached it
were refused (-22.2 to -3.4; 118 of 1,800 spikes missed), with 8 spikes 4 of
10 (48 of 320 missed).  At 3,000 points the two are far apart (t(3) +44 to
+68; 40 or 80 spikes -62 to -9).  So at a few hundred points the band cannot
always tell many spikes from a heavy tail: about one t(3) series in 300
loses its heavy-tail line."""


def _shoulder_support(z: np.ndarray, alpha: float, scale: float, searched: float) -> float:
    """Poisson log-likelihood ratio, fitted t against Gaussian, of the count in the band.

    The band is ``SHOULDER < z <= searched`` (0 when it is narrower than half
    a sigma: no evidence either way).

    Many real pulses among Gaussian residuals make the largest residuals
    heavy-tailed (and the Hill index small) while the residuals without them
    are Gaussian: the t fitted to the largest then predicts several times the
    count the band holds.  With a heavy tail proper the band holds what the t
    predicts.
    """
    from scipy import stats

    low, high = SHOULDER, searched
    if high < low + 0.5:
        return 0.0
    count = int(np.count_nonzero((z > low) & (z <= high)))
    gauss = z.size * 2.0 * float(stats.norm.sf(low) - stats.norm.sf(high))
    heavy = z.size * 2.0 * float(stats.t.sf(low / scale, alpha) - stats.t.sf(high / scale, alpha))
    if not (gauss > 0 and heavy > 0):
        return 0.0
    return count * math.log(heavy / gauss) - (heavy - gauss)


TAIL_SHARE = 0.02
"""Share of the largest residuals the tail index is read from (k of the Hill
estimate): 350 of elecdemand's 17,518, 38 of 1,920 points."""

MIN_TAIL_POINTS = 20
"""Fewest order statistics beyond the trimmed ones that a tail index rests on."""


TAIL_METHOD = "trimmed Hill index, Weissman scale"


def _trimmed_hill(top: np.ndarray, removed: int) -> tuple[float, int] | None:
    """Trimmed Hill index of positive values sorted largest first: ``(alpha, k)``.

    ``k`` order statistics (``TAIL_SHARE`` of them, at least
    ``MIN_TAIL_POINTS`` beyond the trimmed ones) above ``top[k]``, the
    ``removed`` largest trimmed (at most a quarter); None when there are too
    few values or no spread among them.  alpha is at least ``MIN_DF``.
    """
    k0 = min(int(removed), top.size // 4)
    k = max(int(TAIL_SHARE * top.size), k0 + MIN_TAIL_POINTS)
    if k + 1 >= top.size or not top[k] > 0:
        return None
    logs = np.log(top[: k + 1] / top[k])
    spacing = (k0 + 1) * logs[k0] + float(np.sum(logs[k0 + 1 : k]))
    if not spacing > 0:
        return None
    return max(MIN_DF, (k - k0) / spacing), k


EXTREME_GUARD = 1.25
"""Window extremes count as heavy-tailed when their (k+1)-th largest exceeds
the Gaussian value of the same rank by this factor (measured on a day of 1 s
AR(1) points in 1-minute windows, three seeds each: ratio 1.03-1.06 with
Gaussian innovations, 1.70-1.74 Laplace, 1.82-1.88 Student t(5), 3.5-3.9
t(3))."""

MIN_EXTREME_WINDOWS = 100
"""Fewest windows whose extremes a tail is read from; fewer take the Gaussian line."""


def extremes_critical(
    z: np.ndarray, count: float, n_windows: float, allowance: float = ALLOWANCE
) -> float:
    """Critical |z| for window extremes: ``n_windows`` windows share ``allowance`` false ones.

    Parameters
    ----------
    z : ndarray
        Standardized extremes of the usable windows (deviation of the point
        farthest from the window median, over the spread around the window).
    count : float
        Mean number of points in a window.
    n_windows : float
        Windows the allowance is spent over (those tested, or those in 30
        days for a false-alarm budget).
    allowance : float, default=0.2
        Expected false extremes over those windows.

    Returns
    -------
    float
        The Gaussian line (:func:`critical_value` of ``n_windows * count``
        points, one test a point), or, when the extremes' own tail is
        measurably heavier, the larger of that and Weissman's extrapolation
        of the largest extremes to the tail probability ``allowance /
        n_windows`` a window.

    Notes
    -----
    An extreme is the largest of a window's deviations, a block maximum: with
    Gaussian points its tail is light (Gumbel), with heavy-tailed points it
    has the points' tail index (Frechet; Gumbel 1958, recalled from memory).
    Heavy when the (k+1)-th largest of the m extremes (k as in
    :func:`fit_tail`) exceeds ``EXTREME_GUARD`` times the Gaussian quantile
    of the same rank, ``norm.isf((k + 1) / (2 m count))``.  Then alpha is the
    trimmed Hill index of the extremes (those above the Gaussian line
    trimmed, at most a quarter of k: they may be real spikes) and the line
    ``X_(k+1) ((k + 1) / (m p))^(1 / alpha)`` with ``p = allowance /
    n_windows`` (Weissman 1978).  Measured on a day of 1 s AR(1) points in
    1-minute windows: 0 false extremes with the budget's line for Gaussian,
    Laplace, t(5) and t(3) innovations, where the Gaussian line gave about
    360 a day for t(3).
    """
    gaussian = critical_value(n_windows * count, allowance)
    top = np.sort(np.abs(np.asarray(z, dtype=float)))[::-1]
    top = top[np.isfinite(top) & (top > 0)]
    m = top.size
    if m < MIN_EXTREME_WINDOWS or not count > 0:
        return gaussian
    k = max(int(TAIL_SHARE * m), MIN_TAIL_POINTS)
    if k + 1 >= m:
        return gaussian
    expected = -float(ndtri((k + 1) / (2.0 * m * count)))
    if not top[k] > EXTREME_GUARD * expected:
        return gaussian
    hill = _trimmed_hill(top, int(np.count_nonzero(top >= gaussian)))
    if hill is None:
        return gaussian
    alpha, k = hill
    p = allowance / n_windows
    return max(gaussian, float(top[k]) * ((k + 1) / (m * p)) ** (1.0 / alpha))
