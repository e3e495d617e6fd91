"""The invented demo fleet and the scoring of events against its truth.

References
----------
Effect shapes of the four event types, as in Chen, C. and Liu, L.-M. (1993),
"Joint estimation of model parameters and outlier effects in time series",
JASA 88(421), 284-297 (recalled from memory): from the event time t0 on,
AO adds omega at t0 only; LS adds omega for ever; TC adds omega * delta**k;
IO adds omega * psi_k, psi being the impulse response (MA-infinity weights) of
the series' own ARMA model.  For an ARMA(1,1) with coefficients phi, theta,
psi_0 = 1, psi_1 = phi + theta and psi_k = phi * psi_(k-1) (Box and Jenkins,
Time Series Analysis, chapter on the psi weights; recalled from memory).

The scoring cases are worked out by hand in each test's comments.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from statsmodels.tsa.arima.model import ARIMA

from changekind.flows.demo import score_against_truth
from changekind.tasks.errors import ConfigError
from changekind.tasks.simulate import DEMO_TC_DECAY as TC_DECAY
from changekind.tasks.simulate import EFFECT_SIGMAS, DemoFleet, make_demo_fleet
from changekind.tasks.types import Event

PER_DAY = 288  # five-minute samples in a day


@pytest.fixture(scope="module")
def fleet() -> DemoFleet:
    return make_demo_fleet(np.random.default_rng(11))


@pytest.fixture(scope="module")
def clean_twin() -> DemoFleet:
    """Same seed, same draws, events left out of the data."""
    return make_demo_fleet(np.random.default_rng(11), inject=False)


def _values(fleet: DemoFleet, series_id: str) -> np.ndarray:
    return fleet.data.loc[fleet.data["series_id"] == series_id, "value"].to_numpy()


def _position(fleet: DemoFleet, time: pd.Timestamp) -> int:
    start = fleet.data["timestamp"].iloc[0]
    return int((time - start) / fleet.step)


# --------------------------------------------------------------------------- the fleet


def test_same_seed_gives_the_same_fleet_and_another_seed_does_not(fleet):
    again = make_demo_fleet(np.random.default_rng(11))
    pd.testing.assert_frame_equal(fleet.data, again.data)
    pd.testing.assert_frame_equal(fleet.truth, again.truth)
    other = make_demo_fleet(np.random.default_rng(12))
    assert not np.allclose(fleet.data["value"].to_numpy(), other.data["value"].to_numpy())


def test_default_fleet_layout(fleet):
    # 12 controllers x 2 metrics, 14 days of 5-minute samples each.
    assert fleet.step == pd.Timedelta("5min")
    assert len(fleet.series_ids) == 24
    assert list(fleet.data.columns) == ["series_id", "timestamp", "value"]
    assert list(fleet.truth.columns) == ["series_id", "event_time", "event_type", "effect", "note"]
    sizes = fleet.data.groupby("series_id").size()
    assert (sizes == 14 * PER_DAY).all()
    for _, rows in fleet.data.groupby("series_id"):
        gaps = rows["timestamp"].diff().dropna().unique()
        assert list(gaps) == [pd.Timedelta("5min")]
    assert all(sid.startswith("array-") and "/ctl-" in sid for sid in fleet.series_ids)
    # Every kind of event is present, and some series are clean.
    assert set(fleet.truth["event_type"]) == {"AO", "LS", "TC", "IO"}
    assert set(fleet.truth["series_id"]) < set(fleet.series_ids)
    # Events avoid the first two days and the last day.
    positions = [_position(fleet, t) for t in fleet.truth["event_time"]]
    assert min(positions) >= 2 * PER_DAY
    assert max(positions) < 13 * PER_DAY


def test_injected_effects_have_the_published_shapes(fleet, clean_twin):
    """data - data_without_events is exactly the Chen & Liu (1993) shape of each event."""
    n = 14 * PER_DAY
    hit = set()
    for sid, rows in fleet.truth.groupby("series_id"):
        hit.add(sid)
        diff = _values(fleet, sid) - _values(clean_twin, sid)
        expected = np.zeros(n)
        io_rows = []
        for _, ev in rows.iterrows():
            t0, omega = _position(fleet, ev["event_time"]), ev["effect"]
            k = np.arange(n - t0)
            if ev["event_type"] == "AO":
                expected[t0] += omega
            elif ev["event_type"] == "LS":
                expected[t0:] += omega
            elif ev["event_type"] == "TC":
                expected[t0:] += omega * TC_DECAY**k
            else:
                io_rows.append((t0, omega))
        if not io_rows:
            assert_allclose(diff, expected, atol=1e-9)
            continue
        # IO: one shock through the series' ARMA(1,1): zero before t0, omega at
        # t0, then psi_k with a constant ratio phi from k = 1 on (Box-Jenkins).
        ((t0, omega),) = io_rows
        assert_allclose(diff[:t0], 0.0, atol=1e-9)
        assert_allclose(diff[t0], omega, rtol=1e-9)
        ratios = diff[t0 + 2 : t0 + 12] / diff[t0 + 1 : t0 + 11]
        assert_allclose(ratios, ratios[0], rtol=1e-6)
        assert 0.0 < ratios[0] < 1.0  # a stationary AR part carries the shock on
        assert diff[t0 + 1] / omega > ratios[0]  # psi_1 = phi + theta > phi (theta > 0)
    for sid in set(fleet.series_ids) - hit:  # clean series are untouched
        assert_allclose(_values(fleet, sid), _values(clean_twin, sid), atol=0)


def test_level_shift_moves_the_daily_mean_by_its_effect(fleet):
    """One whole day after a firmware step minus the day before ~ omega (profile cancels)."""
    shifts = fleet.truth[fleet.truth["event_type"] == "LS"]
    assert len(shifts) >= 2
    for _, ev in shifts.iterrows():
        y = _values(fleet, ev["series_id"])
        t0 = _position(fleet, ev["event_time"])
        change = y[t0 : t0 + PER_DAY].mean() - y[t0 - PER_DAY : t0].mean()
        # The AR(1) noise moves a day's mean by about 0.2 innovation sd, and omega
        # is at least 4 of them, so 25 % of omega is a generous margin.
        assert change == pytest.approx(ev["effect"], rel=0.25)


def test_effects_are_four_to_eight_innovation_sds(fleet, clean_twin):
    """Innovation sd estimated by statsmodels' ARIMA on the event-free twin (oracle)."""
    low, high = EFFECT_SIGMAS
    for sid in fleet.truth["series_id"].unique()[:4]:
        y = _values(clean_twin, sid)
        phase_mean = pd.Series(y).groupby(np.arange(y.size) % PER_DAY).transform("mean")
        resid = y - phase_mean.to_numpy()  # remove the daily profile
        fit = ARIMA(resid[-5 * PER_DAY :], order=(1, 0, 1), trend="c").fit()
        sigma = float(np.sqrt(fit.params[-1]))
        for omega in fleet.truth.loc[fleet.truth["series_id"] == sid, "effect"]:
            # 1,440 points pin sigma to within a few per cent; allow 10 %.
            assert low * 0.9 <= abs(omega) / sigma <= high * 1.1


def test_scales_with_the_knobs():
    small = make_demo_fleet(np.random.default_rng(3), n_controllers=3, days=5, step="10min")
    assert len(small.series_ids) == 6
    assert (small.data.groupby("series_id").size() == 5 * 144).all()
    assert small.step == pd.Timedelta("10min")


@pytest.mark.parametrize(
    ("knobs", "match"),
    [
        ({"n_controllers": 0}, "n_controllers"),
        ({"days": 3}, "days"),
        ({"step": "7min"}, "divide a day"),
        ({"step": "often"}, "not a time interval"),
    ],
)
def test_bad_knobs_are_refused(knobs, match):
    with pytest.raises(ConfigError, match=match):
        make_demo_fleet(np.random.default_rng(0), **knobs)


# --------------------------------------------------------------------------- scoring

T0 = pd.Timestamp("2031-03-05 10:00", tz="UTC")
STEP = pd.Timedelta("5min")


def _truth(rows):
    frame = pd.DataFrame(rows, columns=["series_id", "event_time", "event_type"])
    frame["effect"] = 1.0
    frame["note"] = ""
    return frame


def test_score_on_a_hand_made_case():
    truth = _truth(
        [
            ("a", T0, "LS"),
            ("a", T0 + 100 * STEP, "AO"),
            ("b", T0, "TC"),
            ("b", T0 + 50 * STEP, "IO"),
        ]
    )
    found = pd.DataFrame(
        {
            "series_id": ["a", "a", "a", "b", "b", "c"],
            # ISO text with and without an offset, as detect --json gives them.
            "event_time": [
                "2031-03-05T10:00:00+00:00",  # a LS exact, right type
                "2031-03-05T10:05:00+00:00",  # a second hit on the same LS: false
                (T0 + 102 * STEP).isoformat(),  # a AO at +2 steps, called LS: wrong type
                "2031-03-05 10:15:00",  # b TC at +3 steps: outside tolerance, false
                (T0 + 49 * STEP).isoformat(),  # b IO at -1 step, right type
                T0.isoformat(),  # series c has no injected event: false
            ],
            "event_type": ["LS", "LS", "LS", "TC", "IO", "AO"],
        }
    )
    score = score_against_truth(found, truth, step=STEP, tolerance=2)
    # By hand: 3 of 4 injected found, 2 of the 3 typed right, 6 - 3 = 3 false.
    assert (score.n_injected, score.n_detected, score.n_matched, score.n_typed) == (4, 6, 3, 2)
    assert score.recall == pytest.approx(3 / 4)
    assert score.type_accuracy == pytest.approx(2 / 3)
    assert score.false_events == 3
    per = score.per_type
    assert per.loc["AO", ["injected", "found", "typed", "called_LS"]].tolist() == [1, 1, 0, 1]
    assert per.loc["TC", ["injected", "found"]].tolist() == [1, 0]
    assert np.isnan(per.loc["TC", "type_accuracy"])
    assert per.loc["IO", "recall"] == 1.0
    assert sorted(score.matches["offset"].tolist()) == [-1.0, 0.0, 2.0]
    # A wider tolerance takes in the TC at +3 steps.
    wider = score_against_truth(found, truth, step="5min", tolerance=3)
    assert wider.n_matched == 4


def test_score_takes_the_closest_detection_and_accepts_events():
    truth = _truth([("s", T0, "TC")])

    def event(offset_steps: int, kind: str) -> Event:
        return Event(
            series_id="s",
            position=0,
            event_time=(T0 + offset_steps * STEP).isoformat(),
            event_type=kind,
            effect=1.0,
            effect_pct=None,
            t_stat=5.0,
            se=0.2,
            type_weights=((kind, 1.0),),
            status="confirmed",
            decay=None,
            half_life=None,
            level=0.0,
            model="ARIMA(1,0,0)",
        )

    # The IO one step late is closer than the TC two steps early: it is the match,
    # so the type is wrong and the TC counts as a false event.
    score = score_against_truth([event(-2, "TC"), event(1, "IO")], truth, step=STEP)
    assert (score.n_matched, score.n_typed, score.false_events) == (1, 0, 1)
    assert score.matches["event_type"].tolist() == ["IO"]
    # At equal distance the same-type detection is preferred.
    score = score_against_truth([event(-1, "TC"), event(1, "IO")], truth, step=STEP)
    assert (score.n_matched, score.n_typed, score.false_events) == (1, 1, 1)


def test_score_on_a_numeric_grid_and_with_nothing_found():
    truth = _truth([("x", 10.0, "AO"), ("x", 40.0, "LS")])
    found = pd.DataFrame({"series_id": ["x"], "event_time": ["12"], "event_type": ["AO"]})
    score = score_against_truth(found, truth, step=1.0, tolerance=2)
    assert (score.recall, score.type_accuracy, score.false_events) == (0.5, 1.0, 0)
    # Spacing 2: 12 is one grid step from 10.
    assert score_against_truth(found, truth, step=2.0, tolerance=1).n_matched == 1
    empty = score_against_truth([], truth, step=1.0)
    assert (empty.n_matched, empty.recall, empty.false_events) == (0, 0.0, 0)
    assert np.isnan(empty.type_accuracy)


def test_score_refuses_bad_inputs():
    truth = _truth([("x", T0, "AO")])
    with pytest.raises(ConfigError, match="lacks column"):
        score_against_truth(pd.DataFrame({"series_id": ["x"]}), truth, step=STEP)
    with pytest.raises(ConfigError, match="tolerance"):
        score_against_truth([], truth, step=STEP, tolerance=-1)
    with pytest.raises(ConfigError, match="not a time interval"):
        score_against_truth([], truth, step="soon")


# --------------------------------------------------------------------------- the command
