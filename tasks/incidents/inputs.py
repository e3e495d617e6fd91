"""The inputs of the grouping, checked once: the fleet's labels and the stored events."""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError
from changekind.tasks.incidents.values import (
    EVENT_STATUSES,
    REQUIRED_COLUMNS,
    FleetLabels,
    _first_rows,
    label_text,
)
from changekind.tasks.types import REPORTED_TYPES

# --------------------------------------------------------------------------- inputs


def fleet_labels(
    labels: FleetLabels | pd.DataFrame | Mapping[str, Mapping[str, Any]],
) -> FleetLabels:
    """The fleet and its labels, validated.

    Parameters
    ----------
    labels : pandas.DataFrame or mapping
        One row per series of the fleet: a DataFrame indexed by series id (or
        with a ``series_id`` column) whose other columns are labels, or a
        mapping ``series_id -> {label: value}``.  Missing values (None, NaN,
        empty text) mean the label is unknown for that series.  Every series of
        the fleet needs a row, also one without labels: the rows are the fleet
        that shares are taken of.  Values are compared as text.

    Returns
    -------
    FleetLabels

    Raises
    ------
    ConfigError
        Not a DataFrame or mapping, no series, duplicate or empty series ids.
    """
    if isinstance(labels, FleetLabels):
        return labels
    if isinstance(labels, pd.DataFrame):
        frame = labels
        if "series_id" in frame.columns:
            frame = frame.set_index("series_id")
        ids = [label_text(s) for s in frame.index]
        names = [str(c) for c in frame.columns]
        columns = [[label_text(v) for v in frame[c].tolist()] for c in frame.columns]
        rows = {}
        for i, sid in enumerate(ids):
            if sid is None:
                raise ConfigError(
                    f"labels row {i} has no series id; give every row the id of its series"
                )
            if sid in rows:
                raise ConfigError(f"labels has two rows for series {sid!r}; keep one per series")
            rows[sid] = {n: col[i] for n, col in zip(names, columns, strict=True)}
    elif isinstance(labels, Mapping):
        rows = {}
        for sid, row in labels.items():
            if label_text(sid) is None:
                raise ConfigError("labels has an empty series id; give every row its series id")
            if not isinstance(row, Mapping):
                raise ConfigError(
                    f"labels of series {sid!r} is a {type(row).__name__}, not a mapping "
                    "label -> value; give {} for a series without labels"
                )
            rows[str(sid)] = {str(n): label_text(v) for n, v in row.items()}
        names = sorted({n for row in rows.values() for n in row})
    else:
        raise ConfigError(
            f"labels must be a DataFrame or a mapping series_id -> {{label: value}}, "
            f"got {type(labels).__name__}"
        )
    if not rows:
        raise ConfigError("labels has no series; give one row per series of the fleet")
    series_ids = tuple(sorted(rows))
    names = sorted(names)
    values = tuple(tuple(rows[s].get(n) for s in series_ids) for n in names)
    counts = tuple(
        tuple(sorted(Counter(v for v in col if v is not None).items())) for col in values
    )
    known = tuple(sum(v is not None for v in col) for col in values)
    index = {s: i for i, s in enumerate(series_ids)}  # a dict: it travels between processes
    return FleetLabels(series_ids, tuple(names), values, counts, known, index)


@dataclass(frozen=True, slots=True, eq=False)
class _Rows:
    """The usable event rows as arrays (one entry per event)."""

    series: np.ndarray  # object
    times: np.ndarray  # object: event_time text
    ts: np.ndarray  # int64 ns UTC
    types: np.ndarray  # object
    effect: np.ndarray
    effect_pct: np.ndarray  # NaN where none
    t_stat: np.ndarray
    status: np.ndarray  # object
    n_events: int
    n_retracted: int
    n_untimed: int


def _check_events(events: pd.DataFrame) -> _Rows:
    """Validate the event rows once and keep those that can be members.

    Raises ConfigError naming the column or the first offending rows.
    """
    if not isinstance(events, pd.DataFrame):
        raise ConfigError(
            f"events must be a pandas DataFrame of series_events rows, got {type(events).__name__}"
        )
    missing = [c for c in REQUIRED_COLUMNS if c not in events.columns]
    if missing:
        raise ConfigError(
            f"events lacks the column(s) {', '.join(missing)}; it needs "
            f"{', '.join(REQUIRED_COLUMNS)} (the series_events columns, as "
            "changekind.tasks.persist.read_events(..., include_retracted=True) returns them)"
        )
    n = len(events)
    series = np.array([label_text(s) for s in events["series_id"].tolist()], dtype=object)
    times = np.array([label_text(t) for t in events["event_time"].tolist()], dtype=object)
    bad = np.array([s is None for s in series], dtype=bool) | np.array(
        [t is None for t in times], dtype=bool
    )
    if bad.any():
        raise ConfigError(
            f"events has {int(bad.sum())} row(s) without a series_id or event_time "
            f"(first: row {int(np.flatnonzero(bad)[0])}); every event needs both"
        )
    keys = pd.MultiIndex.from_arrays([series, times])
    dup = keys.duplicated()
    if dup.any():
        raise ConfigError(
            f"events has the same (series_id, event_time) more than once: "
            f"{_first_rows(dup, series, times)}; give each event once, as series_events keeps it"
        )
    # event_ts: date-times in UTC; NaT where the event time is not a date-time.
    try:
        stamps = pd.to_datetime(events["event_ts"], utc=True)
    except (ValueError, TypeError, OverflowError) as exc:
        raise ConfigError(
            f"events column event_ts must hold date-times (UTC, NaT where none): {exc}"
        ) from None
    untimed = np.asarray(stamps.isna(), dtype=bool)
    ts = np.asarray(stamps.dt.tz_convert("UTC").astype("datetime64[ns, UTC]").array.asi8)
    types = _one_of(events, "event_type", REPORTED_TYPES, series, times)
    status = _one_of(events, "status", EVENT_STATUSES, series, times)
    numbers = {}
    for name in ("effect", "effect_pct", "t_stat"):
        try:
            numbers[name] = np.array(
                pd.to_numeric(events[name], errors="raise").to_numpy(dtype=float, na_value=np.nan)
            )
        except (ValueError, TypeError) as exc:
            raise ConfigError(f"events column {name} must hold numbers: {exc}") from None
    for name in ("effect", "t_stat"):
        wrong = ~np.isfinite(numbers[name])
        if wrong.any():
            raise ConfigError(
                f"events has a missing or infinite {name} at {_first_rows(wrong, series, times)}; "
                "every event needs a finite number there"
            )
    numbers["effect_pct"][~np.isfinite(numbers["effect_pct"])] = np.nan
    retracted = status == "retracted"
    keep = ~retracted & ~untimed
    return _Rows(
        series=series[keep],
        times=times[keep],
        ts=ts[keep],
        types=types[keep],
        effect=numbers["effect"][keep],
        effect_pct=numbers["effect_pct"][keep],
        t_stat=numbers["t_stat"][keep],
        status=status[keep],
        n_events=n,
        n_retracted=int(retracted.sum()),
        n_untimed=int((untimed & ~retracted).sum()),
    )


def _one_of(
    events: pd.DataFrame, name: str, allowed: Sequence[str], series: np.ndarray, times: np.ndarray
) -> np.ndarray:
    """Column ``name`` as text, every value one of ``allowed``."""
    values = np.array([str(v) for v in events[name].tolist()], dtype=object)
    wrong = ~np.isin(values, allowed)
    if wrong.any():
        raise ConfigError(
            f"events has unknown {name} value(s) {sorted(set(values[wrong]))} at "
            f"{_first_rows(wrong, series, times)}; use one of {', '.join(allowed)}"
        )
    return values


def _step_ns(
    step_seconds: float | pd.Timedelta | Mapping[str, float | pd.Timedelta], series: np.ndarray
) -> tuple[np.ndarray, float]:
    """Each event's sampling interval in ns, and the largest interval given (ns)."""

    def one(value: Any, what: str) -> float:
        seconds = value.total_seconds() if isinstance(value, pd.Timedelta) else value
        try:
            seconds = float(seconds)
        except (TypeError, ValueError):
            seconds = math.nan
        if not (math.isfinite(seconds) and seconds > 0):
            raise ConfigError(
                f"{what} is {value!r}; give the sampling interval in seconds, a positive number"
            )
        return seconds * 1e9

    if isinstance(step_seconds, Mapping):
        steps = {str(k): one(v, f"step_seconds of series {k!r}") for k, v in step_seconds.items()}
        absent = sorted(set(series.tolist()) - set(steps))
        if absent:
            more = f" and {len(absent) - 3} more" if len(absent) > 3 else ""
            raise ConfigError(
                f"step_seconds has no sampling interval for series "
                f"{', '.join(map(repr, absent[:3]))}{more}, which have events; give every "
                "series' interval (the step of its stored model)"
            )
        out = np.array([steps[s] for s in series.tolist()], dtype=float)
        return out, max(steps.values(), default=0.0)
    step = one(step_seconds, "step_seconds")
    return np.full(series.size, step), step
