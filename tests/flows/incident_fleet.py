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


def _event(sid: str, at: pd.Timestamp, kind: str, effect: float):
    from changekind.tasks.types import Event

    return Event(
        series_id=sid,
        position=-1,
        event_time=at.isoformat(),
        event_type=kind,
        effect=effect,
        effect_pct=100 * effect / 50,
        t_stat=effect / 1.15,
        se=1.15,
        type_weights=((kind, 1.0),),
        status="confirmed",
        decay=None,
        half_life=None,
        level=50.0,
        model="ARIMA(1,0,0)",
    )


def store_incident_fleet(url: str, folder: Path) -> tuple[Path, dict[str, object]]:
    """The fleet as a Parquet source and, in the database at ``url``, its injected
    events (the rollout's level shifts at each host's upgrade hour, the rack spike),
    the series' models and labels, and the incidents that follow.  (source, truth)"""
    from changekind.tasks import incident_store, persist
    from changekind.tasks.types import FittedModel

    data, truth = make_incident_fleet()
    source = write_source(data, folder)
    events = []
    for sid in sorted(truth["rollout"]):
        rows = data[data["series_id"] == sid]
        at = rows.loc[rows["firmware"].eq("5.2").idxmax(), "timestamp"]
        events.append(_event(sid, at, "LS", 9.2))
    events += [_event(sid, SPIKE_AT, "AO", 11.5) for sid in sorted(truth["spike"])]
    ids = sorted(data["series_id"].unique())
    persist.init_db(url).dispose()
    persist.write_events(url, "run-1", events)
    models = [
        FittedModel(
            sid,
            (1, 0, 0),
            (0, 0, 0, 0),
            "c",
            (("sigma2", 1.3),),
            1.3,
            288,
            "mle",
            True,
            step_seconds=3600.0,
        )
        for sid in ids
    ]
    end = data["timestamp"].max().isoformat()
    persist.save_models(url, models, watermarks=dict.fromkeys(ids, end))
    last = data.sort_values("timestamp").groupby("series_id").tail(1)
    incident_store.write_labels(url, "run-1", last[["series_id", "rack", "firmware"]])
    incident_store.refresh_incidents(url, "run-1")
    return source, truth
