"""How fast ``changekind events`` answers on a 100,000-row SQLite event table.

Run by hand (it is not collected by pytest)::

    .venv/bin/python tests/benchmarks/bench_events.py [--rows 100000] [--repeat 3]

An invented fleet's events (1,000 series, 100 events each, every type and
status, a third of them judged) are written straight into a fresh SQLite
database of the current schema.  Each case runs the installed ``changekind``
command in a fresh interpreter, as a person at a terminal does, and prints the
best wall time of ``--repeat`` runs: start-up and imports included.  The
target of the operator work is under 2 s for the default listing.  A baseline
line shows the start-up alone (``changekind --version``).
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import sqlalchemy as sa

from changekind.tasks import persist

TYPES = ("AO", "LS", "TC", "IO")
STATES = (None, None, None, "acknowledged", "dismissed", "explained")


def build(url: str, n_rows: int, rng: np.random.Generator) -> None:
    engine = persist.init_db(url)
    t0 = datetime(2031, 1, 1, tzinfo=UTC)
    n_series = max(1, n_rows // 100)
    rows = []
    for i in range(n_rows):
        when = t0 + timedelta(minutes=int(rng.integers(0, 60 * 24 * 365)))
        kind = TYPES[i % 4]
        state = STATES[i % len(STATES)]
        rows.append(
            {
                "series_id": f"region-{i % 7}/service-{i % n_series:04d}/latency-p99-ms",
                "event_time": when.isoformat() + f"#{i}",  # unique key
                "event_ts": when,
                "event_type": kind,
                "effect": float(rng.normal(0, 10)),
                "effect_pct": float(rng.normal(0, 20)),
                "t_stat": float(rng.normal(0, 8)),
                "se": 1.0,
                "type_weights": json.dumps({k: 0.25 for k in TYPES}),
                "status": "confirmed" if i % 5 else "provisional",
                "decay": 0.7 if kind == "TC" else None,
                "half_life": 7000.0 if kind == "TC" else None,
                "level": 100.0,
                "model": "ARIMA(1,0,0) mean=100 ar.L1=0.5 sigma=2",
                "first_run_id": "bench",
                "last_run_id": "bench",
                "first_seen": t0,
                "last_seen": t0,
                "triage_state": state,
                "triage_reason": "bench" if state else None,
                "triage_at": t0 if state else None,
            }
        )
    with engine.begin() as conn:
        for start in range(0, len(rows), 10_000):
            conn.execute(sa.insert(persist.series_events), rows[start : start + 10_000])
    engine.dispose()


def timed(args: list[str], repeat: int) -> tuple[float, int]:
    best = float("inf")
    size = 0
    for _ in range(repeat):
        start = time.perf_counter()
        done = subprocess.run(
            args, capture_output=True, check=True, env={"COLUMNS": "120", "PATH": ""}
        )
        best = min(best, time.perf_counter() - start)
        size = len(done.stdout)
    return best, size


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--repeat", type=int, default=3)
    options = parser.parse_args()
    command = shutil.which("changekind", path=str(Path(sys.executable).parent))
    base = [command] if command else [sys.executable, "-m", "changekind.flows.cli"]
    with tempfile.TemporaryDirectory() as tmp:
        url = f"sqlite:///{Path(tmp) / 'events.db'}"
        start = time.perf_counter()
        build(url, options.rows, np.random.default_rng(7))
        print(f"built {options.rows:,} events in {time.perf_counter() - start:.1f} s")
        cases = [
            ("start-up only (--version)", ["--version"]),
            ("events (table, newest 200)", ["events", "--db", url]),
            (
                "events --type LS --triage none",
                ["events", "--db", url, "--type", "LS", "--triage", "none"],
            ),
            (
                "events --min-effect-pct 40 --limit 50",
                ["events", "--db", url, "--min-effect-pct", "40", "--limit", "50"],
            ),
            ("events --json --limit 1000", ["events", "--db", url, "--json", "--limit", "1000"]),
            ("events --csv (all rows)", ["events", "--db", url, "--csv"]),
            ("events --json (all rows)", ["events", "--db", url, "--json"]),
        ]
        print(f"{'case':45s} {'best wall s':>11s} {'stdout bytes':>13s}")
        for name, args in cases:
            seconds, size = timed([*base, *args], options.repeat)
            print(f"{name:45s} {seconds:11.2f} {size:13,d}")


if __name__ == "__main__":
    main()
