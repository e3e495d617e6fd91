"""Cost of the incident update after a run, with the database (``refresh_incidents``).

Run:  python -m tests.benchmarks.bench_incident_store [--series 10000] [--events 1000]
                                                      [--days 7] [--db URL]

The invented fleet of tests/benchmarks/bench_incidents.py (``--series``
series with rack, firmware, zone and host labels; 5-minute sampling) gets a
stored history: models and watermarks for every series, ``--days`` days of
events (``--events`` a day: a firmware rollout, a rack spike and random events
each day), labels, and the incidents of that history (the first update, timed
too).  Then one hourly scan is imitated: ``--events`` new events in the last
hour (the busiest case: every event of a day in one hour), watermarks one hour
later, and the update after it is timed.  Also timed: storing the labels
again unchanged (what every run with ``--label-column`` does) and a rerun's
update (nothing changed).  Wall and CPU time of this process, one run each:
the machine has 2 cores shared with other work, so timings are noisy.  The
warm scan these are compared with (52.6 s for 10,000 series) is quoted from
tests/benchmarks/RESULTS.md, not measured here.  Figures only; nothing is
asserted.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from changekind.tasks import persist
from changekind.tasks.types import Event, FittedModel
from tests.benchmarks.bench_incidents import START, STEP, WARM_SCAN_SECONDS, make_events, make_fleet


def _events(frame: pd.DataFrame) -> list[Event]:
    return [
        Event(
            series_id=r.series_id,
            position=-1,
            event_time=r.event_time,
            event_type=r.event_type,
            effect=float(r.effect),
            effect_pct=float(r.effect_pct),
            t_stat=float(r.t_stat),
            se=1.0,
            type_weights=((r.event_type, 1.0),),
            status=r.status,
            decay=None,
            half_life=None,
            level=100.0,
            model="ARIMA(1,0,0)",
        )
        for r in frame.itertuples(index=False)
    ]


def _timed(fn):
    c0, w0 = time.process_time(), time.perf_counter()
    out = fn()
    return time.perf_counter() - w0, time.process_time() - c0, out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=10_000)
    parser.add_argument("--events", type=int, default=1_000)
    parser.add_argument("--days", type=int, default=7)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--db", default=None, help="database URL (default: a SQLite file)")
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    fleet = make_fleet(args.series, rng)
    ids = list(fleet.index)
    with tempfile.TemporaryDirectory() as tmp:
        url = args.db or f"sqlite:///{Path(tmp) / 'bench.db'}"
        engine = persist.init_db(url)
        try:
            model = dict(
                order=(1, 0, 0),
                seasonal_order=(0, 0, 0, 0),
                trend="c",
                params=(("sigma2", 1.0),),
                sigma2=1.0,
                nobs=2016,
                method="mle",
                converged=True,
                step_seconds=STEP,
            )
            history = []
            for day in range(args.days):
                part = make_events("day", fleet, args.events, rng)
                shift = pd.Timedelta(days=day)
                part["event_ts"] = part["event_ts"] + shift
                part["event_time"] = [t.isoformat() for t in part["event_ts"]]
                history.append(part)
            events = pd.concat(history, ignore_index=True).drop_duplicates(
                ["series_id", "event_time"]
            )
            end = START + pd.Timedelta(days=args.days)
            persist.save_models(
                engine,
                [FittedModel(series_id=s, **model) for s in ids],
                watermarks=dict.fromkeys(ids, end.isoformat()),
            )
            persist.write_events(engine, "history", _events(events))
            labels = fleet.reset_index()
            wl, cl, changed = _timed(lambda: persist.write_labels(engine, "history", labels))
            print(
                f"{args.series:,} series, {len(events):,} stored events over {args.days} days, "
                f"database {engine.url.get_backend_name()}\n"
            )
            print(
                f"labels stored the first time: {changed:,} values, {wl:.2f} s wall, {cl:.2f} s CPU"
            )
            wf, cf, first = _timed(lambda: persist.refresh_incidents(engine, "history"))
            print(
                f"first update (whole history): {len(first.changes)} incidents, "
                f"{wf:.2f} s wall, {cf:.2f} s CPU"
            )
            # One hourly scan: the busiest hour, every event of a day in it.
            hour = make_events("hour", fleet, args.events, rng)
            hour["event_ts"] = hour["event_ts"] - START + end
            hour["event_time"] = [t.isoformat() for t in hour["event_ts"]]
            later = end + pd.Timedelta(hours=1)
            persist.write_events(engine, "scan", _events(hour))
            persist.update_watermarks(engine, dict.fromkeys(ids, later.isoformat()))
            wu, cu, done = _timed(lambda: persist.refresh_incidents(engine, "scan"))
            ws, cs, _ = _timed(lambda: persist.write_labels(engine, "scan", labels))
            wr, cr, again = _timed(lambda: persist.refresh_incidents(engine, "rerun"))
        finally:
            engine.dispose()
    print(
        "\n| step after an hourly scan | wall (s) | CPU (s) | share of a 52.6 s warm scan |\n"
        "|---|---|---|---|"
    )
    for name, wall, cpu in (
        (
            f"update of the incidents ({len(hour):,} new events in the hour; "
            f"{len(done.changes)} incidents written, {done.reads} read(s) of events)",
            wu,
            cu,
        ),
        (f"labels stored again, unchanged ({labels.shape[1] - 1} a series)", ws, cs),
        (f"a rerun's update (nothing changed: {len(again.changes)} written)", wr, cr),
    ):
        print(f"| {name} | {wall:.2f} | {cpu:.2f} | {100 * wall / WARM_SCAN_SECONDS:.1f} % |")


if __name__ == "__main__":
    main()
