"""The effect types as objects: one registry, one home for each shape.

An effect of size omega at time T enters the series through an input filter
xi(B) (Box and Tiao 1975); the ARIMA model's pi(B) = phi(B) alpha(B) / theta(B)
turns it into a pattern in the residuals e = pi(B) y (Chen and Liu 1993):

======  =====================  ==============================  ==========================
type    pulse response xi(B)   in the series                   in the residuals
======  =====================  ==============================  ==========================
AO      1                      omega at T only                 omega pi(B) I_T
LS      1 / (1 - B)            omega from T on                 omega pi(B) / (1 - B) I_T
TC      1 / (1 - delta B)      omega delta^(t-T) from T on     omega pi(B) / (1 - delta B) I_T
IO      psi(B) = 1 / pi(B)     omega psi_(t-T) from T on       omega I_T
VC      (windowed mode)        a step in the window spreads    (not a residual pattern)
======  =====================  ==============================  ==========================

Every step that needs a shape (the search, the joint regression, the warm
screen, the windowed mode, the report's curves) asks :data:`EFFECTS`; none
re-derives it from the type's name.

References
----------
Box, G. E. P. and Tiao, G. C. (1975). Intervention analysis with applications
to economic and environmental problems. JASA 70(349), 70-79.
Chen, C. and Liu, L.-M. (1993). Joint estimation of model parameters and
outlier effects in time series. JASA 88(421), 284-297.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

TC_DECAY = 0.7
"""Decay of a temporary change when none was estimated (Chen and Liu 1993 use
0.7; the engine estimates it per event and falls back to this value only for a
stored event without one)."""


def _decay(delta: float | None) -> float:
    return TC_DECAY if delta is None else float(delta)


def _tc_residual(pi: np.ndarray, delta: float | None) -> np.ndarray:
    """pi(B) / (1 - delta B): a temporary change's pattern in the residuals."""
    from scipy.signal import lfilter  # here: start-up of commands that filter nothing

    return lfilter([1.0], [1.0, -_decay(delta)], pi)


def _pulse(length: int) -> np.ndarray:
    out = np.zeros(length)
    if length:
        out[0] = 1.0
    return out


def _io_path(length: int, delta: float | None, psi: np.ndarray | None) -> np.ndarray:
    if psi is None:
        raise ValueError("an IO's path needs the model's psi weights")
    return np.asarray(psi[:length], dtype=float)


@dataclass(frozen=True, slots=True)
class Effect:
    """One effect type: its name and shapes.

    ``path(length, delta, psi)`` is the series-space path of a unit effect over
    ``length`` points from its time; ``pattern(pi, delta)`` is its residual-space
    signature (lag 0 first) under a model with pi weights ``pi``.
    ``decays`` says whether the type carries a decay rate (TC); ``lasting``
    whether it leaves the series somewhere else for good (a cached model then
    describes a series that is no longer there); ``pulse_like`` whether it is a
    one-time shock (AO, IO); ``needs_psi`` whether its path is the model's psi
    weights (IO); ``single_point`` whether it touches one point only (AO: an
    extreme window is one, a pulse before the series start is gone);
    ``clipped`` whether, spread over many points, it is tested on clipped
    residuals with the spread critical value when the tails are heavy (LS,
    TC); ``in_spread`` whether it lives in the window spreads, not the series
    (VC, windowed mode only); ``spread_twin`` the type this one is reported as
    when found in the window spreads (an LS of the log spread is a VC).
    """

    kind: str
    name: str
    path_fn: Callable[[int, float | None, np.ndarray | None], np.ndarray]
    pattern_fn: Callable[[np.ndarray, float | None], np.ndarray] | None
    decays: bool = False
    lasting: bool = False
    pulse_like: bool = False
    needs_psi: bool = False
    single_point: bool = False
    clipped: bool = False
    in_spread: bool = False
    spread_twin: str | None = None

    def path(
        self, length: int, *, delta: float | None = None, psi: np.ndarray | None = None
    ) -> np.ndarray:
        """Series-space path of a unit effect over ``length`` points from its time."""
        return self.path_fn(int(length), delta, psi)

    def pattern(self, pi: np.ndarray, *, delta: float | None = None) -> np.ndarray:
        """Residual-space signature of a unit effect (same length as ``pi``)."""
        if self.pattern_fn is None:
            raise ValueError(f"a {self.kind} has no residual pattern")
        return self.pattern_fn(np.asarray(pi, dtype=float), delta)


EFFECTS: dict[str, Effect] = {
    "AO": Effect(
        "AO",
        "additive outlier",
        lambda n, d, psi: _pulse(n),
        lambda pi, d: pi,
        pulse_like=True,
        single_point=True,
    ),
    "LS": Effect(
        "LS",
        "level shift",
        lambda n, d, psi: np.ones(n),
        lambda pi, d: np.cumsum(pi),
        lasting=True,
        clipped=True,
        spread_twin="VC",
    ),
    "TC": Effect(
        "TC",
        "temporary change",
        lambda n, d, psi: _decay(d) ** np.arange(n),
        _tc_residual,
        decays=True,
        clipped=True,
    ),
    "IO": Effect(
        "IO",
        "innovational outlier",
        _io_path,
        lambda pi, d: _pulse(pi.size),
        pulse_like=True,
        needs_psi=True,
    ),
    "VC": Effect(
        "VC",
        "variance change",
        lambda n, d, psi: np.ones(n),  # drawn as a step in the window spreads
        None,
        lasting=True,
        in_spread=True,
    ),
}
"""Every effect type by its code."""

UNKNOWN = Effect("?", "unknown type", lambda n, d, psi: np.zeros(n), None)
"""Stands in for a type the registry does not know (a stored event of a newer
version): every flag False, so a step asking about one treats it as plain."""

SEARCHED: tuple[str, ...] = ("AO", "LS", "TC", "IO")
"""The types the residual search estimates at every time point."""
