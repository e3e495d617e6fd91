"""The fitted effect of an event on its series, and how far it reaches.

The shapes are the engine's (:data:`changekind.tasks.effects.EFFECTS`):
a pulse for an AO, a step for an LS, a fading jump omega delta^k for a TC and
the shock carried through the model's psi weights for an IO.  A variance
change (windowed mode) is drawn as a step in the window spreads.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from changekind.tasks.arma import psi_weights
from changekind.tasks.effects import EFFECTS
from changekind.tasks.report.axis import event_tick, grid_offsets, grid_step, read_axis
from changekind.tasks.types import Event, FittedModel

__all__ = ["REACH_FLOOR", "effect_curve", "effect_reach", "unit_path"]

REACH_FLOOR = 0.05
"""An effect has faded once its path stays below this share of its largest value."""


def unit_path(event: Event, length: int, model: FittedModel | None = None) -> np.ndarray:
    """The path of a unit effect of the event's type over ``length`` points from the event.

    An IO needs the model's psi weights; without a model it is drawn as its
    shock alone (the psi weights of white noise, a pulse), which the picture's
    words say.  A variance change is drawn as its registry path, a step in the
    spreads.
    """
    effect = EFFECTS[event.event_type]
    psi = None
    if effect.needs_psi:
        psi = psi_weights(model, length) if model is not None else np.eye(1, length)[0]
    return effect.path(length, delta=event.decay, psi=psi)


def effect_reach(event: Event, model: FittedModel | None = None, *, horizon: int) -> int | None:
    """Steps after the event until its effect has faded, or None if it has not within ``horizon``.

    Parameters
    ----------
    event : Event
    model : FittedModel, optional
        For an IO, the model whose psi weights carry the shock.
    horizon : int
        Longest reach looked for, in grid steps.

    Returns
    -------
    int or None
        The last step ``k <= horizon`` at which ``|path_k|`` is at least
        :data:`REACH_FLOOR` times the path's largest value; None when the
        path is still that large at ``horizon`` (a step, or a fade slower than
        the horizon).  0 for an AO.
    """
    path = np.abs(unit_path(event, int(horizon) + 2, model))  # one step past the horizon
    peak = float(path.max()) if path.size else 0.0
    if not math.isfinite(peak) or peak == 0.0:
        return 0
    last = int(np.flatnonzero(path >= REACH_FLOOR * peak)[-1])
    return None if last > horizon else last


def effect_curve(
    event: Event,
    timestamps: Any,
    *,
    model: FittedModel | None = None,
    step_seconds: float | None = None,
) -> np.ndarray:
    """The fitted effect of ``event`` at each of ``timestamps``, in the series' units.

    Parameters
    ----------
    event : Event
    timestamps : array-like of shape (n,)
        Date-times (naive, aware or ISO text) or numbers, in any order.
    model : FittedModel, optional
        The series' model: its spacing places the event and, for an IO, its
        psi weights shape the effect.  Without one an IO is drawn as its shock
        alone (a pulse).
    step_seconds : float, optional
        Grid spacing; default the model's, else the median gap of ``timestamps``.

    Returns
    -------
    numpy.ndarray of shape (n,)
        ``effect * shape(k)`` for points ``k >= 0`` steps after the event, 0 before.
    """
    kind, ticks = read_axis(timestamps)
    at = event_tick(event, kind)
    step = float(step_seconds) if step_seconds else grid_step(ticks, kind, model)
    k = grid_offsets(ticks, at, kind, step)
    out = np.zeros(k.size)
    after = k >= 0
    if not after.any():
        return out
    shape = unit_path(event, int(k[after].max()) + 1, model)
    out[after] = event.effect * shape[k[after]]
    return out
