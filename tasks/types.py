"""Value types shared by the steps.

Every result that crosses a step boundary is a frozen dataclass defined here;
no bare dicts.  Field names follow statsmodels where there is one (``params``,
``sigma2``, ``nobs``, ``converged``, ``n_iter``).
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any, Literal

import numpy as np
import pandas as pd

from changekind.tasks.errors import ModelError

EventType = Literal["AO", "LS", "TC", "IO", "VC"]
EVENT_TYPES: tuple[EventType, ...] = ("AO", "LS", "TC", "IO")
"""The four intervention types the engine classifies.  ``"VC"`` (variance
change) is not among them: windowed mode reports it from a step in the window
spreads (changekind.tasks.window)."""
REPORTED_TYPES: tuple[EventType, ...] = (*EVENT_TYPES, "VC")
"""Every type an event row can carry: the four, and windowed mode's variance change."""
EVENT_NAMES: dict[str, str] = {
    "AO": "additive outlier",
    "LS": "level shift",
    "TC": "temporary change",
    "IO": "innovational outlier",
    "VC": "variance change",
}
Status = Literal["provisional", "confirmed"]


STORED_DIGITS = 10
"""Significant digits kept in reported numbers.  The same analysis run twice can
differ in the last bits of a float (BLAS kernels sum in an order that depends
on memory alignment); rounding to 10 digits makes reruns store identical
values, far below any precision the statistics have."""


def number(value: object, fmt: str) -> str:
    """``value`` formatted with ``fmt``, or ``-`` when it is missing, not a number
    or not finite: the one number formatting of tables, pages and summaries."""
    if value is None:
        return "-"
    try:
        x = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return "-"
    return format(x, fmt) if math.isfinite(x) else "-"


def round_sig(value: float, digits: int = STORED_DIGITS) -> float:
    """``value`` rounded to ``digits`` significant digits (non-finite values unchanged)."""
    if not math.isfinite(value) or value == 0:
        return value
    return float(f"{value:.{digits}g}")


def format_duration(seconds: float) -> str:
    """Readable duration: ``'250 ms'``, ``'42 s'``, ``'3.5 min'``, ``'2 h'``, ``'3.2 d'``."""
    if not math.isfinite(seconds):
        return "inf"
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0), ("s", 1.0)):
        if abs(seconds) >= size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds * 1000:.3g} ms"


def _optional_float(value: Any) -> float | None:
    return None if value is None else float(value)


class StampLabels(Sequence):
    """Labels of a datetime grid: each observed stamp's ISO text, made when asked.

    ``stamps`` holds one zone-less datetime64[ns] per grid point (NaT for a
    gap); ``labels[i]`` is ``Timestamp.isoformat()`` of a whole-second stamp,
    so building a series does not format text for every point.
    """

    __slots__ = ("_stamps",)

    def __init__(self, stamps: np.ndarray) -> None:
        self._stamps = stamps

    def __len__(self) -> int:
        return int(self._stamps.size)

    def __getitem__(self, i):
        if isinstance(i, slice):
            return StampLabels(self._stamps[i])
        stamp = self._stamps[i]
        return None if np.isnat(stamp) else str(np.datetime_as_string(stamp, unit="s"))


@dataclass(frozen=True, slots=True, eq=False)
class RegularSeries:
    """A series on a regular grid.

    ``index`` is regular with spacing ``step``; grid points with no observation
    hold NaN in ``values``.  ``labels[i]`` is the timestamp of point ``i`` as the
    input gave it (None for a gap), so results can quote the input's own text.
    Datetime grids have a ``pd.Timedelta`` step; numeric grids a float step.
    """

    series_id: str
    index: pd.Index
    values: np.ndarray
    step: pd.Timedelta | float
    labels: Sequence[str | None]
    n_duplicates: int = 0
    business_days: bool = False

    @property
    def nobs(self) -> int:
        return int(self.values.size)

    @property
    def n_missing(self) -> int:
        return int(np.isnan(self.values).sum())

    @property
    def is_datetime(self) -> bool:
        return isinstance(self.index, pd.DatetimeIndex)

    @property
    def step_seconds(self) -> float:
        """The grid spacing in seconds (datetime grids) or index units (numeric)."""
        if isinstance(self.step, pd.Timedelta):
            return self.step.total_seconds()
        return float(self.step)

    def label(self, i: int) -> str:
        """Timestamp of grid point ``i`` as given, or in ISO form for a gap."""
        given = self.labels[i]
        if given is not None:
            return given
        stamp = self.index[i]
        if isinstance(stamp, pd.Timestamp):
            return stamp.isoformat()
        number = float(stamp)  # one text per number, as TimeAxis.label writes it
        return str(int(number)) if number.is_integer() else repr(number)

    def tail(self, n: int) -> RegularSeries:
        """The last ``n`` grid points as a series of their own."""
        n = min(n, self.nobs)
        return RegularSeries(
            self.series_id,
            self.index[-n:],
            self.values[-n:],
            self.step,
            self.labels[-n:],
            0,
            self.business_days,
        )


@dataclass(frozen=True, slots=True, eq=False)
class Decomposition:
    """A regular series split into a seasonal part and what the ARIMA sees.

    ``adjusted = observed - seasonal``.  The seasonal part is the sum of one
    zero-mean profile per period in ``periods``; ``profiles[k][j]`` is the value
    at phase ``j`` of period ``periods[k]``, phase 0 being grid point 0 of
    ``series``.  The trend is never removed: it stays in ``adjusted``.
    """

    series: RegularSeries
    periods: tuple[int, ...]
    profiles: tuple[np.ndarray, ...]
    seasonal: np.ndarray
    adjusted: np.ndarray

    @property
    def observed(self) -> np.ndarray:
        return self.series.values

    def recompose(self, adjusted: np.ndarray | None = None) -> np.ndarray:
        """Add the seasonal part back to ``adjusted`` (default: the decomposition's own)."""
        base = self.adjusted if adjusted is None else np.asarray(adjusted, dtype=float)
        return base + self.seasonal


@dataclass(frozen=True, slots=True)
class ResidualTail:
    """How heavy the tails of a model's standardized residuals are.

    ``df`` and ``scale`` of a Student t fitted (location 0) to the residuals
    divided by the engine's robust sigma; ``df`` is ``inf`` for Gaussian
    tails.  ``method`` names the estimator (see changekind.tasks.critical).
    """

    df: float
    scale: float
    nobs: int
    method: str = "student-t mle"

    @property
    def gaussian(self) -> bool:
        return not math.isfinite(self.df)


@dataclass(frozen=True, slots=True)
class FittedModel:
    """A fitted ARIMA model in a small serializable form.

    Enough to filter new points without re-estimating: orders, parameters (named
    as statsmodels names them), the seasonal profiles removed beforehand and the
    grid they are anchored to.  ``method`` says how it was obtained (``"mle"``,
    ``"given"`` for fixed orders, ``"baseline"`` for the robust fallback) and
    ``fallback`` why a simpler model was taken, if one was.

    A model fitted in windowed mode (changekind.tasks.window) is the model of
    the window medians; ``window`` names the width (pandas offset text such as
    ``"10s"``) and ``spread`` holds the model of the log window spreads (None
    when the spreads could not be modelled).
    """

    series_id: str
    order: tuple[int, int, int]
    seasonal_order: tuple[int, int, int, int]
    trend: str
    params: tuple[tuple[str, float], ...]
    sigma2: float
    nobs: int
    method: str
    converged: bool
    fallback: str | None = None
    aicc: float | None = None
    periods: tuple[int, ...] = ()
    profiles: tuple[tuple[float, ...], ...] = ()
    anchor: str | None = None
    step_seconds: float | None = None
    fitted_through: str | None = None
    fingerprint: str | None = None
    window: str | None = None
    spread: FittedModel | None = None
    business_days: bool = False
    tail: ResidualTail | None = None

    @property
    def param_dict(self) -> dict[str, float]:
        return dict(self.params)

    @property
    def sigma(self) -> float:
        return math.sqrt(self.sigma2)

    @property
    def n_start(self) -> int:
        """Points at the start that cannot carry a test statistic (d + sD + p + sP)."""
        p, d, _ = self.order
        P, D, _, s = self.seasonal_order
        return d + s * D + p + s * P

    def spec(self) -> str:
        """The model in readable form, e.g. ``ARIMA(1,0,0) mean=12.1 ar.L1=0.62 sigma=0.98``."""
        p, d, q = self.order
        P, D, Q, s = self.seasonal_order
        name = f"ARIMA({p},{d},{q})"
        if s and (P or D or Q):
            name += f"({P},{D},{Q}){s}"
        parts = [name]
        for key, value in self.params:
            if key == "sigma2":
                continue
            parts.append(f"{'mean' if key == 'const' else key}={value:.4g}")
        parts.append(f"sigma={self.sigma:.4g}")
        if self.periods:
            parts.append("season=" + "+".join(str(p) for p in self.periods))
        if self.fallback:
            parts.append(f"[{self.fallback}]")
        return " ".join(parts)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), separators=(",", ":"))

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> FittedModel:
        try:
            return cls(
                series_id=str(data["series_id"]),
                order=tuple(int(v) for v in data["order"]),  # type: ignore[arg-type]
                seasonal_order=tuple(int(v) for v in data["seasonal_order"]),  # type: ignore[arg-type]
                trend=str(data["trend"]),
                params=tuple((str(k), float(v)) for k, v in data["params"]),
                sigma2=float(data["sigma2"]),
                nobs=int(data["nobs"]),
                method=str(data["method"]),
                converged=bool(data["converged"]),
                fallback=data.get("fallback"),
                aicc=_optional_float(data.get("aicc")),
                periods=tuple(int(p) for p in data.get("periods", ())),
                profiles=tuple(tuple(float(v) for v in prof) for prof in data.get("profiles", ())),
                anchor=data.get("anchor"),
                step_seconds=_optional_float(data.get("step_seconds")),
                fitted_through=data.get("fitted_through"),
                fingerprint=data.get("fingerprint"),
                window=data.get("window"),
                spread=None if data.get("spread") is None else cls.from_dict(data["spread"]),
                business_days=bool(data.get("business_days", False)),
                tail=None if data.get("tail") is None else ResidualTail(**data["tail"]),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelError(
                f"stored model is malformed ({exc!r}); refit the series to replace it"
            ) from exc

    @classmethod
    def from_json(cls, text: str) -> FittedModel:
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise ModelError(f"stored model is not JSON ({exc}); refit the series") from exc
        return cls.from_dict(data)


@dataclass(frozen=True, slots=True)
class Event:
    """One detected intervention.

    ``effect`` is omega in the series' own units (for a TC the initial jump, for
    an IO the shock); ``effect_pct`` is that relative to the local level just
    before the event (None where the level is near zero).  ``type_weights`` are
    the relative likelihood support of each type at this time, summing to 1.
    ``position`` indexes the analysed grid.
    """

    series_id: str
    position: int
    event_time: str
    event_type: EventType
    effect: float
    effect_pct: float | None
    t_stat: float
    se: float
    type_weights: tuple[tuple[str, float], ...]
    status: Status
    decay: float | None
    half_life: float | None
    """Half-life of a decaying effect: seconds on a date-time grid, index units on
    a numeric one (a number, so tables can sort and sum it); None for other types."""
    level: float
    model: str
    window_start: str | None = None
    window_end: str | None = None
    effect_sigma: float | None = None
    """The effect in noise sigma (|omega| / sigma of the model)."""
    duration: float | None = None
    """How long the effect lasts: a level shift, from its time to the last point
    analysed (so far: it has not ended); a temporary change, until 5 % of its
    jump remains; None for AO, IO and VC."""

    @property
    def weights(self) -> dict[str, float]:
        return dict(self.type_weights)

    def to_record(self) -> dict[str, Any]:
        """The ``detect --json`` contract: plain JSON-ready values."""
        return {
            "series_id": self.series_id,
            "event_time": self.event_time,
            "event_type": self.event_type,
            "effect": self.effect,
            "effect_pct": self.effect_pct,
            "effect_sigma": self.effect_sigma,
            "t_stat": self.t_stat,
            "se": self.se,
            "type_weights": dict(self.type_weights),
            "status": self.status,
            "decay": self.decay,
            "half_life": self.half_life,
            "duration": self.duration,
            "level": self.level,
            "model": self.model,
            "window_start": self.window_start,
            "window_end": self.window_end,
        }


@dataclass(frozen=True, slots=True)
class Pattern:
    """Spikes recurring at a fixed spacing, absorbed into the seasonal model."""

    period: int
    period_time: str
    occurrences: int
    amplitude: float


@dataclass(frozen=True, slots=True)
class DetectionResult:
    """Everything the engine found in one series."""

    series_id: str
    events: tuple[Event, ...]
    model: FittedModel
    critical: float
    nobs: int
    n_missing: int
    converged: bool
    n_iter: int
    patterns: tuple[Pattern, ...] = ()
    notes: tuple[str, ...] = field(default=())
    n_fits: int = 0
    """Exact likelihood fits made (each a state-space maximum-likelihood estimate)."""
    resid_scale: float | None = None
    """Warm screen: robust scale of the new points' residuals over the model's sigma."""
    budget_spent: bool = False
    """The work budget ran out: the engine kept what it had (the notes say where)."""
    pulse_critical: float | None = None
    """Heavy-tailed residuals: the critical |t| of a single-point event (IO),
    above ``critical``, which holds for effects spread over many points
    (changekind.tasks.critical.Thresholds); None when the tails are Gaussian."""
