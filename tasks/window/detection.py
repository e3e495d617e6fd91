"""Events in window summaries: the cold analysis, the extreme windows, the warm screen.

:func:`detect_windowed` runs the engine on the window medians (level events:
AO, LS, TC, IO) and on the log of the window spreads (a lasting step there is a
variance change, reported as ``"VC"``); :func:`extreme_windows` finds windows
whose extreme point their median and spread cannot explain;
:func:`screen_windowed` is the warm path on new windows.  Every event names its
window.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from changekind.tasks.effects import EFFECTS, SEARCHED, UNKNOWN
from changekind.tasks.errors import SeriesError
from changekind.tasks.results import local_level
from changekind.tasks.types import DetectionResult, Event, FittedModel, format_duration
from changekind.tasks.window.summary import (
    MIN_WINDOWS,
    WindowSummary,
    summarize_windows,
    window_text,
)

MIN_SPREAD_POINTS = 5
"""Windows with fewer points carry no spread into variance-change detection:
the MAD of a handful of points is too noisy (our own choice)."""


MIN_BEFORE_VC = 5
"""Fewest usable windows before a variance change (our own choice)."""


LEVEL_WINDOWS = 24
"""Windows before an event whose median is its ``level`` (as the engine's
local level)."""


@dataclass(frozen=True, slots=True, eq=False)
class WindowedResult:
    """What windowed detection found in one series.

    Attributes
    ----------
    series_id : str
    window : pandas.Timedelta
    summary : WindowSummary
    level : DetectionResult
        The engine on the window medians.
    spread : DetectionResult or None
        The engine on the log window spreads; None when it could not run (the
        reason is in ``notes``).
    events : tuple of Event
        Level events and variance changes (``"VC"``), by window start; each
        with ``window_start`` and ``window_end``.
    notes : tuple of str
    """

    series_id: str
    window: pd.Timedelta
    summary: WindowSummary
    level: DetectionResult
    spread: DetectionResult | None
    events: tuple[Event, ...]
    notes: tuple[str, ...] = ()

    @property
    def n_points(self) -> int:
        """Raw observed points summarized."""
        return self.summary.nobs

    @property
    def n_modelled(self) -> int:
        """Points the engine modelled in the level series (one per window)."""
        return self.level.nobs

    def as_detection(self) -> DetectionResult:
        """The result in the engine's own form (for printing and JSON output).

        Model, critical value and counts are those of the level series; the
        events include the variance changes; the notes say what was windowed.
        """
        notes = [
            f"windows of {format_duration(self.window.total_seconds())}: "
            f"{self.n_points} raw points in {self.summary.n_windows} windows "
            f"({self.summary.n_empty} empty)"
        ]
        if self.spread is not None:
            notes.append(f"spread model (log scale): {self.spread.model.spec()}")
        converged = self.level.converged and (self.spread is None or self.spread.converged)
        return DetectionResult(
            series_id=self.series_id,
            events=self.events,
            model=self.level.model,
            critical=self.level.critical,
            nobs=self.level.nobs,
            n_missing=self.level.n_missing,
            converged=converged,
            n_iter=self.level.n_iter,
            patterns=self.level.patterns,
            notes=(*notes, *self.level.notes, *self.notes),
        )


WINDOW_FAMILIES = 3
"""Families of tests in windowed mode: window medians, log spreads, extremes."""


def family_budget(false_budget: float | None) -> float | None:
    """One family's share of a windowed series' false-alarm budget: a third.

    Never below the smallest budget accepted (``BUDGET_RANGE``), so the
    smallest budgets are spent up to three times over; a budget outside the
    accepted range raises ValueError naming it.
    """
    from changekind.tasks.critical import BUDGET_RANGE, check_budget

    budget = check_budget(false_budget)
    if budget is None:
        return None
    return max(budget / WINDOW_FAMILIES, BUDGET_RANGE[0])


def detect_windowed(
    series_id: str,
    timestamps,
    values,
    window: str | pd.Timedelta,
    *,
    critical: float | None = None,
    periods: Sequence[int] | None = None,
    false_budget: float | None = None,
) -> WindowedResult:
    """Detect level events and variance changes on window summaries.

    Parameters
    ----------
    series_id : str
    timestamps, values : array-like of shape (nobs,)
        Raw observations, as for :func:`summarize_windows`.
    window : str or pandas.Timedelta
        Window width (see :func:`parse_window`).
    critical : float, optional
        Critical |t| for both series; default the engine's for the number of
        windows.
    periods : sequence of int, optional
        Seasonal periods in windows for both series (None: the engine chooses
        from the window width).
    false_budget : float, optional
        Expected false events per clean series per 30 days of data, shared by
        the three families tested (:func:`family_budget`): the window medians,
        the log window spreads and the window extremes each take a third, and
        their critical values come from the spacing, not the length, as the
        raw engine's do.  Ignored with ``critical``.

    Returns
    -------
    WindowedResult

    Raises
    ------
    ConfigError, SeriesError
        As :func:`summarize_windows`, and the engine's SeriesError for the
        median series (a constant series, for example).

    Notes
    -----
    1. Summarize the raw points into windows.
    2. Run the engine on log(spread) of the windows with at least
       ``MIN_SPREAD_POINTS`` points and a positive spread.  A change in scale
       is multiplicative: on the log scale it is a step of log(ratio), and the
       log of a spread estimate has a noise level that does not depend on the
       spread, so the engine's constant-variance model holds.  A level shift
       there is a variance change, reported as ``"VC"``: its effect is the
       change of the spread in the series' units, ``effect_pct`` the change in
       per cent, ``level`` the spread before, ``se`` by the delta method and
       ``t_stat`` the test statistic on the log scale; its type weights are
       the support of each shape in the spread series, the step (LS) named VC.
       Other spread events are not reported (a note counts them): a one-window
       burst of spread is what a level shift or a spike inside a window
       leaves, and a variance change is a step in scale (Tsay 1988).  Nor is a
       step with fewer than ``MIN_BEFORE_VC`` usable windows before it: a step
       at window 1 is the same signal as one odd window 0.
    3. Standardize the window medians by the variance changes found, so the
       engine's constant-variance model holds for them too: from each change
       on, deviations from the level just before it (median of up to
       ``LEVEL_WINDOWS`` windows) are divided by the cumulative ratio, the
       pieces joined continuously (in the spirit of Tsay (1988), who divides
       the residuals after a variance change by its ratio; recalled from
       memory).  Without this, the noisier regime after a doubling of the
       noise gave 15 spurious level events in one of five simulated series
       (3 days at 1 s, 1-minute windows).  Run the engine on the result: its events (AO,
       LS, TC, IO) are level events; effects and standard errors are scaled
       back to the series' units (t statistics are scale-free), ``level`` and
       ``effect_pct`` taken from the raw window medians.
    4. Every event gets ``window_start``/``window_end`` (ISO text) and
       ``event_time`` = its window start; events in window order.  A window
       names one event (the events table is keyed by series and time): when a
       level event and a variance change fall in the same window, the level
       event is kept and the variance change dropped.

    3b. Spikes: a single-point spike barely moves a window median, so each
       window's extreme (its max or min, whichever is farther from the
       median) is tested against the window's own spread (a MAD, which one
       spike does not move): see :func:`extreme_windows`.  A window whose
       extreme clears the critical value for all raw points tested is an AO
       named by the window, unless a level event already names it.

    A level shift part-way through a window moves that window's median part
    of the way: it may come out as two level shifts in consecutive windows
    whose effects add up to the shift.

    Multiplicity: three families are tested (medians, spreads, extremes).
    With a false-alarm budget each spends a third of it, so a clean series
    stays within the budget; with the length's default each family has the
    engine's target for its length, so false events per clean series are up
    to three times that target.

    References
    ----------
    Tsay, R. S. (1988). Outliers, level shifts, and variance changes in time
    series. Journal of Forecasting 7(1), 1-20.
    """
    from changekind.tasks.detect import analyse_series

    # Step 1: windows.
    summary = summarize_windows(series_id, timestamps, values, window)
    width = summary.window
    notes: list[str] = []

    # Step 2: spreads.
    usable = (summary.count >= MIN_SPREAD_POINTS) & (summary.spread > 0)
    log_spread = np.where(usable, np.log(np.where(usable, summary.spread, 1.0)), np.nan)
    spread: DetectionResult | None = None
    if int(usable.sum()) < MIN_WINDOWS:
        notes.append(
            f"variance changes not tested: only {int(usable.sum())} window(s) hold "
            f"{MIN_SPREAD_POINTS}+ points with a positive spread (at least {MIN_WINDOWS} needed); "
            "use a longer window"
        )
    else:
        try:
            spread = analyse_series(
                series_id,
                summary.index,
                log_spread,
                periods=periods,
                critical=critical,
                false_budget=family_budget(false_budget),
            )
        except SeriesError as exc:
            notes.append(f"variance changes not tested: {exc.problem}")
    changes: list[Event] = []
    if spread is not None:
        before = np.cumsum(usable) - usable  # usable windows strictly before each window
        dropped: dict[str, int] = {}
        early = 0
        for ev in spread.events:
            if EFFECTS[ev.event_type].spread_twin is None:
                dropped[ev.event_type] = dropped.get(ev.event_type, 0) + 1
            elif before[ev.position] < MIN_BEFORE_VC:
                early += 1
            else:
                changes.append(ev)
        if dropped:
            what = ", ".join(f"{n} {kind}" for kind, n in sorted(dropped.items()))
            notes.append(
                f"spread series: {what} not reported (only lasting steps in spread are "
                "variance changes)"
            )
        if early:
            notes.append(
                f"spread series: {early} step(s) within the first {MIN_BEFORE_VC} windows not "
                "reported (too little before them to tell a change from one odd window)"
            )
    changes.sort(key=lambda ev: ev.position)

    # Step 3: levels, on the scale of the first variance regime.
    scale = np.ones(summary.n_windows)
    level_input = summary.median
    if changes:
        level_input, scale = _standardize(
            summary.median, [(ev.position, math.exp(ev.effect)) for ev in changes]
        )
        notes.append(
            f"level series standardized by {len(changes)} variance change(s) before modelling; "
            "the level model's sigma is in units of the first variance regime"
        )
    level = analyse_series(
        series_id,
        summary.index,
        level_input,
        periods=periods,
        critical=critical,
        false_budget=family_budget(false_budget),
    )
    events = [
        _windowed(_rescaled(ev, scale[ev.position], summary.median), width) for ev in level.events
    ]
    events += [_windowed(_as_variance_change(ev), width) for ev in changes]

    # Step 3b: spikes inside windows (their extremes).
    taken = {ev.position for ev in level.events}
    spikes = extreme_windows(
        summary,
        critical=critical,
        skip=taken,
        model=level.model.spec(),
        false_budget=family_budget(false_budget),
    )
    events += [_windowed(ev, width) for ev in spikes]
    if spikes:
        notes.append(
            f"{len(spikes)} window(s) hold an extreme that the window's median and spread "
            "cannot explain: reported as AO at the window (drill shows the point)"
        )

    # Step 4: in window order, one event per window.
    events = _one_per_window(events)
    return WindowedResult(
        series_id=series_id,
        window=width,
        summary=summary,
        level=level,
        spread=spread,
        events=tuple(events),
        notes=tuple(notes),
    )


def extreme_windows(
    summary: WindowSummary,
    *,
    critical: float | None = None,
    skip: set[int] | frozenset[int] = frozenset(),
    model: str = "",
    false_budget: float | None = None,
) -> list[Event]:
    """Windows whose extreme point the window's median and spread cannot explain.

    Parameters
    ----------
    summary : WindowSummary
    critical : float, optional
        Critical |z|; default :func:`~changekind.tasks.critical.extremes_critical`
        of the windows tested (one test a raw point: the extreme is the
        largest of the window's deviations; heavy-tailed points raise it to
        the extremes' own tail).
    skip : set of int
        Window positions already named by an event.
    model : str
        Text for the events' ``model`` field.
    false_budget : float, optional
        Expected false extremes per clean series per 30 days: the critical
        value then spends ``false_budget`` over the raw points of 30 days
        (the mean count of a usable window times the windows in 30 days)
        instead of over the points tested.  Ignored with ``critical``.

    Returns
    -------
    list of Event
        One AO per window (``event_time`` = the window start, as text),
        ``effect`` = extreme - median, ``se`` = the spread around the window
        (median of the window spreads within 12 windows either side),
        ``t_stat`` their ratio; type weights all on AO (the test looks for
        nothing else).

    Notes
    -----
    Only windows with at least ``MIN_SPREAD_POINTS`` points and a positive
    spread are tested; spreads are normalized MADs, so the spike itself does
    not inflate them.  The points inside a window are treated as
    independent given its median (autocorrelated points make the test
    conservative for a spike and anticonservative for a slow swing).
    """
    from changekind.tasks.critical import (
        ALLOWANCE,
        BUDGET_DAYS,
        SECONDS_PER_DAY,
        check_budget,
        check_critical,
        extremes_critical,
    )

    ok = (summary.count >= MIN_SPREAD_POINTS) & (summary.spread > 0)
    if not ok.any():
        return []
    crit = check_critical(critical)
    budget = check_budget(false_budget)
    up = summary.max - summary.median
    down = summary.min - summary.median
    dev = np.where(np.abs(up) >= np.abs(down), up, down)
    # The spread around each window: the median over the usable windows
    # within LEVEL_WINDOWS / 2 either side (one window's MAD of 60 points is
    # about 12 % noisy, which alone made clean windows look extreme).
    usable = pd.Series(np.where(ok, summary.spread, np.nan))
    local = usable.rolling(LEVEL_WINDOWS + 1, center=True, min_periods=1).median().to_numpy()
    ok &= np.isfinite(local) & (local > 0)
    z = np.where(ok, dev / np.where(ok, local, 1.0), 0.0)
    if crit is None:
        count = float(summary.count[ok].mean())
        if budget is not None:
            windows = BUDGET_DAYS * SECONDS_PER_DAY / summary.window.total_seconds()
            allowance = min(budget, 0.5 * windows * count)
        else:
            windows, allowance = float(np.count_nonzero(ok)), ALLOWANCE
        crit = extremes_critical(z[ok], count, windows, allowance)
    weights = tuple((k, 1.0 if EFFECTS[k].single_point else 0.0) for k in SEARCHED)
    out = []
    for pos in np.flatnonzero(np.abs(z) >= crit):
        pos = int(pos)
        if pos in skip:
            continue
        level = float(summary.median[pos])
        effect = float(dev[pos])
        near_zero = not abs(level) > 1e-9 * (1 + abs(effect))
        out.append(
            Event(
                series_id=summary.series_id,
                position=pos,
                event_time=summary.index[pos].isoformat(),
                event_type="AO",
                effect=effect,
                effect_pct=None if near_zero else 100.0 * effect / level,
                t_stat=float(z[pos]),
                se=float(local[pos]),
                type_weights=weights,
                status="confirmed",
                decay=None,
                half_life=None,
                level=level,
                model=f"window extreme vs spread; {model}".rstrip("; "),
                effect_sigma=abs(float(z[pos])),
            )
        )
    return out


def windowed_model(result: WindowedResult) -> FittedModel:
    """The model to cache for a windowed series: the level model with the spread model inside."""
    return replace(
        result.level.model,
        window=window_text(result.window),
        spread=None if result.spread is None else result.spread.model,
    )


def screen_windowed(
    model: FittedModel,
    summary: WindowSummary,
    test_from: pd.Timestamp,
    *,
    known: Sequence[Event] = (),
    critical: float | None = None,
    false_budget: float | None = None,
) -> DetectionResult:
    """Test the newest windows of a series against its cached windowed model.

    The warm counterpart of :func:`detect_windowed`, for the fleet flows: no
    estimation, only the engine's filter of new points
    (:func:`~changekind.tasks.detect.screen_new_points`) on the window medians
    and on the log window spreads.

    Parameters
    ----------
    model : FittedModel
        A model from :func:`windowed_model` (``model.window`` set).
    summary : WindowSummary
        Context windows followed by the new ones, of the model's width.
    test_from : pandas.Timestamp
        Start of the first window that may carry events.
    known : sequence of Event
        Stored events of the series (level events and variance changes); their
        effects are removed first.
    critical : float, optional
    false_budget : float, optional
        As for :func:`detect_windowed`: each family tested spends a third.

    Returns
    -------
    DetectionResult
        Level events, variance changes and window extremes (AO, see
        :func:`extreme_windows`) among the tested windows, with window bounds;
        the level model; the level screen's notes.

    Notes
    -----
    The cached level model's sigma is in units of the first variance regime
    of the data it was fitted on (medians are standardized by the variance
    changes found then).  The newest windows are tested with sigma scaled by
    the product of the known variance changes' ratios, which is exactly the
    standardization applied to the points after the last change; known level
    events are in series units and removed as they are.  Known variance
    changes are removed from the log spreads as steps of log(ratio).
    """
    from changekind.tasks.decompose import regularize
    from changekind.tasks.detect import screen_new_points

    width = summary.window
    sid = summary.series_id
    # Known variance changes with a usable ratio (spread after / before).
    changes = [
        e
        for e in known
        if EFFECTS.get(e.event_type, UNKNOWN).in_spread
        and e.effect_pct is not None
        and e.effect_pct > -100.0
    ]
    ratio = math.prod(1.0 + ev.effect_pct / 100.0 for ev in changes)
    level_model = replace(model, sigma2=model.sigma2 * ratio**2) if ratio != 1.0 else model
    level_series = regularize(sid, summary.index, summary.median)
    n_new = int(np.sum(np.asarray(level_series.index >= test_from)))
    if n_new == 0:
        raise ValueError("no window to test at or after test_from")
    level = screen_new_points(
        level_model,
        level_series,
        n_new,
        known=[e for e in known if not EFFECTS.get(e.event_type, UNKNOWN).in_spread],
        critical=critical,
        false_budget=family_budget(false_budget),
    )
    events = [_windowed(ev, width) for ev in level.events]
    usable = (summary.count >= MIN_SPREAD_POINTS) & (summary.spread > 0)
    new = np.asarray(summary.index >= test_from)
    if model.spread is not None and (usable & new).any() and int(usable.sum()) >= MIN_WINDOWS:
        log_spread = np.where(usable, np.log(np.where(usable, summary.spread, 1.0)), np.nan)
        spread_series = regularize(sid, summary.index, log_spread)
        n_spread = int(np.sum(np.asarray(spread_series.index >= test_from)))
        steps = [
            replace(ev, event_type="LS", effect=math.log(1.0 + ev.effect_pct / 100.0), decay=None)
            for ev in changes
        ]
        if n_spread:
            spread = screen_new_points(
                model.spread,
                spread_series,
                n_spread,
                known=steps,
                critical=critical,
                false_budget=family_budget(false_budget),
            )
            events += [
                _windowed(_as_variance_change(ev), width)
                for ev in spread.events
                if EFFECTS[ev.event_type].spread_twin is not None
            ]
    old = set(np.flatnonzero(~new).tolist())
    spikes = extreme_windows(
        summary,
        critical=critical,
        skip=old,
        model=model.spec(),
        false_budget=family_budget(false_budget),
    )
    events += [_windowed(ev, width) for ev in spikes]  # after level events: they win a window
    return replace(level, events=_one_per_window(events))


def _one_per_window(events: Sequence[Event]) -> tuple[Event, ...]:
    """Events in window order, at most one per window (a level event before a VC)."""
    chosen: dict[pd.Timestamp, Event] = {}
    for ev in sorted(events, key=lambda e: EFFECTS[e.event_type].in_spread):
        chosen.setdefault(pd.Timestamp(ev.event_time), ev)
    return tuple(chosen[t] for t in sorted(chosen))


def _windowed(ev: Event, width: pd.Timedelta) -> Event:
    """The event named by its window: ``event_time`` = window start, bounds as ISO text."""
    start = pd.Timestamp(ev.event_time)
    return replace(
        ev,
        event_time=start.isoformat(),
        window_start=start.isoformat(),
        window_end=(start + width).isoformat(),
    )


def _standardize(
    median: np.ndarray, changes: Sequence[tuple[int, float]]
) -> tuple[np.ndarray, np.ndarray]:
    """Window medians on the scale of the first variance regime, and the scale per window.

    From each change (position, ratio) on, ``y' = a + (m - b) / S``, with ``b``
    the level just before the change, ``a`` that level on the standardized
    scale (so the pieces join) and ``S`` the cumulative ratio.
    """
    y = median.astype(float).copy()
    scale = np.ones(median.size)
    a, b, S = 0.0, 0.0, 1.0  # identity before the first change
    for pos, ratio in changes:
        before = local_level(median, pos, LEVEL_WINDOWS)
        if not math.isfinite(before) or not ratio > 0:
            continue
        a, b, S = a + (before - b) / S, before, S * ratio
        y[pos:] = a + (median[pos:] - b) / S
        scale[pos:] = S
    return y, scale


def _rescaled(ev: Event, scale: float, median: np.ndarray) -> Event:
    """A level event found on the standardized medians, in the series' own units."""
    if scale == 1.0:
        return ev
    effect = ev.effect * scale
    level = local_level(median, ev.position, LEVEL_WINDOWS)
    near_zero = not abs(level) > 1e-9 * (1 + abs(effect))
    return replace(
        ev,
        effect=effect,
        se=ev.se * scale,
        level=level,
        effect_pct=None if near_zero else 100.0 * effect / level,
    )


def _as_variance_change(ev: Event) -> Event:
    """A level shift of log(spread) as a variance change in the series' units."""
    omega, se_log = ev.effect, ev.se
    before = math.exp(ev.level) if math.isfinite(ev.level) else float("nan")
    ratio = math.exp(omega)
    weights = tuple((EFFECTS[k].spread_twin or k, w) for k, w in ev.type_weights)
    return replace(
        ev,
        event_type="VC",
        effect=before * (ratio - 1.0),
        effect_pct=100.0 * (ratio - 1.0),
        se=before * ratio * se_log if math.isfinite(se_log) else se_log,
        level=before,
        type_weights=weights,
        decay=None,
        half_life=None,
        model=f"log spread: {ev.model}",
    )
