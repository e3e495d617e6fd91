"""Monte Carlo accuracy study of the detection engine.

Simulates series with one known event each (``simulate.py``), runs the engine,
two naive baselines and the statsmodels oracle (``baselines.py``) on every
series, and prints markdown tables: per method x model x type x size, a
summary per type at 4 sigma against the targets, the engine's type confusion,
the oracle type classifier's confusion, the engine's type accuracy against that
classifier per cell, and timings.

Run from the repository root::

    python -m tests.benchmarks.montecarlo --replications 25 --jobs 2

The oracle type classifier runs with the TC decay known by default (about 1.5
times the study's time without it); ``--oracle-types profiled`` adds the
profiled-decay variant (about twice the time), ``--oracle-types off`` drops it.

Metrics
-------
recall
    Share of injected series with a reported event within +/-``TOLERANCE``
    positions of the true time.
type acc
    Among recalled series, share whose matched event (the reported event
    nearest the true time; ties to the larger |t|) has the true type.
false/1000
    Events per 1,000 points: on clean series every event; on injected series
    every event outside the tolerance window (reported in a separate column).
RMSE, oracle RMSE, ratio
    Root mean square of ``effect - omega`` over correctly typed recalled
    events, and the oracle's over the same series (paired, so the selection
    of the engine's successes applies to both).
oracle power
    Share of a cell's series whose oracle t statistic (true time and type, no
    search) exceeds the engine's critical value C: an optimistic bound on the
    recall any method can reach while keeping that critical value.
mean weight of true type
    The engine's type weight of the true type at the matched event, averaged
    (ambiguity shows as weights near 0.5 rather than as a confident wrong type).
oracle type acc (known δ)
    Share of a cell's injected series (all of them, recalled or not: the
    oracle is told the time) that the likelihood classifier
    ``baselines.oracle_type`` types right.  It fits statsmodels' SARIMAX with
    the true orders once per type, with that type's regressor at the true time
    (AO pulse, LS step, TC ``0.7**(t - T)``, IO the model's psi weights),
    parameters estimated, and picks the largest log-likelihood (equal priors,
    no penalty: one effect parameter each).  An optimistic bound on the type
    accuracy any method can reach on these series.
oracle type acc (δ profiled, +1)
    The same with the TC decay unknown: the TC's log-likelihood is maximized
    over decays 0.1, 0.2, ..., 0.9 and charged one unit (AIC's charge for the
    extra parameter, as the engine charges).  ``--oracle-types profiled`` only.
oracle ... (recalled)
    In the engine-against-oracle table, the oracle's type accuracy over the
    series the engine recalled, paired with the engine's type acc; "calls" are
    counts of AO/LS/TC/IO on those series.

Options: ``--replications``, ``--clean``, ``--jobs``, ``--models``, ``--types``,
``--sizes``, ``--n``, ``--seed``, ``--critical``, ``--no-engine``,
``--oracle-types`` (``--help``).
"""

from __future__ import annotations

import argparse
import itertools
import math
import multiprocessing
import sys
import time
from collections.abc import Iterable, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field

import numpy as np

if __package__ in (None, ""):  # run as a script: make the repository root importable
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from changekind.tasks.simulate import (
    BASE_SEED,
    INNOVATIONS,
    MODEL_NAMES,
    MODELS,
    N_POINTS,
    SIZES,
    SeriesKey,
    SimulatedSeries,
    study_keys,
)
from changekind.tasks.simulate import STUDY_TYPES as EVENT_TYPES
from tests.benchmarks.baselines import band_events, esd_events, oracle_fit, oracle_type

TOLERANCE = 2
ENGINE = "engine"
BAND = "band3sd"
ESD = "gesd"
ORACLE = "oracle"
METHODS: tuple[str, ...] = (ENGINE, BAND, ESD)
TYPED_METHODS = frozenset({ENGINE})

TARGET_RECALL = {"AO": 0.90, "LS": 0.90, "TC": 0.90, "IO": 0.80}
TARGET_TYPE_ACC = 0.85
TARGET_FALSE_PER_1000 = 0.5
TARGET_RMSE_RATIO = 1.25

ORACLE_TYPE_MODES: tuple[str, ...] = ("off", "known", "profiled")
"""The oracle type classifier: not run; TC decay known (three fits per injected
series beside ``oracle_fit``'s); also the decay profiled (eleven or twelve)."""
ORACLE_TYPES_DEFAULT = "known"
KNOWN = "known"
PROFILED = "profiled"


@dataclass(frozen=True, slots=True)
class Detection:
    """One event a method reported (type, effect, t and weights are None for baselines)."""

    position: int
    event_type: str | None = None
    effect: float | None = None
    t_stat: float | None = None
    type_weights: tuple[tuple[str, float], ...] | None = None


@dataclass(frozen=True, slots=True)
class MethodRun:
    """What one method reported on one series and how long it took."""

    detections: tuple[Detection, ...]
    seconds: float
    error: str | None = None


@dataclass(frozen=True, slots=True)
class SeriesOutcome:
    """Truth and every method's output for one simulated series."""

    key: SeriesKey
    series_id: str
    nobs: int
    position: int
    omega: float
    runs: dict[str, MethodRun]
    oracle_omega: float | None = None
    oracle_t: float | None = None
    oracle_seconds: float = 0.0
    oracle_converged: bool = True
    oracle_type_known: str | None = None
    oracle_type_profiled: str | None = None
    oracle_type_seconds: float = 0.0
    oracle_type_converged: bool = True


def engine_available() -> bool:
    """True when ``changekind.tasks.detect`` can be imported."""
    try:
        import changekind.tasks.detect  # noqa: F401
    except ImportError:
        return False
    return True


def _run_engine(series: SimulatedSeries, critical: float | None) -> tuple[Detection, ...]:
    from changekind.tasks.detect import analyse_series

    result = analyse_series(series.series_id, series.timestamps, series.values, critical=critical)
    return tuple(
        Detection(
            int(e.position),
            str(e.event_type),
            float(e.effect),
            float(e.t_stat),
            tuple((str(k), float(v)) for k, v in e.type_weights),
        )
        for e in result.events
    )


def _run_band(series: SimulatedSeries, critical: float | None) -> tuple[Detection, ...]:
    return tuple(Detection(p) for p in band_events(series.values))


def _run_esd(series: SimulatedSeries, critical: float | None) -> tuple[Detection, ...]:
    return tuple(Detection(p) for p in esd_events(series.values, period=series.spec.period))


_RUNNERS = {ENGINE: _run_engine, BAND: _run_band, ESD: _run_esd}


def evaluate_series(
    key: SeriesKey,
    *,
    methods: Sequence[str] = METHODS,
    n: int = N_POINTS,
    base_seed: int = BASE_SEED,
    critical: float | None = None,
    oracle: bool = True,
    oracle_types: str = ORACLE_TYPES_DEFAULT,
) -> SeriesOutcome:
    """Build one series and run every method (and the oracle) on it.

    ``oracle_types`` is one of ``ORACLE_TYPE_MODES``: the likelihood type
    classifier off, with the TC decay known only, or also with the decay
    profiled (only with ``oracle``).  A method that raises is recorded with its
    error and no detections, so one failure does not stop a study; the tables
    count such series.
    """
    if oracle_types not in ORACLE_TYPE_MODES:
        raise ValueError(f"oracle_types must be one of {ORACLE_TYPE_MODES}, got {oracle_types!r}")
    series = key.build(n=n, base_seed=base_seed)
    runs: dict[str, MethodRun] = {}
    for name in methods:
        start = time.perf_counter()
        try:
            found = _RUNNERS[name](series, critical)
            error = None
        except Exception as exc:  # recorded and counted, never hidden
            found, error = (), f"{type(exc).__name__}: {exc}"
        runs[name] = MethodRun(found, time.perf_counter() - start, error)
    oracle_omega = oracle_t = None
    oracle_seconds, converged = 0.0, True
    if oracle and series.event_type is not None:
        start = time.perf_counter()
        fit = oracle_fit(series)
        oracle_seconds = time.perf_counter() - start
        oracle_omega, converged = fit.omega, fit.converged
        oracle_t = fit.omega / fit.se if fit.se > 0 else math.nan
    typed = None
    type_seconds = 0.0
    if oracle and series.event_type is not None and oracle_types != "off":
        start = time.perf_counter()
        typed = oracle_type(
            series,
            profile=oracle_types == PROFILED,
            known_llf={series.event_type: fit.llf},  # the true type's fit, done above
        )
        type_seconds = time.perf_counter() - start
    return SeriesOutcome(
        key=key,
        series_id=series.series_id,
        nobs=series.nobs,
        position=series.position,
        omega=series.omega,
        runs=runs,
        oracle_omega=oracle_omega,
        oracle_t=oracle_t,
        oracle_seconds=oracle_seconds,
        oracle_converged=converged,
        oracle_type_known=None if typed is None else typed.known,
        oracle_type_profiled=None if typed is None else typed.profiled,
        oracle_type_seconds=type_seconds,
        oracle_type_converged=True if typed is None else typed.converged,
    )


def _evaluate_star(args: tuple[SeriesKey, dict]) -> SeriesOutcome:
    key, options = args
    return evaluate_series(key, **options)


def run_study(
    keys: Iterable[SeriesKey],
    *,
    jobs: int = 1,
    methods: Sequence[str] = METHODS,
    n: int = N_POINTS,
    base_seed: int = BASE_SEED,
    critical: float | None = None,
    oracle: bool = True,
    oracle_types: str = ORACLE_TYPES_DEFAULT,
) -> list[SeriesOutcome]:
    """Evaluate every series, in this process (``jobs=1``) or a process pool."""
    options = {
        "methods": tuple(methods),
        "n": n,
        "base_seed": base_seed,
        "critical": critical,
        "oracle": oracle,
        "oracle_types": oracle_types,
    }
    work = [(k, options) for k in keys]
    if jobs <= 1:
        return [_evaluate_star(w) for w in work]
    # forkserver: workers start from a clean interpreter, not a fork of a
    # process that may hold threads (pytest, Prefect).
    ctx = multiprocessing.get_context("forkserver")
    with ProcessPoolExecutor(max_workers=jobs, mp_context=ctx) as pool:
        return list(pool.map(_evaluate_star, work, chunksize=max(1, len(work) // (8 * jobs))))


# ---------------------------------------------------------------------------
# Metrics


def match(outcome: SeriesOutcome, method: str) -> Detection | None:
    """The reported event nearest the true time within the tolerance (ties: larger |t|)."""
    near = [
        d
        for d in outcome.runs[method].detections
        if abs(d.position - outcome.position) <= TOLERANCE
    ]
    if not near:
        return None
    return min(
        near,
        key=lambda d: (abs(d.position - outcome.position), -abs(d.t_stat or 0.0)),
    )


def n_false(outcome: SeriesOutcome, method: str) -> int:
    """Reported events that are not the injected one (all of them on a clean series)."""
    dets = outcome.runs[method].detections
    if outcome.key.event_type is None:
        return len(dets)
    return sum(abs(d.position - outcome.position) > TOLERANCE for d in dets)


@dataclass(frozen=True, slots=True)
class CellStats:
    """Metrics of one method on one group of series (NaN where undefined)."""

    method: str
    model: str
    event_type: str
    size: float | None
    n_series: int
    recall: float = math.nan
    type_acc: float = math.nan
    false_per_1000: float = math.nan
    rmse: float = math.nan
    oracle_rmse: float = math.nan
    n_errors: int = 0
    n_typed: int = 0
    confusion: dict[str, int] = field(default_factory=dict)

    @property
    def ratio(self) -> float:
        if not (self.oracle_rmse > 0):
            return math.nan
        return self.rmse / self.oracle_rmse


def cell_stats(
    outcomes: Sequence[SeriesOutcome],
    method: str,
    *,
    model: str,
    event_type: str,
    size: float | None,
) -> CellStats:
    """Metrics of ``method`` over ``outcomes`` (all injected with one type, or all clean)."""
    n_series = len(outcomes)
    points = sum(o.nobs for o in outcomes)
    errors = sum(o.runs[method].error is not None for o in outcomes)
    false = sum(n_false(o, method) for o in outcomes)
    false_rate = 1000.0 * false / points if points else math.nan
    if event_type == "clean":
        return CellStats(
            method, model, event_type, size, n_series, false_per_1000=false_rate, n_errors=errors
        )
    matched = [(o, match(o, method)) for o in outcomes]
    recalled = [(o, d) for o, d in matched if d is not None]
    recall = len(recalled) / n_series if n_series else math.nan
    type_acc = rmse = oracle_rmse = math.nan
    confusion: dict[str, int] = {}
    n_typed = 0
    if method in TYPED_METHODS and recalled:
        for _, d in recalled:
            confusion[str(d.event_type)] = confusion.get(str(d.event_type), 0) + 1
        typed = [(o, d) for o, d in recalled if d.event_type == event_type]
        n_typed = len(typed)
        type_acc = n_typed / len(recalled)
        if typed:
            err = np.array([d.effect - o.omega for o, d in typed])
            rmse = float(np.sqrt(np.mean(err**2)))
            orc = np.array(
                [o.oracle_omega - o.omega for o, _ in typed if o.oracle_omega is not None]
            )
            if orc.size:
                oracle_rmse = float(np.sqrt(np.mean(orc**2)))
    return CellStats(
        method,
        model,
        event_type,
        size,
        n_series,
        recall,
        type_acc,
        false_rate,
        rmse,
        oracle_rmse,
        errors,
        n_typed,
        confusion,
    )


def oracle_rmse_all(outcomes: Sequence[SeriesOutcome]) -> float:
    """The oracle's RMSE over every injected series given (no selection)."""
    err = np.array([o.oracle_omega - o.omega for o in outcomes if o.oracle_omega is not None])
    return float(np.sqrt(np.mean(err**2))) if err.size else math.nan


def oracle_called(outcome: SeriesOutcome, variant: str) -> str | None:
    """The oracle type classifier's type for one series (``KNOWN`` or ``PROFILED``), or None."""
    if variant == KNOWN:
        return outcome.oracle_type_known
    if variant == PROFILED:
        return outcome.oracle_type_profiled
    raise ValueError(f"variant must be {KNOWN!r} or {PROFILED!r}, got {variant!r}")


def oracle_type_acc(outcomes: Iterable[SeriesOutcome], variant: str) -> float:
    """Share of injected series the oracle type classifier ran on that it typed right."""
    calls = [
        (o.key.event_type, oracle_called(o, variant))
        for o in outcomes
        if o.key.event_type is not None
    ]
    right = [t == c for t, c in calls if c is not None]
    return float(np.mean(right)) if right else math.nan


def _group(outcomes: Iterable[SeriesOutcome]) -> dict[tuple[str, str, float | None], list]:
    groups: dict[tuple[str, str, float | None], list[SeriesOutcome]] = {}
    for o in outcomes:
        k = o.key
        cell = (k.model, "clean", None) if k.event_type is None else (k.model, k.event_type, k.size)
        groups.setdefault(cell, []).append(o)
    return groups


def study_table(outcomes: Sequence[SeriesOutcome], methods: Sequence[str]) -> list[CellStats]:
    """One ``CellStats`` per method x model x type x size, clean rows last per model."""
    groups = _group(outcomes)
    order = {t: i for i, t in enumerate((*EVENT_TYPES, "clean"))}
    cells = sorted(
        groups,
        key=lambda c: (MODEL_NAMES.index(c[0]), order[c[1]], c[2] or 0.0),
    )
    return [
        cell_stats(groups[c], m, model=c[0], event_type=c[1], size=c[2])
        for m in methods
        for c in cells
    ]


def pooled_stats(
    outcomes: Sequence[SeriesOutcome],
    method: str,
    *,
    event_type: str,
    size: float | None = None,
) -> CellStats:
    """Metrics pooled over models (and over sizes when ``size`` is None)."""
    if event_type == "clean":
        sel = [o for o in outcomes if o.key.event_type is None]
    else:
        sel = [
            o
            for o in outcomes
            if o.key.event_type == event_type and (size is None or o.key.size == size)
        ]
    return cell_stats(sel, method, model="all", event_type=event_type, size=size)


# ---------------------------------------------------------------------------
# Tables


def _f(x: float, digits: int = 2) -> str:
    return "—" if x is None or not math.isfinite(x) else f"{x:.{digits}f}"


def _mark(ok: bool | None) -> str:
    return "" if ok is None else (" ✓" if ok else " ✗")


def format_study_table(
    rows: Sequence[CellStats],
    outcomes: Sequence[SeriesOutcome] = (),
    *,
    critical: float | None = None,
) -> str:
    """The main table, one row per method x model x type x size.

    With ``critical``, the oracle's power at that critical value is shown beside
    the recall (the same for every method of a cell); the oracle type
    classifier's accuracy over all the cell's series is shown beside the type
    accuracy (likewise).
    """
    groups = _group(outcomes)
    lines = [
        "| method | model | type | size | series | recall | oracle power | type acc | "
        "oracle type acc (known δ) | oracle type acc (δ profiled, +1) | "
        "false/1000 (clean) | false/1000 (injected) | RMSE | oracle RMSE | ratio | errors |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        clean = r.event_type == "clean"
        cell = groups.get((r.model, r.event_type, r.size), ())
        power = oracle_power(cell, critical) if critical is not None and not clean else math.nan
        acc_known = oracle_type_acc(cell, KNOWN)
        acc_prof = oracle_type_acc(cell, PROFILED)
        lines.append(
            f"| {r.method} | {r.model} | {r.event_type} | "
            f"{'—' if r.size is None else f'{r.size:g}σ'} | {r.n_series} | "
            f"{_f(r.recall)} | {_f(power)} | {_f(r.type_acc)} | "
            f"{_f(acc_known)} | {_f(acc_prof)} | "
            f"{_f(r.false_per_1000) if clean else '—'} | "
            f"{'—' if clean else _f(r.false_per_1000)} | "
            f"{_f(r.rmse, 3)} | {_f(r.oracle_rmse, 3)} | {_f(r.ratio)} | {r.n_errors} |"
        )
    return "\n".join(lines)


def oracle_power(outcomes: Sequence[SeriesOutcome], critical: float) -> float:
    """Share of injected series whose oracle |t| (true time, true type) exceeds ``critical``.

    No method that keeps this critical value can be expected to recall much
    more than this: the oracle is told the time and the type and searches nothing.
    """
    ts = [abs(o.oracle_t) for o in outcomes if o.oracle_t is not None]
    return float(np.mean([t > critical for t in ts])) if ts else math.nan


def format_summary(
    outcomes: Sequence[SeriesOutcome], methods: Sequence[str], *, critical: float | None = None
) -> str:
    """Per type at 4 sigma, pooled over models, against the targets."""
    head = ["| type | target recall |"]
    sep = ["|---|---|"]
    if critical is not None:
        head.append(f" oracle power at C={critical:.2f} |")
        sep.append("---|")
    for m in methods:
        head.append(f" {m} recall |")
        sep.append("---|")
    if ENGINE in methods:
        head.append(
            " engine type acc (≥ 0.85) | engine RMSE | oracle RMSE | ratio (≤ 1.25) |"
            " oracle RMSE, all series |"
        )
        sep.append("---|---|---|---|---|")
    head.append(" oracle type acc (known δ) | oracle type acc (δ profiled, +1) |")
    sep.append("---|---|")
    lines = ["".join(head), "".join(sep)]
    for t in EVENT_TYPES:
        row = [f"| {t} | ≥ {TARGET_RECALL[t]:.2f} |"]
        sel = [o for o in outcomes if o.key.event_type == t and o.key.size == 4.0]
        if critical is not None:
            row.append(f" {_f(oracle_power(sel, critical))} |")
        for m in methods:
            s = pooled_stats(outcomes, m, event_type=t, size=4.0)
            ok = (
                None
                if m != ENGINE or not math.isfinite(s.recall)
                else (s.recall >= TARGET_RECALL[t])
            )
            row.append(f" {_f(s.recall)}{_mark(ok)} |")
        if ENGINE in methods:
            s = pooled_stats(outcomes, ENGINE, event_type=t, size=4.0)
            acc_ok = None if not math.isfinite(s.type_acc) else s.type_acc >= TARGET_TYPE_ACC
            ratio_ok = None if not math.isfinite(s.ratio) else s.ratio <= TARGET_RMSE_RATIO
            row.append(
                f" {_f(s.type_acc)}{_mark(acc_ok)} | {_f(s.rmse, 3)} | {_f(s.oracle_rmse, 3)} |"
                f" {_f(s.ratio)}{_mark(ratio_ok)} | {_f(oracle_rmse_all(sel), 3)} |"
            )
        row.append(f" {_f(oracle_type_acc(sel, KNOWN))} | {_f(oracle_type_acc(sel, PROFILED))} |")
        lines.append("".join(row))
    # False events on clean series, pooled over models.
    row = [f"| clean: false/1000 | ≤ {TARGET_FALSE_PER_1000} |"]
    if critical is not None:
        row.append(" |")
    for m in methods:
        s = pooled_stats(outcomes, m, event_type="clean")
        ok = (
            None
            if m != ENGINE or not math.isfinite(s.false_per_1000)
            else (s.false_per_1000 <= TARGET_FALSE_PER_1000)
        )
        row.append(f" {_f(s.false_per_1000)}{_mark(ok)} |")
    if ENGINE in methods:
        row.append(" | | | | |")
    row.append(" | |")
    lines.append("".join(row))
    return "\n".join(lines)


def format_confusion(outcomes: Sequence[SeriesOutcome]) -> str:
    """Engine: true type x reported type of the matched event, pooled over models and sizes."""
    lines = [
        "| true \\ reported | AO | LS | TC | IO | missed | series | mean weight of true type |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for t in EVENT_TYPES:
        sel = [o for o in outcomes if o.key.event_type == t]
        counts = {u: 0 for u in EVENT_TYPES}
        missed = 0
        weights: list[float] = []
        for o in sel:
            d = match(o, ENGINE)
            if d is None:
                missed += 1
            else:
                counts[str(d.event_type)] = counts.get(str(d.event_type), 0) + 1
                if d.type_weights is not None:
                    weights.append(dict(d.type_weights).get(t, 0.0))
        mean_w = float(np.mean(weights)) if weights else math.nan
        lines.append(
            f"| {t} | "
            + " | ".join(str(counts[u]) for u in EVENT_TYPES)
            + f" | {missed} | {len(sel)} | {_f(mean_w)} |"
        )
    return "\n".join(lines)


def _calls(labels: Iterable[str | None]) -> str:
    """Counts of each type among ``labels`` as ``AO/LS/TC/IO`` (None, a miss, not counted)."""
    labels = list(labels)
    return "/".join(str(sum(x == t for x in labels)) for t in EVENT_TYPES)


def format_oracle_confusion(outcomes: Sequence[SeriesOutcome], variant: str) -> str:
    """Oracle type classifier: true type x its type, pooled over models and sizes."""
    lines = [
        "| true \\ oracle | AO | LS | TC | IO | series | accuracy |",
        "|---|---|---|---|---|---|---|",
    ]
    for t in EVENT_TYPES:
        called = [oracle_called(o, variant) for o in outcomes if o.key.event_type == t]
        called = [c for c in called if c is not None]
        counts = [sum(c == u for c in called) for u in EVENT_TYPES]
        acc = counts[EVENT_TYPES.index(t)] / len(called) if called else math.nan
        lines.append(f"| {t} | " + " | ".join(map(str, counts)) + f" | {len(called)} | {_f(acc)} |")
    return "\n".join(lines)


def format_type_comparison(outcomes: Sequence[SeriesOutcome]) -> str:
    """Engine type accuracy against the oracle type classifier, per model x type x size.

    The oracle's accuracy is given over all the cell's series and, paired with
    the engine's, over the series the engine recalled (recalled series tend to
    carry larger realized effects, which are easier to type).  Calls are counts
    of AO/LS/TC/IO: the engine's at its matched event, the oracle's on the
    recalled series.  Rows with model ``all`` pool the models.
    """
    lines = [
        "| model | type | size | series | engine recalled | engine type acc | "
        "oracle known δ (all) | oracle profiled (all) | oracle known δ (recalled) | "
        "oracle profiled (recalled) | engine calls AO/LS/TC/IO | "
        "oracle known δ calls (recalled) | oracle profiled calls (recalled) |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    injected = [o for o in outcomes if o.key.event_type is not None]
    sizes = sorted({o.key.size for o in injected})
    models = [m for m in MODEL_NAMES if any(o.key.model == m for o in injected)]
    for model in (*models, "all"):
        for t in EVENT_TYPES:
            for size in sizes:
                cell = [
                    o
                    for o in injected
                    if o.key.event_type == t
                    and o.key.size == size
                    and (model == "all" or o.key.model == model)
                ]
                if not cell:
                    continue
                hits = [(o, match(o, ENGINE)) for o in cell]
                hits = [(o, d) for o, d in hits if d is not None]
                rec = [o for o, _ in hits]
                acc = np.mean([d.event_type == t for _, d in hits]) if hits else math.nan
                lines.append(
                    f"| {model} | {t} | {size:g}σ | {len(cell)} | {len(hits)} | {_f(acc)} | "
                    f"{_f(oracle_type_acc(cell, KNOWN))} | {_f(oracle_type_acc(cell, PROFILED))} | "
                    f"{_f(oracle_type_acc(rec, KNOWN))} | {_f(oracle_type_acc(rec, PROFILED))} | "
                    f"{_calls(d.event_type for _, d in hits)} | "
                    f"{_calls(o.oracle_type_known for o in rec)} | "
                    f"{_calls(o.oracle_type_profiled for o in rec)} |"
                )
    return "\n".join(lines)


def format_timings(outcomes: Sequence[SeriesOutcome], methods: Sequence[str]) -> str:
    """Wall seconds per series per method (inside the worker process)."""
    lines = [
        "| method | series | mean s/series | median s/series | max s/series |",
        "|---|---|---|---|---|",
    ]
    for m in methods:
        secs = np.array([o.runs[m].seconds for o in outcomes])
        lines.append(
            f"| {m} | {secs.size} | {secs.mean():.4f} | {np.median(secs):.4f} | {secs.max():.4f} |"
        )
    orc = np.array([o.oracle_seconds for o in outcomes if o.oracle_omega is not None])
    if orc.size:
        lines.append(
            f"| {ORACLE} | {orc.size} | {orc.mean():.4f} | {np.median(orc):.4f} | {orc.max():.4f} |"
        )
    typ = np.array([o.oracle_type_seconds for o in outcomes if o.oracle_type_known is not None])
    if typ.size:
        lines.append(
            f"| oracle types | {typ.size} | {typ.mean():.4f} | {np.median(typ):.4f} |"
            f" {typ.max():.4f} |"
        )
    return "\n".join(lines)


def format_errors(
    outcomes: Sequence[SeriesOutcome], methods: Sequence[str], limit: int = 10
) -> str:
    """The first few method errors, one line each."""
    lines = []
    for o in outcomes:
        for m in methods:
            err = o.runs[m].error
            if err is not None:
                lines.append(f"- {m} on {o.series_id}: {err}")
    if not lines:
        return ""
    more = f"\n- ... and {len(lines) - limit} more" if len(lines) > limit else ""
    return "\n".join(lines[:limit]) + more


CALIBRATION_BINS = (0.25, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 1.0001)
"""Bins of the reported type's weight (the largest of four, so at least 0.25)."""


def calibration(outcomes: Sequence[SeriesOutcome]) -> tuple[list[tuple], float, int]:
    """Reliability of the engine's type weights and their expected calibration error.

    Over injected series with a matched event: confidence = the reported
    type's weight, correct = the reported type is the true type.  Returns rows
    (low, high, count, mean confidence, accuracy), the ECE (sum over bins of
    count / N * |accuracy - mean confidence|) and N.
    """
    conf, hit = [], []
    for o in outcomes:
        if o.key.event_type is None:
            continue
        d = match(o, ENGINE)
        if d is None or d.type_weights is None:
            continue
        weights = dict(d.type_weights)
        conf.append(weights.get(str(d.event_type), max(weights.values())))
        hit.append(d.event_type == o.key.event_type)
    c, h = np.asarray(conf), np.asarray(hit, dtype=float)
    rows, ece = [], 0.0
    for lo, hi in itertools.pairwise(CALIBRATION_BINS):
        sel = (c >= lo) & (c < hi)
        if sel.any():
            mc, acc = float(c[sel].mean()), float(h[sel].mean())
            rows.append((lo, min(hi, 1.0), int(sel.sum()), mc, acc))
            ece += sel.sum() / c.size * abs(acc - mc)
    return rows, (ece if c.size else math.nan), int(c.size)


def _laws(outcomes: Sequence[SeriesOutcome]) -> str:
    return "+".join(sorted({o.key.law for o in outcomes})) or "no"


def format_calibration(outcomes: Sequence[SeriesOutcome]) -> str:
    rows, ece, total = calibration(outcomes)
    lines = [
        "| reported type's weight | events | mean weight | share right |",
        "|---|---|---|---|",
    ]
    for lo, hi, count, mc, acc in rows:
        lines.append(f"| [{lo:.2f}, {hi:.2f}) | {count} | {mc:.3f} | {acc:.3f} |")
    lines.append("")
    lines.append(f"Expected calibration error over {total} matched events: {_f(ece, 3)} (≤ 0.05)")
    return "\n".join(lines)


def report(
    outcomes: Sequence[SeriesOutcome],
    methods: Sequence[str],
    *,
    wall: float,
    jobs: int,
    critical: float | None = None,
) -> str:
    """Every table of the study as one markdown text."""
    parts = [
        f"## Monte Carlo study: {len(outcomes)} series ({_laws(outcomes)} innovations), "
        f"wall {wall:.1f} s on {jobs} job(s)",
        "",
        "Recall: an event within ±2 positions of the true time. RMSE of effect − ω over "
        "correctly typed recalled events; oracle RMSE over the same series (statsmodels "
        "SARIMAX, true orders, true regressor at the true time, cov_type='oim'). "
        "'oracle power': share of series whose oracle |t| statistic clears the engine's "
        "critical value C (an optimistic bound on recall at that C). 'oracle type acc': "
        "share of all the cell's series that a likelihood classifier typed right, told the "
        "true time and orders (statsmodels SARIMAX, one fit per type with its regressor at "
        "the true time, largest log-likelihood; TC decay known 0.7, or profiled over "
        "0.1..0.9 and charged 1 log-likelihood unit): an optimistic bound on type accuracy.",
        "",
        format_study_table(study_table(outcomes, methods), outcomes, critical=critical),
        "",
        "### Summary at 4σ (pooled over models)",
        "",
        format_summary(outcomes, methods, critical=critical),
    ]
    if ENGINE in methods:
        parts += [
            "",
            "### Engine type confusion (all models and sizes)",
            "",
            format_confusion(outcomes),
            "",
            "### Calibration of the type weights (all models and sizes)",
            "",
            format_calibration(outcomes),
        ]
    typed = [o for o in outcomes if o.oracle_type_known is not None]
    if typed:
        for variant, title in ((KNOWN, "TC decay known"), (PROFILED, "TC decay profiled, +1")):
            if any(oracle_called(o, variant) is not None for o in typed):
                parts += [
                    "",
                    f"### Oracle type confusion, {title} (all models and sizes)",
                    "",
                    format_oracle_confusion(typed, variant),
                ]
        if ENGINE in methods:
            parts += [
                "",
                "### Type accuracy: engine against the oracle type classifier",
                "",
                format_type_comparison(outcomes),
            ]
    parts += ["", "### Timings", "", format_timings(outcomes, methods)]
    nonconv = sum(not o.oracle_converged for o in outcomes if o.oracle_omega is not None)
    if nonconv:
        parts += ["", f"Oracle fits not reported converged: {nonconv}."]
    nonconv = sum(not o.oracle_type_converged for o in typed)
    if nonconv:
        parts += ["", f"Series with an oracle type fit not reported converged: {nonconv}."]
    errs = format_errors(outcomes, methods)
    if errs:
        parts += ["", "### Errors", "", errs]
    return "\n".join(parts)


# ---------------------------------------------------------------------------
# Command line


def _parse(argv: Sequence[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(
        prog="python -m tests.benchmarks.montecarlo",
        description="Monte Carlo accuracy study of the detection engine.",
    )
    p.add_argument(
        "--replications",
        type=int,
        default=25,
        help="series per (model, type, size) cell (default 25)",
    )
    p.add_argument(
        "--clean",
        type=int,
        default=None,
        help="clean series per model (default: same as --replications)",
    )
    p.add_argument("--jobs", type=int, default=1, help="worker processes (default 1)")
    p.add_argument("--models", nargs="+", default=list(MODEL_NAMES), choices=list(MODELS))
    p.add_argument("--types", nargs="+", default=list(EVENT_TYPES), choices=list(EVENT_TYPES))
    p.add_argument("--sizes", nargs="+", type=float, default=list(SIZES))
    p.add_argument("--n", type=int, default=N_POINTS, help="points per series (default 480)")
    p.add_argument("--seed", type=int, default=BASE_SEED, help="study seed")
    p.add_argument(
        "--innovations",
        choices=INNOVATIONS,
        default="gauss",
        help="innovation law: gauss, or t3 (Student t(3) scaled to unit variance)",
    )
    p.add_argument(
        "--critical",
        type=float,
        default=None,
        help="engine critical value (default: the engine's own)",
    )
    p.add_argument("--no-engine", action="store_true", help="run the baselines and the oracle only")
    p.add_argument(
        "--oracle-types",
        choices=ORACLE_TYPE_MODES,
        default=ORACLE_TYPES_DEFAULT,
        help="oracle type classifier: off, TC decay known only (3 fits per injected series), "
        f"or also the decay profiled (11-12 fits; default {ORACLE_TYPES_DEFAULT})",
    )
    args = p.parse_args(argv)
    if args.replications < 1 or args.jobs < 1 or args.n < 50:
        p.error("--replications and --jobs must be at least 1 and --n at least 50")
    return args


def main(argv: Sequence[str] | None = None) -> int:
    args = _parse(argv)
    methods = list(METHODS)
    if args.no_engine:
        methods.remove(ENGINE)
    elif not engine_available():
        print(
            "changekind.tasks.detect is not importable; running baselines and oracle only.",
            file=sys.stderr,
        )
        methods.remove(ENGINE)
    keys = list(
        study_keys(
            models=args.models,
            types=args.types,
            sizes=args.sizes,
            replications=args.replications,
            clean_replications=args.clean,
            law=args.innovations,
        )
    )
    start = time.perf_counter()
    outcomes = run_study(
        keys,
        jobs=args.jobs,
        methods=methods,
        n=args.n,
        base_seed=args.seed,
        critical=args.critical,
        oracle_types=args.oracle_types,
    )
    wall = time.perf_counter() - start
    crit = args.critical
    if crit is None and ENGINE in methods:
        from changekind.tasks.detect import default_critical

        crit = default_critical(args.n)
    print(report(outcomes, methods, wall=wall, jobs=args.jobs, critical=crit))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
