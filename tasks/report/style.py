"""The report's look: one colour, marker and hatch per event type, line styles, page colours.

Every colour the pictures and the page use is named here, and every pair of
text and background colour is listed in :data:`TEXT_PAIRS`, which
``tests/tasks/report/test_style.py`` checks against the WCAG 2.x contrast
ratio for text (at least 4.5:1).  The type fills are dark enough for white
text on a badge and for lines and bars on white paper; types are told apart by
marker and hatch as well as by colour, and the two series lines by line style,
so that a grayscale print or a reader who does not see every hue can still
tell them apart.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = [
    "ADJUSTED_STYLE",
    "FALLBACK_STYLE",
    "FIGURE_DPI",
    "FIGURE_SIZE",
    "GRID_COLOUR",
    "INK",
    "MUTED_INK",
    "OBSERVED_STYLE",
    "PAGE_COLOURS",
    "PAPER",
    "RULE_COLOUR",
    "TEXT_PAIRS",
    "TYPE_STYLES",
    "VERDICT_COLOURS",
    "TypeStyle",
    "style_of",
]


@dataclass(frozen=True, slots=True)
class TypeStyle:
    """How one event type is drawn: fill colour, the text colour on that fill, marker, hatch."""

    colour: str
    text: str
    marker: str
    hatch: str


FIGURE_SIZE = (12.5, 7.2)
"""Picture size in inches; at :data:`FIGURE_DPI` a picture is 1250 x 720 pixels."""

FIGURE_DPI = 100

INK = "#1f1f1f"
"""Text and the observed series: near-black (16.5:1 on white)."""
MUTED_INK = "#595959"
"""Secondary text (notes, a dismissed verdict): 7.0:1 on white."""
PAPER = "#ffffff"
GRID_COLOUR = "#d9d9d9"
"""Grid lines: decoration only, no text is drawn in it."""
RULE_COLOUR = "#8c8c8c"
"""Table borders and the zero line of the effect panel (3.4:1 on white, for lines only)."""

TYPE_STYLES: dict[str, TypeStyle] = {
    "AO": TypeStyle("#a34700", PAPER, "o", "//"),
    "LS": TypeStyle("#2d5f9a", PAPER, "s", ".."),
    "TC": TypeStyle("#2b7348", PAPER, "^", "xx"),
    "IO": TypeStyle("#7a3e94", PAPER, "D", "\\\\"),
    "VC": TypeStyle("#8c2d5a", PAPER, "v", "--"),
}
"""One fill, marker and hatch per type, in every figure and on the page (white text on each)."""

FALLBACK_STYLE = TypeStyle("#595959", PAPER, "o", "")
"""For a type the report does not know (a newer database): gray, white text."""

OBSERVED_STYLE: dict[str, Any] = {
    "color": INK,
    "linestyle": "-",
    "linewidth": 1.1,
    "marker": ".",
    "markersize": 3.5,
}
ADJUSTED_STYLE: dict[str, Any] = {
    "color": "#0f6e74",
    "linestyle": "--",
    "linewidth": 1.4,
}

VERDICT_COLOURS: dict[str, str] = {
    "acknowledged": "#2d5f9a",
    "explained": "#2b7348",
    "dismissed": MUTED_INK,
    "none": INK,
}
"""Text colour of each triage verdict on the page (on white; ``none``: no verdict yet)."""

PAGE_COLOURS: dict[str, str] = {
    "ink": INK,
    "muted": MUTED_INK,
    "paper": PAPER,
    "rule": RULE_COLOUR,
    "grid": GRID_COLOUR,
    "header": "#ececec",
    "link": "#0b57a4",
    "dismissed_row": "#f4f4f4",
}
"""The page's own colours, handed to the stylesheet template by name."""

TEXT_PAIRS: tuple[tuple[str, str, str], ...] = (
    *((f"{kind} badge", s.text, s.colour) for kind, s in TYPE_STYLES.items()),
    ("unknown-type badge", FALLBACK_STYLE.text, FALLBACK_STYLE.colour),
    ("text", INK, PAPER),
    ("table header", INK, PAGE_COLOURS["header"]),
    ("muted text", MUTED_INK, PAPER),
    ("link", PAGE_COLOURS["link"], PAPER),
    *((f"{state} verdict", colour, PAPER) for state, colour in VERDICT_COLOURS.items()),
    *(
        (f"{state} verdict, dismissed row", colour, PAGE_COLOURS["dismissed_row"])
        for state, colour in VERDICT_COLOURS.items()
    ),
    ("text, dismissed row", INK, PAGE_COLOURS["dismissed_row"]),
    *((f"{kind} text in a picture", s.colour, PAPER) for kind, s in TYPE_STYLES.items()),
)
"""Every (what, text colour, background colour) the report draws text with."""


def style_of(kind: str) -> TypeStyle:
    """The style of an event type (:data:`FALLBACK_STYLE` for one the report does not know)."""
    return TYPE_STYLES.get(kind, FALLBACK_STYLE)
