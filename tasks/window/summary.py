"""Windows of a fine-grained series: the width, the summaries, and which windows are complete.

:func:`parse_window` and :func:`window_text` read and write a window width;
:func:`summarize_windows` aggregates the raw points into fixed windows (first,
max, min, last, median, robust spread, count); :func:`complete_windows`,
:func:`count_windows` and :func:`last_window_label` are the bookkeeping of a
warm scan in windowed mode.

Windows are left-closed, ``[start, start + window)``, labelled by their start
and aligned to the Unix epoch, as ``pandas.Timestamp.floor`` aligns them: a 10 s
window starts at :00, :10, ...; a window that divides a day starts at midnight.
A naive time is UTC (:mod:`changekind.tasks.timeaxis`): windows are aligned in UTC
(labels are given back in the input's zone).
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from datetime import timedelta

import numpy as np
import pandas as pd
from pandas.tseries.frequencies import to_offset
from scipy.special import ndtri

from changekind.tasks.decompose import MAX_GRID_RATIO, MIN_POINTS, check_values
from changekind.tasks.errors import (
    AllMissingError,
    ConfigError,
    SeriesError,
    TimestampError,
    TooShortError,
)
from changekind.tasks.timeaxis import parse_times
from changekind.tasks.types import format_duration

MIN_WINDOWS = MIN_POINTS
"""Fewest windows with data that windowed detection accepts (the engine's own
minimum number of points)."""


MIN_POINTS_PER_WINDOW = 2
"""A window must hold at least this many points (median over the windows with
data); a shorter window only copies the raw series."""


MAD_SCALE = float(1.0 / ndtri(0.75))
"""1.4826...: makes the MAD a consistent estimate of the standard deviation of
normal data (the same scaling as ``scipy.stats.median_abs_deviation(...,
scale="normal")``)."""


WINDOW_EXAMPLES = "'250ms', '10s', '1min', '15min', '1h'"


_NUMBER = re.compile(r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$")


@dataclass(frozen=True, slots=True, eq=False)
class WindowSummary:
    """A raw series aggregated into fixed, regular windows.

    Every window from the first with data to the last with data is present;
    a window without observations has ``count`` 0 and NaN aggregates (as in
    ``pandas.DataFrame.resample``).  Missing raw values are not counted.

    Attributes
    ----------
    series_id : str
    window : pandas.Timedelta
        Window width.
    index : pandas.DatetimeIndex of shape (n_windows,)
        Window starts (naive, or in the input's time zone).
    first, max, min, last, median : ndarray of shape (n_windows,)
        Of the observed values in each window, in time order.
    spread : ndarray of shape (n_windows,)
        Normalized MAD, ``1.4826 * median(|x - median(x)|)``: the standard
        deviation for normal data, unmoved by a spike inside the window
        (breakdown 50 %; the IQR's is 25 %, at the same efficiency of about
        37 %).  0 for a window of one point.
    count : ndarray of int64, shape (n_windows,)
    nobs : int
        Raw observed points summarized.
    """

    series_id: str
    window: pd.Timedelta
    index: pd.DatetimeIndex
    first: np.ndarray
    max: np.ndarray
    min: np.ndarray
    last: np.ndarray
    median: np.ndarray
    spread: np.ndarray
    count: np.ndarray
    nobs: int

    @property
    def n_windows(self) -> int:
        return len(self.index)

    @property
    def n_empty(self) -> int:
        return int((self.count == 0).sum())

    def to_frame(self) -> pd.DataFrame:
        """The windows as a frame indexed by window start."""
        return pd.DataFrame(
            {
                "first": self.first,
                "max": self.max,
                "min": self.min,
                "last": self.last,
                "median": self.median,
                "spread": self.spread,
                "count": self.count,
            },
            index=pd.Index(self.index, name="window_start"),
        )


def parse_window(text: str | pd.Timedelta | timedelta) -> pd.Timedelta:
    """A window width from text such as ``"10s"``, ``"1min"``, ``"250ms"``.

    Parameters
    ----------
    text : str, pandas.Timedelta or datetime.timedelta
        A pandas offset alias with a fixed length (``"250ms"``, ``"10s"``,
        ``"1min"``, ``"1h30min"``, ``"1D"``) or duration text pandas reads
        (``"5 minutes"``).  A Timedelta is taken as it is.

    Returns
    -------
    pandas.Timedelta
        Positive.

    Raises
    ------
    ConfigError
        Unknown text, a bare number (no unit), a calendar offset (months,
        weeks anchored to a weekday, business days), or a width that is not
        positive.
    """
    if isinstance(text, pd.Timedelta | timedelta):
        width = pd.Timedelta(text)
        if width is pd.NaT or width <= pd.Timedelta(0):
            raise ConfigError(f"window {text!s} is not positive; give e.g. {WINDOW_EXAMPLES}")
        return width
    if not isinstance(text, str) or not text.strip():
        raise ConfigError(f"window {text!r} is not a duration; give e.g. {WINDOW_EXAMPLES}")
    raw = text.strip()
    if _NUMBER.match(raw):
        raise ConfigError(
            f"window {raw!r} has no unit; give a number with a unit, e.g. {WINDOW_EXAMPLES}"
        )
    width = None
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # deprecated aliases fall through to Timedelta
        try:
            offset = to_offset(raw)
        except (ValueError, TypeError, Warning):
            offset = None
        if offset is not None:
            try:
                width = pd.Timedelta(offset)
            except (ValueError, TypeError, Warning):
                raise ConfigError(
                    f"window {raw!r} is a calendar offset ({offset.freqstr}) without a fixed "
                    f"length; give a fixed duration such as {WINDOW_EXAMPLES}"
                ) from None
        else:
            try:
                width = pd.Timedelta(raw)
            except (ValueError, TypeError, OverflowError, Warning):
                width = None
    if width is None or width is pd.NaT:
        raise ConfigError(
            f"window {raw!r} is not a duration pandas understands; give e.g. {WINDOW_EXAMPLES}"
        )
    if width <= pd.Timedelta(0):
        raise ConfigError(f"window {raw!r} is not positive; give e.g. {WINDOW_EXAMPLES}")
    return width


def summarize_windows(
    series_id: str, timestamps, values, window: str | pd.Timedelta
) -> WindowSummary:
    """Aggregate raw observations of one series into fixed windows.

    Parameters
    ----------
    series_id : str
        Name used in results and error messages.
    timestamps : array-like of shape (nobs,)
        Datetimes or ISO text (naive or with a zone); need not be sorted.
    values : array-like of shape (nobs,)
        Numbers; missing values (None, NaN) are allowed and not counted.
    window : str or pandas.Timedelta
        Window width (see :func:`parse_window`).

    Returns
    -------
    WindowSummary

    Raises
    ------
    ConfigError
        The window is not a duration.
    NonNumericError, NonFiniteError, TimestampError, AllMissingError
        Bad values or timestamps (plain-number timestamps included: windows of
        time need dates/times).
    TooShortError
        Fewer than ``MIN_WINDOWS`` windows hold data.
    SeriesError
        The window holds fewer than two points (shorter than the spacing), or
        the windows would be mostly empty.

    Notes
    -----
    1. Parse the window, the values and the timestamps (aware times to UTC).
    2. Window key = floor(ns since the epoch / window ns); sort by time.
    3. Per window (contiguous after the sort): first, last, max, min, count;
       median and MAD from one sort by (window, value).
    4. Put the windows on the full grid from the first to the last key.
    """
    # Step 1: inputs.
    width = parse_window(window)
    vals = check_values(series_id, values)
    if len(vals) != len(timestamps):
        raise SeriesError(series_id, "timestamps and values have different lengths")
    stamps, tz = _datetimes(series_id, timestamps)
    if stamps.dtype.kind != "M":
        raise TimestampError(
            series_id,
            "timestamps are plain numbers; windows of time need dates/times (ISO 8601 text, "
            "or epoch numbers read with a timestamp unit)",
        )
    ok = ~np.isnan(vals)
    if not ok.any():
        raise AllMissingError(series_id, "every value is missing; check the value column")

    # Step 2: keys, in time order.
    ns = stamps.view("i8")[ok]
    v = vals[ok]
    order = np.argsort(ns, kind="stable")
    ns, v = ns[order], v[order]
    w_ns = int(width.value)
    key = np.floor_divide(ns, w_ns)

    # Step 3: aggregates per window.
    starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    ends = np.r_[starts[1:], key.size]
    counts = ends - starts
    _check_shape(series_id, width, key, counts, ns)
    first = v[starts]
    last = v[ends - 1]
    vmax = np.maximum.reduceat(v, starts)
    vmin = np.minimum.reduceat(v, starts)
    med = _group_median(key, v, starts, counts)
    dev = np.abs(v - np.repeat(med, counts))
    mad = MAD_SCALE * _group_median(key, dev, starts, counts)

    # Step 4: the full grid of windows.
    k0 = int(key[0])
    n_windows = int(key[-1]) - k0 + 1
    slot = key[starts] - k0

    def grid(x: np.ndarray) -> np.ndarray:
        out = np.full(n_windows, np.nan)
        out[slot] = x
        return out

    count = np.zeros(n_windows, dtype=np.int64)
    count[slot] = counts
    index = pd.DatetimeIndex(((k0 + np.arange(n_windows)) * w_ns).astype("datetime64[ns]"))
    if tz is not None:
        index = index.tz_localize("UTC").tz_convert(tz)
    return WindowSummary(
        series_id=series_id,
        window=width,
        index=index,
        first=grid(first),
        max=grid(vmax),
        min=grid(vmin),
        last=grid(last),
        median=grid(med),
        spread=grid(mad),
        count=count,
        nobs=int(v.size),
    )


def window_text(window: str | pd.Timedelta | timedelta) -> str:
    """The canonical text of a window width (``"10s"``, ``"90s"``, ``"h"``...).

    The fleet flows store it with each windowed model, so a run with another
    width (``"10S"``, ``"10 seconds"`` are the same width) is recognised as
    the same or as a change that needs a new model.
    """
    return str(to_offset(parse_window(window)).freqstr)


def complete_windows(series_id: str, timestamps, window: str | pd.Timedelta, end=None):
    """Which raw points lie in complete windows, as a boolean array.

    The last window holding data may still be filling (a scan reads up to
    now); it is held back for the next run unless ``end`` (the read's
    exclusive upper bound, a timestamp) is at or after its end.  Every earlier
    window is complete: data arrive in time order.
    """
    width = parse_window(window)
    stamps, _ = _datetimes(series_id, timestamps)
    if stamps.size == 0:
        return np.zeros(0, dtype=bool)
    w_ns = int(width.value)
    key = np.floor_divide(stamps.view("i8"), w_ns)
    last = int(key.max())
    if end is not None:
        bound = pd.Timestamp(end)
        if bound.tzinfo is not None:
            bound = bound.tz_convert("UTC").tz_localize(None)
        if (last + 1) * w_ns <= int(bound.as_unit("ns").value):
            return np.ones(stamps.size, dtype=bool)
    return key < last


def count_windows(series_id: str, timestamps, values, window: str | pd.Timedelta) -> int:
    """How many windows hold at least one observed (non-missing) value."""
    width = parse_window(window)
    stamps, _ = _datetimes(series_id, timestamps)
    ok = ~np.isnan(check_values(series_id, values))
    keys = np.floor_divide(stamps.view("i8")[ok], int(width.value))
    return int(np.unique(keys).size)


def last_window_label(summary: WindowSummary) -> str:
    """ISO text of the last window start holding data (a windowed series' watermark)."""
    ok = np.flatnonzero(summary.count > 0)
    return summary.index[int(ok[-1]) if ok.size else -1].isoformat()


def _datetimes(series_id: str, timestamps) -> tuple[np.ndarray, object]:
    """UTC-naive datetime64[ns] and the input's time zone (None for naive input).

    Parsed by :func:`~changekind.tasks.timeaxis.parse_times`: a naive time is
    UTC, text is ISO 8601, mixed UTC offsets (a local zone across a
    daylight-saving change) are read as UTC; numbers are refused.
    """
    stamps = parse_times(series_id, timestamps)
    if not stamps.axis.is_datetime:
        raise TimestampError(
            series_id,
            "timestamps are plain numbers; windows of time need dates/times (ISO 8601 text, "
            "or epoch numbers read with a timestamp unit)",
        )
    return stamps.utc_naive(), stamps.axis.zone


def _check_shape(
    series_id: str, width: pd.Timedelta, key: np.ndarray, counts: np.ndarray, ns: np.ndarray
) -> None:
    """Refuse windows too long (too few of them) or too short (one point each)."""
    span = format_duration((int(ns[-1]) - int(ns[0])) / 1e9)
    name = format_duration(width.total_seconds())
    if counts.size < MIN_WINDOWS:
        longest = format_duration(max((int(ns[-1]) - int(ns[0])) / 1e9 / MIN_WINDOWS, 1e-9))
        raise TooShortError(
            series_id,
            f"a window of {name} gives only {counts.size} window(s) with data over the series' "
            f"{span} ({key.size} points); at least {MIN_WINDOWS} are needed: choose a window "
            f"of at most about {longest}",
        )
    typical = float(np.median(counts))
    if typical < MIN_POINTS_PER_WINDOW:
        spacing = format_duration(float(np.median(np.diff(ns))) / 1e9) if ns.size > 1 else "?"
        raise SeriesError(
            series_id,
            f"a window of {name} holds a median of {typical:g} point(s) (the series' spacing is "
            f"about {spacing}); choose a window several times the spacing",
        )
    n_windows = int(key[-1] - key[0]) + 1
    if n_windows > MAX_GRID_RATIO * counts.size and n_windows > 10_000:
        raise SeriesError(
            series_id,
            f"windows of {name} would be mostly empty ({counts.size} of {n_windows} hold data); "
            "the series has long gaps: choose a longer window or read a shorter span",
        )


def _group_median(key: np.ndarray, x: np.ndarray, starts: np.ndarray, counts: np.ndarray):
    """Median of ``x`` within each contiguous group of ``key`` (one lexsort)."""
    order = np.lexsort((x, key))
    sx = x[order]
    lo = sx[starts + (counts - 1) // 2]
    hi = sx[starts + counts // 2]
    return 0.5 * (lo + hi)
