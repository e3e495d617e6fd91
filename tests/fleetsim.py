"""Clean invented fleets scanned cold then hourly through the fleet's own code path.

Shared by the false-alarm budget tests (tests/flows/test_false_budget.py) and
the benchmark (tests/benchmarks/bench_budget.py).  Each run plans its works
with the flows' ``plan_works`` and runs them with ``run_batch`` on a Parquet
file, as ``scan`` does; the database is replaced by dictionaries that take
the outcomes as the flow's writes do (models, watermarks, events by time,
retracted provisional events removed).  Nothing is stored but what a run
would store.

The fleet (:func:`changekind.tasks.simulate.ar1_fleet`): AR(1) minute series (phi 0.6)
around a level of 50 with Gaussian
innovations or Student-t(3) innovations scaled to unit variance (t_3 / sqrt(3)),
the heavy tails of latency metrics; ``shifts`` adds one level shift of a given
size (in innovation sigma, the engine's noise sigma) to some series at a
known time inside the scanned hours.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from changekind.flows.pipeline import plan_works
from changekind.tasks.batch import AnalysisOptions, run_batch
from changekind.tasks.fetch import open_source
from changekind.tasks.simulate import AR1_FLEET_START, AR1_FLEET_STEP, ar1_fleet, probe_id
from changekind.tasks.types import Event

START = AR1_FLEET_START
STEP = AR1_FLEET_STEP


def simulate_fleet(
    n_series: int,
    *,
    history: int,
    scans: int,
    per_scan: int = 60,
    heavy: Sequence[bool] | None = None,
    shifts: dict[int, tuple[int, float]] | None = None,
    rng: np.random.Generator,
) -> pd.DataFrame:
    """Long frame (series_id, timestamp, value): ``history`` points then ``scans`` hours
    (:func:`changekind.tasks.simulate.ar1_fleet`)."""
    n = history + scans * per_scan
    return ar1_fleet(n_series, n=n, heavy=heavy, shifts=shifts, rng=rng).data


sid = probe_id


@dataclass
class FleetRun:
    """What the scans wrote, and what they cost."""

    events: dict[str, dict[str, Event]] = field(default_factory=dict)
    ever: set[tuple[str, str]] = field(default_factory=set)  # every (series, time) written
    scan_seconds: list[float] = field(default_factory=list)
    points_tested: int = 0
    modes: dict[str, int] = field(default_factory=dict)

    def confirmed(self) -> list[tuple[str, Event]]:
        pairs = ((s, e) for s, evs in self.events.items() for e in evs.values())
        return [(s, e) for s, e in pairs if e.status == "confirmed"]


def scan_fleet(
    path: str,
    series_ids: Sequence[str],
    *,
    history: int,
    scans: int,
    options: AnalysisOptions,
    per_scan: int = 60,
) -> FleetRun:
    """One cold run on ``history`` points, then ``scans`` hourly warm runs.

    Each run reads the source up to its end (exclusive), as ``scan --until``.
    """
    spec = open_source(path)
    run = FleetRun()
    models: dict = {}
    marks: dict[str, str] = {}
    for k in range(scans + 1):
        end = START + STEP * (history + k * per_scan)
        known = {s: tuple(evs.values()) for s, evs in run.events.items()}
        works = plan_works(
            list(series_ids),
            models=models,
            watermarks=marks,
            known=known,
            options=options,
            time_kind="datetime",
            end=end,
        )
        t0 = time.perf_counter()
        outcome = run_batch(spec, works, options)
        if k > 0:
            run.scan_seconds.append(time.perf_counter() - t0)
        for out in outcome.outcomes:
            run.modes[out.mode] = run.modes.get(out.mode, 0) + 1
            assert out.failure is None, (out.series_id, out.failure)
            if out.model is not None:
                models[out.series_id] = out.model
            if out.watermark is not None:
                marks[out.series_id] = out.watermark
            run.points_tested += out.points
            stored = run.events.setdefault(out.series_id, {})
            for t in out.retract:
                stored.pop(t, None)
            for e in out.events:
                stored[e.event_time] = e
                run.ever.add((out.series_id, e.event_time))
    return run


def write_fleet(frame: pd.DataFrame, path) -> str:
    frame.to_parquet(path, index=False)
    return str(path)
