"""An event, its series and a verdict in words, for the picture and the page."""

from __future__ import annotations

import math

from changekind.tasks.effects import EFFECTS, UNKNOWN
from changekind.tasks.report.views import Verdict
from changekind.tasks.types import EVENT_NAMES, Event, FittedModel, format_duration, number

__all__ = [
    "axis_label",
    "describe_event",
    "half_life_text",
    "shorten_middle",
    "type_name",
    "verdict_line",
]


def type_name(kind: str) -> str:
    """``level shift`` for ``LS``; an unknown type is named by its code."""
    return EVENT_NAMES.get(kind, kind)


def half_life_text(value: object) -> str:
    """A stored half-life in words: text as stored (``1.94 h``), or seconds as a duration."""
    if value is None:
        return "-"
    if isinstance(value, int | float):
        return format_duration(float(value)) if math.isfinite(value) else "-"
    return str(value)


def shorten_middle(text: str, width: int) -> str:
    """``text`` cut to ``width`` characters by an ellipsis in the middle (both ends kept)."""
    if len(text) <= width:
        return text
    keep = width - 1
    head = (keep + 1) // 2
    return f"{text[:head]}…{text[len(text) - (keep - head) :]}"


def axis_label(series_id: str, unit: str | None, *, width: int = 48) -> str:
    """The y-axis label: the series' name, and its unit in brackets when known."""
    suffix = f" [{unit}]" if unit else ""
    return shorten_middle(series_id, max(8, width - len(suffix))) + suffix


_SHAPE_LINES = {
    "TC": (
        lambda e: (
            f"decays by a factor {number(e.decay, '.3g')} a step, "
            f"half-life {half_life_text(e.half_life)}"
        ),
    ),
    "IO": (lambda e: "shock carried on by the model's own dynamics (psi weights)",),
}
"""What the shape of a type adds to its words."""


def verdict_line(verdict: Verdict | None) -> str:
    """``verdict dismissed: planned maintenance``, or ``no verdict yet``."""
    return f"verdict {verdict.words()}" if verdict else "no verdict yet"


def describe_event(event: Event, model: FittedModel | None = None) -> list[str]:
    """The event and its model in words, one short line per fact."""
    if event.effect_pct is not None and math.isfinite(event.effect_pct):
        pct = f" ({event.effect_pct:+.1f} % of the level {event.level:.4g} before it)"
    else:
        pct = " (level near zero: no percentage)"
    lines = [
        f"{type_name(event.event_type)} ({event.event_type}), {event.status}",
        f"at {event.event_time}",
        f"size {event.effect:+.4g} in the series' units{pct}",
        f"t = {event.t_stat:+.2f} (standard error {number(event.se, '.3g')})",
    ]
    lines += [line(event) for line in _SHAPE_LINES.get(event.event_type, ())]
    ranked = sorted(event.type_weights, key=lambda kv: -kv[1])
    lines.append("type weights " + ", ".join(f"{k} {w:.2f}" for k, w in ranked if w >= 0.005))
    lines.append(f"model {event.model}")
    if model is not None and model.spec() != event.model:
        lines.append(f"curve drawn with the series' current model {model.spec()}")
    if EFFECTS.get(event.event_type, UNKNOWN).needs_psi and model is None:
        lines.append("no stored model: the IO is drawn as its shock alone")
    return lines
