"""Per-series wall time of the engine: cold detection and warm screening.

Run:  python -m tests.benchmarks.bench_detect [--reps 5]

Prints, for hourly AR(1) series of 168, 720 and 2,880 points with one level
shift and one spike: the median wall time of a cold ``analyse_series`` (order
selection, estimation, detection, final joint estimate), its split by stage
from cProfile, and the median time of ``screen_new_points`` testing 60 new
points against the cached model.  Figures only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import statistics
import time

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from changekind.tasks.decompose import regularize
from changekind.tasks.detect import analyse_series, screen_new_points

STAGES = {
    "order selection + tests": ("select_orders", "choose_d", "_outlying"),
    "ML estimation (statsmodels)": ("estimate",),
    "Kalman residuals": ("innovations",),
    "search + joint regression": ("_inner_loop", "_joint"),
    "type weights": ("_support", "_weights_at"),
}


def make_series(rng: np.random.Generator, n: int) -> tuple[pd.DatetimeIndex, np.ndarray]:
    y = lfilter([1.0], [1.0, -0.6], rng.normal(size=n + 60)) + 40
    y[int(0.6 * n) :] += 4.0
    y[int(0.3 * n)] += 6.0
    return pd.date_range("2026-01-01", periods=n + 60, freq="h"), y


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=5)
    args = parser.parse_args()
    rng = np.random.default_rng(2026)
    print("| n | cold median (s) | cold min (s) | warm 60 new points median (ms) | events |")
    print("|---|---|---|---|---|")
    profiles = {}
    for n in (168, 720, 2880):
        cold, warm, counts = [], [], []
        for _ in range(args.reps):
            stamps, y = make_series(rng, n)
            t0 = time.perf_counter()
            result = analyse_series("bench", stamps[:n], y[:n])
            cold.append(time.perf_counter() - t0)
            counts.append(len(result.events))
            context = regularize("bench", stamps[n - 240 :], y[n - 240 :])
            t0 = time.perf_counter()
            screen_new_points(result.model, context, 60, known=result.events)
            warm.append(time.perf_counter() - t0)
        print(
            f"| {n} | {statistics.median(cold):.3f} | {min(cold):.3f} | "
            f"{1000 * statistics.median(warm):.1f} | {statistics.median(counts):.0f} |"
        )
        stamps, y = make_series(rng, n)
        prof = cProfile.Profile()
        prof.enable()
        analyse_series("bench", stamps[:n], y[:n])
        prof.disable()
        profiles[n] = pstats.Stats(prof)
    print("\nWhere a cold run's time goes (cumulative seconds of one run, cProfile):\n")
    print("| stage | " + " | ".join(f"n={n}" for n in profiles) + " |")
    print("|---|" + "---|" * len(profiles))
    for label, names in STAGES.items():
        row = []
        for stats in profiles.values():
            total = 0.0
            for (_, _, func), entry in stats.stats.items():  # type: ignore[attr-defined]
                if func in names:
                    total += entry[3]
            row.append(f"{total:.3f}")
        print(f"| {label} | " + " | ".join(row) + " |")
    totals = [f"{s.total_tt:.3f}" for s in profiles.values()]  # type: ignore[attr-defined]
    print("| total (profiled) | " + " | ".join(totals) + " |")


if __name__ == "__main__":
    main()
