"""Windowed mode: window aggregates, detection on windows, drilling back to the raw rows.

References
----------
- Window aggregates are checked against pandas' own ``DataFrame.resample``
  (first, max, min, last, median, count; left-closed bins labelled by their
  start) and the spread against ``scipy.stats.median_abs_deviation(...,
  scale="normal")``, computed independently on the same data.
- The drilled rows are checked row for row against pandas boolean filtering of
  the very frame written to the source.
- The detection test uses an invented second-resolution series (AR(1) noise,
  phi = 0.5) with three injected events; the injected truth is the reference:
  a level shift of 3.0, a fading jump of 6.0 with a half-life of 300 s, and
  the noise standard deviation doubling.  The expected window-level figures
  follow from the injection: a jump decaying by 0.5 every 300 s decays by
  0.5^(60/300) = 0.8706 per 1-minute window, and starts in its first window
  at a median of 6 * 0.5^(29.5/300) = 5.61; a doubled noise sd doubles every
  window's spread (+100 %).
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy.stats import median_abs_deviation
from typer.testing import CliRunner

from changekind.flows.cli import app
from changekind.flows.cli import detect as cli_window  # the windowed detect helpers
from changekind.tasks.errors import ConfigError, SeriesError, SourceError, TooShortError
from changekind.tasks.fetch import open_source
from changekind.tasks.simulate import arma_filter
from changekind.tasks.types import EVENT_NAMES, EVENT_TYPES, FittedModel
from changekind.tasks.window.detection import detect_windowed, screen_windowed, windowed_model
from changekind.tasks.window.drill import drill
from changekind.tasks.window.summary import (
    MIN_WINDOWS,
    complete_windows,
    parse_window,
    summarize_windows,
)

SID = "array-07/write_latency_ms"
OTHER = "array-09/write_latency_ms"
DAY = 86_400
START = pd.Timestamp("2026-03-02 00:00:00")
LS_AT = START + pd.Timedelta(seconds=DAY + 8 * 3600 + 30)  # inside the 08:00 window
TC_AT = START + pd.Timedelta(seconds=DAY + 20 * 3600)
VC_AT = START + pd.Timedelta(seconds=2 * DAY + 12 * 3600)
LS_SIZE, TC_SIZE, TC_HALF_LIFE_S = 3.0, 6.0, 300.0
GAP = (START + pd.Timedelta(hours=5), START + pd.Timedelta(hours=5, minutes=4, seconds=30))
MINUTE = pd.Timedelta("1min")

runner = CliRunner()


def make_second_series(seed: int, *, days: int = 3) -> pd.DataFrame:
    """Invented write latency of one storage array, one sample a second.

    AR(1) noise (phi 0.5, innovation sd 1, doubled from VC_AT on) around 50 ms,
    a level shift at LS_AT, a fading jump at TC_AT; 0.3 % of the values missing
    and a gap of 4.5 minutes (no rows at all) on the first day.
    """
    rng = np.random.default_rng(seed)
    n = days * DAY
    stamps = pd.date_range(START, periods=n, freq="s")
    scale = np.where(stamps >= VC_AT, 2.0, 1.0)
    shocks = rng.normal(size=n + 200)
    shocks[200:] *= scale
    y = 50.0 + arma_filter(shocks, ar=(0.5,))[200:]
    y[stamps >= LS_AT] += LS_SIZE
    after = stamps >= TC_AT
    y[after] += TC_SIZE * 0.5 ** (np.arange(after.sum()) / TC_HALF_LIFE_S)
    y[rng.random(n) < 0.003] = np.nan
    keep = ~((stamps >= GAP[0]) & (stamps < GAP[1]))
    return pd.DataFrame({"series_id": SID, "timestamp": stamps[keep], "value": y[keep]})


@pytest.fixture(scope="module")
def raw() -> pd.DataFrame:
    return make_second_series(2026)


@pytest.fixture(scope="module")
def windowed(raw):
    return detect_windowed(SID, raw["timestamp"], raw["value"], "1min")


@pytest.fixture(scope="module")
def sources(raw, tmp_path_factory):
    """The same rows (plus a second series) as Parquet (date/time column) and CSV (text)."""
    folder = tmp_path_factory.mktemp("window-sources")
    other = raw.iloc[: 2 * 3600].assign(series_id=OTHER)
    frame = pd.concat([other, raw], ignore_index=True)
    frame.to_parquet(folder / "latency.parquet", index=False)
    day1 = frame[frame["timestamp"] < START + pd.Timedelta(days=1, hours=12)]
    text = day1.assign(timestamp=day1["timestamp"].dt.strftime("%Y-%m-%dT%H:%M:%S"))
    text.to_csv(folder / "latency.csv", index=False)
    return {
        "frame": frame,
        "text": text,
        "parquet": open_source(folder / "latency.parquet"),
        "csv": open_source(folder / "latency.csv"),
        "folder": folder,
    }


# --------------------------------------------------------------------------- parse_window


@pytest.mark.parametrize(
    ("text", "seconds"),
    [("250ms", 0.25), ("10s", 10), ("1min", 60), ("15min", 900), ("1h30min", 5400), ("1D", DAY)],
)
def test_parse_window_reads_pandas_offsets(text, seconds):
    # Reference: pandas' own reading of the same alias as a fixed offset.
    assert parse_window(text) == pd.Timedelta(pd.tseries.frequencies.to_offset(text))
    assert parse_window(text).total_seconds() == seconds


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("10", r"window '10' has no unit"),
        ("abc", r"window 'abc' is not a duration pandas understands; give e\.g\. '250ms'"),
        ("1ME", r"window '1ME' is a calendar offset"),
        ("0s", r"window '0s' is not positive"),
        ("-5s", r"window '-5s' is not positive"),
        ("", r"is not a duration; give e\.g\."),
    ],
)
def test_parse_window_refuses_unknown_text_with_one_clear_message(text, message):
    with pytest.raises(ConfigError, match=message):
        parse_window(text)


# --------------------------------------------------------------------------- summaries


def test_summary_matches_pandas_resample(raw):
    got = summarize_windows(SID, raw["timestamp"], raw["value"], "1min")
    # Oracle: pandas' resample (left-closed, labelled by the window start).
    series = pd.Series(raw["value"].to_numpy(), index=pd.DatetimeIndex(raw["timestamp"]))
    ref = series.resample("1min").agg(["first", "max", "min", "last", "median", "count"])
    assert got.index.equals(pd.DatetimeIndex(ref.index).as_unit("ns"))
    for name in ("first", "max", "min", "last", "median"):
        assert_allclose(getattr(got, name), ref[name].to_numpy(), rtol=0, atol=1e-12, err_msg=name)
    np.testing.assert_array_equal(got.count, ref["count"].to_numpy())
    # Oracle: scipy's normalized MAD of each window.
    spread = series.resample("1min").apply(
        lambda x: median_abs_deviation(x.dropna(), scale="normal") if x.count() else np.nan
    )
    assert_allclose(got.spread, spread.to_numpy(), rtol=1e-12, atol=1e-12)
    # The gap: windows without rows are present, empty, NaN (as resample has them).
    assert got.n_empty == int((ref["count"] == 0).sum()) >= 4
    assert got.nobs == int(raw["value"].notna().sum())
    assert got.to_frame().shape == (len(ref), 7)


def test_summary_of_shuffled_zoned_text_matches_resample():
    # Europe/Paris across the 2026-03-29 daylight-saving change, given as ISO
    # text with two different UTC offsets, shuffled.
    rng = np.random.default_rng(5)
    stamps = pd.date_range(
        "2026-03-29 00:00", "2026-03-29 04:00", freq="s", tz="Europe/Paris", inclusive="left"
    )
    y = rng.gamma(2.0, 3.0, stamps.size)
    order = rng.permutation(stamps.size)
    text = [stamps[i].isoformat() for i in order]
    got = summarize_windows("zoned", text, y[order], "5min")
    ref = pd.Series(y, index=stamps).resample("5min").agg(["first", "median", "last", "count"])
    assert got.index.equals(pd.DatetimeIndex(ref.index).tz_convert("UTC").as_unit("ns"))
    for name in ("first", "median", "last"):
        assert_allclose(getattr(got, name), ref[name].to_numpy(), rtol=0, atol=0, err_msg=name)
    # Date/time input keeps its own zone in the labels.
    zoned = summarize_windows("zoned", stamps, y, "5min")
    assert str(zoned.index.tz) == "Europe/Paris"
    assert_allclose(zoned.median, got.median, rtol=0, atol=0)


def test_window_larger_than_the_data_is_refused_with_the_count():
    stamps = pd.date_range(START, periods=3 * DAY // 60, freq="min")
    y = np.random.default_rng(1).normal(size=stamps.size)
    with pytest.raises(
        TooShortError,
        match=rf"'s1'.*window of 1 d gives only 3 window\(s\).*"
        rf"at least {MIN_WINDOWS} are needed: choose a window of at most about 3 h",
    ):
        summarize_windows("s1", stamps, y, "1D")


@pytest.mark.parametrize(
    ("stamps", "values", "window", "error", "message"),
    [
        (
            pd.date_range(START, periods=600, freq="s"),
            np.ones(600),
            "250ms",
            SeriesError,
            r"a window of 250 ms holds a median of 1 point\(s\) "
            r"\(the series' spacing is about 1 s\)",
        ),
        (
            np.arange(600.0),
            np.ones(600),
            "10s",
            SeriesError,
            r"timestamps are plain numbers; windows of time need dates/times",
        ),
        (
            pd.date_range(START, periods=600, freq="s"),
            ["x"] * 600,
            "10s",
            SeriesError,
            r"600 value\(s\) are not numbers \(first: 'x'\)",
        ),
        (
            pd.date_range(START, periods=600, freq="s"),
            np.ones(600),
            "fortnightly",
            ConfigError,
            r"window 'fortnightly' is not a duration",
        ),
    ],
)
def test_bad_summaries_get_one_clear_message(stamps, values, window, error, message):
    with pytest.raises(error, match=message):
        summarize_windows("bad", stamps, values, window)


# --------------------------------------------------------------------------- detection


def _near(events, kind: str, when: pd.Timestamp) -> list:
    """Events of ``kind`` within one window of the window holding ``when``."""
    home = when.floor("1min")
    return [
        e
        for e in events
        if e.event_type == kind and abs(pd.Timestamp(e.window_start) - home) <= MINUTE
    ]


def test_windowed_mode_finds_the_injected_ls_tc_and_vc(windowed, raw):
    events = windowed.events
    shifts = _near(events, "LS", LS_AT)
    (tc,) = _near(events, "TC", TC_AT)
    (vc,) = _near(events, "VC", VC_AT)
    # Effects against the injected truth.  A shift half-way through a window
    # moves that window's median half-way: it comes out as one level shift or
    # as two in consecutive windows, whose effects add up to the shift.  When
    # the engine models the medians with d=1, a step is estimated from the
    # jump between neighbouring windows, so the half-moved window makes it
    # smaller (by up to about a quarter in simulations of this series).
    # Hence -30 % / +25 %.
    assert 1 <= len(shifts) <= 2
    assert LS_SIZE * 0.70 <= sum(e.effect for e in shifts) <= LS_SIZE * 1.25
    assert all(e.t_stat > 0 for e in shifts)
    first_window = TC_SIZE * 0.5 ** (29.5 / TC_HALF_LIFE_S)  # 5.61, see the module notes
    assert_allclose(tc.effect, first_window, rtol=0.15)
    assert_allclose(tc.decay, 0.5 ** (60 / TC_HALF_LIFE_S), atol=0.035)  # 0.8706
    assert_allclose(vc.effect_pct, 100.0, atol=10.0)  # noise sd doubled
    assert vc.level > 0 and vc.effect > 0
    # At most two events besides the three injected: the engine aims at about
    # 0.2 false events per clean series, and two series (medians, spreads) are
    # tested.
    others = len(events) - len(shifts) - 2
    assert others <= 2, [(e.event_type, e.event_time, e.t_stat) for e in events]


def test_warm_screen_of_new_windows_agrees_with_the_cold_analysis(raw, windowed):
    """screen_windowed on day 3 with a model of days 1-2 finds the VC the cold run found.

    Reference: the cold analysis of all three days (detect_windowed) and the
    injected doubling of the noise sd (+100 %).  The warm screen has no
    re-estimation, so its VC is estimated against the cached spread model; the
    two estimates of the same step agree within 15 % of the ratio.
    """
    cut = START + pd.Timedelta(days=2)
    early = raw[raw["timestamp"] < cut]
    model = windowed_model(detect_windowed(SID, early["timestamp"], early["value"], "1min"))
    assert model.window == "min" and model.spread is not None
    assert FittedModel.from_json(model.to_json()) == model  # cached with its spread model
    known = [e for e in windowed.events if pd.Timestamp(e.event_time) < cut]
    context = raw[raw["timestamp"] >= cut - pd.Timedelta(hours=4)]
    summary = summarize_windows(SID, context["timestamp"], context["value"], "1min")
    found = screen_windowed(model, summary, cut, known=known)
    (vc,) = [e for e in found.events if e.event_type == "VC"]
    (cold_vc,) = _near(windowed.events, "VC", VC_AT)
    assert vc.event_time == cold_vc.event_time == VC_AT.isoformat()
    assert vc.window_end == (VC_AT + MINUTE).isoformat()
    assert_allclose(1 + vc.effect_pct / 100, 1 + cold_vc.effect_pct / 100, rtol=0.15)
    assert all(pd.Timestamp(e.event_time) >= cut for e in found.events)
    # Known variance changes scale the level test: with the VC known, the
    # windows after it are tested with a doubled sigma and raise no level event.
    after = screen_windowed(model, summary, VC_AT + pd.Timedelta(hours=1), known=[*known, vc])
    assert not [e for e in after.events if e.event_type != "VC"]


def test_windowed_events_keep_one_event_per_window(windowed):
    times = [e.event_time for e in windowed.events]
    assert len(times) == len(set(times)) and times == sorted(times)


def test_complete_windows_hold_back_the_window_still_filling():
    stamps = pd.date_range("2026-03-02 00:00:00", periods=150, freq="s")  # 2.5 minutes
    keep = complete_windows("s1", stamps, "1min")
    assert keep.sum() == 120 and not keep[120:].any()
    assert complete_windows("s1", stamps, "1min", end=stamps[0] + pd.Timedelta("3min")).all()
    assert complete_windows("s1", stamps, "1min", end=stamps[-1]).sum() == 120


def test_windowed_effects_stay_within_the_data(windowed):
    # No effect can exceed the range of the series it was found in (a physical
    # bound, independent of the method).
    medians = windowed.summary.median
    spreads = windowed.summary.spread[windowed.summary.count >= 5]
    for event in windowed.events:
        data = spreads if event.event_type == "VC" else medians
        bound = float(np.nanmax(data) - np.nanmin(data))
        assert abs(event.effect) <= bound, (event.event_type, event.event_time, event.effect)
        assert event.position > 0


def test_windowed_mode_models_one_point_per_window(windowed, raw):
    n_windows = windowed.summary.n_windows
    span = raw["timestamp"].iloc[-1].floor("1min") - raw["timestamp"].iloc[0].floor("1min")
    assert n_windows == span // MINUTE + 1 == 3 * DAY // 60
    assert windowed.n_modelled == windowed.level.nobs == n_windows
    assert windowed.spread is not None and windowed.spread.nobs == n_windows
    assert windowed.n_points == int(raw["value"].notna().sum())
    assert windowed.n_points > 59 * windowed.n_modelled


def test_every_windowed_event_names_its_window(windowed):
    assert windowed.events
    for event in windowed.events:
        start, end = pd.Timestamp(event.window_start), pd.Timestamp(event.window_end)
        assert event.event_time == event.window_start == start.isoformat()
        assert end - start == MINUTE and start == start.floor("1min")
        assert windowed.summary.index[event.position] == start
        record = event.to_record()
        assert record["window_start"] == event.window_start
        assert record["window_end"] == event.window_end
    assert "VC" not in EVENT_TYPES and EVENT_NAMES["VC"] == "variance change"
    as_result = windowed.as_detection()
    assert as_result.events == windowed.events
    assert any(note.startswith("windows of 1 min:") for note in as_result.notes)


def test_windowed_mode_refuses_a_window_longer_than_the_data(raw):
    head = raw.iloc[:7200]  # two hours
    with pytest.raises(TooShortError, match=r"window of 15 min gives only 8 window\(s\)"):
        detect_windowed(SID, head["timestamp"], head["value"], "15min")


# --------------------------------------------------------------------------- drill


def _oracle(frame: pd.DataFrame, series_id: str, start: pd.Timestamp, around: int) -> pd.DataFrame:
    """Rows of [start - around min, start + (around + 1) min), by pandas filtering."""
    ts = pd.to_datetime(frame["timestamp"])
    lo, hi = start - around * MINUTE, start + (around + 1) * MINUTE
    keep = (frame["series_id"] == series_id) & (ts >= lo) & (ts < hi)
    out = frame[keep].assign(_t=ts[keep]).sort_values("_t", kind="mergesort")
    return out.assign(offset=(out["_t"] - start) // MINUTE).reset_index(drop=True)


@pytest.mark.parametrize("kind", ["parquet", "csv"])
def test_drill_returns_exactly_the_raw_rows_of_the_window(sources, windowed, kind):
    ls = _near(windowed.events, "LS", LS_AT)[0]
    start = pd.Timestamp(ls.window_start)
    frame = sources["frame"] if kind == "parquet" else sources["text"]
    expected = _oracle(frame, SID, start, 2)
    # Any time inside the window drills the same window.
    for asked in (ls.window_start, (start + pd.Timedelta(seconds=37)).isoformat()):
        got = drill(sources[kind], SID, asked, "1min", around=2)
        assert len(got) == len(expected) > 250
        assert (got["series_id"] == SID).all()
        if kind == "csv":  # text timestamps come back exactly as written
            assert got["timestamp"].tolist() == expected["timestamp"].tolist()
        else:
            np.testing.assert_array_equal(
                pd.to_datetime(got["timestamp"]).to_numpy().astype("datetime64[ns]"),
                expected["timestamp"].to_numpy().astype("datetime64[ns]"),
            )
        np.testing.assert_array_equal(got["value"].to_numpy(), expected["value"].to_numpy())
        np.testing.assert_array_equal(got["window_offset"].to_numpy(), expected["offset"])
        assert (got.loc[got["window_offset"] == 0, "window_start"] == start).all()


def test_drill_reads_a_database_table_with_its_own_column_names(sqlite_url, raw):
    import sqlalchemy as sa

    head = raw.iloc[:7200].rename(columns={"series_id": "array", "timestamp": "at", "value": "ms"})
    engine = sa.create_engine(sqlite_url)
    try:
        head.to_sql("write_latency", engine, index=False)
    finally:
        engine.dispose()
    spec = open_source(
        sqlite_url,
        table="write_latency",
        columns={"series_id": "array", "timestamp": "at", "value": "ms"},
    )
    got = drill(spec, SID, "2026-03-02T01:00:05", "10s", around=1)
    # Oracle: pandas filtering of the rows written.
    keep = (head["at"] >= pd.Timestamp("2026-03-02T00:59:50")) & (
        head["at"] < pd.Timestamp("2026-03-02T01:00:20")
    )
    expected = head[keep]
    np.testing.assert_array_equal(got["value"].to_numpy(), expected["ms"].to_numpy())
    np.testing.assert_array_equal(
        pd.to_datetime(got["timestamp"]).to_numpy().astype("datetime64[ns]"),
        expected["at"].to_numpy().astype("datetime64[ns]"),
    )
    assert got["window_offset"].tolist() == [-1] * 10 + [0] * 10 + [1] * 10


def test_drill_pushes_the_window_bounds_down_to_the_read(sources, monkeypatch):
    import changekind.tasks.fetch as fetch

    seen = {}
    real = fetch.read_series

    def spy(spec, ids, **kwargs):
        seen.update(kwargs, ids=list(ids))
        return real(spec, ids, **kwargs)

    monkeypatch.setattr(fetch, "read_series", spy)
    drill(sources["parquet"], SID, "2026-03-03T08:00:10", "10s", around=3)
    assert seen["ids"] == [SID]
    assert seen["start"] == pd.Timestamp("2026-03-03T07:59:40")
    assert seen["end"] == pd.Timestamp("2026-03-03T08:00:50")


def test_drill_of_a_zoned_time_aligns_in_utc(sources):
    naive = drill(sources["parquet"], SID, "2026-03-03T08:00:00", "1min", around=0)
    zoned = drill(sources["parquet"], SID, "2026-03-03T09:00:20+01:00", "1min", around=0)
    np.testing.assert_array_equal(zoned["value"].to_numpy(), naive["value"].to_numpy())
    assert zoned["window_start"].iloc[0] == pd.Timestamp("2026-03-03T09:00:00+01:00")


@pytest.mark.parametrize(
    ("series_id", "when", "kwargs", "error", "message"),
    [
        (
            "array-99/none",
            "2026-03-03T08:00:00",
            {},
            SourceError,
            r"series 'array-99/none' is not in parquet file .* it holds 2 series",
        ),
        (
            SID,
            "2027-01-01T00:00:00",
            {},
            ConfigError,
            r"series '.*' has no points in the window 2027-01-01T00:00:00 to 2027-01-01T00:01:00 "
            r".*its points run from 2026-03-02 00:00:00 to 2026-03-04 23:59:59",
        ),
        (
            SID,
            GAP[0].isoformat(),
            {},
            ConfigError,
            r"has no points in the window 2026-03-02T05:00:00 to 2026-03-02T05:01:00 .*: "
            r"it falls in "
            r"a gap of the series, between points at 2026-03-02 04:59:59 and 2026-03-02 05:04:30",
        ),
        (SID, "last tuesday", {}, ConfigError, r"event time 'last tuesday' is not a date/time"),
        (SID, "2026-03-03T08:00:00", {"around": -1}, ConfigError, r"around=-1 must be between"),
        (
            SID,
            "2026-03-03T08:00:00",
            {"window": "1 fortnight"},
            ConfigError,
            r"window '1 fortnight' is not a duration",
        ),
    ],
)
def test_bad_drills_get_one_clear_message(sources, series_id, when, kwargs, error, message):
    window = kwargs.pop("window", "1min")
    with pytest.raises(error, match=message):
        drill(sources["parquet"], series_id, when, window, **kwargs)


# --------------------------------------------------------------------------- command line


def test_drill_command_csv_matches_the_source(sources):
    start = pd.Timestamp("2026-03-03T08:00:00")
    result = runner.invoke(
        app,
        [
            "drill",
            "--source",
            str(sources["folder"] / "latency.csv"),
            SID,
            start.isoformat(),
            "--window",
            "1min",
            "--around",
            "1",
            "--csv",
        ],
    )
    assert result.exit_code == 0, result.stderr
    from io import StringIO

    got = pd.read_csv(StringIO(result.stdout), dtype={"timestamp": str})
    expected = _oracle(sources["text"], SID, start, 1)
    assert got["timestamp"].tolist() == expected["timestamp"].tolist()
    np.testing.assert_array_equal(got["value"].to_numpy(), expected["value"].to_numpy())
    np.testing.assert_array_equal(got["window_offset"].to_numpy(), expected["offset"])


def test_drill_command_table_and_png(sources, tmp_path):
    start = pd.Timestamp("2026-03-03T08:00:00")
    source = str(sources["folder"] / "latency.parquet")
    table = runner.invoke(
        app, ["drill", "--source", source, SID, start.isoformat(), "--window", "1min"]
    )
    assert table.exit_code == 0, table.stderr
    expected = _oracle(sources["frame"], SID, start, 2)
    focus = expected[expected["offset"] == 0]["value"].dropna()
    assert f"{len(expected)} raw points" in table.stdout
    # The drilled window's line: its point count and median (pandas as oracle).
    line = next(ln for ln in table.stdout.splitlines() if "0 (drilled)" in ln)
    assert f" {len(focus)} " in line and f"{focus.median():.6g}" in line

    png = tmp_path / "drill.png"
    made = runner.invoke(
        app,
        [
            "drill",
            "--source",
            source,
            SID,
            start.isoformat(),
            "--window",
            "1min",
            "--png",
            str(png),
        ],
    )
    assert made.exit_code == 0, made.stderr
    import matplotlib.image

    image = matplotlib.image.imread(png)
    assert image.shape[:2] == (400, 1000)
    # The shaded window: a band of pale red pixels in the plot.
    red = (image[..., 0] > 0.9) & (image[..., 1] < 0.9) & (image[..., 2] < 0.9)
    assert red.sum() > 1000


@pytest.mark.parametrize(
    ("args", "message"),
    [
        ([SID, "2026-03-03T08:00:00", "--window", "10"], r"window '10' has no unit"),
        (["array-99/none", "2026-03-03T08:00:00", "--window", "1min"], r"is not in parquet file"),
        ([SID, "2030-01-01T00:00:00", "--window", "1min"], r"has no points in the window"),
        ([SID, "soon", "--window", "1min"], r"event time 'soon' is not a date/time"),
    ],
)
def test_drill_command_bad_input_exits_2_with_one_line(sources, args, message):
    source = str(sources["folder"] / "latency.parquet")
    result = runner.invoke(app, ["drill", "--source", source, *args])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("changekind: error: "), result.stderr
    assert re.search(message, lines[0])
    assert "Traceback" not in result.stderr + result.stdout


def test_drill_command_without_a_source_says_how_to_give_one(monkeypatch):
    monkeypatch.delenv("CHANGEKIND_SOURCE", raising=False)
    result = runner.invoke(app, ["drill", SID, "2026-03-03T08:00:00", "--window", "1min"])
    assert result.exit_code == 2
    assert "pass --source PATH (or set CHANGEKIND_SOURCE)" in result.stderr


def test_detect_helpers_for_the_command_line(raw):
    from changekind.tasks.fetch.inputs import SeriesInput

    day = raw[
        (raw["timestamp"] >= START + pd.Timedelta(days=1))
        & (raw["timestamp"] < START + pd.Timedelta(days=1, hours=16))
    ]
    item = SeriesInput(SID, pd.Index(day["timestamp"]), day["value"].to_numpy())
    outcome = cli_window.analyse_windowed_one(item, "1min", None, None)
    assert outcome.ok and outcome.result.nobs == 16 * 60
    assert _near(outcome.result.events, "LS", LS_AT)
    records = cli_window.windowed_records(SID, day["timestamp"], day["value"], "1min")
    assert [(e.event_type, e.window_start) for e in records] == [
        (e.event_type, e.window_start) for e in outcome.result.events
    ]
    bad = SeriesInput("numbered", pd.Index(np.arange(600.0)), np.ones(600))
    failed = cli_window.analyse_windowed_one(bad, "1min", None, None)
    assert not failed.ok and failed.problem.startswith("timestamps are plain numbers")


def test_a_spike_inside_a_window_is_an_ao_naming_the_window():
    # A 13-sigma single-point spike in a day of 1 s AR(1) points barely moves
    # its 1-minute window's median; the window's extreme against the spread
    # around it (normalized MADs, which one spike does not move) finds it.

    from changekind.tasks.window.detection import detect_windowed, extreme_windows
    from changekind.tasks.window.summary import summarize_windows

    rng = np.random.default_rng(1)
    n = 86_400
    stamps = pd.date_range("2026-03-01", periods=n, freq="s")
    y = 50 + arma_filter(rng.normal(size=n), ar=(0.5,))
    sd = 1 / np.sqrt(1 - 0.25)  # the AR(1)'s standard deviation
    y[40_000] += 13 * sd
    result = detect_windowed("s", stamps, y, "1min")
    spikes = [e for e in result.events if e.window_start == "2026-03-01T11:06:00"]
    assert len(spikes) == 1 and spikes[0].event_type == "AO"
    assert spikes[0].window_end == "2026-03-01T11:07:00"
    assert abs(spikes[0].effect - (y[40_000] - np.median(y[39_960:40_020]))) < 1e-9
    assert 10 < spikes[0].t_stat < 16 and spikes[0].weights["AO"] == 1.0
    # On the same series without the spike no window extreme clears the line.
    y[40_000] -= 13 * sd
    assert extreme_windows(summarize_windows("s", stamps, y, "1min")) == []


def test_drill_marks_the_extreme_point_of_each_window():
    from changekind.tasks.window.drill import _extreme_rows

    values = np.array([1.0, 1.2, 9.0, 0.9, 5.0, 5.1, 4.0, np.nan])
    offset = np.array([0, 0, 0, 0, 1, 1, 1, 1])
    assert _extreme_rows(values, offset).tolist() == [
        False,
        False,
        True,
        False,
        False,
        False,
        True,
        False,
    ]


def test_window_summaries_refuse_values_too_large_to_analyse():
    # The one value check (decompose.check_values): sums of squares of 1e200 overflow float64.
    from changekind.tasks.errors import NonFiniteError

    stamps = pd.date_range(START, periods=3000, freq="s")
    y = np.random.default_rng(2).normal(size=stamps.size)
    y[5] = 1e200
    with pytest.raises(NonFiniteError, match=r"1 value\(s\) are beyond 1e\+150 .*first: 1e\+200"):
        summarize_windows("s1", stamps, y, "1min")


def test_false_budget_in_windowed_mode_is_shared_by_the_three_families():
    # A day of 1 s AR(1) points with spikes of several sizes.  Without a
    # budget the window extremes are tested at the line of the points tested
    # (one day); with a budget B each family spends B / 3 over the raw points
    # of 30 days, a higher line: the extremes kept are exactly those of the
    # first run above it.  Reference for the line: scipy's normal quantile of
    # the Bonferroni allowance.  The window medians' critical value is the
    # engine's budget value at the window's spacing for B / 3.
    from scipy.stats import norm

    from changekind.tasks.detect import analyse_series
    from changekind.tasks.window.detection import extreme_windows

    rng = np.random.default_rng(5)
    n = 86_400
    stamps = pd.date_range("2026-03-01", periods=n, freq="s")
    y = 50 + arma_filter(rng.normal(size=n), ar=(0.5,))
    sd = 1 / np.sqrt(1 - 0.25)
    for i, size in enumerate((4.8, 5.2, 5.6, 6.0, 6.4, 9.0)):
        y[5_000 + 13_000 * i] += size * sd
    summary = summarize_windows("s", stamps, y, "1min")
    loose = extreme_windows(summary)
    strict = extreme_windows(summary, false_budget=0.5)
    line = norm.isf(0.5 / (2 * 60 * 30 * 1440))  # 60 points a window, 30 days of windows
    assert 5.1 < line < 5.3
    assert 4 <= len(loose) <= 6
    assert [e.event_time for e in strict] == [e.event_time for e in loose if abs(e.t_stat) >= line]
    assert 0 < len(strict) < len(loose)
    result = detect_windowed("s", stamps, y, "1min", false_budget=1.5)
    alone = analyse_series("s", summary.index, summary.median, false_budget=0.5)
    assert result.level.critical == pytest.approx(alone.critical)
    assert result.level.critical > detect_windowed("s", stamps, y, "1min").level.critical


def test_window_extremes_follow_the_points_own_tail():
    # A day of 1 s AR(1) points whose innovations are Student t(3) (scaled to
    # unit variance, as latency metrics have): the window extremes are the
    # block maxima of heavy-tailed points, and the Gaussian line (about 4.9)
    # would report hundreds of windows a day.  Their own tail (Hill index of
    # the largest extremes, Weissman's extrapolation) puts the line far out:
    # no window of the clean day is reported, with or without a budget.
    # Gaussian points keep the Gaussian line exactly.  References: scipy's
    # normal quantile for the Gaussian line; the t(3) draws of numpy.
    from scipy.stats import norm

    from changekind.tasks.critical import critical_value, extremes_critical
    from changekind.tasks.window.detection import extreme_windows

    rng = np.random.default_rng(7)
    n = 86_400
    stamps = pd.date_range("2026-03-01", periods=n, freq="s")
    heavy = 50 + arma_filter(rng.standard_t(3, size=n) / np.sqrt(3), ar=(0.5,))
    gauss = 50 + arma_filter(rng.normal(size=n), ar=(0.5,))
    summary = summarize_windows("s", stamps, heavy, "1min")
    gaussian_line = norm.isf(0.2 / (2 * 1440 * 60))
    assert critical_value(1440 * 60.0) == pytest.approx(gaussian_line)

    def standardized_extremes(windows):
        farthest = np.maximum(windows.max - windows.median, windows.median - windows.min)
        return farthest / windows.spread

    z = standardized_extremes(summary)
    assert int(np.count_nonzero(z > gaussian_line)) > 100  # what the Gaussian line would report
    line = extremes_critical(z, 60.0, 1440.0)
    assert line > 3 * gaussian_line
    assert extreme_windows(summary) == []
    assert extreme_windows(summary, false_budget=0.5) == []
    gauss_summary = summarize_windows("s", stamps, gauss, "1min")
    assert extremes_critical(standardized_extremes(gauss_summary), 60.0, 1440.0) == pytest.approx(
        gaussian_line
    )
    # Too few windows to read a tail from: the Gaussian line.
    assert extremes_critical(z[:50], 60.0, 50.0) == pytest.approx(critical_value(50 * 60.0))
