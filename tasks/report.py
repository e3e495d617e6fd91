"""Pictures and an HTML page of stored events, for people to look at.

Pure building blocks of the ``changekind report`` command (which reads the
database and the source; nothing here does):

- :func:`effect_curve` -- the fitted effect of one event on a window of its
  series, placed by time: a pulse for an AO, a step for an LS, a fading jump
  omega delta^k for a TC and the shock propagated through the model's psi
  weights for an IO (the shapes of :mod:`changekind.tasks.detect`);
- :func:`event_figure` -- one matplotlib figure per event: the observed series
  around it, the series with the effect removed, the effect curve, the type
  weights and the model and effect in words;
- :func:`summarize_events` and :func:`render_report` -- counts by type and by
  series group and the page itself, every text escaped;
- :func:`write_report` -- draws the pictures and writes ``index.html`` with
  them beside it (the only function here that touches files).

Figures are made with :class:`matplotlib.figure.Figure` directly (Agg canvas,
no pyplot and no display), so drawing needs no window system and keeps no
global state.  The look is the project's own: one colour, marker and hatch
per type (:data:`TYPE_STYLES`), used the same way in every figure and in the
page, and lines told apart by style as well as colour so that a grayscale
print stays readable.
"""

from __future__ import annotations

import html
import math
import re
import textwrap
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from changekind.tasks.detect import SETTLE, series_shape
from changekind.tasks.errors import ConfigError, SeriesError
from changekind.tasks.fit import psi_weights
from changekind.tasks.types import EVENT_NAMES, EVENT_TYPES, REPORTED_TYPES, Event, FittedModel

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = [
    "ADJUSTED_STYLE",
    "OBSERVED_STYLE",
    "TYPE_STYLES",
    "EventView",
    "ReportSummary",
    "TypeStyle",
    "describe_event",
    "effect_curve",
    "event_figure",
    "event_from_record",
    "picture_name",
    "render_report",
    "series_group",
    "slice_window",
    "summarize_events",
    "window_bounds",
    "window_points",
    "write_report",
]

WINDOW_FACTOR = 3
"""Points shown either side of an event: this many times its settle span."""

MIN_WINDOW_POINTS = 24
"""Fewest points shown either side of an event."""

FIGURE_SIZE = (10.0, 6.0)
"""Figure size in inches; at :data:`FIGURE_DPI` a picture is 1000 x 600 pixels."""

FIGURE_DPI = 100

INDEX_NAME = "index.html"
PICTURE_PATTERN = "event-*.png"
"""Names of the pictures a report writes (earlier ones are removed first)."""


@dataclass(frozen=True, slots=True)
class TypeStyle:
    """How one event type is drawn: fill colour, marker and bar hatch."""

    colour: str
    marker: str
    hatch: str


TYPE_STYLES: dict[str, TypeStyle] = {
    "AO": TypeStyle("#d9822b", "o", "//"),
    "LS": TypeStyle("#3a6ea5", "s", ".."),
    "TC": TypeStyle("#5a9e6f", "^", "xx"),
    "IO": TypeStyle("#9b5fa5", "D", "\\\\"),
    "VC": TypeStyle("#b23a48", "v", "--"),
}
"""One colour, marker and hatch per type, in every figure and in the page."""

OBSERVED_STYLE: dict[str, Any] = {
    "color": "#1f1f1f",
    "linestyle": "-",
    "linewidth": 1.1,
    "marker": ".",
    "markersize": 3.5,
}
ADJUSTED_STYLE: dict[str, Any] = {
    "color": "#138086",
    "linestyle": "--",
    "linewidth": 1.4,
}
_SHAPE_WORDS = {
    "AO": "pulse at the event only",
    "LS": "step from the event on",
    "TC": "fading jump, omega x delta^k",
    "IO": "shock through the model, omega x psi_k",
    "VC": "step in the window spread from the event on",
}


# --------------------------------------------------------------------------- values


@dataclass(frozen=True, slots=True, eq=False)
class EventView:
    """One event with what its picture needs.

    ``timestamps`` and ``values`` are the observations around the event as the
    source holds them (None when the source has none); ``model`` is the
    series' stored model (None when there is none); ``note`` says why there is
    no data, when there is none.
    """

    event: Event
    timestamps: Any = None
    values: Any = None
    model: FittedModel | None = None
    note: str | None = None


@dataclass(frozen=True, slots=True)
class ReportSummary:
    """Counts shown at the top of a report.

    ``by_type`` holds ``(type, confirmed, provisional, total)`` per type in
    :data:`~changekind.tasks.types.REPORTED_TYPES` order; ``by_group`` holds
    ``(group, counts per type in the same order, total)`` per series group,
    groups sorted by name; ``strongest`` the indices of the events, largest
    |t| first.
    """

    n_events: int
    n_series: int
    by_type: tuple[tuple[str, int, int, int], ...]
    by_group: tuple[tuple[str, tuple[int, ...], int], ...]
    strongest: tuple[int, ...]


def series_group(series_id: str) -> str:
    """The group of a series: its id up to the first ``/`` (the whole id without one)."""
    return series_id.split("/", 1)[0]


def event_from_record(record: Mapping[str, Any]) -> Event:
    """An Event from a row of :func:`changekind.tasks.persist.read_events`.

    ``position`` is -1: stored events are placed by time, not by grid index.
    """

    def opt(value: Any) -> float | None:
        if value is None or (isinstance(value, float) and math.isnan(value)):
            return None
        return float(value)

    def text(value: Any) -> str | None:
        return None if value is None or (isinstance(value, float) and math.isnan(value)) else value

    weights = record["type_weights"]
    if isinstance(weights, Mapping):
        pairs = tuple((str(k), float(v)) for k, v in weights.items())
    else:
        pairs = tuple((str(k), float(v)) for k, v in weights)
    return Event(
        series_id=str(record["series_id"]),
        position=-1,
        event_time=str(record["event_time"]),
        event_type=record["event_type"],
        effect=float(record["effect"]),
        effect_pct=opt(record.get("effect_pct")),
        t_stat=float(record["t_stat"]),
        se=float(record["se"]),
        type_weights=pairs,
        status=record["status"],
        decay=opt(record.get("decay")),
        half_life=text(record.get("half_life")),
        level=float(record["level"]),
        model=str(record["model"]),
        window_start=text(record.get("window_start")),
        window_end=text(record.get("window_end")),
    )


# --------------------------------------------------------------------------- time axis


def _utc_naive(stamps: pd.DatetimeIndex) -> pd.DatetimeIndex:
    return stamps.tz_convert("UTC").tz_localize(None) if stamps.tz is not None else stamps


def _axis(timestamps: Any) -> tuple[str, np.ndarray]:
    """``("datetime", datetime64[ns] UTC-naive)`` or ``("numeric", float64)``.

    Aware times are converted to UTC and naive ones kept as they are, the same
    rule as for an event's time (:func:`_event_tick`), so the two always meet.
    """
    raw = pd.Series(timestamps).reset_index(drop=True)
    if raw.dtype.kind in "iuf":
        return "numeric", raw.to_numpy(dtype=float)
    if raw.dtype.kind == "M" or isinstance(raw.dtype, pd.DatetimeTZDtype):
        parsed = pd.DatetimeIndex(raw)
    else:
        text = raw.astype(str)
        numbers = pd.to_numeric(text, errors="coerce")
        if numbers.notna().all():
            return "numeric", numbers.to_numpy(dtype=float)
        try:
            parsed = pd.DatetimeIndex(pd.to_datetime(text, format="ISO8601", utc=False))
        except (ValueError, TypeError):
            try:
                parsed = pd.DatetimeIndex(pd.to_datetime(text, format="mixed", utc=True))
            except (ValueError, TypeError) as exc:
                raise ConfigError(
                    f"timestamps cannot be read as times or numbers ({exc}); "
                    "use ISO 8601 such as 2026-01-31T14:05:00"
                ) from None
    return "datetime", _utc_naive(parsed).to_numpy(dtype="datetime64[ns]")


def _event_tick(event: Event, kind: str) -> np.datetime64 | float:
    if kind == "numeric":
        try:
            return float(event.event_time)
        except ValueError:
            raise SeriesError(
                event.series_id,
                f"event time {event.event_time!r} is not a number but the source's "
                "timestamps are; check that --source is the data the events came from",
            ) from None
    try:
        stamp = pd.Timestamp(event.event_time)
    except (ValueError, TypeError):
        raise SeriesError(
            event.series_id,
            f"event time {event.event_time!r} is not a date-time but the source's "
            "timestamps are; check that --source is the data the events came from",
        ) from None
    if stamp.tz is not None:
        stamp = stamp.tz_convert("UTC").tz_localize(None)
    return stamp.to_datetime64().astype("datetime64[ns]")


def _step(ticks: np.ndarray, kind: str, model: FittedModel | None) -> float:
    """Grid spacing in seconds (datetime) or index units: the model's, else the data's."""
    if model is not None and model.step_seconds:
        return float(model.step_seconds)
    values = ticks.astype("datetime64[ns]").view("i8") / 1e9 if kind == "datetime" else ticks
    gaps = np.diff(np.unique(values))
    if gaps.size == 0:
        raise ConfigError("needs at least two distinct timestamps to place an effect")
    return float(np.median(gaps))


def _offsets(ticks: np.ndarray, at: np.datetime64 | float, kind: str, step: float) -> np.ndarray:
    """Grid steps from the event to each timestamp (negative before it)."""
    if kind == "datetime":
        delta = (ticks.astype("datetime64[ns]") - at).astype("timedelta64[ns]")
        seconds = delta.astype(np.int64).astype(float) / 1e9
    else:
        seconds = ticks - float(at)
    return np.rint(seconds / step).astype(np.int64)


# --------------------------------------------------------------------------- windows


def window_points(
    event: Event, *, factor: int = WINDOW_FACTOR, minimum: int = MIN_WINDOW_POINTS
) -> int:
    """Points to show either side of an event: ``factor`` times its settle span.

    The settle span is what the engine waits for before it confirms an event:
    ``SETTLE`` points, or two decay half-lives of a TC when that is longer.
    """
    settle = float(SETTLE)
    if event.event_type == "TC" and event.decay is not None and 0.0 < event.decay < 1.0:
        settle = max(settle, 2.0 * math.log(0.5) / math.log(event.decay))
    return max(int(minimum), math.ceil(factor * settle))


def window_bounds(
    event: Event, *, step_seconds: float, time_kind: str, points: int | None = None
) -> tuple[Any, Any]:
    """``(start, end)`` of the span to read around an event, ``start <= t < end``.

    Parameters
    ----------
    event : Event
    step_seconds : float
        Grid spacing: seconds for date/time series, index units for numeric ones.
    time_kind : {"datetime", "text", "numeric"}
        What the source's timestamps hold (``SourceSpec.time_kind``).
    points : int, optional
        Points either side; default :func:`window_points`.

    Returns
    -------
    tuple
        ``pd.Timestamp`` bounds (in the event's own zone, if it has one) or floats.
    """
    if not step_seconds > 0:
        raise ConfigError(f"step_seconds must be positive, got {step_seconds!r}")
    n = window_points(event) if points is None else int(points)
    if time_kind == "numeric":
        at = float(_event_tick(event, "numeric"))
        return at - n * step_seconds, at + (n + 1) * step_seconds
    stamp = pd.Timestamp(event.event_time)
    span = pd.Timedelta(seconds=n * step_seconds)
    return stamp - span, stamp + span + pd.Timedelta(seconds=step_seconds)


def slice_window(
    event: Event,
    timestamps: Any,
    values: Any,
    *,
    model: FittedModel | None = None,
    points: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """The observations within ``points`` grid steps of an event, sorted by time.

    Parameters
    ----------
    event : Event
    timestamps, values : array-like of shape (n,)
        Observations of the event's series (any span, any order).
    model : FittedModel, optional
        Its spacing places the points; default the median gap of ``timestamps``.
    points : int, optional
        Points either side; default :func:`window_points`.

    Returns
    -------
    (timestamps, values) : tuple of numpy.ndarray
        The timestamps as given (same dtype) and the values as float64.
    """
    stamps = pd.Series(timestamps).reset_index(drop=True)
    vals = pd.to_numeric(pd.Series(values).reset_index(drop=True), errors="coerce")
    if len(stamps) != len(vals):
        raise SeriesError(event.series_id, "timestamps and values have different lengths")
    if len(stamps) == 0:
        return stamps.to_numpy(), vals.to_numpy(dtype=float)
    kind, ticks = _axis(stamps)
    step = _step(ticks, kind, model) if len(stamps) > 1 else 1.0
    k = _offsets(ticks, _event_tick(event, kind), kind, step)
    n = window_points(event) if points is None else int(points)
    keep = np.flatnonzero(np.abs(k) <= n)
    keep = keep[np.argsort(ticks[keep], kind="stable")]
    return stamps.to_numpy()[keep], vals.to_numpy(dtype=float)[keep]


# --------------------------------------------------------------------------- effects


def effect_curve(
    event: Event,
    timestamps: Any,
    *,
    model: FittedModel | None = None,
    step_seconds: float | None = None,
) -> np.ndarray:
    """The fitted effect of ``event`` at each of ``timestamps``, in the series' units.

    Parameters
    ----------
    event : Event
    timestamps : array-like of shape (n,)
        Date-times (naive, aware or ISO text) or numbers, in any order.
    model : FittedModel, optional
        The series' model: its spacing places the event and, for an IO, its
        psi weights shape the effect.  Without one an IO is drawn as its shock
        alone (a pulse).
    step_seconds : float, optional
        Grid spacing; default the model's, else the median gap of ``timestamps``.

    Returns
    -------
    numpy.ndarray of shape (n,)
        ``effect * shape(k)`` for points ``k >= 0`` steps after the event, 0 before.
    """
    kind, ticks = _axis(timestamps)
    at = _event_tick(event, kind)
    step = float(step_seconds) if step_seconds else _step(ticks, kind, model)
    k = _offsets(ticks, at, kind, step)
    out = np.zeros(k.size)
    after = k >= 0
    if not after.any():
        return out
    length = int(k[after].max()) + 1
    psi = None
    kind_of_shape = "LS" if event.event_type == "VC" else event.event_type  # a step in spread
    if kind_of_shape == "IO":
        if model is None:
            kind_of_shape = "AO"
        else:
            psi = psi_weights(model, length)
    shape = series_shape(kind_of_shape, length, delta=event.decay, psi=psi)
    out[after] = event.effect * shape[k[after]]
    return out


# --------------------------------------------------------------------------- words


def _num(value: float | None, fmt: str) -> str:
    if value is None or not math.isfinite(value):
        return "-"
    return format(value, fmt)


def describe_event(event: Event, model: FittedModel | None = None) -> list[str]:
    """The event and its model in words, one short line per fact."""
    name = EVENT_NAMES.get(event.event_type, event.event_type)
    if event.effect_pct is not None and math.isfinite(event.effect_pct):
        pct = f" ({event.effect_pct:+.1f} % of the level {event.level:.4g} before it)"
    else:
        pct = " (level near zero: no percentage)"
    lines = [
        f"{name} ({event.event_type}), {event.status}",
        f"at {event.event_time}",
        f"size {event.effect:+.4g} in the series' units{pct}",
        f"t = {event.t_stat:+.2f} (standard error {_num(event.se, '.3g')})",
    ]
    if event.event_type == "TC":
        decay = _num(event.decay, ".3g")
        lines.append(f"decays by a factor {decay} a step, half-life {event.half_life or '-'}")
    if event.event_type == "IO":
        lines.append("shock carried on by the model's own dynamics (psi weights)")
    ranked = sorted(event.type_weights, key=lambda kv: -kv[1])
    lines.append("type weights " + ", ".join(f"{k} {w:.2f}" for k, w in ranked if w >= 0.005))
    lines.append(f"model {event.model}")
    if model is not None and model.spec() != event.model:
        lines.append(f"curve drawn with the series' current model {model.spec()}")
    if event.event_type == "IO" and model is None:
        lines.append("no stored model: the IO is drawn as its shock alone")
    return lines


# --------------------------------------------------------------------------- figure


def event_figure(
    event: Event,
    timestamps: Any,
    values: Any,
    model: FittedModel | None = None,
    *,
    dpi: int = FIGURE_DPI,
) -> Figure:
    """One event's picture.

    Parameters
    ----------
    event : Event
    timestamps, values : array-like of shape (n,)
        The observed series around the event (at least two points; missing
        values allowed).
    model : FittedModel, optional
        The series' stored model (spacing, and psi weights for an IO).
    dpi : int, default=100
        The figure is ``FIGURE_SIZE`` inches, 1000 x 600 pixels at 100 dpi.

    Returns
    -------
    matplotlib.figure.Figure
        Four panels: observed and effect-removed series (top left), the effect
        curve (bottom left, same time axis), type weights (top right), the
        event in words (bottom right).

    Raises
    ------
    SeriesError
        No observations, or none around the event.
    """
    from matplotlib import dates as mdates
    from matplotlib.figure import Figure

    sid = event.series_id
    y = pd.to_numeric(pd.Series(values).reset_index(drop=True), errors="coerce")
    y = y.to_numpy(dtype=float)
    if not hasattr(timestamps, "__len__") or len(y) != len(timestamps):
        raise SeriesError(sid, "timestamps and values for the picture have different lengths")
    if y.size < 2 or np.isnan(y).all():
        raise SeriesError(sid, f"the source has no observations around {event.event_time}")
    kind, ticks = _axis(timestamps)
    order = np.argsort(ticks, kind="stable")
    ticks, y = ticks[order], y[order]
    at = _event_tick(event, kind)
    step = _step(ticks, kind, model)
    k = _offsets(ticks, at, kind, step)
    if k.min() > 0 or k.max() < 0:
        raise SeriesError(
            sid,
            f"the observations read ({_tick_text(ticks[0])} to {_tick_text(ticks[-1])}) do not "
            f"reach the event at {event.event_time}; check that --source is the data the "
            "events came from",
        )
    effect = effect_curve(event, ticks, model=model, step_seconds=step)
    style = TYPE_STYLES.get(event.event_type, TypeStyle("#555555", "o", ""))
    x = ticks
    x_at = at

    fig = Figure(figsize=FIGURE_SIZE, dpi=dpi, layout="constrained")
    grid = fig.add_gridspec(2, 2, width_ratios=(3.1, 1.0), height_ratios=(2.1, 1.0))
    ax_obs = fig.add_subplot(grid[0, 0])
    ax_eff = fig.add_subplot(grid[1, 0], sharex=ax_obs)
    ax_w = fig.add_subplot(grid[0, 1])
    ax_txt = fig.add_subplot(grid[1, 1])

    # Observed and effect-removed series.
    observed = "observed"
    if event.window_start is not None:  # windowed mode: the series the event was found in
        observed = "window spread" if event.event_type == "VC" else "window median"
    ax_obs.plot(x, y, label=observed, **OBSERVED_STYLE)
    ax_obs.plot(x, y - effect, label="with the effect removed", **ADJUSTED_STYLE)
    ax_obs.axvline(
        x_at, color=style.colour, linestyle=":", linewidth=1.6, label="event time", zorder=1
    )
    hit = np.flatnonzero(k == 0)
    if hit.size and not np.isnan(y[hit[0]]):
        ax_obs.plot(
            [x[hit[0]]],
            [y[hit[0]]],
            linestyle="none",
            marker=style.marker,
            markersize=8,
            markerfacecolor=style.colour,
            markeredgecolor="#000000",
            zorder=4,
        )
    ax_obs.set_title(
        f"{sid}: {EVENT_NAMES.get(event.event_type, event.event_type)} at {event.event_time}",
        loc="left",
        fontsize=10,
    )
    ax_obs.set_ylabel("value")
    ax_obs.grid(True, color="#d8d8d8", linewidth=0.6)
    ax_obs.legend(loc="best", fontsize=8, framealpha=0.85)

    # The fitted effect curve.
    ax_eff.axhline(0.0, color="#8a8a8a", linewidth=0.8)
    ax_eff.plot(
        x,
        effect,
        color=style.colour,
        linestyle="-.",
        linewidth=1.5,
        marker=style.marker,
        markersize=3.5,
        markeredgecolor="#000000",
        markeredgewidth=0.4,
        label=f"fitted {event.event_type}: {_SHAPE_WORDS.get(event.event_type, '')}",
    )
    ax_eff.axvline(x_at, color=style.colour, linestyle=":", linewidth=1.6)
    ax_eff.margins(y=0.3)  # room for the legend above or below the curve
    ax_eff.set_ylabel("effect")
    ax_eff.grid(True, color="#d8d8d8", linewidth=0.6)
    ax_eff.legend(loc="best", fontsize=8, framealpha=0.85)
    if kind == "datetime":
        # minticks 3: with the default 5, some spans (3 points over 5 days) warn.
        locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
        ax_eff.xaxis.set_major_locator(locator)
        ax_eff.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
        ax_eff.set_xlabel("time (UTC)" if _has_zone(event.event_time) else "time")
    else:
        ax_eff.set_xlabel("index")
    ax_obs.tick_params(labelbottom=False)

    # Type weights.
    weights = event.weights
    kinds = list(weights) if weights else list(EVENT_TYPES)
    rows = np.arange(len(kinds))[::-1]
    for row, kind_name in zip(rows, kinds, strict=True):
        own = TYPE_STYLES[kind_name]
        ax_w.barh(
            row,
            weights.get(kind_name, 0.0),
            color=own.colour,
            hatch=own.hatch,
            edgecolor="#000000",
            linewidth=2.2 if kind_name == event.event_type else 0.6,
        )
        share = weights.get(kind_name, 0.0)
        inside = share > 0.75  # label inside a long bar, on a white box
        ax_w.text(
            share - 0.03 if inside else share + 0.03,
            row,
            f"{share:.2f}",
            va="center",
            ha="right" if inside else "left",
            fontsize=8,
            bbox={"facecolor": "#ffffff", "edgecolor": "none", "pad": 1.0} if inside else None,
        )
    ax_w.set_yticks(rows, kinds)
    ax_w.set_xlim(0.0, 1.0)
    ax_w.set_title("type weights", fontsize=9, loc="left")
    ax_w.grid(True, axis="x", color="#d8d8d8", linewidth=0.6)

    # The event in words.
    ax_txt.axis("off")
    wrapped = [
        part for line in describe_event(event, model) for part in textwrap.wrap(line, width=40)
    ]
    ax_txt.text(0.0, 1.0, "\n".join(wrapped), va="top", ha="left", fontsize=7.5, wrap=False)
    return fig


def _has_zone(text: str) -> bool:
    try:
        return pd.Timestamp(text).tz is not None
    except (ValueError, TypeError):
        return False


def _tick_text(tick: Any) -> str:
    if isinstance(tick, np.datetime64):
        return str(pd.Timestamp(tick))
    return f"{float(tick):g}"


# --------------------------------------------------------------------------- summary and page


def summarize_events(events: Sequence[Event]) -> ReportSummary:
    """Counts by type and status, by series group, and the order by strength."""
    by_type = []
    for kind in REPORTED_TYPES:
        mine = [e for e in events if e.event_type == kind]
        confirmed = sum(e.status == "confirmed" for e in mine)
        by_type.append((kind, confirmed, len(mine) - confirmed, len(mine)))
    groups: dict[str, list[int]] = {}
    for e in events:
        counts = groups.setdefault(series_group(e.series_id), [0] * len(REPORTED_TYPES))
        if e.event_type in REPORTED_TYPES:
            counts[REPORTED_TYPES.index(e.event_type)] += 1
    by_group = tuple((g, tuple(c), sum(c)) for g, c in sorted(groups.items()))
    strongest = tuple(
        sorted(range(len(events)), key=lambda i: (-_abs_t(events[i]), events[i].series_id))
    )
    return ReportSummary(
        n_events=len(events),
        n_series=len({e.series_id for e in events}),
        by_type=tuple(by_type),
        by_group=by_group,
        strongest=strongest,
    )


def _abs_t(event: Event) -> float:
    return abs(event.t_stat) if math.isfinite(event.t_stat) else -1.0


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


_CSS = """
body { font-family: 'DejaVu Sans', Verdana, sans-serif; margin: 1.5rem auto; max-width: 72rem;
       padding: 0 1rem; color: #1f1f1f; line-height: 1.4; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.2rem; border-bottom: 2px solid #1f1f1f; padding-bottom: 0.2rem;
     margin-top: 2rem; }
h3 { font-size: 1rem; margin-bottom: 0.3rem; }
table { border-collapse: collapse; margin: 0.5rem 0 1rem; font-size: 0.9rem; }
th, td { border: 1px solid #b8b8b8; padding: 0.2rem 0.55rem; text-align: left; }
th { background: #ececec; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
dl.facts { display: grid; grid-template-columns: max-content auto; gap: 0.1rem 1rem;
           font-size: 0.9rem; }
dl.facts dt { font-weight: bold; }
dl.facts dd { margin: 0; }
.badge { display: inline-block; min-width: 2.2rem; text-align: center; font-weight: bold;
         border: 1.5px solid #000; border-radius: 3px; padding: 0 0.25rem; color: #000; }
section.event { border-top: 1px solid #b8b8b8; padding-top: 0.6rem; margin-top: 1.2rem; }
h2 + section.event { border-top: none; }
section.event img { max-width: 100%; height: auto; border: 1px solid #d0d0d0; }
ul.words { font-size: 0.9rem; margin-top: 0.3rem; }
p.note { font-style: italic; }
"""


_DARK_FILLS = ("LS", "IO")  # white text reads better on these fills (contrast about 5:1)


def _badge(kind: str) -> str:
    style = TYPE_STYLES.get(kind)
    colour = style.colour if style else "#dddddd"
    text = "#ffffff" if kind in _DARK_FILLS else "#000000"
    return f'<span class="badge" style="background:{_e(colour)};color:{text}">{_e(kind)}</span>'


def _anchor(i: int) -> str:
    return f"event-{i + 1}"


def render_report(
    events: Sequence[Event],
    pictures: Mapping[tuple[str, str], str],
    summary: ReportSummary,
    *,
    title: str = "changekind events",
    facts: Sequence[tuple[str, str]] = (),
    notes: Mapping[tuple[str, str], str] | None = None,
) -> str:
    """The report page as one self-contained HTML document.

    Parameters
    ----------
    events : sequence of Event
    pictures : mapping of (series_id, event_time) to str
        Relative path of each event's picture; events without one are listed
        without a picture (with their entry of ``notes``, if any).
    summary : ReportSummary
        From :func:`summarize_events` of the same ``events``.
    title : str
    facts : sequence of (name, value)
        Shown at the top (database, source, selection, when made...).
    notes : mapping of (series_id, event_time) to str, optional
        Why an event has no picture.

    Returns
    -------
    str
        HTML5 with inline CSS and no script; every text escaped.
    """
    if summary.n_events != len(events):
        raise ConfigError(
            f"the summary counts {summary.n_events} events but {len(events)} were given; "
            "make it with summarize_events(events)"
        )
    notes = notes or {}
    out: list[str] = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title>",
        f"<style>{_CSS}</style>",
        "</head>",
        "<body>",
        f"<h1>{_e(title)}</h1>",
    ]
    if facts:
        out.append('<dl class="facts">')
        for name, value in facts:
            out.append(f"<dt>{_e(name)}</dt><dd>{_e(value)}</dd>")
        out.append("</dl>")
    out.append(
        f"<p>{summary.n_events} event{'s' if summary.n_events != 1 else ''} in "
        f"{summary.n_series} series. Events are statistical evidence for a person to judge, "
        "not verdicts.</p>"
    )

    # Summary by type.
    out += [
        '<h2 id="by-type">Events by type</h2>',
        "<table>",
        "<thead><tr><th>type</th><th>meaning</th><th>confirmed</th><th>provisional</th>"
        "<th>total</th></tr></thead>",
        "<tbody>",
    ]
    for kind, confirmed, provisional, total in summary.by_type:
        out.append(
            f"<tr><td>{_badge(kind)}</td><td>{_e(EVENT_NAMES.get(kind, kind))}</td>"
            f'<td class="num">{confirmed}</td><td class="num">{provisional}</td>'
            f'<td class="num">{total}</td></tr>'
        )
    out += ["</tbody>", "</table>"]

    # Summary by group.
    out += [
        '<h2 id="by-group">Events by series group</h2>',
        "<p>A group is a series id up to its first &ldquo;/&rdquo;.</p>",
        "<table>",
        "<thead><tr><th>group</th>"
        + "".join(f"<th>{_badge(k)}</th>" for k in REPORTED_TYPES)
        + "<th>total</th></tr></thead>",
        "<tbody>",
    ]
    for group, counts, total in summary.by_group:
        cells = "".join(f'<td class="num">{c}</td>' for c in counts)
        out.append(f'<tr><td>{_e(group)}</td>{cells}<td class="num">{total}</td></tr>')
    out += ["</tbody>", "</table>"]

    # Strongest first.
    out += [
        '<h2 id="strongest">Events, strongest first (by |t|)</h2>',
        "<table>",
        "<thead><tr><th>#</th><th>series</th><th>time</th><th>type</th><th>effect</th>"
        "<th>effect %</th><th>t</th><th>status</th><th>picture</th></tr></thead>",
        "<tbody>",
    ]
    for rank, i in enumerate(summary.strongest, start=1):
        e = events[i]
        key = (e.series_id, e.event_time)
        picture = pictures.get(key)
        link = (
            f'<a href="#{_anchor(i)}">details</a> &middot; <a href="{_e(picture)}">picture</a>'
            if picture
            else f'<a href="#{_anchor(i)}">details</a> &middot; none'
        )
        out.append(
            f'<tr><td class="num">{rank}</td><td>{_e(e.series_id)}</td>'
            f"<td>{_e(e.event_time)}</td><td>{_badge(e.event_type)}</td>"
            f'<td class="num">{_e(_num(e.effect, "+.4g"))}</td>'
            f'<td class="num">{_e(_num(e.effect_pct, "+.1f"))}</td>'
            f'<td class="num">{_e(_num(e.t_stat, "+.2f"))}</td>'
            f"<td>{_e(e.status)}</td><td>{link}</td></tr>"
        )
    out += ["</tbody>", "</table>"]

    # One section per event, in the same order.
    out.append('<h2 id="events">Each event</h2>')
    if not events:
        out.append('<p class="note">No event matches the selection.</p>')
    for i in summary.strongest:
        e = events[i]
        key = (e.series_id, e.event_time)
        picture = pictures.get(key)
        out.append(f'<section class="event" id="{_anchor(i)}">')
        out.append(f"<h3>{_badge(e.event_type)} {_e(e.series_id)} at {_e(e.event_time)}</h3>")
        if picture:
            alt = (
                f"{EVENT_NAMES.get(e.event_type, e.event_type)} in {e.series_id} at "
                f"{e.event_time}: observed series, series with the effect removed, "
                "fitted effect and type weights"
            )
            out.append(
                f'<a href="{_e(picture)}"><img src="{_e(picture)}" alt="{_e(alt)}" '
                f'width="{int(FIGURE_SIZE[0] * FIGURE_DPI)}" '
                f'height="{int(FIGURE_SIZE[1] * FIGURE_DPI)}" loading="lazy"></a>'
            )
        else:
            why = notes.get(key, "no picture was drawn")
            out.append(f'<p class="note">No picture: {_e(why)}</p>')
        out.append('<ul class="words">')
        out += [f"<li>{_e(line)}</li>" for line in describe_event(e)]
        out.append("</ul>")
        out.append("</section>")
    out += ["</body>", "</html>", ""]
    return "\n".join(out)


# --------------------------------------------------------------------------- files


def picture_name(rank: int, event: Event) -> str:
    """File name of an event's picture: rank, then the series and time in safe characters."""
    slug = re.sub(r"[^a-z0-9]+", "-", f"{event.series_id} {event.event_time}".lower()).strip("-")
    return f"event-{rank:04d}-{slug[:80]}.png"


def write_report(
    out_dir: str | Path,
    views: Sequence[EventView],
    *,
    title: str = "changekind events",
    facts: Sequence[tuple[str, str]] = (),
    dpi: int = FIGURE_DPI,
    on_progress: Callable[[int, int], None] | None = None,
) -> Path:
    """Draw every event's picture and write ``index.html`` beside them.

    Parameters
    ----------
    out_dir : str or Path
        Created if missing.  Pictures of an earlier report there
        (``event-*.png``) are removed first, so the folder holds this report only.
    views : sequence of EventView
    title : str
    facts : sequence of (name, value)
        Shown at the top of the page; the time the report was made is added.
    dpi : int, default=100
    on_progress : callable, optional
        Called with (done, total) after each picture.

    Returns
    -------
    Path
        The ``index.html`` written.

    Notes
    -----
    1. Order the events by |t| and name each picture after its rank.
    2. Draw each picture; an event whose data cannot be drawn (none in the
       source, times that do not meet) is listed with the reason instead.
    3. Write the page; it links only to the pictures just written.
    """
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
        for old in out.glob(PICTURE_PATTERN):
            old.unlink()
    except OSError as exc:
        raise ConfigError(f"cannot write the report to {out}: {exc.strerror or exc}") from None
    events = [v.event for v in views]
    keys = [(e.series_id, e.event_time) for e in events]
    if len(set(keys)) != len(keys):
        raise ConfigError("an event (series, time) is given twice; give each event once")
    # Step 1: order and names.
    summary = summarize_events(events)
    pictures: dict[tuple[str, str], str] = {}
    notes: dict[tuple[str, str], str] = {}
    # Step 2: pictures.
    for done, i in enumerate(summary.strongest, start=1):
        view = views[i]
        key = keys[i]
        if view.timestamps is None or view.values is None:
            notes[key] = view.note or "the source holds no observations of this series"
        else:
            try:
                fig = event_figure(view.event, view.timestamps, view.values, view.model, dpi=dpi)
            except (SeriesError, ConfigError) as exc:
                notes[key] = getattr(exc, "problem", None) or str(exc)
            else:
                name = picture_name(done, view.event)
                try:
                    fig.savefig(out / name, format="png", dpi=dpi)
                except OSError as exc:
                    raise ConfigError(f"cannot write {out / name}: {exc.strerror or exc}") from None
                pictures[key] = name
        if on_progress is not None:
            on_progress(done, len(views))
    # Step 3: the page.
    made = datetime.now(UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
    page = render_report(
        events,
        pictures,
        summary,
        title=title,
        facts=(*facts, ("made", made)),
        notes=notes,
    )
    index = out / INDEX_NAME
    try:
        index.write_text(page, encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot write {index}: {exc.strerror or exc}") from None
    return index
