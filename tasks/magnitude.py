"""Effects that matter: the smallest effect a run writes, and how long an effect lasts.

An event clears the critical value because it is unlikely under the noise; it
matters only if it is large enough to act on.  :class:`MinEffect` is the
operator's floor, in one of three units: per cent of the local level
(``"5%"``), noise sigma (``"2sigma"``) or the series' own units (``"3.5"``).
An event whose |effect| is below it is not written at all (the fleet runs
filter before anything is stored, so the revision log never mentions it).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Literal

from changekind.tasks.types import Event

Unit = Literal["pct", "sigma", "units"]

_TEXT = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*(%|sigma|σ|s\.?d\.?)?\s*$")
_SUFFIX = {
    None: "units",
    "%": "pct",
    "sigma": "sigma",
    "σ": "sigma",
    "sd": "sigma",
    "s.d.": "sigma",
    "s.d": "sigma",
    "sd.": "sigma",
}


@dataclass(frozen=True, slots=True)
class MinEffect:
    """The smallest |effect| an event needs to be written.

    Attributes
    ----------
    value : float
        Non-negative threshold.
    unit : {"pct", "sigma", "units"}
        Per cent of the local level (``Event.effect_pct``), noise sigma
        (``Event.effect_sigma``) or series units (``Event.effect``).
    """

    value: float
    unit: Unit

    def passes(self, event: Event) -> bool:
        """True when the event's |effect| in this unit reaches the floor.

        An event without a measure in this unit (no percentage where the local
        level is near zero, no sigma) passes: it cannot be judged small.
        """
        size = {"pct": event.effect_pct, "sigma": event.effect_sigma, "units": event.effect}[
            self.unit
        ]
        if size is None or not math.isfinite(size):
            return True
        return abs(size) >= self.value

    @property
    def text(self) -> str:
        """Canonical text, parsed back by :func:`parse_min_effect`."""
        suffix = {"pct": "%", "sigma": "sigma", "units": ""}[self.unit]
        return f"{self.value:g}{suffix}"


def parse_min_effect(text: str | None) -> MinEffect | None:
    """``"5%"``, ``"2sigma"`` (or ``"2σ"``, ``"2sd"``) or ``"3.5"`` (series units).

    Raises ValueError naming the accepted forms; None and ``""`` give None.
    """
    if text is None or str(text).strip() == "":
        return None
    match = _TEXT.match(str(text).lower())
    if match is None:
        raise ValueError(
            f"minimum effect {text!r} is not understood; give a non-negative number with "
            "'%' for per cent of the level (5%), 'sigma' for noise sigma (2sigma), or no "
            "suffix for the series' own units (3.5)"
        )
    value = float(match.group(1))
    suffix = match.group(2)
    if suffix is not None:
        suffix = suffix.replace(" ", "")
    return MinEffect(value=value, unit=_SUFFIX[suffix])  # type: ignore[arg-type]


def keep_effects(events, floor: MinEffect | None) -> tuple[Event, ...]:
    """The events whose effect reaches ``floor`` (all of them without one)."""
    if floor is None:
        return tuple(events)
    return tuple(e for e in events if floor.passes(e))
