"""The invented demo fleet and scoring of detected events against its truth.

The scenario is our own: a fleet of storage controllers (``array-03/ctl-b``)
reporting their mean write latency (milliseconds) and mean queue depth every
five minutes.  Each series is a stationary ARMA process around the
controller's own level plus a daily profile (busier in working hours).  Known
events are injected on top, each with a story:

========================  ====  =================================================
story                      type  shape of the effect from the event time t0 on
========================  ====  =================================================
firmware rollout           LS    latency steps up by omega and stays
cache rebuild              TC    latency jumps by omega, fading as 0.8 ** k
metrics-agent glitch       AO    one sample off by omega (latency or queue depth)
front-end port fault       IO    a shock of omega in the queue depth's innovations,
                                 carried on by the series' own ARMA dynamics
clean controller           --    nothing
========================  ====  =================================================

Effect sizes are 4 to 8 innovation standard deviations of the series they hit.
Nothing here names or models a real product or company.

Attributes: every series carries ``rack`` (three arrays to a rack: ``rk1`` holds
``array-01`` .. ``array-03``) and ``firmware``: ``7.2`` everywhere, except that a
controller of the rollout runs ``7.3`` from its upgrade (its level shift) on.
:func:`with_labels` adds them to the observations as columns, as a collector
that tags its rows would; the rollout is then one incident whose members share
firmware 7.3 (:func:`score_rollout_incident`).

:func:`score_against_truth` compares any set of detected events with a truth
table of this shape; the fleet flows reuse it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from changekind.tasks.effects import EFFECTS
from changekind.tasks.errors import ConfigError
from changekind.tasks.timeaxis import parse_times
from changekind.tasks.types import EVENT_TYPES, Event

TC_DECAY = 0.8
"""Decay per grid step of an injected temporary change (cache rebuild): the demo's
scenario, not the engine's default (``changekind.tasks.effects.TC_DECAY``)."""

EFFECT_SIGMAS = (4.0, 8.0)
"""Range of injected effect sizes, in innovation standard deviations."""

METRICS = ("write-latency-ms", "queue-depth")

ROLES = ("firmware", "cache", "glitch", "fault", "clean")
"""Controller roles, dealt out in this order (then shuffled) so that even a
small fleet has every kind of event and some clean controllers."""

DEMO_START = pd.Timestamp("2031-03-03 00:00", tz="UTC")  # a Monday, invented

TRUTH_COLUMNS = ("series_id", "event_time", "event_type", "effect", "note")

LABEL_COLUMNS = ("rack", "firmware")
"""The attribute columns of the demo's source (``--label-column`` of its runs)."""
OLD_FIRMWARE, NEW_FIRMWARE = "7.2", "7.3"

DAY_FILE_GLOB = "day-*.parquet"
"""The files :func:`write_day_files` writes (``day-2031-03-03.parquet`` ...)."""


@dataclass(frozen=True, slots=True, eq=False)
class DemoFleet:
    """An invented fleet: the observations and the events injected into them.

    Attributes
    ----------
    data : pandas.DataFrame
        Long form, columns ``series_id, timestamp, value``; timestamps are UTC.
    truth : pandas.DataFrame
        Columns ``series_id, event_time, event_type, effect, note``: every
        injected event, ``effect`` being omega in the series' units.
    step : pandas.Timedelta
        The sampling interval.
    labels : pandas.DataFrame
        The series' attributes over time: ``series_id, since, rack, firmware``
        (a row per series and value change; ``since`` the first time it holds).
    """

    data: pd.DataFrame
    truth: pd.DataFrame
    step: pd.Timedelta
    labels: pd.DataFrame = None  # type: ignore[assignment]

    @property
    def rollout_series(self) -> set[str]:
        """The series the injected firmware rollout shifted."""
        notes = self.truth["note"].astype(str)
        return set(self.truth.loc[notes.str.startswith("firmware"), "series_id"])

    @property
    def series_ids(self) -> list[str]:
        return list(pd.unique(self.data["series_id"]))


@dataclass(frozen=True, slots=True)
class _Process:
    level: float
    amplitude: float
    sigma: float
    ar: float
    ma: float


def _controller_ids(n: int) -> list[str]:
    return [f"array-{i // 2 + 1:02d}/ctl-{'ab'[i % 2]}" for i in range(n)]


def _rack(controller: str) -> str:
    """Three arrays to a rack: array-01 .. array-03 in rk1."""
    array = int(controller.split("/")[0].split("-")[1])
    return f"rk{(array - 1) // 3 + 1}"


def _daily_shape(phase: np.ndarray) -> np.ndarray:
    """Working-hours bump in [-1, 1]: peak mid-afternoon, trough before dawn."""
    hours = 24.0 * phase
    return 0.75 * np.cos(2 * np.pi * (hours - 14.0) / 24.0) + 0.25 * np.cos(
        4 * np.pi * (hours - 11.0) / 24.0
    )


def _process(metric: str, rng: np.random.Generator) -> _Process:
    if metric == "write-latency-ms":
        level = rng.uniform(1.5, 4.0)
        return _Process(
            level=level,
            amplitude=level * rng.uniform(0.10, 0.20),
            sigma=level * rng.uniform(0.03, 0.05),
            ar=rng.uniform(0.30, 0.60),
            ma=0.0,
        )
    level = rng.uniform(12.0, 40.0)
    return _Process(
        level=level,
        amplitude=level * rng.uniform(0.15, 0.30),
        sigma=level * rng.uniform(0.04, 0.06),
        ar=rng.uniform(0.45, 0.70),
        ma=rng.uniform(0.15, 0.35),
    )


def _pick_times(rng: np.random.Generator, k: int, *, lo: int, hi: int, gap: int) -> list[int]:
    """``k`` positions in ``[lo, hi)``, ``gap`` or more apart (fewer if they do not fit)."""
    chosen: list[int] = []
    for _ in range(200 * max(k, 1)):
        if len(chosen) == k:
            break
        t = int(rng.integers(lo, hi))
        if all(abs(t - c) >= gap for c in chosen):
            chosen.append(t)
    return sorted(chosen)


def make_demo_fleet(
    rng: np.random.Generator,
    *,
    n_controllers: int = 12,
    days: int = 14,
    step: str | pd.Timedelta = "5min",
    inject: bool = True,
) -> DemoFleet:
    """Build the invented storage-controller fleet with known injected events.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of all randomness; the same seed gives the same fleet.
    n_controllers : int, default=12
        Controllers in the fleet; each reports two series (write latency and
        queue depth), so the default fleet has 24 series.
    days : int, default=14
        Length of history; at least 4.
    step : str or pandas.Timedelta, default="5min"
        Sampling interval; must divide a day evenly.
    inject : bool, default=True
        ``False`` draws exactly the same noise and events but leaves the events
        out of the data (the truth table still lists them), so that
        ``data_with - data_without`` is the injected effect alone; also a clean
        fleet for measuring false events.

    Returns
    -------
    DemoFleet

    Raises
    ------
    ConfigError
        A knob out of range.

    Notes
    -----
    1. Deal the roles (firmware, cache, glitch, fault, clean) to controllers.
    2. For each series draw its process (level, daily amplitude, innovation sd,
       ARMA coefficients) and its innovations; filter them through the ARMA
       polynomial after a burn-in.
    3. Draw the events of the series' role, with effects of 4-8 innovation
       sds, at times away from the first two days and the last day and at
       least half a day apart; an IO is added to the innovations before
       filtering, the other types to the observations after.
    4. Add the level and the daily profile.
    """
    if not isinstance(n_controllers, int | np.integer) or n_controllers < 1:
        raise ConfigError(f"n_controllers must be a whole number >= 1, got {n_controllers!r}")
    if not isinstance(days, int | np.integer) or days < 4:
        raise ConfigError(f"days must be a whole number >= 4 (two days warm-up), got {days!r}")
    try:
        step_td = pd.Timedelta(step)
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"step {step!r} is not a time interval such as '5min'") from exc
    day = pd.Timedelta(days=1)
    if step_td <= pd.Timedelta(0) or day % step_td != pd.Timedelta(0):
        raise ConfigError(f"step {step!r} must be positive and divide a day evenly")
    per_day = int(day / step_td)
    n = per_day * int(days)
    stamps = pd.date_range(DEMO_START, periods=n, freq=step_td)
    phase = (np.arange(n) % per_day) / per_day
    shape = _daily_shape(phase)
    burn = 200

    # Step 1: roles.
    controllers = _controller_ids(int(n_controllers))
    roles = [ROLES[i % len(ROLES)] for i in range(len(controllers))]
    roles = [roles[i] for i in rng.permutation(len(roles))]
    # The firmware goes out in the 02:00 maintenance window from the day at
    # 45 % of the history on, one controller every ~30 minutes, 16 a night.
    first_night = max(2, int(0.45 * days))
    nights = max(1, int(days) - 1 - first_night)
    wave = 0

    frames = []
    truth_rows = []
    label_rows = []
    for controller, role in zip(controllers, roles, strict=True):
        upgraded = None
        for metric in METRICS:
            series_id = f"{controller}/{metric}"
            # Step 2: the process and its innovations.
            proc = _process(metric, rng)
            shocks = rng.normal(0.0, proc.sigma, n + burn)

            # Step 3: the events of this role on this metric.
            events: list[tuple[int, str, str]] = []  # (position, type, note)
            lo, hi, gap = 2 * per_day, n - per_day, per_day // 2
            if role == "firmware" and metric == "write-latency-ms":
                night = first_night + (wave // 16) % nights
                t0 = night * per_day + per_day // 12 + (wave % 16) * max(1, per_day // 48)
                wave += 1
                upgraded = stamps[t0]
                events.append((t0, "LS", f"firmware 7.3 rollout, controller {wave} of the wave"))
            elif role == "cache" and metric == "write-latency-ms":
                (t0,) = _pick_times(rng, 1, lo=lo, hi=hi, gap=gap)
                events.append((t0, "TC", "cache rebuild after a drive swap"))
            elif role == "glitch":
                k = 1 if metric == "write-latency-ms" else int(rng.integers(0, 2))
                for t0 in _pick_times(rng, k, lo=lo, hi=hi, gap=gap):
                    events.append((t0, "AO", "metrics agent restart read a stale counter"))
            elif role == "fault" and metric == "queue-depth":
                (t0,) = _pick_times(rng, 1, lo=lo, hi=hi, gap=gap)
                events.append((t0, "IO", "front-end port fault; backlog drained on its own"))

            adds = np.zeros(n)
            for t0, kind, note in events:
                sign = 1.0 if kind != "AO" else float(rng.choice([-1.0, 1.0]))
                omega = sign * proc.sigma * rng.uniform(*EFFECT_SIGMAS)
                truth_rows.append((series_id, stamps[t0], kind, float(omega), note))
                if not inject:
                    continue
                if kind == "IO":  # an innovation: the process's psi(B) carries it
                    shocks[burn + t0] += omega
                else:  # AO, LS, TC: the registry's paths
                    adds[t0:] += omega * EFFECTS[kind].path(n - t0, delta=TC_DECAY)

            noise = lfilter([1.0, proc.ma], [1.0, -proc.ar], shocks)[burn:]
            # Step 4: level and daily profile.
            values = proc.level + proc.amplitude * shape + noise + adds
            frames.append(
                pd.DataFrame({"series_id": series_id, "timestamp": stamps, "value": values})
            )
        for metric in METRICS:  # the controller's firmware applies to both its series
            series_id = f"{controller}/{metric}"
            label_rows.append((series_id, stamps[0], _rack(controller), OLD_FIRMWARE))
            if upgraded is not None:
                label_rows.append((series_id, upgraded, _rack(controller), NEW_FIRMWARE))

    data = pd.concat(frames, ignore_index=True)
    truth = pd.DataFrame(truth_rows, columns=list(TRUTH_COLUMNS))
    truth["event_time"] = pd.to_datetime(truth["event_time"], utc=True)
    labels = pd.DataFrame(label_rows, columns=["series_id", "since", *LABEL_COLUMNS])
    return DemoFleet(data=data, truth=truth, step=step_td, labels=labels)


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
