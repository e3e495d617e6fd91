"""Which stretch of a series a picture shows: the event's reach and its neighbours.

References
----------
- TC: delta^k < 0.05 from k > ln(0.05) / ln(delta) on (closed form).
- IO: the psi weights of an AR(1) are phi^k (Box, Jenkins and Reinsel, the
  AR(1) as an infinite moving average); statsmodels' ``arma2ma`` is the
  oracle for an ARMA(1,1) and for a differenced model, whose psi weights do
  not fade.
- The injected truth of the invented series (tests/tasks/report/pair.py): a
  compensating shift nine hours (108 five-minute steps) before the event.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from statsmodels.tsa.arima_process import arma2ma

from changekind.tasks.errors import ConfigError
from changekind.tasks.report import event_figure, shown_span, slice_window, window_bounds
from changekind.tasks.report.curve import REACH_FLOOR, effect_reach
from changekind.tasks.report.span import (
    MAX_OWN_SIDE_POINTS,
    MIN_SIDE_POINTS,
    NEIGHBOUR_POINTS,
    Span,
)
from changekind.tasks.types import FittedModel
from tests.tasks.report.pair import (
    STAMPS,
    STEP_SECONDS,
    T_DOWN,
    T_GLITCH,
    T_UP,
    pair_event,
    pair_events,
    pair_model,
    pair_series,
)


def _model(order=(1, 0, 0), params=(("const", 40.0), ("ar.L1", 0.6), ("sigma2", 1.0))):
    return FittedModel(
        series_id="x",
        order=order,
        seasonal_order=(0, 0, 0, 0),
        trend="c" if order[1] == 0 else "n",
        params=params,
        sigma2=1.0,
        nobs=500,
        method="given",
        converged=True,
        step_seconds=STEP_SECONDS,
    )


def _event(kind: str, **extra):
    base = pair_event(T_UP, kind, 1.4, 9.3)
    fields = {name: getattr(base, name) for name in base.__slots__}
    fields.update(extra)
    return type(base)(**fields)


def _last_above_floor(path: np.ndarray) -> int:
    path = np.abs(path)
    return int(np.flatnonzero(path >= REACH_FLOOR * path.max())[-1])


@pytest.mark.parametrize("delta", [0.3, 0.7, 0.9, 0.94])
def test_a_tc_is_shown_until_it_has_faded_twice_over(delta):
    reach = math.floor(math.log(REACH_FLOOR) / math.log(delta))  # closed form
    assert effect_reach(_event("TC", decay=delta), horizon=48) == reach
    span = shown_span(_event("TC", decay=delta), step_seconds=STEP_SECONDS)
    assert span == Span(max(MIN_SIDE_POINTS, 2 * reach), max(MIN_SIDE_POINTS, 2 * reach))


def test_an_io_is_shown_until_its_psi_weights_fade():
    # AR(1): psi_k = phi^k (reference above); ARMA(1,1) against arma2ma.
    ar1 = _model()
    assert effect_reach(_event("IO"), ar1, horizon=48) == math.floor(
        math.log(REACH_FLOOR) / math.log(0.6)
    )
    arma = _model(
        order=(1, 0, 1), params=(("const", 40.0), ("ar.L1", 0.85), ("ma.L1", 0.4), ("sigma2", 1.0))
    )
    oracle = arma2ma(np.r_[1.0, -0.85], np.r_[1.0, 0.4], 49)
    reach = _last_above_floor(oracle)
    assert effect_reach(_event("IO"), arma, horizon=48) == reach
    assert shown_span(_event("IO"), step_seconds=STEP_SECONDS, model=arma).after == max(
        MIN_SIDE_POINTS, 2 * reach
    )
    # A differenced model carries the shock on for ever: shown like a step.
    walk = _model(order=(0, 1, 1), params=(("ma.L1", 0.3), ("sigma2", 1.0)))
    assert abs(arma2ma(np.r_[1.0, -1.0], np.r_[1.0, 0.3], 49)[-1]) > REACH_FLOOR
    assert effect_reach(_event("IO"), walk, horizon=48) is None
    assert shown_span(_event("IO"), step_seconds=STEP_SECONDS, model=walk).after == 96


def test_steps_and_pulses_get_the_longest_and_the_shortest_own_span():
    assert shown_span(_event("AO"), step_seconds=STEP_SECONDS) == Span(24, 24)
    assert shown_span(_event("LS"), step_seconds=STEP_SECONDS) == Span(96, 96)
    assert shown_span(_event("VC"), step_seconds=STEP_SECONDS) == Span(96, 96)
    assert (MIN_SIDE_POINTS, MAX_OWN_SIDE_POINTS) == (24, 96)


def test_a_compensating_shift_nine_hours_earlier_is_in_view():
    # Reference: the injected truth; the down-shift is 108 steps before the up-shift.
    down, up, glitch = pair_events()
    span = shown_span(up, [down, up, glitch], step_seconds=STEP_SECONDS)
    assert span == Span(before=108 + MIN_SIDE_POINTS, after=96)  # the glitch is too far
    data = pair_series()
    ts, values = slice_window(
        up, data["timestamp"], data["value"], model=pair_model(), neighbours=[down, glitch]
    )
    assert ts[0] == STAMPS[T_DOWN - MIN_SIDE_POINTS] and ts[-1] == STAMPS[T_UP + 96]
    assert len(values) == 108 + MIN_SIDE_POINTS + 96 + 1
    start, end = window_bounds(
        up, step_seconds=STEP_SECONDS, time_kind="datetime", neighbours=[down, glitch]
    )
    assert (start, end) == (STAMPS[T_DOWN - MIN_SIDE_POINTS], STAMPS[T_UP + 97])
    # The picture marks the neighbour where it is, with its own type's marker.
    fig = event_figure(up, ts, values, pair_model(), neighbours=[down, glitch])
    marked = [
        line for line in fig.axes[0].get_lines() if line.get_label() == "other LS of this series"
    ]
    assert len(marked) == 1
    assert pd.Timestamp(marked[0].get_xdata()[0]) == STAMPS[T_DOWN].tz_localize(None)
    assert not any("AO" in str(line.get_label()) for line in fig.axes[0].get_lines())


def test_the_neighbour_horizon_is_a_day_or_288_steps_whichever_is_more():
    down = _event("LS", event_time=STAMPS[T_DOWN].isoformat())
    for step, steps_away, seen in [
        (300.0, 288, True),  # a day of 5-minute data
        (300.0, 289, False),
        (3600.0, 288, True),  # 12 days of hourly data
        (3600.0, 289, False),
        (60.0, 540, True),  # nine hours of minute data: within a day
        (60.0, 1440, True),
        (60.0, 1441, False),
    ]:
        later = _event(
            "LS",
            event_time=(STAMPS[T_DOWN] + pd.Timedelta(seconds=step * steps_away)).isoformat(),
        )
        span = shown_span(later, [down], step_seconds=step)
        expected = steps_away + MIN_SIDE_POINTS if seen else MAX_OWN_SIDE_POINTS
        assert span.before == expected, (step, steps_away)
    assert NEIGHBOUR_POINTS == 288


def test_numeric_axes_use_grid_steps_and_gaps_do_not_narrow_the_view():
    grid = 1000.0 + 2.0 * np.arange(400)
    at, before = _event("AO", event_time="1500"), _event("LS", event_time="1300")
    assert shown_span(at, [before], step_seconds=2.0).before == 100 + MIN_SIDE_POINTS
    keep = np.r_[0:180, 200:400]  # 20 points missing between the two events
    ts, _ = slice_window(at, grid[keep], np.ones(keep.size), neighbours=[before])
    assert ts[0] == 1300.0 - 2.0 * MIN_SIDE_POINTS and ts[-1] == 1500.0 + 2.0 * MIN_SIDE_POINTS


def test_a_bad_step_is_refused():
    with pytest.raises(ConfigError, match="step_seconds must be positive"):
        shown_span(_event("AO"), step_seconds=0.0)
    with pytest.raises(ConfigError, match="step_seconds must be positive"):
        window_bounds(_event("AO"), step_seconds=-1.0, time_kind="datetime")


def test_the_glitch_far_away_gets_its_own_span_only():
    down, up, glitch = pair_events()
    assert T_GLITCH - T_UP > NEIGHBOUR_POINTS
    assert shown_span(glitch, [down, up], step_seconds=STEP_SECONDS) == Span(24, 24)
