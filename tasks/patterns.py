"""Recurring patterns: shapes that repeat at a fixed spacing are one pattern, not events.

A heartbeat (a spike every k points) or a sawtooth (a buffer that fills and is
flushed every k points) would otherwise come out as a long list of events of
the same size at the same phase.  Such a spacing joins the seasonal periods
of the decomposition (its profile kept sharp) and is reported once as a
:class:`~changekind.tasks.types.Pattern`.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from changekind.tasks.decompose import decompose
from changekind.tasks.types import Decomposition, Pattern, format_duration

MAX_PATTERNS = 2
"""Most patterns absorbed in one analysis."""

MIN_PATTERN_REPEATS = 4
"""Fewest occurrences of a shape before it is a pattern."""


def find_period(y: np.ndarray, crit: float) -> int | None:
    """Spacing of recurring spikes or recurring jumps in ``y``, if regular.

    Spikes are points far from a rolling median; jumps are first differences
    far from their median (a sawtooth's flush).  Jumps count only when the
    series returns to the same level each cycle (the median change over one
    period is small against the jumps): a staircase that keeps climbing is a
    list of level shifts, not a pattern.
    """
    period = spike_period(y, crit)
    if period is not None:
        return period
    return jump_period(y, crit)


def jump_period(y: np.ndarray, crit: float) -> int | None:
    """Spacing of recurring jumps that the series recovers from each cycle."""
    ok = ~np.isnan(y)
    if ok.sum() < 16:
        return None
    z = pd.Series(y).interpolate(limit_direction="both").to_numpy()
    dz = np.diff(z)
    centre = float(np.median(dz))
    scale = 1.4826 * float(np.median(np.abs(dz - centre)))
    big = np.abs(dz - centre) > crit * scale if scale > 0 else dz != centre
    jumps = np.flatnonzero(big) + 1
    period = regular_period(list(jumps), y.size)
    if period is None:
        return None
    heights = np.abs(dz[jumps - 1])
    drift = np.abs(z[period:] - z[:-period])
    if float(np.median(drift)) > 0.5 * float(np.median(heights)):
        return None
    return period


def spike_period(y: np.ndarray, crit: float) -> int | None:
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
    return regular_period(list(spikes), y.size)


def regular_period(positions: Sequence[int], n: int) -> int | None:
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


def absorb_pattern(decomp: Decomposition, period: int) -> tuple[Decomposition, Pattern]:
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
