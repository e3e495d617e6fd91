"""An invented fleet with attributes for the incident flow tests.

Hourly readings of 24 series: 4 racks (r1..r4) x 3 storage hosts x 2 metrics
(``vault-r2-h1/commit-ms``, ``.../journal-len``), AR(1) noise around each
series' level.  Attributes in the source: ``rack`` and ``firmware``.  Three
stories:

- a firmware rollout on day 8: one host per rack (h2 on every rack, 8 series)
  is moved from firmware 5.1 to 5.2 between 02:00 and 04:00, and every series
  of those hosts steps up by 8 sd at its host's upgrade hour; the source's
  firmware column changes at the same hour;
- a rack-wide spike on rack r3 on day 10 at 13:00: every series of r3
  (6 series) reads 10 sd high for one hour;
- unrelated single spikes on two other series, a day and more from anything
  (the truth lists them as (series, time)).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter

RACKS = ("r1", "r2", "r3", "r4")
HOSTS = ("h1", "h2", "h3")
METRICS = ("commit-ms", "journal-len")
START = pd.Timestamp("2031-08-04")  # invented
DAYS = 12
ROLLOUT_AT = START + pd.Timedelta(days=8, hours=2)
SPIKE_AT = START + pd.Timedelta(days=10, hours=13)
SINGLES = (
    ("vault-r1-h3/journal-len", START + pd.Timedelta(days=6, hours=9)),
    ("vault-r4-h1/commit-ms", START + pd.Timedelta(days=11, hours=20)),
)


def make_incident_fleet(seed: int = 5) -> tuple[pd.DataFrame, dict[str, object]]:
    """(data, truth): long-form rows with ``rack`` and ``firmware``, and what was injected."""
    rng = np.random.default_rng(seed)
    stamps = pd.date_range(START, periods=24 * DAYS, freq="h")
    frames = []
    rollout, spike = set(), set()
    upgrade = {}
    for k, rack in enumerate(RACKS):
        upgrade[f"vault-{rack}-h2"] = ROLLOUT_AT + pd.Timedelta(minutes=40 * k)
    for i, (rack, host, metric) in enumerate(
        (r, h, m) for r in RACKS for h in HOSTS for m in METRICS
    ):
        node = f"vault-{rack}-{host}"
        sid = f"{node}/{metric}"
        y = lfilter([1.0], [1.0, -0.5], rng.normal(size=len(stamps))) + 50 + 2 * i
        firmware = np.full(len(stamps), "5.1", dtype=object)
        if node in upgrade:
            at = upgrade[node].floor("h")
            t = int(np.searchsorted(stamps, at))
            y[t:] += 8.0 * 1.15  # 8 sd of the AR(1) (sd 1.15)
            firmware[t:] = "5.2"
            rollout.add(sid)
        if rack == "r3":
            y[int(np.searchsorted(stamps, SPIKE_AT))] += 10.0 * 1.15
            spike.add(sid)
        for single, at in SINGLES:
            if single == sid:
                y[int(np.searchsorted(stamps, at))] += 10.0 * 1.15
        frames.append(
            pd.DataFrame(
                {
                    "series_id": sid,
                    "timestamp": stamps,
                    "value": y,
                    "rack": rack,
                    "firmware": firmware,
                }
            )
        )
    data = pd.concat(frames, ignore_index=True)
    singles = {(s, at.isoformat()) for s, at in SINGLES}
    truth = {"rollout": rollout, "spike": spike, "singles": singles}
    return data, truth


def write_source(data: pd.DataFrame, root: Path, *, until: pd.Timestamp | None = None) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    for old in root.glob("*.parquet"):
        old.unlink()
    part = data if until is None else data[data["timestamp"] < until]
    part.to_parquet(root / "part-0.parquet", index=False)
    return root
