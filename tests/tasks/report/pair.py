"""An invented 5-minute series with a compensating pair of level shifts nine hours apart.

A queue-depth series of an invented message broker drops by 1.4 when a
consumer pool is doubled and comes back up by 1.4 nine hours later when the
extra pool is removed; a metrics-agent glitch (an AO) comes 62 hours
later.  The injected events are the truth the report tests check against.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from changekind.tasks import persist
from changekind.tasks.simulate import arma_filter
from changekind.tasks.types import Event, FittedModel

SERIES = "broker-3/queue-depth"
STEP_SECONDS = 300.0
N = 1200  # 100 hours
STAMPS = pd.date_range("2031-05-04", periods=N, freq="5min", tz="UTC")
T_DOWN, T_UP, T_GLITCH = 300, 300 + 108, 1150  # nine hours apart, then 62 hours later
LEVEL, SHIFT, GLITCH = 40.0, 1.4, 6.0


def pair_series(seed: int = 5) -> pd.DataFrame:
    """The long-form rows (series_id, timestamp, value) of the invented series."""
    rng = np.random.default_rng(seed)
    y = LEVEL + arma_filter(rng.normal(scale=0.3, size=N), ar=(0.5,))
    y[T_DOWN:] -= SHIFT
    y[T_UP:] += SHIFT
    y[T_GLITCH] += GLITCH
    return pd.DataFrame({"series_id": SERIES, "timestamp": STAMPS, "value": y})


def pair_model() -> FittedModel:
    return FittedModel(
        series_id=SERIES,
        order=(1, 0, 0),
        seasonal_order=(0, 0, 0, 0),
        trend="c",
        params=(("const", LEVEL), ("ar.L1", 0.5), ("sigma2", 0.09)),
        sigma2=0.09,
        nobs=N,
        method="given",
        converged=True,
        step_seconds=STEP_SECONDS,
    )


def pair_event(position: int, kind: str, effect: float, t_stat: float) -> Event:
    weights = {k: (0.85 if k == kind else 0.05) for k in ("AO", "LS", "TC", "IO")}
    return Event(
        series_id=SERIES,
        position=position,
        event_time=STAMPS[position].isoformat(),
        event_type=kind,
        effect=effect,
        effect_pct=100.0 * effect / LEVEL,
        t_stat=t_stat,
        se=abs(effect / t_stat),
        type_weights=tuple(weights.items()),
        status="confirmed",
        decay=None,
        half_life=None,
        level=LEVEL,
        model="ARIMA(1,0,0) mean=40 ar.L1=0.5 sigma=0.3",
    )


def pair_events() -> list[Event]:
    """The injected events as the engine would store them."""
    return [
        pair_event(T_DOWN, "LS", -SHIFT, -9.0),
        pair_event(T_UP, "LS", +SHIFT, 9.3),
        pair_event(T_GLITCH, "AO", GLITCH, 14.0),
    ]


def store_pair(db: str, folder: Path, *, reason: str = "metrics agent restart") -> Path:
    """Write the events and model to ``db`` through the persistence layer, dismiss the
    glitch with ``reason``, and the series as ``folder/series.csv``; returns that path."""
    persist.migrate(db)
    persist.write_batch(
        db,
        "run-1",
        events=pair_events(),
        models=[pair_model()],
        watermarks={SERIES: STAMPS[-1].isoformat()},
    )
    persist.set_triage(db, SERIES, STAMPS[T_GLITCH].isoformat(), "dismissed", reason)
    path = folder / "series.csv"
    pair_series().to_csv(path, index=False)
    return path
