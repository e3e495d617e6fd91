"""A small invented fleet for the flow tests: hourly disks with known events
(simulated by :func:`changekind.tasks.simulate.disk_fleet`)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from changekind.tasks.simulate import disk_fleet


def make_fleet(
    n_series: int = 8, *, hours: int = 24 * 21, seed: int = 0
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Hourly AR(1) series with known level shifts and spikes; returns (data, truth)."""
    fleet = disk_fleet(n_series, hours=hours, seed=seed)
    return fleet.data, fleet.truth[["series_id", "event_time", "event_type"]]


def found_in(events: pd.DataFrame, truth: pd.DataFrame, tolerance: str = "2h") -> int:
    """Injected events (``truth``) with a stored event of the same type within the tolerance."""
    hits = 0
    for row in truth.itertuples():
        mine = events[events.series_id == row.series_id]
        times = pd.to_datetime(mine.event_time)
        near = mine[(times - row.event_time).abs() <= pd.Timedelta(tolerance)]
        hits += int((near.event_type == row.event_type).any())
    return hits


def write_source(data: pd.DataFrame, root: Path, *, until: str | None = None) -> Path:
    """Write the rows before ``until`` as a Parquet dataset directory."""
    root.mkdir(parents=True, exist_ok=True)
    for old in root.glob("*.parquet"):
        old.unlink()
    part = data if until is None else data[data["timestamp"] < pd.Timestamp(until)]
    part.to_parquet(root / "part-0.parquet", index=False)
    return root
