"""The demo fleet on disk, and scoring of detected events against its truth.

The fleet itself (storage controllers with injected firmware rollouts, cache
rebuilds, agent glitches and port faults) is simulated by
:func:`changekind.tasks.simulate.make_demo_fleet`, whose docstring tells the
scenario.  Here: :func:`with_labels` adds the series' attributes (``rack``,
``firmware``) to the observations as columns, as a collector that tags its
rows would, and :func:`write_day_files` writes a Parquet file a day; the
rollout is then one incident whose members share firmware 7.3
(:func:`score_rollout_incident`).

:func:`score_against_truth` compares any set of detected events with a truth
table of this shape; the fleet flows reuse it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError
from changekind.tasks.simulate import NEW_FIRMWARE
from changekind.tasks.timeaxis import parse_times
from changekind.tasks.types import EVENT_TYPES, Event

DAY_FILE_GLOB = "day-*.parquet"
"""The files :func:`write_day_files` writes (``day-2031-03-03.parquet`` ...)."""


def with_labels(data: pd.DataFrame, labels: pd.DataFrame) -> pd.DataFrame:
    """The observations with each row's attributes (the value in force at its time).

    Parameters
    ----------
    data : pandas.DataFrame
        Long form ``series_id, timestamp, value``.
    labels : pandas.DataFrame
        ``series_id, since`` and attribute columns (a :class:`DemoFleet`'s labels).
    """
    names = [c for c in labels.columns if c not in ("series_id", "since")]
    left = data.assign(_order=np.arange(len(data))).sort_values("timestamp", kind="stable")
    right = labels.sort_values("since", kind="stable")
    merged = pd.merge_asof(
        left, right, left_on="timestamp", right_on="since", by="series_id", direction="backward"
    )
    merged = merged.sort_values("_order", kind="stable").reset_index(drop=True)
    return merged[[*data.columns, *names]]


def write_day_files(
    data: pd.DataFrame,
    folder: str | Path,
    *,
    first: int = 0,
    last: int | None = None,
    labels: pd.DataFrame | None = None,
) -> list[Path]:
    """Write days ``first <= k < last`` of a fleet as one Parquet file per UTC day.

    The folder becomes a Parquet dataset that grows by a file a day, as a
    collector would leave it: ``day-2031-03-03.parquet``, ... (rows sorted by
    series and time, so a read of some series skips the others' row groups).

    Parameters
    ----------
    data : pandas.DataFrame
        Long form ``series_id, timestamp, value`` (a :class:`DemoFleet`'s data).
    folder : str or pathlib.Path
        Created if missing; files of the same days are overwritten.
    first, last : int
        Day numbers counted from the first timestamp's day; ``last`` None
        means through the last day.
    labels : pandas.DataFrame, optional
        The fleet's attributes over time (:attr:`DemoFleet.labels`), written as
        columns beside the values (:func:`with_labels`).

    Returns
    -------
    list of pathlib.Path
        The files written, in day order.
    """
    if labels is not None:
        data = with_labels(data, labels)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    stamps = pd.to_datetime(data["timestamp"], utc=True)
    day = stamps.dt.floor("D")
    number = ((day - day.min()) / pd.Timedelta(days=1)).astype(int)
    end = int(number.max()) + 1 if last is None else last
    written = []
    for k in range(first, end):
        part = data[number == k]
        if part.empty:
            continue
        part = part.sort_values(["series_id", "timestamp"], kind="stable")
        path = folder / f"day-{day[number == k].iloc[0]:%Y-%m-%d}.parquet"
        part.to_parquet(path, index=False)
        written.append(path)
    return written


# --------------------------------------------------------------------------- scoring


@dataclass(frozen=True, slots=True, eq=False)
class Score:
    """How detected events compare with injected ones.

    Attributes
    ----------
    n_injected, n_detected, n_matched, n_typed : int
        Injected events; detected events; injected events with a detected event
        within the tolerance; matched events whose detected type is right.
    recall : float
        ``n_matched / n_injected`` (NaN without injected events).
    type_accuracy : float
        ``n_typed / n_matched`` (NaN without matches).
    false_events : int
        Detected events matched to no injected event.
    per_type : pandas.DataFrame
        One row per injected type (AO, LS, TC, IO): ``injected``, ``found``,
        ``typed``, ``recall``, ``type_accuracy`` and ``called_AO`` ...
        ``called_IO`` (what the matched events were called).
    matches : pandas.DataFrame
        One row per matched pair: ``series_id``, ``true_time``, ``true_type``,
        ``event_time``, ``event_type``, ``offset`` (grid steps, detected minus
        true).
    """

    n_injected: int
    n_detected: int
    n_matched: int
    n_typed: int
    recall: float
    type_accuracy: float
    false_events: int
    per_type: pd.DataFrame
    matches: pd.DataFrame


def _events_frame(events: Sequence[Event] | pd.DataFrame) -> pd.DataFrame:
    if isinstance(events, pd.DataFrame):
        missing = [c for c in ("series_id", "event_time", "event_type") if c not in events]
        if missing:
            raise ConfigError(f"events table lacks column(s) {', '.join(missing)}")
        return events[["series_id", "event_time", "event_type"]].reset_index(drop=True)
    rows = [(e.series_id, e.event_time, e.event_type) for e in events]
    return pd.DataFrame(rows, columns=["series_id", "event_time", "event_type"])


def _positions(times: pd.Series, step) -> np.ndarray:
    """Times as float positions in units of ``step`` (any common origin)."""
    if isinstance(step, int | float | np.integer | np.floating):
        if step <= 0:
            raise ConfigError(f"step must be positive, got {step!r}")
        return pd.to_numeric(times).to_numpy(dtype=float) / float(step)
    try:
        step_td = pd.Timedelta(step)
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"step {step!r} is not a time interval such as '5min'") from exc
    if step_td <= pd.Timedelta(0):
        raise ConfigError(f"step must be positive, got {step!r}")
    ns = parse_times("scored events", pd.Series(times, dtype=object)).instants  # UTC (timeaxis)
    return ns.astype(float) / float(step_td.value)


def score_against_truth(
    events: Sequence[Event] | pd.DataFrame,
    truth: pd.DataFrame,
    *,
    step: str | pd.Timedelta | float,
    tolerance: int = 2,
) -> Score:
    """Match detected events to injected ones and count hits, types and false events.

    Parameters
    ----------
    events : sequence of Event, or pandas.DataFrame
        Detected events; a frame needs ``series_id, event_time, event_type``
        (for example the records of ``changekind detect --json``).
    truth : pandas.DataFrame
        Injected events with ``series_id, event_time, event_type``.
    step : str, pandas.Timedelta or float
        The grid spacing (a number for unitless numeric grids).
    tolerance : int, default=2
        A detection within this many grid steps of an injected event, in the
        same series, counts as finding it.

    Returns
    -------
    Score

    Notes
    -----
    1. Express every time in grid steps.  2. Within each series, list the
    (injected, detected) pairs no more than ``tolerance`` apart.  3. Take pairs
    greedily, closest first (a same-type pair first among equally close ones),
    each event at most once.  4. Count.
    """
    if tolerance < 0:
        raise ConfigError(f"tolerance must be >= 0 grid steps, got {tolerance!r}")
    found = _events_frame(events)
    true = truth[["series_id", "event_time", "event_type"]].reset_index(drop=True)

    # Step 1: times in grid steps.
    found_pos = _positions(found["event_time"], step) if len(found) else np.array([])
    true_pos = _positions(true["event_time"], step) if len(true) else np.array([])

    # Step 2: candidate pairs within the tolerance, per series.
    pairs = []
    found_by_series = found.groupby("series_id", sort=False).indices if len(found) else {}
    for i, sid in enumerate(true["series_id"]):
        for j in found_by_series.get(sid, ()):
            dist = abs(found_pos[j] - true_pos[i])
            if dist <= tolerance + 1e-9:
                same = found["event_type"].iat[j] == true["event_type"].iat[i]
                pairs.append((dist, not same, i, int(j)))

    # Step 3: greedy, closest first.
    used_true: set[int] = set()
    used_found: set[int] = set()
    matched = []
    for _dist, _same, i, j in sorted(pairs):
        if i in used_true or j in used_found:
            continue
        used_true.add(i)
        used_found.add(j)
        matched.append((i, j, float(found_pos[j] - true_pos[i])))

    # Step 4: counts.
    matches = pd.DataFrame(
        {
            "series_id": [true["series_id"].iat[i] for i, _, _ in matched],
            "true_time": [true["event_time"].iat[i] for i, _, _ in matched],
            "true_type": [true["event_type"].iat[i] for i, _, _ in matched],
            "event_time": [found["event_time"].iat[j] for _, j, _ in matched],
            "event_type": [found["event_type"].iat[j] for _, j, _ in matched],
            "offset": [off for _, _, off in matched],
        }
    )
    rows = {}
    for kind in EVENT_TYPES:
        injected = int((true["event_type"] == kind).sum())
        mine = matches[matches["true_type"] == kind]
        typed = int((mine["event_type"] == kind).sum())
        row = {
            "injected": injected,
            "found": len(mine),
            "typed": typed,
            "recall": len(mine) / injected if injected else np.nan,
            "type_accuracy": typed / len(mine) if len(mine) else np.nan,
        }
        for called in EVENT_TYPES:
            row[f"called_{called}"] = int((mine["event_type"] == called).sum())
        rows[kind] = row
    per_type = pd.DataFrame.from_dict(rows, orient="index")
    per_type.index.name = "event_type"

    n_injected, n_matched = len(true), len(matched)
    n_typed = int((matches["true_type"] == matches["event_type"]).sum()) if n_matched else 0
    return Score(
        n_injected=n_injected,
        n_detected=len(found),
        n_matched=n_matched,
        n_typed=n_typed,
        recall=n_matched / n_injected if n_injected else float("nan"),
        type_accuracy=n_typed / n_matched if n_matched else float("nan"),
        false_events=len(found) - n_matched,
        per_type=per_type,
        matches=matches,
    )


# --------------------------------------------------------------------------- the rollout incident


@dataclass(frozen=True, slots=True)
class RolloutScore:
    """How the incidents found compare with the injected firmware rollout.

    ``incident_id`` is the incident holding most of the rollout's series
    (None when no incident holds any); ``n_rollout`` the series the rollout
    shifted, ``n_found`` those among its members, ``n_other`` its members
    outside the rollout; ``shared`` its shared attributes (label -> value);
    ``other_incidents`` how many other incidents hold rollout series (a
    rollout split in pieces).
    """

    incident_id: str | None
    n_rollout: int
    n_found: int
    n_other: int
    shared: tuple[tuple[str, str], ...]
    other_incidents: int

    @property
    def firmware_shared(self) -> bool:
        return dict(self.shared).get("firmware") == NEW_FIRMWARE

    def words(self) -> str:
        if self.incident_id is None:
            return f"the rollout's {self.n_rollout} series form no incident"
        shared = ", ".join(f"{k}={v}" for k, v in self.shared) or "none found"
        text = (
            f"{self.n_found} of the rollout's {self.n_rollout} series in incident "
            f"{self.incident_id} ({self.n_other} other member(s)); shared attributes: {shared}"
        )
        if self.other_incidents:
            text += f"; {self.other_incidents} other incident(s) hold rollout series"
        return text


def score_rollout_incident(incidents: Sequence, rollout: set[str]) -> RolloutScore:
    """Compare incidents (``changekind.tasks.incidents.Incident`` values) with the rollout.

    Reference: the injected truth (:attr:`DemoFleet.rollout_series`).
    """
    holding = [(len(set(i.series_ids) & rollout), i) for i in incidents]
    holding = [(k, i) for k, i in holding if k > 0]
    if not holding:
        return RolloutScore(None, len(rollout), 0, 0, (), 0)
    k, best = max(holding, key=lambda h: (h[0], -h[1].n_series, h[1].incident_id))
    return RolloutScore(
        incident_id=best.incident_id,
        n_rollout=len(rollout),
        n_found=k,
        n_other=best.n_series - k,
        shared=tuple(sorted(best.shared_labels.items())),
        other_incidents=len(holding) - 1,
    )
