"""Reading speed of changekind.tasks.fetch on a 1,000-series x 720-point Parquet dataset.

Run by hand (it is not collected by pytest)::

    .venv/bin/python tests/benchmarks/bench_fetch.py [--series 1000] [--points 720] [--repeat 3]

Two layouts of the same invented hourly fleet are written to a temporary
directory: ``by-series`` (10 files, rows sorted by series id and time) and
``by-day`` (one file per day, all series in each, as an hourly append job
writes them).  For each it prints the best of ``--repeat`` wall times and rows
per second for:

* the whole dataset read and filtered in pandas (no pushdown);
* one batch of 100 series over the whole span (series pushdown);
* a warm scan of every series in batches of 100, reading the last 24 points
  plus 48 points of context, with the same watermark for all series (one time
  condition per batch) and with a different watermark per series (compared:
  one OR-ed condition per series vs one earliest-start condition trimmed in
  memory, the choice ``MAX_FILTER_GROUPS`` makes).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from changekind.tasks import fetch
from changekind.tasks.fetch import reading


def build(root: Path, n_series: int, n_points: int, rng: np.random.Generator) -> pd.DataFrame:
    stamps = pd.date_range("2031-03-01", periods=n_points, freq="h", tz="UTC")
    ids = np.repeat([f"node-{i:04d}" for i in range(n_series)], n_points)
    frame = pd.DataFrame(
        {
            "series_id": ids,
            "timestamp": np.tile(stamps.as_unit("us"), n_series),
            "value": rng.normal(100.0, 5.0, n_series * n_points),
        }
    )
    table = pa.Table.from_pandas(frame, preserve_index=False)
    (root / "by-series").mkdir()
    per_file = n_series // 10 * n_points
    for k in range(10):
        part = table.slice(k * per_file, per_file if k < 9 else None)
        pq.write_table(part, root / "by-series" / f"part-{k}.parquet", row_group_size=72_000)
    (root / "by-day").mkdir()
    by_day = frame.sort_values(["timestamp", "series_id"], kind="mergesort")
    for day, chunk in by_day.groupby(by_day["timestamp"].dt.date):
        pq.write_table(
            pa.Table.from_pandas(
                chunk.sort_values(["series_id", "timestamp"]), preserve_index=False
            ),
            root / "by-day" / f"day-{day}.parquet",
            row_group_size=24_000,
        )
    return frame


def best(fn: Callable[[], int], repeat: int) -> tuple[float, int]:
    times, rows = [], 0
    for _ in range(repeat):
        t0 = time.perf_counter()
        rows = fn()
        times.append(time.perf_counter() - t0)
    return min(times), rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=1000)
    parser.add_argument("--points", type=int, default=720)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    rng = np.random.default_rng(20310301)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        frame = build(root, args.series, args.points, rng)
        ids = sorted(frame["series_id"].unique())
        last = frame["timestamp"].max()
        step = pd.Timedelta(hours=1)
        same = [
            fetch.SeriesWindow.after_watermark(s, last - 24 * step, context_points=48, step=step)
            for s in ids
        ]
        lags = rng.integers(1, 48, len(ids))
        varied = [
            fetch.SeriesWindow.after_watermark(
                s, last - int(lag) * step, context_points=48, step=step
            )
            for s, lag in zip(ids, lags, strict=True)
        ]
        # A few watermark groups (a fleet where some series lag a day behind).
        few = [
            fetch.SeriesWindow.after_watermark(
                s, last - (24 + 24 * (i % 4)) * step, context_points=48, step=step
            )
            for i, s in enumerate(ids)
        ]
        print(
            f"{args.series} series x {args.points} points = {len(frame):,} rows; "
            f"best of {args.repeat}"
        )
        for layout in ("by-series", "by-day"):
            spec = fetch.open_source(root / layout)

            def no_pushdown(spec=spec) -> int:
                whole = pq.read_table(spec.location).to_pandas()
                keep = whole["series_id"].isin(ids[:100])
                return int(keep.sum())

            def one_batch(spec=spec) -> int:
                return len(fetch.read_series(spec, ids[:100]))

            def warm(windows, groups: int, spec=spec) -> Callable[[], int]:
                def run() -> int:
                    saved = reading.MAX_FILTER_GROUPS
                    reading.MAX_FILTER_GROUPS = groups
                    try:
                        return sum(
                            len(f)
                            for batch in fetch.iter_window_batches(spec, windows, batch_size=100)
                            for _, f in batch
                        )
                    finally:
                        reading.MAX_FILTER_GROUPS = saved

                return run

            cases = [
                ("read all, filter 100 series in pandas", no_pushdown),
                ("read_series, 100 series, whole span", one_batch),
                ("warm scan, same watermark", warm(same, reading.MAX_FILTER_GROUPS)),
                ("warm scan, 4 watermark groups, OR per group", warm(few, 10**6)),
                ("warm scan, 4 watermark groups, earliest start + trim", warm(few, 0)),
                ("warm scan, varied watermarks, OR per series", warm(varied, 10**6)),
                ("warm scan, varied watermarks, earliest start + trim", warm(varied, 0)),
            ]
            print(f"\nlayout {layout}:")
            for name, fn in cases:
                seconds, rows = best(fn, args.repeat)
                print(
                    f"  {name:<55} {seconds:7.3f} s  {rows:>9,} rows  "
                    f"{rows / seconds:>12,.0f} rows/s"
                )


if __name__ == "__main__":
    main()
