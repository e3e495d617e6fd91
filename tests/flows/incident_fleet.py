"""An invented fleet with attributes for the incident flow tests
(simulated by :func:`changekind.tasks.simulate.vault_fleet`).

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

import pandas as pd

from changekind.tasks.simulate import VAULT_SINGLES as SINGLES
from changekind.tasks.simulate import VAULT_SPIKE_AT as SPIKE_AT
from changekind.tasks.simulate import VAULT_START as START
from changekind.tasks.simulate import vault_fleet

__all__ = ["SPIKE_AT", "START", "make_incident_fleet", "store_incident_fleet", "write_source"]


def make_incident_fleet(seed: int = 5) -> tuple[pd.DataFrame, dict[str, object]]:
    """(data, truth): long-form rows with ``rack`` and ``firmware``, and what was injected
    (:func:`changekind.tasks.simulate.vault_fleet`)."""
    fleet = vault_fleet(seed)
    truth = fleet.truth
    singles = {(s, at.isoformat()) for s, at in SINGLES}
    spike = set(truth.loc[truth["event_time"] == SPIKE_AT, "series_id"])
    rollout = set(truth.loc[truth["event_type"] == "LS", "series_id"])
    return fleet.data, {"rollout": rollout, "spike": spike, "singles": singles}


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
    from changekind.tasks import persist
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
    persist.write_labels(url, "run-1", last[["series_id", "rack", "firmware"]])
    persist.refresh_incidents(url, "run-1")
    return source, truth
