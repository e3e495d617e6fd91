"""Raw versus windowed detection on a second-resolution series.

Run:  python -m tests.benchmarks.bench_window [--raw-days 1] [--timeout 1200]

An invented series of one write-latency metric sampled every second (AR(1)
noise, phi 0.5) with three injected events: a level shift of 3.0 (inside a
minute), a fading jump of 6.0 with a half-life of 300 s, and the noise
standard deviation doubling.  Each measurement runs in a fresh child process
(so memory figures do not mix); the child reports

- points modelled (the grid the engine fitted: raw points, or windows),
- wall time of the detection call alone (data generation excluded),
- peak memory: growth of the process's resident-set high-water mark
  (``resource.getrusage().ru_maxrss``) during the call, and the high-water
  mark itself,
- which injected events were found: right type within one window (windowed)
  or within 60 s (raw) of the injected time.  The raw engine has no
  variance-change type, so for raw detection the VC row says what it reported
  near that time instead.

Raw detection on tens of thousands of points is slow; a child that exceeds
``--timeout`` is stopped and reported as such.  Figures only; nothing is
asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time

import numpy as np
import pandas as pd

from changekind.tasks.simulate import arma_filter

DAY = 86_400
START = pd.Timestamp("2026-03-02")


def injected(days: int) -> dict[str, pd.Timestamp]:
    """Event times: spread over the last day so every size holds all three."""
    last = START + pd.Timedelta(days=days - 1)
    return {
        "LS": last + pd.Timedelta(hours=6, seconds=30),
        "TC": last + pd.Timedelta(hours=12),
        "VC": last + pd.Timedelta(hours=18),
    }


def make_series(seed: int, days: int) -> tuple[pd.DatetimeIndex, np.ndarray]:
    rng = np.random.default_rng(seed)
    n = days * DAY
    stamps = pd.date_range(START, periods=n, freq="s")
    when = injected(days)
    shocks = rng.normal(size=n + 200)
    shocks[200:] *= np.where(stamps >= when["VC"], 2.0, 1.0)
    y = 50.0 + arma_filter(shocks, ar=(0.5,))[200:]
    y[stamps >= when["LS"]] += 3.0
    after = stamps >= when["TC"]
    y[after] += 6.0 * 0.5 ** (np.arange(after.sum()) / 300.0)
    return stamps, y


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def child(mode: str, days: int, seed: int, window: str) -> dict:
    from changekind.tasks.detect import analyse_series
    from changekind.tasks.window.detection import detect_windowed

    stamps, y = make_series(seed, days)
    before = _rss_mb()
    cpu0 = time.process_time()
    t0 = time.perf_counter()
    if mode == "raw":
        result = analyse_series("bench", stamps, y)
        events, modelled, tolerance = result.events, result.nobs, pd.Timedelta("60s")
    else:
        found = detect_windowed("bench", stamps, y, window)
        events, modelled = found.events, found.n_modelled
        tolerance = pd.Timedelta(window)
    seconds = time.perf_counter() - t0
    cpu = time.process_time() - cpu0
    peak = _rss_mb()
    found_types = {}
    when_all = list(injected(days).values())
    for kind, when in injected(days).items():
        home = when.floor(tolerance) if mode != "raw" else when
        near = [e.event_type for e in events if abs(pd.Timestamp(e.event_time) - home) <= tolerance]
        found_types[kind] = near
    extra = sum(
        all(abs(pd.Timestamp(e.event_time) - w.floor(tolerance)) > tolerance for w in when_all)
        for e in events
    )
    return {
        "mode": mode,
        "days": days,
        "points": int(y.size),
        "modelled": int(modelled),
        "seconds": seconds,
        "cpu_seconds": cpu,
        "extra": int(extra),
        "rss_growth_mb": peak - before,
        "rss_peak_mb": peak,
        "n_events": len(events),
        "by_type": pd.Series([e.event_type for e in events]).value_counts().to_dict(),
        "near": found_types,
    }


def run(mode: str, days: int, seed: int, window: str, timeout: float) -> dict:
    cmd = [
        sys.executable,
        "-m",
        "tests.benchmarks.bench_window",
        "--child",
        mode,
        "--days",
        str(days),
        "--seed",
        str(seed),
        "--window",
        window,
    ]
    try:
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=False)
    except subprocess.TimeoutExpired:
        return {"mode": mode, "days": days, "timeout": timeout}
    if done.returncode != 0:
        return {"mode": mode, "days": days, "error": done.stderr.strip().splitlines()[-1:]}
    return json.loads(done.stdout.strip().splitlines()[-1])


def _verdict(row: dict, kind: str) -> str:
    near = row["near"][kind]
    if kind in near:
        return "found"
    return "missed" + (f" (near: {', '.join(near)})" if near else "")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--child", choices=["raw", "windowed"])
    parser.add_argument("--days", type=int, default=1)
    parser.add_argument("--raw-days", type=int, default=1)
    parser.add_argument("--window", default="1min")
    parser.add_argument("--seed", type=int, default=2031)
    parser.add_argument("--timeout", type=float, default=1200.0)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(child(args.child, args.days, args.seed, args.window), default=str))
        return

    plan = [("windowed", 1), ("windowed", 3), ("raw", args.raw_days)]
    rows = []
    for mode, days in plan:
        print(f"running {mode} on {days} day(s)...", file=sys.stderr, flush=True)
        rows.append(run(mode, days, args.seed, args.window, args.timeout))
    print(
        f"\nSeries of 1 s samples; window {args.window}; seed {args.seed}; "
        f"{os.cpu_count()} core(s); each run in a fresh process.\n"
    )
    print(
        "| mode | days | raw points | points modelled | wall (s) | CPU (s) | peak RSS (MB) | "
        "RSS growth in call (MB) | events | away from the injected | LS | TC | VC |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    for row in rows:
        if "timeout" in row or "error" in row:
            what = (
                f"stopped after {row['timeout']:.0f} s"
                if "timeout" in row
                else f"failed: {row['error']}"
            )
            print(
                f"| {row['mode']} | {row['days']} | {row['days'] * DAY} | - | {what} "
                "| - | - | - | - | - | - | - | - |"
            )
            continue
        types = ", ".join(f"{k} {v}" for k, v in sorted(row["by_type"].items())) or "none"
        print(
            f"| {row['mode']} | {row['days']} | {row['points']} | {row['modelled']} | "
            f"{row['seconds']:.1f} | {row['cpu_seconds']:.1f} | {row['rss_peak_mb']:.0f} | "
            f"{row['rss_growth_mb']:.0f} | {row['n_events']} ({types}) | {row['extra']} | "
            f"{_verdict(row, 'LS')} | {_verdict(row, 'TC')} | "
            f"{_verdict(row, 'VC')} |"
        )


if __name__ == "__main__":
    main()
