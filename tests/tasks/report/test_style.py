"""Colour contrast of every text the report draws, on the page and in the pictures.

References
----------
- WCAG 2.x (2.1 and 2.2 alike), Definitions, "relative luminance":
  L = 0.2126 R + 0.7152 G + 0.0722 B, each sRGB channel c (0..1) linearised as
  c / 12.92 when c <= 0.04045, else ((c + 0.055) / 1.055) ** 2.4 (WCAG 2.0
  printed the threshold as 0.03928; no 8-bit value lies between the two), and
  "contrast ratio": (L1 + 0.05) / (L2 + 0.05) with L1 the lighter colour.
- WCAG 2.x Success Criterion 1.4.3 Contrast (Minimum): text at least 4.5:1.
- WCAG 2.1 Success Criterion 1.4.11 Non-text Contrast: graphical objects that
  carry meaning at least 3:1 against adjacent colours.
- matplotlib (the renderer) turns colour specifications into RGB
  (``matplotlib.colors.to_rgb``) and lays the figure out; the check reads its
  text artists after drawing.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import to_rgb
from matplotlib.text import Text

from changekind.tasks.report import event_figure, render_report, summarize_events
from changekind.tasks.report.style import (
    ADJUSTED_STYLE,
    OBSERVED_STYLE,
    PAGE_COLOURS,
    PAPER,
    TEXT_PAIRS,
    TYPE_STYLES,
)
from changekind.tasks.report.views import Verdict
from changekind.tasks.types import REPORTED_TYPES, Event

WCAG_TEXT = 4.5
WCAG_GRAPHICS = 3.0


def relative_luminance(colour: str) -> float:
    """WCAG 2.x relative luminance of an sRGB colour (the definition quoted above)."""

    def linear(c: float) -> float:
        return c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = (linear(c) for c in to_rgb(colour))
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def contrast(a: str, b: str) -> float:
    """WCAG 2.x contrast ratio (L1 + 0.05) / (L2 + 0.05), L1 the lighter."""
    la, lb = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def test_the_formula_gives_the_definitions_end_points_and_a_known_value():
    # The definition's extremes: black on white is 21:1, a colour on itself 1:1.
    assert contrast("#000000", "#ffffff") == pytest.approx(21.0, rel=1e-12)
    assert contrast("#2d5f9a", "#2d5f9a") == pytest.approx(1.0, rel=1e-12)
    # #767676 on white is the darkest-needed gray often quoted as just passing
    # 4.5:1 (about 4.54:1; from memory).
    assert contrast("#767676", "#ffffff") == pytest.approx(4.54, abs=0.01)
    # The old VC badge, black on #b23a48, was the one the operators could not read
    # (about 3.6:1): the check must reject it.
    assert contrast("#000000", "#b23a48") == pytest.approx(3.59, abs=0.01)
    assert contrast("#000000", "#b23a48") < WCAG_TEXT


@pytest.mark.parametrize(("what", "text", "background"), TEXT_PAIRS)
def test_every_text_colour_pair_meets_4_5_to_1(what, text, background):
    assert contrast(text, background) >= WCAG_TEXT, what


def test_every_type_has_a_badge_pair_and_meaningful_graphics_meet_3_to_1():
    assert set(TYPE_STYLES) == set(REPORTED_TYPES)
    badges = {what for what, _, _ in TEXT_PAIRS if what.endswith(" badge")}
    assert {f"{kind} badge" for kind in REPORTED_TYPES} <= badges
    lines = [s.colour for s in TYPE_STYLES.values()]
    lines += [OBSERVED_STYLE["color"], ADJUSTED_STYLE["color"], PAGE_COLOURS["rule"]]
    for colour in lines:
        assert contrast(colour, PAPER) >= WCAG_GRAPHICS, colour


def _event(kind: str, **extra) -> Event:
    fields = {
        "series_id": "pod-<7>/queue",
        "position": -1,
        "event_time": "2031-05-04T12:00:00+00:00",
        "event_type": kind,
        "effect": 4.0,
        "effect_pct": 20.0,
        "t_stat": 6.0,
        "se": 0.7,
        "type_weights": (("AO", 0.05), ("LS", 0.05), ("TC", 0.1), ("IO", 0.8)),
        "status": "confirmed",
        "decay": 0.6 if kind == "TC" else None,
        "half_life": None,
        "level": 20.0,
        "model": "ARIMA(1,0,0) mean=20 ar.L1=0.5 sigma=1",
    }
    fields.update(extra)
    return Event(**fields)


def _rules(css: str) -> list[tuple[str, dict[str, str]]]:
    rules = []
    for selector, body in re.findall(r"([^{}]+)\{([^{}]*)\}", css):
        decls = dict(
            (name.strip(), value.strip())
            for name, _, value in (d.partition(":") for d in body.split(";"))
            if value.strip()
        )
        rules.append((selector.strip(), decls))
    return rules


def test_the_page_uses_only_checked_colours_and_every_text_rule_meets_4_5_to_1():
    # The rendered page, not the palette: every colour in it must be one of the
    # style's, and every rule that colours text must read on each background a
    # text can sit on (page, table header, dismissed row), or on its own background.
    events = [_event(kind, series_id=f"s{i}") for i, kind in enumerate(REPORTED_TYPES)]
    events.append(_event("XX", series_id="newer"))  # a type this report does not know
    verdicts = {
        (events[0].series_id, events[0].event_time): Verdict("dismissed", "test load"),
        (events[1].series_id, events[1].event_time): Verdict("explained", "rollout"),
        (events[2].series_id, events[2].event_time): Verdict("acknowledged"),
    }
    summary = summarize_events(events, verdicts=verdicts)
    page = render_report(events, {}, summary, verdicts=verdicts)
    css = page[page.index("<style>") + 7 : page.index("</style>")]
    used = {c.lower() for c in re.findall(r"#[0-9a-fA-F]{6}\b", page)}
    allowed = {c.lower() for _, a, b in TEXT_PAIRS for c in (a, b)}
    allowed |= {c.lower() for c in PAGE_COLOURS.values()}
    assert used <= allowed, used - allowed
    cell_backgrounds = [PAGE_COLOURS[k] for k in ("paper", "header", "dismissed_row")]
    checked = 0
    for selector, decls in _rules(css):
        if "color" not in decls:
            continue
        own = decls.get("background")
        for background in [own] if own else cell_backgrounds:
            ratio = contrast(decls["color"], background)
            assert ratio >= WCAG_TEXT, (selector, decls["color"], background, ratio)
            checked += 1
    # Badges of all five types, the unknown type, the verdicts, links, headers, body.
    assert checked >= len(REPORTED_TYPES) + 1 + 4 + 3
    for kind in REPORTED_TYPES:
        assert f'class="badge badge-{kind}"' in page
    assert 'class="badge badge-other"' in page


def _text_background(text: Text, figure_colour: str) -> str:
    patch = text.get_bbox_patch()
    if patch is not None and patch.get_facecolor()[3] > 0:
        return patch.get_facecolor()
    return figure_colour


@pytest.mark.parametrize("kind", REPORTED_TYPES)
def test_every_text_in_a_picture_meets_4_5_to_1(kind):
    stamps = pd.date_range("2031-05-04", periods=97, freq="5min", tz="UTC")
    event = _event(kind, event_time=stamps[48].isoformat())
    values = 20.0 + np.sin(np.arange(97)) + np.where(np.arange(97) >= 48, 4.0, 0.0)
    fig = event_figure(event, stamps, values, verdict=Verdict("dismissed", "load test"), unit="ms")
    FigureCanvasAgg(fig).draw()  # the PNG canvas; lays out, so every text is as drawn
    paper = fig.get_facecolor()
    found = list(fig.findobj(Text))
    for ax in fig.axes:  # tick labels are not among findobj's children
        found += ax.get_xticklabels() + ax.get_yticklabels()
    texts = [
        t
        for t in {id(t): t for t in found}.values()
        if t.get_visible() and t.get_text().strip() and t.get_window_extent().width > 0
    ]
    assert len(texts) > 30  # titles, labels, ticks, facts, weights
    for t in texts:
        background = _text_background(t, paper)
        ratio = contrast(t.get_color(), background)
        assert ratio >= WCAG_TEXT, (t.get_text(), t.get_color(), background, ratio)
