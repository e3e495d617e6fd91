"""Simulated metric series with one known intervention each.

The Monte Carlo study (``tests/benchmarks/montecarlo.py``) and its small
version in the default test run draw their data from here.  Every series is
reproducible on its own: its generator is seeded from the study's base seed and
the series' coordinates (model, event type, size, replicate), never from the
order in which series are made.

Models (innovation sd 1, hourly timestamps):

- ``ar1``: AR(1), phi = 0.6, around a level of 20;
- ``arma11``: ARMA(1,1), phi = 0.5, theta = 0.3, around 20;
- ``arima011``: ARIMA(0,1,1), theta = -0.4, starting at 20 (statsmodels'
  sign convention, ``y_t - y_{t-1} = e_t + theta e_{t-1}``);
- ``seasonal``: the AR(1) plus a fixed daily profile (period 24) keyed to the
  hour of day.

Event shapes, ``y = x + effect`` with ``x`` the ARIMA process and ``T`` the
event position: AO ``omega`` at ``T`` only; LS ``omega`` for ``t >= T``; TC
``omega * delta**(t - T)`` for ``t >= T`` (delta = 0.7); IO ``omega * psi[t - T]``
for ``t >= T`` where ``psi`` are the model's MA(infinity) weights, integration
included, which is the same as adding ``omega`` to the innovation at ``T``.

References
----------
Chen, C. and Liu, L.-M. (1993). Joint estimation of model parameters and
outlier effects in time series. JASA 88, 284-297 (the four event shapes).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.signal import lfilter

N_POINTS = 480
TC_DELTA = 0.7
LEVEL = 20.0
BURN_IN = 300
START = "2024-03-04 00:00"
BASE_SEED = 20240304
EVENT_TYPES: tuple[str, ...] = ("AO", "LS", "TC", "IO")
SIZES: tuple[float, ...] = (3.0, 4.0, 5.0)


@dataclass(frozen=True, slots=True)
class ModelSpec:
    """An ARIMA data-generating model.

    ``ar`` and ``ma`` hold the coefficients as statsmodels reports them
    (``ar.L1``, ``ma.L1``): ``(1 - sum ar_i B^i)(1 - B)^d x_t = (1 + sum ma_j B^j) e_t``.
    ``profile`` is the deterministic daily pattern (length ``period``) added to
    the series, or empty.
    """

    name: str
    ar: tuple[float, ...]
    ma: tuple[float, ...]
    d: int
    profile: tuple[float, ...] = ()

    @property
    def order(self) -> tuple[int, int, int]:
        return (len(self.ar), self.d, len(self.ma))

    @property
    def period(self) -> int:
        return len(self.profile)

    @property
    def ar_poly(self) -> np.ndarray:
        """AR polynomial with the differencing folded in, lag-0 coefficient first."""
        poly = np.r_[1.0, -np.asarray(self.ar, dtype=float)]
        for _ in range(self.d):
            poly = np.convolve(poly, [1.0, -1.0])
        return poly

    @property
    def ma_poly(self) -> np.ndarray:
        return np.r_[1.0, np.asarray(self.ma, dtype=float)]

    def psi(self, n: int) -> np.ndarray:
        """The first ``n`` MA(infinity) weights ``psi_0 = 1, psi_1, ...`` (integration included)."""
        pulse = np.zeros(n)
        pulse[0] = 1.0
        return lfilter(self.ma_poly, self.ar_poly, pulse)


def _daily_profile() -> tuple[float, ...]:
    """An invented hour-of-day pattern: a low night, a morning peak and an evening shoulder."""
    hours = np.arange(24)
    shape = (
        -2.0 * np.cos(2 * np.pi * hours / 24)
        + 1.2 * np.sin(4 * np.pi * hours / 24)
        + 0.5 * np.cos(6 * np.pi * (hours - 2) / 24)
    )
    shape = shape - shape.mean()
    return tuple(float(v) for v in np.round(shape, 6))


MODELS: dict[str, ModelSpec] = {
    "ar1": ModelSpec("ar1", ar=(0.6,), ma=(), d=0),
    "arma11": ModelSpec("arma11", ar=(0.5,), ma=(0.3,), d=0),
    "arima011": ModelSpec("arima011", ar=(), ma=(-0.4,), d=1),
    "seasonal": ModelSpec("seasonal", ar=(0.6,), ma=(), d=0, profile=_daily_profile()),
}
MODEL_NAMES: tuple[str, ...] = tuple(MODELS)


def event_shape(
    event_type: str, n: int, position: int, omega: float, *, model: ModelSpec
) -> np.ndarray:
    """The additive effect of one event on a series of length ``n``.

    Parameters
    ----------
    event_type : {"AO", "LS", "TC", "IO"}
    n : int
        Series length.
    position : int
        Index ``T`` of the event, ``0 <= T < n``.
    omega : float
        Size of the event (for TC the initial jump, for IO the shock).
    model : ModelSpec
        The process the IO's shock propagates through.

    Returns
    -------
    numpy.ndarray of shape (n,)
        ``omega`` times the unit regressor of the type (zero before ``T``).
    """
    return omega * unit_regressor(event_type, n, position, model=model)


def _ao(k: int, model: ModelSpec) -> np.ndarray:
    out = np.zeros(k)
    out[0] = 1.0
    return out


def _ls(k: int, model: ModelSpec) -> np.ndarray:
    return np.ones(k)


def _tc(k: int, model: ModelSpec) -> np.ndarray:
    return TC_DELTA ** np.arange(k, dtype=float)


def _io(k: int, model: ModelSpec) -> np.ndarray:
    return model.psi(k)


_SHAPES = {"AO": _ao, "LS": _ls, "TC": _tc, "IO": _io}


def unit_regressor(event_type: str, n: int, position: int, *, model: ModelSpec) -> np.ndarray:
    """The regressor of an event of size 1 at ``position`` (zero before it)."""
    try:
        shape = _SHAPES[event_type]
    except KeyError:
        raise ValueError(
            f"unknown event type {event_type!r}; use one of {', '.join(_SHAPES)}"
        ) from None
    if not 0 <= position < n:
        raise ValueError(f"event position {position} is outside the series (0..{n - 1})")
    out = np.zeros(n)
    out[position:] = shape(n - position, model)
    return out


INNOVATIONS: tuple[str, ...] = ("gauss", "t3")
"""Innovation laws: Gaussian, and Student t with 3 degrees of freedom scaled
to unit variance (t_3 / sqrt(3)), the heavy tails of latency-like metrics."""


def innovations(law: str, size: int, rng: np.random.Generator) -> np.ndarray:
    """Unit-variance innovations of ``law`` (one of ``INNOVATIONS``)."""
    if law == "gauss":
        return rng.standard_normal(size)
    if law == "t3":
        return rng.standard_t(3, size) / np.sqrt(3.0)
    raise ValueError(f"unknown innovations {law!r}; use one of {', '.join(INNOVATIONS)}")


def simulate_process(
    model: ModelSpec, n: int, rng: np.random.Generator, *, law: str = "gauss"
) -> np.ndarray:
    """One path of the model's ARIMA process (no profile, no event), sd-1 innovations.

    Stationary models start from a burn-in of ``BURN_IN`` points and sit around
    ``LEVEL``; the integrated model's differences get the same burn-in and its
    level starts at ``LEVEL``.  ``law`` picks the innovations (``INNOVATIONS``).
    """
    e = innovations(law, n + BURN_IN, rng)
    if model.d == 0:
        x = lfilter(model.ma_poly, np.r_[1.0, -np.asarray(model.ar, dtype=float)], e)
        return LEVEL + x[BURN_IN:]
    # Differenced process first, then integrate d times from LEVEL.
    w = lfilter(model.ma_poly, np.r_[1.0, -np.asarray(model.ar, dtype=float)], e)[BURN_IN:]
    for _ in range(model.d):
        w = np.cumsum(w)
    return LEVEL + w


@dataclass(frozen=True, slots=True, eq=False)
class SimulatedSeries:
    """One simulated series and the truth behind it.

    ``event_type`` is None for a clean series (then ``position`` is -1 and
    ``omega`` 0).  ``values = process + profile + effect``.
    """

    series_id: str
    model: str
    event_type: str | None
    size: float
    omega: float
    position: int
    timestamps: pd.DatetimeIndex
    values: np.ndarray
    profile: np.ndarray
    effect: np.ndarray
    seed: tuple[int, ...]

    @property
    def spec(self) -> ModelSpec:
        return MODELS[self.model]

    @property
    def nobs(self) -> int:
        return int(self.values.size)


def series_seed(
    model: str, event_type: str | None, size: float, replicate: int, *, base_seed: int
) -> tuple[int, ...]:
    """The seed of one series from its coordinates (stable across runs and orderings)."""
    m = MODEL_NAMES.index(model)
    k = 0 if event_type is None else 1 + EVENT_TYPES.index(event_type)
    return (int(base_seed), m, k, round(size * 10), int(replicate))


def make_series(
    model: str,
    event_type: str | None,
    size: float,
    replicate: int,
    *,
    n: int = N_POINTS,
    base_seed: int = BASE_SEED,
    law: str = "gauss",
) -> SimulatedSeries:
    """Simulate one series with one event (or none).

    Parameters
    ----------
    model : str
        A key of ``MODELS``.
    event_type : {"AO", "LS", "TC", "IO"} or None
        None for a clean series.
    size : float
        ``|omega|`` in innovation sds (ignored for a clean series).
    replicate : int
        Replicate number within the cell.
    n : int, default=N_POINTS
        Length; hourly timestamps from ``START``.
    base_seed : int, default=BASE_SEED
        Study seed.
    law : str, default="gauss"
        Innovations: ``"gauss"`` or ``"t3"`` (unit-variance Student t(3)).

    Notes
    -----
    1. Generator from ``series_seed``.  2. Process path.  3. Event time uniform
    on ``[0.2 n, 0.8 n]`` and a random sign.  4. Profile by hour of day.
    """
    if model not in MODELS:
        raise ValueError(f"unknown model {model!r}; use one of {', '.join(MODELS)}")
    spec = MODELS[model]
    # Step 1
    seed = series_seed(
        model, event_type, size if event_type else 0.0, replicate, base_seed=base_seed
    )
    rng = np.random.default_rng(list(seed))
    # Step 2
    x = simulate_process(spec, n, rng, law=law)
    # Step 3 (drawn for clean series too, so the stream is the same shape)
    position = int(rng.integers(int(0.2 * n), int(0.8 * n) + 1))
    sign = 1.0 if rng.random() < 0.5 else -1.0
    timestamps = pd.date_range(START, periods=n, freq="h")
    if event_type is None:
        omega, position, effect = 0.0, -1, np.zeros(n)
    else:
        omega = sign * float(size)
        effect = event_shape(event_type, n, position, omega, model=spec)
    # Step 4
    if spec.period:
        profile = np.asarray(spec.profile)[np.asarray(timestamps.hour) % spec.period]
    else:
        profile = np.zeros(n)
    tag = "clean" if event_type is None else f"{event_type}{size:g}"
    if law != "gauss":
        tag += f"-{law}"
    return SimulatedSeries(
        series_id=f"{model}-{tag}-r{replicate:03d}",
        model=model,
        event_type=event_type,
        size=float(size) if event_type else 0.0,
        omega=omega,
        position=position,
        timestamps=timestamps,
        values=x + profile + effect,
        profile=profile,
        effect=effect,
        seed=seed,
    )


@dataclass(frozen=True, slots=True)
class SeriesKey:
    """Coordinates of one series of a study (enough to rebuild it)."""

    model: str
    event_type: str | None
    size: float
    replicate: int
    law: str = "gauss"

    def build(self, *, n: int = N_POINTS, base_seed: int = BASE_SEED) -> SimulatedSeries:
        return make_series(
            self.model,
            self.event_type,
            self.size,
            self.replicate,
            n=n,
            base_seed=base_seed,
            law=self.law,
        )


def study_keys(
    *,
    models: Sequence[str] = MODEL_NAMES,
    types: Sequence[str] = EVENT_TYPES,
    sizes: Sequence[float] = SIZES,
    replications: int = 25,
    clean_replications: int | None = None,
    law: str = "gauss",
) -> Iterator[SeriesKey]:
    """Every series of a study: each (model, type, size) cell, then the clean series per model."""
    clean = replications if clean_replications is None else clean_replications
    for model in models:
        for event_type in types:
            for size in sizes:
                for r in range(replications):
                    yield SeriesKey(model, event_type, float(size), r, law)
        for r in range(clean):
            yield SeriesKey(model, None, 0.0, r, law)
