"""Events as reported: the search's candidates in the series' own units and times."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from changekind.tasks.critical import Thresholds
from changekind.tasks.effects import EFFECTS, SEARCHED
from changekind.tasks.search import Candidate, Support
from changekind.tasks.types import (
    DetectionResult,
    Event,
    FittedModel,
    Pattern,
    RegularSeries,
    round_sig,
)

SETTLE = 8
"""An event with fewer observations after it than this (or than two decay
half-lives of a TC) is provisional: the types still look alike there."""


def to_event(
    series: RegularSeries,
    model: FittedModel,
    c: Candidate,
    weights: dict[str, float],
    refined_delta: float | None,
) -> Event:
    n = series.nobs
    delta = c.delta if c.delta is not None else refined_delta
    after = n - 1 - c.position
    decays = EFFECTS[c.kind].decays
    half_steps = math.log(0.5) / math.log(delta) if decays and delta else None
    settle = max(SETTLE, 2 * half_steps if half_steps else 0)
    level = local_level(series.values, c.position)
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
        type_weights=tuple((k, round(weights[k], 4)) for k in SEARCHED),
        status="provisional" if after < settle else "confirmed",
        decay=round(delta, 4) if decays and delta is not None else None,
        half_life=_half_life(series, round(delta, 4) if decays and delta else None),
        level=round_sig(level),
        model=model.spec(),
        effect_sigma=round_sig(abs(c.omega) / model.sigma) if model.sigma2 > 0 else None,
        duration=_duration(series, c.kind, after, delta),
    )


def detection_result(
    series: RegularSeries,
    model: FittedModel,
    found: Sequence[Candidate],
    support: Support,
    crit: Thresholds,
    *,
    converged: bool,
    n_iter: int,
    patterns: Sequence[Pattern] = (),
    notes: Sequence[str] = (),
    n_fits: int = 0,
    budget_spent: bool = False,
    resid_scale: float | None = None,
) -> DetectionResult:
    """One analysis of a series as reported, cold (detect) or warm (screen).

    The candidates become events (:func:`to_event`, with their types' support);
    the critical values are those the analysis used (the single-point one only
    where the residuals' tails are heavy).
    """
    events = tuple(
        to_event(series, model, c, weights, delta)
        for c, (weights, delta) in zip(found, support, strict=True)
    )
    return DetectionResult(
        series_id=series.series_id,
        events=events,
        model=model,
        critical=crit.gaussian,
        pulse_critical=crit.single if crit.heavy else None,
        nobs=series.nobs,
        n_missing=series.n_missing,
        converged=converged,
        n_iter=n_iter,
        patterns=tuple(patterns),
        notes=tuple(notes),
        n_fits=n_fits,
        resid_scale=resid_scale,
        budget_spent=budget_spent,
    )


TC_GONE = 0.05
"""A temporary change has ended when this share of its jump remains."""


def _duration(series: RegularSeries, kind: str, after: int, delta: float | None) -> float | None:
    """How long an LS has lasted (to the last analysed point) or a TC lasts (to 5 %)."""
    effect = EFFECTS[kind]
    if effect.lasting:
        steps = float(after + 1)
    elif effect.decays and delta is not None and 0 < delta < 1:
        steps = math.log(TC_GONE) / math.log(delta)
    else:
        return None
    return round_sig(steps * series.step_seconds, 4)


def local_level(values: np.ndarray, T: int, window: int = 24) -> float:
    """Median of up to ``window`` observed values before ``T`` (after it, if none):
    an event's ``level``, for points and for window medians alike."""
    before = values[max(0, T - window) : T]
    before = before[~np.isnan(before)]
    if before.size == 0:
        after = values[T + 1 : T + 1 + window]
        before = after[~np.isnan(after)]
    return float(np.median(before)) if before.size else float("nan")


def _half_life(series: RegularSeries, decay: float | None) -> float | None:
    """Seconds (date-time grid) or index units (numeric grid) from the stored decay.

    Computed from ``decay`` as stored (4 decimals) and kept to 4 significant
    digits, so the same stored decay always gives the same stored half-life.
    """
    if decay is None or not 0.0 < decay < 1.0:
        return None
    return round_sig(math.log(0.5) / math.log(decay) * series.step_seconds, 4)
