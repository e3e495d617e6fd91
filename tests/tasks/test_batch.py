"""tasks/batch.py: one series' cold and warm analysis, refits, and a batch read from a source.

References
----------
- The light refit after a confirmed level shift (``detect.reestimate``) is
  checked against statsmodels' ARIMA fitted independently on the same series
  with the same orders and the shift removed (statsmodels is the oracle for
  the likelihood fit; the same likelihood gives the same coefficients).
- Everything else is checked against the injected truth of invented series
  (AR(1) noise, phi 0.6, with a level shift at a known time) and against the
  rules documented in tasks/batch.py (refit by age, deferral below the
  minimum).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from statsmodels.tsa.arima.model import ARIMA

from changekind.tasks.batch import (
    AnalysisOptions,
    SeriesWork,
    analyse_series_work,
    run_batch,
)
from changekind.tasks.decompose import regularize
from changekind.tasks.detect import reestimate
from changekind.tasks.fetch import open_source
from changekind.tasks.simulate import arma_filter

SID = "edge-004/node-17"
HISTORY, NEW = 480, 60
SHIFT_AT, SHIFT = HISTORY + 20, 5.0
OPTIONS = AnalysisOptions()


def make_series(seed: int = 4, *, shift: bool = True) -> pd.DataFrame:
    """Invented minute latency: AR(1) (phi 0.6, sd 1) around 20, a +5 step 20 points into NEW."""
    rng = np.random.default_rng(seed)
    n = HISTORY + NEW
    y = 20.0 + arma_filter(rng.normal(size=n), ar=(0.6,))
    if shift:
        y[SHIFT_AT:] += SHIFT
    stamps = pd.date_range("2031-03-01", periods=n, freq="min")
    return pd.DataFrame({"series_id": SID, "timestamp": stamps, "value": y})


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    return make_series()


@pytest.fixture(scope="module")
def cold(frame):
    first = frame.iloc[:HISTORY]
    return analyse_series_work(SeriesWork(SID), first["timestamp"], first["value"], OPTIONS)


@pytest.fixture(scope="module")
def source(frame, tmp_path_factory):
    folder = tmp_path_factory.mktemp("batch-source")
    frame.to_parquet(folder / "part-0.parquet", index=False)
    return open_source(folder)


def _warm_work(cold, start=None) -> SeriesWork:
    return SeriesWork(SID, cold.model, cold.watermark, cold.events, start=start)


def test_cold_fits_and_reports_the_history(cold, frame):
    assert cold.mode == "cold" and cold.model is not None
    assert cold.model.order[0] >= 1  # the AR(1) dependence is modelled
    assert cold.points == HISTORY
    assert pd.Timestamp(cold.watermark) == frame["timestamp"].iloc[HISTORY - 1]
    assert not cold.events  # clean history: at most the rare false event, here none


def test_too_short_a_history_is_deferred_with_the_count(frame):
    few = frame.iloc[:50]
    out = analyse_series_work(SeriesWork(SID), few["timestamp"], few["value"], OPTIONS)
    assert out.mode == "deferred" and out.model is None
    assert out.note == "50 observed points; a first fit needs 96"


def test_warm_with_nothing_new_is_unchanged(cold, frame):
    first = frame.iloc[:HISTORY]
    out = analyse_series_work(_warm_work(cold), first["timestamp"], first["value"], OPTIONS)
    assert out.mode == "unchanged" and out.watermark == cold.watermark and not out.events


def test_warm_finds_the_level_shift_and_reestimates_the_coefficients(cold, frame, source):
    start = frame["timestamp"].iloc[HISTORY - OPTIONS.context_points]
    batch = run_batch(source, [_warm_work(cold, start)], OPTIONS)
    (out,) = batch.outcomes
    assert out.mode == "warm"
    (ls,) = [e for e in out.events if e.event_type == "LS"]
    assert pd.Timestamp(ls.event_time) == frame["timestamp"].iloc[SHIFT_AT]
    assert ls.status == "confirmed"
    assert_allclose(ls.effect, SHIFT, atol=1.0)  # about three standard errors
    # Re-estimated on the whole history, orders kept, fitted through the last point.
    assert out.model is not None and out.model != cold.model
    assert out.model.order == cold.model.order and out.model.nobs == HISTORY + NEW
    assert pd.Timestamp(out.model.fitted_through) == frame["timestamp"].iloc[-1]
    assert out.note == "coefficients re-estimated: confirmed LS"
    assert out.reestimate is None


def test_reestimate_matches_statsmodels_on_the_series_without_the_shift(cold, frame, source):
    """Oracle: statsmodels' ARIMA, same orders, fitted on the series minus the estimated step."""
    start = frame["timestamp"].iloc[HISTORY - OPTIONS.context_points]
    (out,) = run_batch(source, [_warm_work(cold, start)], OPTIONS).outcomes
    (ls,) = [e for e in out.events if e.event_type == "LS"]
    series = regularize(SID, frame["timestamp"], frame["value"])
    model = reestimate(cold.model, series, [ls])
    assert model == out.model  # the batch used exactly this function
    y = frame["value"].to_numpy().copy()
    y[SHIFT_AT:] -= ls.effect
    p, d, q = cold.model.order
    oracle = ARIMA(y, order=(p, d, q), trend="c" if d == 0 else "n").fit()
    ar = [v for k, v in model.params if k.startswith("ar.")]
    assert_allclose(ar, oracle.arparams, atol=2e-3)
    assert_allclose(model.sigma2, oracle.params[-1], rtol=1e-2)


def test_a_model_stale_by_age_is_refitted_cold(cold, frame, source):
    # refit_after 0.05: after more than 24 new points (5 % of 480) the model is stale.
    options = replace(OPTIONS, refit_after=0.05)
    clean = make_series(shift=False)
    first = clean.iloc[:HISTORY]
    model = analyse_series_work(SeriesWork(SID), first["timestamp"], first["value"], options)
    out = analyse_series_work(
        SeriesWork(SID, model.model, model.watermark), clean["timestamp"], clean["value"], options
    )
    assert out.mode == "cold" and out.note == "refit: age" and out.model is None
    # Through run_batch the whole history is read again and fitted cold.
    (done,) = run_batch(source, [SeriesWork(SID, cold.model, cold.watermark)], options).outcomes
    assert done.mode == "cold" and done.note == "refit: age"
    assert done.model is not None and done.model.nobs == HISTORY + NEW


def test_a_bad_series_fails_alone_with_its_problem(cold):
    stamps = pd.date_range("2031-03-01", periods=200, freq="min")
    out = analyse_series_work(SeriesWork(SID), pd.Series(stamps), pd.Series([3.0] * 200), OPTIONS)
    assert out.mode == "failed" and out.failure is not None
    assert out.failure[0] == "prepare" and "constant" in out.failure[1]


def test_windowed_cold_with_a_window_longer_than_the_history_is_deferred(frame):
    """540 minute points in windows of a day: one window, still filling, so none to model."""
    options = replace(OPTIONS, window="D")
    out = analyse_series_work(SeriesWork(SID), frame["timestamp"], frame["value"], options)
    assert out.mode == "deferred" and out.model is None
    assert out.note == "0 observed windows of D; a first fit needs 96"
    hourly = replace(OPTIONS, window="h", min_points=24)  # 9 windows; the last is held back
    out = analyse_series_work(SeriesWork(SID), frame["timestamp"], frame["value"], hourly)
    assert out.mode == "deferred" and out.note == "8 observed windows of h; a first fit needs 24"


def test_series_needing_their_history_share_one_read(cold, frame, tmp_path, monkeypatch):
    """Two series of a batch both refit (one by age, one after a confirmed LS): one extra read."""
    import changekind.tasks.batch as batch

    other = frame.assign(series_id="edge-004/node-18")
    pd.concat([frame, other]).to_parquet(tmp_path / "part-0.parquet", index=False)
    spec = open_source(tmp_path)
    start = frame["timestamp"].iloc[HISTORY - OPTIONS.context_points]
    works = [_warm_work(cold, start), replace(_warm_work(cold, start), series_id=other.iloc[0, 0])]
    calls = []
    real = batch.read_windows
    monkeypatch.setattr(
        batch, "read_windows", lambda s, w, **kw: calls.append(len(w)) or real(s, w, **kw)
    )
    outs = run_batch(spec, works, OPTIONS).outcomes
    assert calls == [2, 2]  # the batch's windows, then both histories together
    assert [o.note for o in outs] == ["coefficients re-estimated: confirmed LS"] * 2
    assert outs[0].model == outs[1].model  # same data, same history, same fit
    assert outs[0].model is not None and outs[0].model.nobs == HISTORY + NEW


def test_a_work_batch_is_one_opaque_value_that_pickles_whole(cold):
    """Prefect's parameter walk (prefect.utilities.collections.visit_collection) sees one value."""
    import pickle

    import cloudpickle
    from prefect.utilities.collections import visit_collection

    from changekind.tasks.batch import WorkBatch

    works = [_warm_work(cold), SeriesWork("edge-004/node-18")]
    batch = WorkBatch(works)
    seen: list = []
    visit_collection(batch, seen.append)
    assert seen == [batch]
    again = pickle.loads(cloudpickle.dumps(batch))
    assert len(again) == 2 and list(again) == works


def test_refits_beyond_the_share_are_deferred_longest_waiting_first(tmp_path):
    # Four clean series, all stale by age (refit_after 0.05); a share of 0.25 of
    # a batch of four allows one full refit: the series whose watermark is
    # oldest (it has waited longest) is refitted; the others are tested warm
    # with their old model (watermark moved on, no new model) and counted as
    # deferred.
    options = replace(OPTIONS, refit_after=0.05, refit_share=0.25)
    parts, works = [], []
    for k, name in enumerate(["rack-a", "rack-b", "rack-c", "rack-d"]):
        data = make_series(seed=20 + k, shift=False).assign(series_id=name)
        parts.append(data)
        mark_at = HISTORY - (30 if name == "rack-c" else 0)
        first = data.iloc[:mark_at]
        fitted = analyse_series_work(SeriesWork(name), first["timestamp"], first["value"], options)
        works.append(SeriesWork(name, fitted.model, fitted.watermark))
    folder = tmp_path / "fleet"
    folder.mkdir()
    pd.concat(parts).to_parquet(folder / "part-0.parquet", index=False)
    outcomes = run_batch(open_source(folder), works, options).outcomes
    by_id = {o.series_id: o for o in outcomes}
    assert by_id["rack-c"].mode == "cold" and by_id["rack-c"].note == "refit: age"
    for name in ("rack-a", "rack-b", "rack-d"):
        out = by_id[name]
        work = next(w for w in works if w.series_id == name)
        assert out.mode == "warm" and out.refit_deferred and out.refit_due is None
        assert out.watermark > work.watermark and out.model is None
        assert out.note == "refit deferred: age"
    # Without a limit every due refit is made.
    unlimited = run_batch(open_source(folder), works, replace(options, refit_share=None))
    assert [o.mode for o in unlimited.outcomes] == ["cold"] * 4
