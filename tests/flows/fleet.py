"""A small invented fleet for the flow tests: hourly disks with known events."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter


def make_fleet(
    n_series: int = 8, *, hours: int = 24 * 21, seed: int = 0
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Hourly AR(1) series with known level shifts and spikes; returns (data, truth)."""
    rng = np.random.default_rng(seed)
    stamps = pd.date_range("2026-06-01", periods=hours, freq="h")
    frames, truth = [], []
    for i in range(n_series):
        y = lfilter([1.0], [1.0, -0.5], rng.normal(size=hours)) + 40 + 3 * i
        sid = f"shelf-{i // 4}/disk-{i % 4}"
        if i % 3 == 0:
            t = int(rng.integers(hours // 3, hours - 48))
            y[t:] += 6.0
            truth.append((sid, stamps[t], "LS"))
        if i % 3 == 1:
            t = int(rng.integers(48, hours - 48))
            y[t] += 9.0
            truth.append((sid, stamps[t], "AO"))
        frames.append(pd.DataFrame({"series_id": sid, "timestamp": stamps, "value": y}))
    if n_series >= 3:  # a series that cannot be analysed: constant
        frames.append(
            pd.DataFrame({"series_id": "shelf-x/stuck", "timestamp": stamps, "value": 7.0})
        )
    data = pd.concat(frames, ignore_index=True)
    return data, pd.DataFrame(truth, columns=["series_id", "event_time", "event_type"])


def write_source(data: pd.DataFrame, root: Path, *, until: str | None = None) -> Path:
    """Write the rows before ``until`` as a Parquet dataset directory."""
    root.mkdir(parents=True, exist_ok=True)
    for old in root.glob("*.parquet"):
        old.unlink()
    part = data if until is None else data[data["timestamp"] < pd.Timestamp(until)]
    part.to_parquet(root / "part-0.parquet", index=False)
    return root
