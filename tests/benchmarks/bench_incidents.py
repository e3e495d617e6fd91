"""Cost of grouping a run's events into incidents, and the time errors behind the windows.

Run:  python -m tests.benchmarks.bench_incidents [--series 10000] [--events 1000] [--repeats 5]
      python -m tests.benchmarks.bench_incidents --time-errors [--replications 25] [--jobs 2]
                                                 [--base-seed N]

Grouping cost.  An invented fleet of ``--series`` series (storage nodes: 250
racks, four firmware versions, five zones and one host name per series as
labels) and ``--events`` events in one run, in three layouts:

- ``hour``: every event in one hour, random types and directions (a warm
  scan's hour at its busiest: the densest case, where chains are longest);
- ``day``: a rollout on one firmware version (20 % of the events), a rack
  spike (one rack's 40 series) and random events over a day (a backfill);
- ``week``: ten times the events over seven days (a longer backfill).

Timed: building the fleet's labels once (``fleet_labels``), the grouping with
its shared-attribute tests (``group_incidents``), and reconciling the result
with itself as stored (``reconcile_incidents``: everything unchanged) and
with nothing stored (everything new), and the whole update after an hourly
scan (``update_incidents`` with the last hour changed, events read from memory:
the database reads are the persistence step's cost).  Medians of ``--repeats``
runs, wall and CPU time of this process.  The machine has 2 cores shared with other work:
timings are noisy.  The warm scan these costs are compared with (52.6 s for
10,000 series) is quoted from tests/benchmarks/RESULTS.md, not measured here.

Time errors (``--time-errors``).  The engine on simulated series with one
injected event each (changekind.tasks.simulate: ar1, arma11, arima011 and
seasonal models, 3, 4 and 5 sigma, ``--replications`` per cell): for the
detection nearest the injected time (within 12 samples), the distance in
samples, by detected type.  These figures chose :data:`TIME_TOLERANCE`.
Figures only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import statistics
import sys
import time
from collections import defaultdict

import numpy as np
import pandas as pd

from changekind.tasks.incidents import (
    GroupingRule,
    fleet_labels,
    group_incidents,
    reconcile_incidents,
    update_incidents,
)

STEP = 300.0
START = pd.Timestamp("2031-06-02", tz="UTC")  # invented
WARM_SCAN_SECONDS = 52.6  # RESULTS.md: warm scan of 10,000 series (quoted, not measured here)
TYPES = ("AO", "LS", "TC", "IO")


def make_fleet(n_series: int, rng: np.random.Generator) -> pd.DataFrame:
    ids = [f"node-{i // 2:05d}/{'lat' if i % 2 == 0 else 'queue'}" for i in range(n_series)]
    node = np.arange(n_series) // 2
    return pd.DataFrame(
        {
            "rack": [f"rk{n % 250:03d}" for n in node],
            "firmware": rng.choice(["11.0", "11.1", "11.2", "12.0"], size=n_series),
            "zone": [f"z{n % 5}" for n in node],
            "host": [f"h{n:05d}" for n in node],
        },
        index=pd.Index(ids, name="series_id"),
    )


def _rows(ids, times, types, signs, rng) -> pd.DataFrame:
    ts = pd.DatetimeIndex(times).floor("5min")
    effect = signs * rng.uniform(1.0, 5.0, size=len(ids))
    return pd.DataFrame(
        {
            "series_id": ids,
            "event_time": [t.isoformat() for t in ts],
            "event_ts": ts,
            "event_type": types,
            "effect": effect,
            "effect_pct": effect * 7.0,
            "t_stat": signs * rng.uniform(4.0, 12.0, size=len(ids)),
            "status": rng.choice(["provisional", "confirmed"], size=len(ids)),
        }
    )


def make_events(layout: str, fleet: pd.DataFrame, n_events: int, rng) -> pd.DataFrame:
    ids = np.asarray(fleet.index)
    if layout == "hour":
        span = pd.Timedelta(hours=1)
    elif layout == "day":
        span = pd.Timedelta(days=1)
    else:
        span, n_events = pd.Timedelta(days=7), 10 * n_events
    parts = []
    n_random = n_events
    if layout != "hour":
        rollout = rng.choice(ids[fleet["firmware"] == "12.0"], size=n_events // 5, replace=False)
        at = START + span / 3 + pd.to_timedelta(np.sort(rng.uniform(0, 7200, rollout.size)), "s")
        parts.append(_rows(rollout, at, np.full(rollout.size, "LS"), np.ones(rollout.size), rng))
        rack = ids[fleet["rack"] == "rk017"]
        parts.append(
            _rows(
                rack,
                [START + span * 2 / 3] * rack.size,
                np.full(rack.size, "AO"),
                np.ones(rack.size),
                rng,
            )
        )
        n_random -= rollout.size + rack.size
    chosen = rng.choice(ids, size=n_random, replace=False)
    at = START + pd.to_timedelta(rng.uniform(0, span.total_seconds(), n_random), "s")
    parts.append(
        _rows(chosen, at, rng.choice(TYPES, size=n_random), rng.choice([-1.0, 1.0], n_random), rng)
    )
    events = pd.concat(parts, ignore_index=True)
    return events.drop_duplicates(["series_id", "event_time"]).reset_index(drop=True)


def timed(fn, repeats: int):
    walls, cpus, out = [], [], None
    for _ in range(repeats):
        c0, w0 = time.process_time(), time.perf_counter()
        out = fn()
        walls.append(time.perf_counter() - w0)
        cpus.append(time.process_time() - c0)
    return statistics.median(walls), statistics.median(cpus), out


def last_hour(events: pd.DataFrame, fleet, rule, stored):
    """update_incidents as an hourly scan would call it: the last hour changed.

    Stored incidents are those of the whole record; readers filter in memory (no
    database: its reads are the persistence step's cost).
    """
    ts = events["event_ts"]
    end = ts.max()

    def read_events(span):
        return events[(ts >= span[0]) & (ts <= span[1])]

    def read_incidents(span):
        return [i for i in stored if i.start <= span[1] and i.end >= span[0]]

    return update_incidents(
        (end - pd.Timedelta(hours=1), end),
        observed=(ts.min(), end),
        read_events=read_events,
        read_incidents=read_incidents,
        labels=fleet,
        step_seconds=STEP,
        rule=rule,
    )


RULES = {"density": GroupingRule(), "chaining": GroupingRule(core_alpha=1.0)}
"""The default rule, and plain chaining of neighbours (the core test off) for comparison."""


def grouping_cost(n_series: int, n_events: int, repeats: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    frame = make_fleet(n_series, rng)
    wall, cpu, fleet = timed(lambda: fleet_labels(frame), repeats)
    print(
        f"\nFleet of {n_series:,} series, 4 labels ({len(set(frame['host'])):,} host names); "
        f"seed {seed}; {os.cpu_count()} core(s) shared with other work; medians of "
        f"{repeats} runs.\n"
    )
    print(f"fleet_labels: {wall * 1000:.1f} ms wall, {cpu * 1000:.1f} ms CPU (once per run)\n")
    print(
        "| layout | events | rule | incidents | members | largest (series, type, shared) | "
        "label values tested | group (ms wall / CPU) | reconcile unchanged (ms) | "
        "reconcile new (ms) | update after the last hour (ms, reads, hours read) | "
        "share of a 52.6 s warm scan (group + reconcile; update) |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|---|---|")
    for layout in ("hour", "day", "week"):
        events = make_events(layout, frame, n_events, rng)
        for name, rule in RULES.items():
            gw, gc, result = timed(
                lambda e=events, r=rule: group_incidents(e, fleet, step_seconds=STEP, rule=r),
                repeats,
            )
            uw, _, same = timed(lambda r=result: reconcile_incidents(r.incidents, r), repeats)
            nw, _, fresh = timed(lambda r=result: reconcile_incidents([], r), repeats)
            assert same.counts()["unchanged"] == len(result.incidents)  # sanity of the figures
            assert fresh.counts()["new"] == len(result.incidents)
            top = sorted(result.incidents, key=lambda i: -i.n_series)[:3]
            largest = "; ".join(
                f"{i.n_series} {i.dominant_type} {i.shared_labels or ''}".strip() for i in top
            )
            tested = sum(len(i.labels) for i in result.incidents)
            vw, _, update = timed(
                lambda e=events, r=rule, i=result.incidents: last_hour(e, fleet, r, i), repeats
            )
            hours = (update.loaded[1] - update.loaded[0]) / pd.Timedelta(hours=1)
            print(
                f"| {layout} | {len(events):,} | {name} | {len(result.incidents):,} | "
                f"{result.n_members:,} | {largest or '-'} | {tested:,} | "
                f"{gw * 1000:.0f} / {gc * 1000:.0f} | {uw * 1000:.1f} | {nw * 1000:.1f} | "
                f"{vw * 1000:.0f}, {update.reads}, {hours:.0f} | "
                f"{100 * (gw + uw) / WARM_SCAN_SECONDS:.2f} %; "
                f"{100 * vw / WARM_SCAN_SECONDS:.2f} % |"
            )


# --------------------------------------------------------------------------- time errors


def _time_error(key):
    from changekind.tasks.simulate import make_series
    from tests.benchmarks.montecarlo import _run_engine

    model, event_type, size, replicate, base_seed = key
    series = make_series(model, event_type, size, replicate, base_seed=base_seed)
    near = [d for d in _run_engine(series, None) if abs(d.position - series.position) <= 12]
    if not near:
        return key, None, None
    d = min(near, key=lambda d: (abs(d.position - series.position), d.position))
    return key, d.event_type, abs(d.position - series.position)


def time_errors(replications: int, jobs: int, base_seed: int | None) -> None:
    from changekind.tasks.simulate import BASE_SEED, MODEL_NAMES, SIZES
    from changekind.tasks.simulate import STUDY_TYPES as SIM_TYPES

    base_seed = BASE_SEED if base_seed is None else base_seed

    keys = [
        (m, t, s, r, base_seed)
        for m in MODEL_NAMES
        for t in SIM_TYPES
        for s in SIZES
        for r in range(replications)
    ]
    t0 = time.perf_counter()
    with multiprocessing.get_context("spawn").Pool(jobs) as pool:
        results = pool.map(_time_error, keys, chunksize=8)
    seconds = time.perf_counter() - t0
    by_type: dict[str, list[int]] = defaultdict(list)
    missed = 0
    for _, detected, error in results:
        if detected is None:
            missed += 1
        else:
            by_type[detected].append(error)
    print(
        f"\n{len(keys):,} simulated series (models {', '.join(MODEL_NAMES)}; sizes "
        f"{', '.join(f'{s:g}' for s in SIZES)} sigma; {replications} replications; "
        f"base seed {base_seed}), "
        f"{jobs} process(es), {seconds:.0f} s; {missed} without a detection within 12 "
        "samples.\n"
    )
    print("| detected type | events | exact | within 1 | within 2 | within 3 | largest |")
    print("|---|---|---|---|---|---|---|")
    for kind in sorted(by_type):
        e = np.array(by_type[kind])
        shares = " | ".join(f"{100 * np.mean(e <= k):.1f} %" for k in range(4))
        print(f"| {kind} | {e.size} | {shares} | {e.max()} |")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=10_000)
    parser.add_argument("--events", type=int, default=1_000)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--seed", type=int, default=2031)
    parser.add_argument("--time-errors", action="store_true")
    parser.add_argument("--replications", type=int, default=25)
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--base-seed", type=int, default=None, help="simulation seed")
    args = parser.parse_args()
    if args.time_errors:
        time_errors(args.replications, args.jobs, args.base_seed)
    else:
        grouping_cost(args.series, args.events, args.repeats, args.seed)
    sys.stdout.flush()


if __name__ == "__main__":
    main()
