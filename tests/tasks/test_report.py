"""The report's pictures and page: effect curves, figures, HTML, files.

References
----------
- Effect shapes are the definitions of Chen & Liu (1993), section 2 (and the
  table in changekind.tasks.detect): AO a pulse, LS a step, TC omega delta^k,
  IO omega psi_k.  Each curve is checked against a series into which the
  effect was injected by an independent computation (an explicit ARMA
  recursion for the IO); the injected truth is the reference.
- psi weights: statsmodels' ``arma2ma`` is the oracle.
- TC half-life: ln(0.5) / ln(delta), the closed form of delta^k = 1/2.
- PNG decoding and sizes: Pillow (a dependency of matplotlib) reads the files.
- HTML: the standard library's ``html.parser`` reads the page; every tag must
  close in order and every local link must name a file or id that exists.
"""

from __future__ import annotations

import io
import json
import math
from collections import Counter
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from PIL import Image
from statsmodels.tsa.arima_process import arma2ma

from changekind.tasks import persist
from changekind.tasks.detect import analyse_series
from changekind.tasks.errors import SeriesError
from changekind.tasks.report import (
    ADJUSTED_STYLE,
    OBSERVED_STYLE,
    TYPE_STYLES,
    EventView,
    describe_event,
    effect_curve,
    event_figure,
    event_from_record,
    render_report,
    series_group,
    shown_span,
    slice_window,
    summarize_events,
    window_bounds,
    write_report,
)
from changekind.tasks.types import EVENT_TYPES, REPORTED_TYPES, Event, FittedModel
from tests.flows.fleet import make_fleet

N, T_EVENT, PHI, THETA, OMEGA, DELTA = 240, 120, 0.6, 0.3, 7.5, 0.7
STAMPS = pd.date_range("2026-03-02", periods=N, freq="h")

VOID_TAGS = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "wbr"}


# --------------------------------------------------------------------------- helpers


class PageChecker(HTMLParser):
    """Reads a page; records nesting errors, ids, links, images and text."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.ids: set[str] = set()
        self.links: list[str] = []
        self.images: list[dict[str, str | None]] = []
        self.tags: Counter[str] = Counter()
        self.text: list[str] = []
        self.doctype = False

    def handle_decl(self, decl: str) -> None:
        self.doctype = self.doctype or decl.lower() == "doctype html"

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        values = dict(attrs)
        self.tags[tag] += 1
        if values.get("id"):
            if values["id"] in self.ids:
                self.errors.append(f"duplicate id {values['id']}")
            self.ids.add(values["id"])  # type: ignore[arg-type]
        if tag == "img":
            self.images.append(values)
        if tag == "a" and values.get("href"):
            self.links.append(values["href"])  # type: ignore[arg-type]
        if tag not in VOID_TAGS:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if tag in VOID_TAGS:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> does not close <{self.stack[-1] if self.stack else ''}>")
            return
        self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def check_page(index: Path) -> PageChecker:
    """Parse a report page and assert it is well formed with only existing local links."""
    page = PageChecker()
    page.feed(index.read_text(encoding="utf-8"))
    page.close()
    assert page.doctype, "the page has no <!DOCTYPE html>"
    assert page.errors == [] and page.stack == [], (page.errors, page.stack)
    for img in page.images:
        assert img.get("alt"), "every picture needs an alt text"
    for ref in [str(i["src"]) for i in page.images] + page.links:
        assert "://" not in ref and not ref.startswith("/"), f"not a relative link: {ref}"
        if ref.startswith("#"):
            assert ref[1:] in page.ids, f"link to a missing id {ref}"
        else:
            assert (index.parent / ref).is_file(), f"link to a missing file {ref}"
    return page


def png_size(data: bytes | Path) -> tuple[int, int]:
    raw = data.read_bytes() if isinstance(data, Path) else data
    with Image.open(io.BytesIO(raw)) as img:
        assert img.format == "PNG"
        img.load()  # decodes the whole image, not only the header
        return img.size


def model_arma(*, ma: float | None = None, d: int = 0) -> FittedModel:
    params = [("const", 20.0), ("ar.L1", PHI)]
    if ma is not None:
        params.append(("ma.L1", ma))
    params.append(("sigma2", 1.0))
    return FittedModel(
        series_id="rack-a/fan-1",
        order=(1, d, 1 if ma is not None else 0),
        seasonal_order=(0, 0, 0, 0),
        trend="c",
        params=tuple(params),
        sigma2=1.0,
        nobs=N,
        method="given",
        converged=True,
        step_seconds=3600.0,
    )


def make_event(kind: str, *, when: str | None = None, effect: float = OMEGA, **extra) -> Event:
    weights = {k: (0.7 if k == kind else 0.1) for k in EVENT_TYPES}
    fields = {
        "series_id": "rack-a/fan-1",
        "position": T_EVENT,
        "event_time": when or STAMPS[T_EVENT].isoformat(),
        "event_type": kind,
        "effect": effect,
        "effect_pct": 100.0 * effect / 20.0,
        "t_stat": 9.5,
        "se": effect / 9.5,
        "type_weights": tuple(weights.items()),
        "status": "confirmed",
        "decay": DELTA if kind == "TC" else None,
        "half_life": 6984.0 if kind == "TC" else None,
        "level": 20.0,
        "model": "ARIMA(1,0,1) mean=20 ar.L1=0.6 ma.L1=0.3 sigma=1",
    }
    fields.update(extra)
    return Event(**fields)


def clean_and_injected(kind: str, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """ARMA(1,1) + mean 20, and the same with an effect of OMEGA injected at T_EVENT.

    Built by the explicit recursion y_t = phi y_(t-1) + a_t + theta a_(t-1), so
    the IO (a shock added to a_T) does not go through any code of changekind.
    """
    rng = np.random.default_rng(seed)
    a = rng.normal(size=N)

    def arma(shocks: np.ndarray) -> np.ndarray:
        y = np.zeros(N)
        for t in range(N):
            y[t] = (
                (PHI * y[t - 1] if t else 0.0) + shocks[t] + (THETA * shocks[t - 1] if t else 0.0)
            )
        return y

    clean = 20.0 + arma(a)
    if kind == "IO":
        bumped = a.copy()
        bumped[T_EVENT] += OMEGA
        return clean, 20.0 + arma(bumped)
    k = np.arange(N) - T_EVENT
    if kind == "AO":
        path = np.where(k == 0, OMEGA, 0.0)
    elif kind == "LS":
        path = np.where(k >= 0, OMEGA, 0.0)
    else:
        path = np.where(k >= 0, OMEGA * DELTA ** np.maximum(k, 0), 0.0)
    return clean, clean + path


# --------------------------------------------------------------------------- effect curves


@pytest.mark.parametrize("kind", EVENT_TYPES)
def test_removing_the_effect_recovers_the_series_before_injection(kind):
    # Reference: the injected truth (Chen & Liu 1993 shapes; IO by explicit recursion).
    clean, observed = clean_and_injected(kind)
    model = model_arma(ma=THETA)
    event = make_event(kind)
    curve = effect_curve(event, STAMPS, model=model)
    assert_allclose(observed - curve, clean, atol=1e-9)
    assert np.all(curve[:T_EVENT] == 0.0)  # nothing before the event


def test_io_curve_is_the_shock_times_the_psi_weights():
    # Oracle: statsmodels arma2ma for ARMA(1,1) and for ARIMA(1,1,1) (AR side times (1 - B)).
    n_after = N - T_EVENT
    for d, ar in ((0, np.r_[1.0, -PHI]), (1, np.convolve([1.0, -PHI], [1.0, -1.0]))):
        curve = effect_curve(make_event("IO"), STAMPS, model=model_arma(ma=THETA, d=d))
        assert_allclose(
            curve[T_EVENT:], OMEGA * arma2ma(ar, np.r_[1.0, THETA], n_after), rtol=1e-10
        )


def test_effect_is_placed_by_time_with_gaps_shuffled_rows_and_time_zones():
    # Reference: the injected truth at the points that remain.
    clean, observed = clean_and_injected("TC")
    stamps = STAMPS.tz_localize("Europe/Paris")
    keep = np.setdiff1d(np.arange(N), [T_EVENT - 1, T_EVENT + 2, T_EVENT + 5])
    order = np.random.default_rng(0).permutation(keep)
    event = make_event("TC", when=stamps[T_EVENT].isoformat())  # '...+01:00'
    curve = effect_curve(event, pd.Series(stamps[order]), model=model_arma(ma=THETA))
    assert_allclose(observed[order] - curve, clean[order], atol=1e-9)
    # ISO text timestamps in UTC meet the same event time.
    as_text = [s.tz_convert("UTC").isoformat() for s in stamps[order]]
    assert_allclose(effect_curve(event, as_text, model=model_arma(ma=THETA)), curve, atol=0)


def test_numeric_grid_without_a_model_uses_the_data_spacing():
    # Reference: the injected truth; spacing 0.5 index units taken from the data.
    clean, observed = clean_and_injected("LS")
    grid = 100.0 + 0.5 * np.arange(N)
    event = make_event("LS", when=f"{grid[T_EVENT]:g}")
    assert_allclose(observed - effect_curve(event, grid), clean, atol=1e-9)
    # An IO without a model is drawn as its shock alone (documented fallback).
    io = effect_curve(make_event("IO", when=f"{grid[T_EVENT]:g}"), grid)
    assert np.count_nonzero(io) == 1 and io[T_EVENT] == OMEGA


def test_span_shows_a_tc_fading_out_twice_over():
    # Reference: delta^k falls below 5 % of its start after ln(0.05)/ln(delta) steps
    # (the closed form); twice that is shown on each side.
    slow = make_event("TC", decay=0.9)
    reach = math.floor(math.log(0.05) / math.log(0.9))  # 28 steps (0.9^28 = 0.052)
    span = shown_span(slow, step_seconds=3600.0)
    assert span.before == span.after == 2 * reach == 56
    start, end = window_bounds(slow, step_seconds=3600.0, time_kind="datetime")
    assert start == STAMPS[T_EVENT] - pd.Timedelta(hours=56)
    assert end == STAMPS[T_EVENT] + pd.Timedelta(hours=57)  # end is exclusive
    ts, vals = slice_window(slow, STAMPS, np.arange(N, dtype=float), model=model_arma())
    assert ts[0] == STAMPS[T_EVENT - 56] and ts[-1] == STAMPS[T_EVENT + 56] and len(vals) == 113


# --------------------------------------------------------------------------- figures


@pytest.mark.parametrize("kind", EVENT_TYPES)
def test_figure_of_each_type_is_a_readable_png(kind):
    clean, observed = clean_and_injected(kind)
    event = make_event(kind)
    ts, vals = slice_window(event, STAMPS, observed, model=model_arma(ma=THETA))
    fig = event_figure(event, ts, vals, model_arma(ma=THETA))
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    width, height = png_size(buf.getvalue())
    assert width >= 400 and height >= 250
    # The type's own fill colour is in the picture (its weight bar), and the
    # observed and effect-removed lines differ in style, not only in colour.
    rgb = np.asarray(Image.open(io.BytesIO(buf.getvalue())).convert("RGB")).reshape(-1, 3)
    fill = tuple(int(TYPE_STYLES[kind].colour[i : i + 2], 16) for i in (1, 3, 5))
    assert (rgb == fill).all(axis=1).sum() > 200
    removed_label = "with this event's effect removed"
    styles = {line.get_label(): line.get_linestyle() for line in fig.axes[0].get_lines()}
    assert styles["observed"] != styles[removed_label]
    # The drawn effect-removed line is the clean series (the injected truth).
    removed = next(line for line in fig.axes[0].get_lines() if line.get_label() == removed_label)
    lo = T_EVENT - shown_span(event, step_seconds=3600.0, model=model_arma(ma=THETA)).before
    assert_allclose(removed.get_ydata(), clean[lo : lo + len(vals)], atol=1e-9)


def test_figure_refuses_data_that_does_not_reach_the_event():
    event = make_event("AO")
    with pytest.raises(SeriesError, match="do not reach the event"):
        event_figure(event, STAMPS[:50], np.ones(50))
    with pytest.raises(SeriesError, match="no observations"):
        event_figure(event, STAMPS[:0], np.ones(0))


def test_styles_tell_types_apart_without_colour():
    assert set(TYPE_STYLES) == set(REPORTED_TYPES)  # the four and windowed mode's VC
    assert len({s.marker for s in TYPE_STYLES.values()}) == len(REPORTED_TYPES)
    assert len({s.hatch for s in TYPE_STYLES.values()}) == len(REPORTED_TYPES)
    assert len({s.colour for s in TYPE_STYLES.values()}) == len(REPORTED_TYPES)
    assert OBSERVED_STYLE["linestyle"] != ADJUSTED_STYLE["linestyle"]


def test_a_few_points_over_days_draw_without_a_locator_warning():
    # Three points over five days made matplotlib's AutoDateLocator(maxticks=8)
    # warn (found drawing the demo report); pytest turns warnings into errors.
    stamps = pd.date_range("2031-03-01", periods=3, freq="40h")
    event = make_event("AO", when=stamps[1].isoformat(), position=1)
    fig = event_figure(event, stamps, np.array([20.0, 27.5, 20.5]))
    assert min(png_size(_png(fig))) >= 250


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def test_words_give_type_time_size_t_and_half_life():
    event = make_event("TC")
    text = " ".join(describe_event(event))
    for part in ("temporary change (TC)", event.event_time, "+7.5", "+37.5 %", "t = +9.50"):
        assert part in text
    assert "half-life 1.94 h" in text and "factor 0.7" in text


# --------------------------------------------------------------------------- summary and page


def test_summary_counts_by_type_and_group_and_orders_by_strength():
    events = [
        make_event("AO", series_id="rack-a/fan-1", t_stat=-12.0),
        make_event("LS", series_id="rack-a/fan-2", t_stat=5.0, status="provisional"),
        make_event("LS", series_id="rack-b/psu", t_stat=30.0),
        make_event("IO", series_id="lonely", t_stat=4.0),
    ]
    summary = summarize_events(events, sort="t")
    # Reference: the same counts by collections.Counter over the input.
    by_type = Counter(e.event_type for e in events)
    assert {k: total for k, _, _, total in summary.by_type} == {
        k: by_type.get(k, 0) for k in REPORTED_TYPES
    }
    assert dict((k, p) for k, _, p, _ in summary.by_type)["LS"] == 1
    groups = Counter(series_group(e.series_id) for e in events)
    assert {g: total for g, _, total in summary.by_group} == dict(groups)
    assert [abs(events[i].t_stat) for i in summary.order] == sorted(
        (abs(e.t_stat) for e in events), reverse=True
    )
    assert series_group("lonely") == "lonely" and series_group("a/b/c") == "a"


def test_page_escapes_every_text(tmp_path):
    nasty = 'rack-<b>&"x"/fan'
    event = make_event("AO", series_id=nasty, model="ARIMA(1,0,0) <script>alert(1)</script>")
    summary = summarize_events([event])
    html_text = render_report([event], {}, summary, title="<i>title</i>", facts=[("<u>", "&")])
    index = tmp_path / "index.html"
    index.write_text(html_text, encoding="utf-8")
    page = check_page(index)
    for tag in ("b", "script", "i", "u"):
        assert page.tags[tag] == 0, f"<{tag}> came through unescaped"
    text = "".join(page.text)
    assert nasty in text and "<script>alert(1)</script>" in text and "<i>title</i>" in text


def test_write_report_links_only_pictures_it_wrote(tmp_path):
    out = tmp_path / "report"
    out.mkdir()
    (out / "event-0009-stale.png").write_bytes(b"not a picture")
    (out / "keep-me.txt").write_text("mine")
    views = []
    for i, kind in enumerate(EVENT_TYPES):
        _, observed = clean_and_injected(kind, seed=10 + i)
        event = make_event(kind, series_id=f"rack-{i}/fan", t_stat=5.0 + i)
        views.append(EventView(event, STAMPS, observed, model_arma(ma=THETA)))
    gone = make_event("LS", series_id="rack-z/gone", t_stat=4.0)
    views.append(EventView(gone, note="the source holds no observations of 'rack-z/gone'"))
    index = write_report(out, views, facts=[("database", "sqlite:///x.db")], sort="t")
    page = check_page(index)
    pictures = sorted(p.name for p in out.glob("event-*.png"))
    assert len(pictures) == 4 and "event-0009-stale.png" not in pictures
    assert (out / "keep-me.txt").read_text() == "mine"
    assert sorted({str(i["src"]) for i in page.images}) == pictures
    for name in pictures:
        assert min(png_size(out / name)) >= 250
    text = " ".join(page.text)
    assert "No picture: the source holds no observations of 'rack-z/gone'" in text
    # Strongest first: IO (t = 8) is picture 1.
    assert pictures[0].startswith("event-0001-rack-3-fan")


def test_report_from_a_database_of_engine_events(tmp_path, sqlite_url):
    # A database written by the persistence layer from real engine results (no
    # Prefect run); the report must show every stored event with its picture.
    data, truth = make_fleet(6)
    persist.migrate(sqlite_url)
    events, models = [], []
    frames = dict(tuple(data.groupby("series_id")))
    for sid, frame in frames.items():
        if sid == "shelf-x/stuck":
            continue
        result = analyse_series(sid, frame["timestamp"], frame["value"])
        events.extend(result.events)
        models.append(result.model)
    persist.write_batch(sqlite_url, "run-1", events=events, models=models)
    stored = persist.read_events(sqlite_url)
    back = [event_from_record(r) for r in stored.to_dict(orient="records")]
    # Round trip: the stored events are the engine's (reference: the input).
    originals = {(e.series_id, e.event_time): e.to_record() for e in events}
    for e in back:
        record = e.to_record()
        assert record == json.loads(json.dumps(originals[(e.series_id, e.event_time)]))
    stored_models = persist.load_models(sqlite_url)
    views = []
    for e in back:
        frame = frames[e.series_id]
        model = stored_models[e.series_id]
        ts, vals = slice_window(e, frame["timestamp"], frame["value"], model=model)
        views.append(EventView(e, ts, vals, model))
    index = write_report(tmp_path / "out", views)
    page = check_page(index)
    assert len(back) >= len(truth) - 1 and len(page.images) == len(back)
    for e in back:
        assert any(
            e.series_id in str(i["alt"]) and e.event_time in str(i["alt"]) for i in page.images
        )
