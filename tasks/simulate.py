"""Simulated series with injected events: one home for the demo, the tests and the benchmarks.

Pure functions: a seeded :class:`numpy.random.Generator` in (or the seed a
series is rebuilt from), arrays and frozen dataclasses out.  Every event is
added through the effect registry (:data:`~changekind.tasks.effects.EFFECTS`):
``omega`` times the type's series path from the event time on; an IO is, in
the same terms, ``omega`` added to the innovation at its time (or the path
through the model's psi weights).

What is here:

- the building blocks: :func:`innovations` (Gaussian or unit-variance
  Student t(3)), :func:`arma_filter`, :func:`injected`;
- the Monte Carlo study's series (``MODELS``, :func:`make_series`,
  :class:`SeriesKey`, :func:`study_keys`), reproducible one by one from the
  study's seed and the series' coordinates;
- the demo fleet of storage controllers (:func:`make_demo_fleet`);
- the invented fleets of the flow tests and the budget runs
  (:func:`ar1_fleet`, :func:`disk_fleet`, :func:`vault_fleet`).

Every scenario is invented; nothing here names or models a real product or company.

Study models (innovation sd 1, hourly timestamps):

- ``ar1``: AR(1), phi = 0.6, around a level of 20;
- ``arma11``: ARMA(1,1), phi = 0.5, theta = 0.3, around 20;
- ``arima011``: ARIMA(0,1,1), theta = -0.4, starting at 20 (statsmodels'
  sign convention, ``y_t - y_{t-1} = e_t + theta e_{t-1}``);
- ``seasonal``: the AR(1) plus a fixed daily profile (period 24) keyed to the
  hour of day.

Study event shapes, ``y = x + effect`` with ``x`` the ARIMA process and ``T``
the event position: AO ``omega`` at ``T`` only; LS ``omega`` for ``t >= T``; TC
``omega * delta**(t - T)`` for ``t >= T`` (delta = 0.7); IO ``omega * psi[t - T]``
for ``t >= T`` where ``psi`` are the model's MA(infinity) weights, integration
included, which is the same as adding ``omega`` to the innovation at ``T``.

The demo fleet: storage controllers (``array-03/ctl-b``) reporting their mean
write latency (milliseconds) and mean queue depth every five minutes.  Each
series is a stationary ARMA process around the controller's own level plus a
daily profile (busier in working hours).  Known events are injected on top,
each with a story:

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
Attributes: every series carries ``rack`` (three arrays to a rack: ``rk1`` holds
``array-01`` .. ``array-03``) and ``firmware``: ``7.2`` everywhere, except that a
controller of the rollout runs ``7.3`` from its upgrade (its level shift) on.

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

from changekind.tasks.effects import EFFECTS, SEARCHED
from changekind.tasks.errors import ConfigError

# --------------------------------------------------------------------------- building blocks

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


def arma_filter(
    shocks: np.ndarray, *, ar: Sequence[float] = (), ma: Sequence[float] = ()
) -> np.ndarray:
    """The ARMA process ``(1 - sum ar_i B^i) x = (1 + sum ma_j B^j) e`` driven by ``shocks``.

    Coefficients as statsmodels reports them (``ar.L1``, ``ma.L1``); the
    process starts from rest, so callers drop a burn-in.
    """
    from scipy.signal import lfilter  # here: importing the demo's names costs no scipy.signal

    return lfilter(
        np.r_[1.0, np.asarray(ma, dtype=float)], np.r_[1.0, -np.asarray(ar, dtype=float)], shocks
    )


def injected(
    n: int,
    position: int,
    event_type: str,
    omega: float,
    *,
    delta: float | None = None,
    psi: np.ndarray | None = None,
) -> np.ndarray:
    """The additive effect of one event on a series of length ``n``: zero before
    ``position``, then ``omega`` times the registry's path of the type (a TC
    decaying at ``delta``, an IO through ``psi``)."""
    out = np.zeros(n)
    out[position:] = omega * EFFECTS[event_type].path(n - position, delta=delta, psi=psi)
    return out


# --------------------------------------------------------------------------- the Monte Carlo study

N_POINTS = 480
TC_DELTA = 0.7
LEVEL = 20.0
BURN_IN = 300
STUDY_START = "2024-03-04 00:00"
BASE_SEED = 20240304
STUDY_TYPES: tuple[str, ...] = SEARCHED
"""The event types of a study: those the residual search estimates."""
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
        return arma_filter(pulse, ar=-self.ar_poly[1:], ma=self.ma_poly[1:])


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


def unit_regressor(event_type: str, n: int, position: int, *, model: ModelSpec) -> np.ndarray:
    """The regressor of an event of size 1 at ``position`` (zero before it).

    The registry's series path (:data:`~changekind.tasks.effects.EFFECTS`), a TC
    decaying at ``TC_DELTA``, an IO through the model's psi weights.
    """
    if event_type not in STUDY_TYPES:
        raise ValueError(f"unknown event type {event_type!r}; use one of {', '.join(STUDY_TYPES)}")
    if not 0 <= position < n:
        raise ValueError(f"event position {position} is outside the series (0..{n - 1})")
    effect = EFFECTS[event_type]
    psi = model.psi(n - position) if effect.needs_psi else None
    return injected(n, position, event_type, 1.0, delta=TC_DELTA, psi=psi)


def simulate_process(
    model: ModelSpec, n: int, rng: np.random.Generator, *, law: str = "gauss"
) -> np.ndarray:
    """One path of the model's ARIMA process (no profile, no event), sd-1 innovations.

    Stationary models start from a burn-in of ``BURN_IN`` points and sit around
    ``LEVEL``; the integrated model's differences get the same burn-in and its
    level starts at ``LEVEL``.  ``law`` picks the innovations (``INNOVATIONS``).
    """
    e = innovations(law, n + BURN_IN, rng)
    w = arma_filter(e, ar=model.ar, ma=model.ma)[BURN_IN:]
    # The integrated model: the differenced process first, then integrate d times.
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
    k = 0 if event_type is None else 1 + STUDY_TYPES.index(event_type)
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
        Length; hourly timestamps from ``STUDY_START``.
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
    timestamps = pd.date_range(STUDY_START, periods=n, freq="h")
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
    types: Sequence[str] = STUDY_TYPES,
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


# --------------------------------------------------------------------------- the demo fleet

DEMO_TC_DECAY = 0.8
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


_PROCESS_RANGES: dict[str, tuple[tuple[float, float] | None, ...]] = {
    # level, daily amplitude and innovation sd (shares of the level), AR, MA (None: 0)
    "write-latency-ms": ((1.5, 4.0), (0.10, 0.20), (0.03, 0.05), (0.30, 0.60), None),
    "queue-depth": ((12.0, 40.0), (0.15, 0.30), (0.04, 0.06), (0.45, 0.70), (0.15, 0.35)),
}


def _process(metric: str, rng: np.random.Generator) -> _Process:
    """A series' process, drawn in the order level, amplitude, sd, AR, MA."""
    level_r, amplitude_r, sigma_r, ar_r, ma_r = _PROCESS_RANGES[metric]
    level = rng.uniform(*level_r)
    return _Process(
        level=level,
        amplitude=level * rng.uniform(*amplitude_r),
        sigma=level * rng.uniform(*sigma_r),
        ar=rng.uniform(*ar_r),
        ma=0.0 if ma_r is None else rng.uniform(*ma_r),
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
                effect = EFFECTS[kind]
                sign = float(rng.choice([-1.0, 1.0])) if effect.single_point else 1.0
                omega = sign * proc.sigma * rng.uniform(*EFFECT_SIGMAS)
                truth_rows.append((series_id, stamps[t0], kind, float(omega), note))
                if not inject:
                    continue
                if effect.needs_psi:  # an innovation: the process's psi(B) carries it
                    shocks[burn + t0] += omega
                else:  # AO, LS, TC: the registry's paths
                    adds[t0:] += omega * EFFECTS[kind].path(n - t0, delta=DEMO_TC_DECAY)

            noise = arma_filter(shocks, ar=(proc.ar,), ma=(proc.ma,))[burn:]
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


# --------------------------------------------------------------------------- test and budget fleets


@dataclass(frozen=True, slots=True, eq=False)
class SimulatedFleet:
    """An invented fleet in long form and what was injected into it.

    Attributes
    ----------
    data : pandas.DataFrame
        Columns ``series_id, timestamp, value`` (and any attribute columns).
    truth : pandas.DataFrame
        Columns ``series_id, event_time, event_type, effect``: every injected
        event, ``effect`` being omega in the series' units.
    """

    data: pd.DataFrame
    truth: pd.DataFrame


TRUTH_FRAME_COLUMNS = ("series_id", "event_time", "event_type", "effect")

AR1_FLEET_START = pd.Timestamp("2031-05-04")
AR1_FLEET_PHI = 0.6
AR1_FLEET_LEVEL = 50.0
AR1_FLEET_STEP = pd.Timedelta(minutes=1)


def probe_id(i: int) -> str:
    """The id of series ``i`` of :func:`ar1_fleet` (50 probes a rack)."""
    return f"rack-{i // 50:02d}/probe-{i % 50:02d}"


def ar1_fleet(
    n_series: int,
    *,
    n: int,
    heavy: Sequence[bool] | None = None,
    shifts: dict[int, tuple[int, float]] | None = None,
    rng: np.random.Generator,
) -> SimulatedFleet:
    """Minute series of probes: AR(1) (phi 0.6) around 50 with unit innovations.

    ``heavy[i]`` gives series i Student-t(3) innovations scaled to unit
    variance (else Gaussian); ``shifts`` maps a series number to (position,
    size in innovation sigma) of a level shift.  A burn-in of 200 points.
    """
    stamps = pd.date_range(AR1_FLEET_START, periods=n, freq=AR1_FLEET_STEP)
    parts, truth = [], []
    for i in range(n_series):
        law = "t3" if heavy is not None and heavy[i] else "gauss"
        shocks = innovations(law, n + 200, rng)
        y = AR1_FLEET_LEVEL + arma_filter(shocks, ar=(AR1_FLEET_PHI,))[200:]
        if shifts and i in shifts:
            at, size = shifts[i]
            y = y + injected(n, at, "LS", size)
            truth.append((probe_id(i), stamps[at], "LS", float(size)))
        parts.append(pd.DataFrame({"series_id": probe_id(i), "timestamp": stamps, "value": y}))
    return SimulatedFleet(
        pd.concat(parts, ignore_index=True),
        pd.DataFrame(truth, columns=list(TRUTH_FRAME_COLUMNS)),
    )


def disk_fleet(n_series: int = 8, *, hours: int = 24 * 21, seed: int = 0) -> SimulatedFleet:
    """Hourly disks (``shelf-0/disk-1``): AR(1), phi 0.5, with known level shifts
    (every third series, +6) and spikes (the next ones, +9), plus a constant
    series ``shelf-x/stuck`` that cannot be analysed (fleets of 3 or more)."""
    rng = np.random.default_rng(seed)
    stamps = pd.date_range("2026-06-01", periods=hours, freq="h")
    frames, truth = [], []
    for i in range(n_series):
        y = arma_filter(rng.normal(size=hours), ar=(0.5,)) + 40 + 3 * i
        sid = f"shelf-{i // 4}/disk-{i % 4}"
        if i % 3 == 0:
            t = int(rng.integers(hours // 3, hours - 48))
            y = y + injected(hours, t, "LS", 6.0)
            truth.append((sid, stamps[t], "LS", 6.0))
        if i % 3 == 1:
            t = int(rng.integers(48, hours - 48))
            y = y + injected(hours, t, "AO", 9.0)
            truth.append((sid, stamps[t], "AO", 9.0))
        frames.append(pd.DataFrame({"series_id": sid, "timestamp": stamps, "value": y}))
    if n_series >= 3:
        frames.append(
            pd.DataFrame({"series_id": "shelf-x/stuck", "timestamp": stamps, "value": 7.0})
        )
    return SimulatedFleet(
        pd.concat(frames, ignore_index=True),
        pd.DataFrame(truth, columns=list(TRUTH_FRAME_COLUMNS)),
    )


VAULT_RACKS = ("r1", "r2", "r3", "r4")
VAULT_HOSTS = ("h1", "h2", "h3")
VAULT_METRICS = ("commit-ms", "journal-len")
VAULT_START = pd.Timestamp("2031-08-04")  # invented
VAULT_DAYS = 12
VAULT_ROLLOUT_AT = VAULT_START + pd.Timedelta(days=8, hours=2)
VAULT_SPIKE_AT = VAULT_START + pd.Timedelta(days=10, hours=13)
VAULT_SINGLES = (
    ("vault-r1-h3/journal-len", VAULT_START + pd.Timedelta(days=6, hours=9)),
    ("vault-r4-h1/commit-ms", VAULT_START + pd.Timedelta(days=11, hours=20)),
)
VAULT_SD = 1.15
"""Standard deviation of the vault series' AR(1) (phi 0.5, unit innovations)."""


def vault_fleet(seed: int = 5) -> SimulatedFleet:
    """Storage hosts with attributes and three stories, hourly for ``VAULT_DAYS`` days.

    24 series: 4 racks x 3 hosts x 2 metrics (``vault-r2-h1/commit-ms``), AR(1)
    noise (phi 0.5) around each series' level; columns ``rack`` and ``firmware``
    beside the values.  Stories: a firmware rollout on day 8 (host h2 of every
    rack moves from 5.1 to 5.2 between 02:00 and 04:00, its series step up by 8
    sd at the upgrade hour); a spike of 10 sd on every series of rack r3 on day
    10 at 13:00; two unrelated spikes (``VAULT_SINGLES``).
    """
    rng = np.random.default_rng(seed)
    stamps = pd.date_range(VAULT_START, periods=24 * VAULT_DAYS, freq="h")
    n = len(stamps)
    frames, truth = [], []
    upgrade = {
        f"vault-{rack}-h2": VAULT_ROLLOUT_AT + pd.Timedelta(minutes=40 * k)
        for k, rack in enumerate(VAULT_RACKS)
    }
    combos = ((r, h, m) for r in VAULT_RACKS for h in VAULT_HOSTS for m in VAULT_METRICS)
    for i, (rack, host, metric) in enumerate(combos):
        node = f"vault-{rack}-{host}"
        sid = f"{node}/{metric}"
        y = arma_filter(rng.normal(size=n), ar=(0.5,)) + 50 + 2 * i
        firmware = np.full(n, "5.1", dtype=object)
        if node in upgrade:
            t = int(np.searchsorted(stamps, upgrade[node].floor("h")))
            y = y + injected(n, t, "LS", 8.0 * VAULT_SD)
            firmware[t:] = "5.2"
            truth.append((sid, stamps[t], "LS", 8.0 * VAULT_SD))
        spikes = [VAULT_SPIKE_AT] if rack == "r3" else []
        spikes += [at for single, at in VAULT_SINGLES if single == sid]
        for at in spikes:
            y = y + injected(n, int(np.searchsorted(stamps, at)), "AO", 10.0 * VAULT_SD)
            truth.append((sid, at, "AO", 10.0 * VAULT_SD))
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
    return SimulatedFleet(
        pd.concat(frames, ignore_index=True),
        pd.DataFrame(truth, columns=list(TRUTH_FRAME_COLUMNS)),
    )
