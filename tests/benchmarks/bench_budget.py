"""False events, recall and warm-scan cost at the default false-alarm budget (prints).

Run: ``.venv/bin/python -m tests.benchmarks.bench_budget [--series 200] [--shifted 40]``.

A fleet of clean AR(1) minute series (phi 0.6; half with Gaussian
innovations, half Student-t(3) scaled to unit variance) plus ``--shifted``
series with one +3 sigma level shift (half of them heavy-tailed) inside the
scanned day, scanned cold on 12 hours and then 24 times hourly through the
fleet's planning and batch code (tests/fleetsim.py).  Prints:

- false events per series per day on the clean series (every event ever
  written counts, including provisional ones later retracted), Gaussian and
  heavy apart (target <= 0.05 at the default budget);
- recall of the +3 sigma shifts (an LS within 20 points of the true time at the
  end; target >= 0.9), Gaussian and heavy apart;
- each warm scan's seconds: median, slowest, and their ratio (target <= 5).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from changekind.tasks.batch import AnalysisOptions
from changekind.tasks.critical import FALSE_BUDGET
from tests.fleetsim import scan_fleet, sid, simulate_fleet, write_fleet

HISTORY, SCANS, PER_SCAN = 720, 24, 60
NEAR = pd.Timedelta(minutes=20)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--series", type=int, default=200)
    parser.add_argument("--shifted", type=int, default=40)
    parser.add_argument("--budget", type=float, default=FALSE_BUDGET)
    parser.add_argument("--seed", type=int, default=10)
    parser.add_argument(
        "--refit-share", type=float, default=0.02, help="scan's refit rate limit (RunOptions)"
    )
    args = parser.parse_args()
    n, k = args.series, args.shifted
    rng = np.random.default_rng(args.seed)
    heavy = [i % 2 == 1 for i in range(n + k)]
    shifts = {
        n + j: (HISTORY + (j % SCANS) * PER_SCAN + int(rng.integers(5, 55)), 3.0) for j in range(k)
    }
    frame = simulate_fleet(n + k, history=HISTORY, scans=SCANS, heavy=heavy, shifts=shifts, rng=rng)
    stamps = frame["timestamp"].iloc[: HISTORY + SCANS * PER_SCAN].reset_index(drop=True)
    with tempfile.TemporaryDirectory() as tmp:
        path = write_fleet(frame, Path(tmp) / "fleet.parquet")
        t0 = time.perf_counter()
        run = scan_fleet(
            path,
            [sid(i) for i in range(n + k)],
            history=HISTORY,
            scans=SCANS,
            per_scan=PER_SCAN,
            options=AnalysisOptions(false_budget=args.budget, refit_share=args.refit_share),
        )
        wall = time.perf_counter() - t0
    days = (HISTORY + SCANS * PER_SCAN) / 1440
    print(
        f"fleet: {n} clean + {k} shifted minute series, cold on {HISTORY} points then "
        f"{SCANS} hourly scans of {PER_SCAN}; budget {args.budget:g} per series per 30 days; "
        f"refit share {args.refit_share:g}; {wall:.1f} s in all"
    )
    for name, want in (("gaussian", False), ("heavy t(3)", True)):
        ids = {sid(i) for i in range(n) if heavy[i] == want}
        false = sum(1 for s, _ in run.ever if s in ids)
        confirmed = sum(1 for s, _ in run.confirmed() if s in ids)
        rate = false / (len(ids) * days)
        print(
            f"  false events, {name}: {false} written ({confirmed} confirmed at the end) on "
            f"{len(ids)} series x {days:.2f} days = {rate:.4f} per series per day "
            f"(target <= 0.05; allowed by the budget {args.budget / 30:.4f})"
        )
    for name, want in (("gaussian", False), ("heavy t(3)", True)):
        hits = total = exact = 0
        for i, (at, _) in shifts.items():
            if heavy[i] != want:
                continue
            total += 1
            when = stamps.iloc[at]
            found = [
                pd.Timestamp(t)
                for t, e in run.events.get(sid(i), {}).items()
                if e.event_type == "LS" and abs(pd.Timestamp(t) - when) <= NEAR
            ]
            hits += bool(found)
            exact += when in found
        if total:
            print(
                f"  recall of +3 sigma LS, {name}: {hits}/{total} = {hits / total:.2f} "
                f"(at the exact minute: {exact}) (target >= 0.9)"
            )
    warm = np.array(run.scan_seconds)
    print(
        f"  warm scans: median {np.median(warm):.2f} s, slowest {warm.max():.2f} s, "
        f"ratio {warm.max() / np.median(warm):.1f} (target <= 5); modes {run.modes}"
    )


if __name__ == "__main__":
    main()
