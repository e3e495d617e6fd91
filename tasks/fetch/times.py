"""Time in a source: bounds, comparable keys and the representation handed on.

Timestamps are handed on as the source typed them; numbers declared as epoch
times become UTC date/times.  A naive time is UTC (the rule of
:mod:`changekind.tasks.timeaxis`), bounds included; a source that declares
the zone of its naive stamps (``timezone``) has them handed on aware, text
with its offset, so that downstream they mean the instant of their row.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError, SourceError, TimestampError
from changekind.tasks.fetch.values import (
    _OPTION,
    Bound,
    SourceSpec,
    TimeKind,
    _is_number,
    _to_timestamp,
)
from changekind.tasks.timeaxis import parse_times

# ---------------------------------------------------------------------------
# Time: bounds, keys and the representation handed on
# ---------------------------------------------------------------------------


def _parse_text_times(text: pd.Series) -> pd.Series:
    """Parse date/time text; naive results stay naive, aware ones become UTC.

    ISO 8601 only, by :func:`~changekind.tasks.timeaxis.parse_times`.  Raises
    ValueError naming the first value that is not a date/time.
    """
    try:
        stamps = parse_times("source", text.reset_index(drop=True))
    except TimestampError as exc:
        raise ValueError(exc.problem) from None
    if not stamps.axis.is_datetime:
        raise ValueError(f"{text.iloc[0]!r} is a number among dates/times")
    out = pd.Series(stamps.utc_naive(), index=text.index)
    return out if stamps.axis.zone is None else out.dt.tz_localize("UTC")


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
        # A naive bound is UTC (timeaxis' rule): the declared zone is the stamps', not the bounds'.
        return _to_timestamp(value, what=what)

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
                ts = pd.to_datetime(ts)
            except (ValueError, TypeError):
                ts = pd.to_datetime(ts, utc=True)
        if spec.time_kind == "text" and ts.dtype == object:
            ts = ts.astype(str)
        if self.tz != "UTC":
            return self._declared(ts, spec)
        return ts

    def _declared(self, ts: pd.Series, spec: SourceSpec) -> pd.Series:
        """Naive stamps in the declared zone, handed on aware (text: with their offset).

        The declaration is applied once, here: downstream, a naive time is UTC.
        """
        if pd.api.types.is_datetime64_any_dtype(ts.dtype):
            if ts.dt.tz is not None:
                return ts
            return ts.dt.tz_localize(
                self.tz, ambiguous=np.ones(len(ts), dtype=bool), nonexistent="shift_forward"
            )
        try:
            stamps = parse_times(spec.describe, ts, naive_zone=self.tz)
        except TimestampError as exc:
            raise SourceError(
                f"{spec.describe}: timestamp column {spec.columns.timestamp!r}: {exc.problem}"
            ) from None
        return pd.Series([stamps.label(i) for i in range(len(stamps))], index=ts.index)

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
