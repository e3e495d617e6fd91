"""Time in a source: bounds, comparable keys and the representation handed on.

Timestamps are handed on as the source typed them; numbers declared as epoch
times become UTC date/times; naive times are read in the source's zone whenever
they are compared with aware ones.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError, SourceError
from changekind.tasks.fetch.values import (
    _OPTION,
    Bound,
    SourceSpec,
    TimeKind,
    _is_number,
    _to_timestamp,
)

# ---------------------------------------------------------------------------
# Time: bounds, keys and the representation handed on
# ---------------------------------------------------------------------------


def _parse_text_times(text: pd.Series) -> pd.Series:
    """Parse date/time text; naive results stay naive, aware ones become UTC.

    ISO 8601 first (fast, unambiguous), then element-wise parsing.  Raises
    ValueError naming the first value that is not a date/time.
    """
    for fmt in ("ISO8601", "mixed"):
        for utc in (False, True):
            try:
                parsed = pd.to_datetime(text, format=fmt, utc=utc)
            except (ValueError, TypeError, OverflowError):
                continue
            if parsed.dt.tz is not None:
                parsed = parsed.dt.tz_convert("UTC")
            return parsed
    coerced = pd.to_datetime(text, format="mixed", utc=True, errors="coerce")
    bad = text[coerced.isna() & text.notna()]
    raise ValueError(f"{(bad.iloc[0] if len(bad) else text.iloc[0])!r} is not a date/time")


def numeric_text(text: pd.Series) -> bool:
    """Whether text cells are all numbers (epoch seconds, sample numbers): one rule for
    every reader (detect's INPUT files too)."""
    return bool(pd.to_numeric(text, errors="coerce").notna().all())


_numeric_text = numeric_text


@dataclass(frozen=True, slots=True)
class _Axis:
    """How times of one source are compared.

    Keys are UTC-aware ``datetime64`` for date/time data (naive values read in
    ``tz``) and float64 for plain numbers.
    """

    temporal: bool
    tz: str

    @classmethod
    def of(cls, spec: SourceSpec) -> _Axis:
        temporal = spec.time_kind != "numeric" or spec.timestamp_unit is not None
        return cls(temporal, spec.timezone)

    def bound(self, value: Bound, *, what: str) -> Any:
        if value is None:
            return None
        if not self.temporal:
            if not _is_number(value):
                raise ConfigError(
                    f"{what} {value!r} is not a number but the source's timestamps are numbers; "
                    "give a number (or set a timestamp unit if they are epoch times)"
                )
            number = float(value)  # type: ignore[arg-type]
            if math.isnan(number):
                raise ConfigError(f"{what} is NaN; give a number or leave it open")
            return number
        stamp = _to_timestamp(value, what=what)
        if stamp.tzinfo is None:
            stamp = stamp.tz_localize(self.tz, ambiguous=True, nonexistent="shift_forward")
        return stamp.tz_convert("UTC").as_unit("ns")

    def key_series(self, mapped: pd.Series) -> pd.Series:
        """Per-row bounds (a Series of keys or missing) in a comparable dtype."""
        if self.temporal:
            return pd.to_datetime(mapped, utc=True)
        return pd.to_numeric(mapped).astype("float64")

    def output(self, ts: pd.Series, spec: SourceSpec) -> pd.Series:
        """The timestamp column as handed on (see the module notes)."""
        if spec.time_kind == "numeric":
            if not pd.api.types.is_numeric_dtype(ts.dtype):
                try:
                    ts = pd.to_numeric(ts)
                except (ValueError, TypeError):
                    bad = ts[pd.to_numeric(ts, errors="coerce").isna()]
                    raise SourceError(
                        f"{spec.describe}: timestamp column {spec.columns.timestamp!r} holds "
                        f"{bad.iloc[0]!r} among numbers; fix that row or choose the right column"
                    ) from None
            if spec.timestamp_unit is not None:
                try:
                    ts = pd.to_datetime(ts, unit=spec.timestamp_unit, utc=True)
                except (ValueError, OverflowError, pd.errors.OutOfBoundsDatetime) as exc:
                    raise SourceError(
                        f"{spec.describe}: timestamps are not epoch times in unit "
                        f"{spec.timestamp_unit!r} ({exc}); check the timestamp unit"
                    ) from None
            return ts
        if spec.time_kind == "datetime" and ts.dtype == object:
            try:
                return pd.to_datetime(ts)
            except (ValueError, TypeError):
                return pd.to_datetime(ts, utc=True)
        if spec.time_kind == "text" and ts.dtype == object:
            return ts.astype(str)
        return ts

    def keys(self, ts: pd.Series, spec: SourceSpec) -> pd.Series:
        """Comparable keys of the handed-on timestamp column."""
        if not self.temporal:
            return ts.astype("float64")
        if pd.api.types.is_datetime64_any_dtype(ts.dtype):
            parsed = ts
        else:
            try:
                parsed = _parse_text_times(ts)
            except ValueError as exc:
                raise SourceError(
                    f"{spec.describe}: timestamp column {spec.columns.timestamp!r}: {exc}; "
                    "fix that row or choose the right column"
                ) from None
        if parsed.dt.tz is None:
            parsed = parsed.dt.tz_localize(
                self.tz, ambiguous=np.ones(len(parsed), dtype=bool), nonexistent="shift_forward"
            )
        return parsed.dt.tz_convert("UTC")


def _time_kind_of_text(sample: pd.Series, spec: SourceSpec) -> TimeKind:
    sample = sample.dropna()
    if len(sample) == 0:
        return "text"
    if _numeric_text(sample):
        return "numeric"
    try:
        _parse_text_times(sample)
    except ValueError as exc:
        raise SourceError(
            f"{spec.describe}: timestamp column {spec.columns.timestamp!r} holds values that are "
            f"neither dates/times nor numbers: {exc}; choose the right column "
            f"({_OPTION['timestamp']}) or fix the data"
        ) from None
    return "text"


@dataclass(frozen=True, slots=True)
class _Group:
    """Series read under one time condition; keys are comparable time keys."""

    ids: tuple[str, ...]
    start: Any  # pd.Timestamp (UTC) or float; None = open
    end: Any


class _Reader(Protocol):
    def time_kind(self) -> TimeKind: ...
    def distinct_ids(self) -> list[str]: ...
    def scan(self, groups: Sequence[_Group], axis: _Axis) -> pd.DataFrame: ...
    def close(self) -> None: ...
