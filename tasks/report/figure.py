"""One picture per event: the series around it, the fitted effect, the facts, the type weights.

Figures are made with :class:`matplotlib.figure.Figure` directly (no pyplot,
no display, no global state), so drawing needs no window system.  Layout, left
to right: the series (top) above the fitted effect (bottom) on one time axis;
the facts in words (top) above the type weights (bottom).  Legends sit above
their panel and the facts in their own panel, so nothing covers the data.
"""

from __future__ import annotations

import textwrap
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from changekind.tasks.effects import EFFECTS, UNKNOWN
from changekind.tasks.errors import SeriesError
from changekind.tasks.report.axis import (
    TimeKind,
    event_tick,
    grid_offsets,
    grid_step,
    read_axis,
    time_tick,
)
from changekind.tasks.report.curve import effect_curve
from changekind.tasks.report.style import (
    ADJUSTED_STYLE,
    FIGURE_DPI,
    FIGURE_SIZE,
    GRID_COLOUR,
    INK,
    OBSERVED_STYLE,
    PAPER,
    RULE_COLOUR,
    style_of,
)
from changekind.tasks.report.views import Verdict
from changekind.tasks.report.words import axis_label, describe_event, type_name, verdict_line
from changekind.tasks.types import EVENT_TYPES, Event, FittedModel

if TYPE_CHECKING:  # matplotlib is imported where a figure is drawn (0.4 s of start-up)
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = ["FIGURE_DPI", "FIGURE_SIZE", "PANELS", "event_figure"]

PANELS = ("series", "effect", "facts", "weights")
"""Labels of the figure's axes (``Axes.get_label()``), in drawing order."""

MARKERS_UP_TO = 120
"""Points are drawn with a marker each up to this many; beyond, as a line only."""

FACT_FONT = 10.0
"""Size in points of the facts' text (the tick labels are 10 pt)."""

FACT_WIDTH = 38
"""Characters per line of the facts: what fits the facts panel at :data:`FACT_FONT`."""

_SHAPE_WORDS = {
    "AO": "pulse at the event only",
    "LS": "step from the event on",
    "TC": "fading jump, omega x delta^k",
    "IO": "shock through the model, omega x psi_k",
    "VC": "step in the window spread from the event on",
}


@dataclass(frozen=True, slots=True)
class _Placed:
    """The observations on the picture's grid: ticks ``x``, values ``y``, the fitted
    effect at each, grid steps ``k`` from the event at tick ``at``, the step."""

    kind: TimeKind
    x: np.ndarray
    y: np.ndarray
    effect: np.ndarray
    k: np.ndarray
    at: Any
    step: float


def event_figure(
    event: Event,
    timestamps: Any,
    values: Any,
    model: FittedModel | None = None,
    *,
    neighbours: Sequence[Event] = (),
    unit: str | None = None,
    verdict: Verdict | None = None,
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
    neighbours : sequence of Event
        Other stored events of the series; those within the drawn span are
        marked on the series.
    unit : str, optional
        The series' unit, shown on the y axes.
    verdict : Verdict, optional
        A person's verdict on the event, shown with the facts.
    dpi : int, default=100
        The figure is :data:`FIGURE_SIZE` inches.

    Returns
    -------
    matplotlib.figure.Figure
        Four axes labelled as :data:`PANELS`.

    Raises
    ------
    SeriesError
        No observations, or none around the event.

    Notes
    -----
    1. Read the axis and place the observations and the event on the grid.
    2. The series: observed, with the effect removed, the event, its neighbours.
    3. The fitted effect on the same time axis.
    4. The facts in words.  5. The type weights.
    """
    placed = _place(event, timestamps, values, model)  # Step 1

    from matplotlib.figure import Figure

    fig = Figure(figsize=FIGURE_SIZE, dpi=dpi, layout="constrained", facecolor=PAPER)
    grid = fig.add_gridspec(2, 2, width_ratios=(2.3, 1.0), height_ratios=(2.2, 1.0))
    ax_obs = fig.add_subplot(grid[0, 0], label=PANELS[0])
    ax_eff = fig.add_subplot(grid[1, 0], sharex=ax_obs, label=PANELS[1])
    ax_txt = fig.add_subplot(grid[0, 1], label=PANELS[2])
    ax_w = fig.add_subplot(grid[1, 1], label=PANELS[3])
    fig.suptitle(
        f"{event.series_id}: {type_name(event.event_type)} at {event.event_time}",
        x=0.01,
        ha="left",
        fontsize=11,
        color=INK,
    )

    _draw_series(ax_obs, event, placed, neighbours, unit)  # Step 2
    _draw_effect(ax_eff, event, placed, unit)  # Step 3
    _format_time_axis(ax_eff, placed.kind, event)
    ax_obs.tick_params(labelbottom=False)
    _draw_facts(ax_txt, event, model, verdict)  # Step 4
    _draw_weights(ax_w, event)  # Step 5
    return fig


def _place(event: Event, timestamps: Any, values: Any, model: FittedModel | None) -> _Placed:
    """The observations sorted by time on the grid, and the effect; refuses data that
    does not reach the event."""
    sid = event.series_id
    y = pd.to_numeric(pd.Series(values).reset_index(drop=True), errors="coerce")
    y = y.to_numpy(dtype=float)
    if not hasattr(timestamps, "__len__") or len(y) != len(timestamps):
        raise SeriesError(sid, "timestamps and values for the picture have different lengths")
    if y.size < 2 or np.isnan(y).all():
        raise SeriesError(sid, f"the source has no observations around {event.event_time}")
    kind, ticks = read_axis(timestamps)
    order = np.argsort(ticks, kind="stable")
    ticks, y = ticks[order], y[order]
    at = event_tick(event, kind)
    step = grid_step(ticks, kind, model)
    k = grid_offsets(ticks, at, kind, step)
    if k.min() > 0 or k.max() < 0:
        raise SeriesError(
            sid,
            f"the observations read ({_tick_text(ticks[0])} to {_tick_text(ticks[-1])}) do not "
            f"reach the event at {event.event_time}; check that --source is the data the "
            "events came from",
        )
    effect = effect_curve(event, ticks, model=model, step_seconds=step)
    return _Placed(kind, ticks, y, effect, k, at, step)


def _observed_words(event: Event) -> str:
    """What the top line shows: the raw series, or the window series a windowed event is in."""
    if event.window_start is None:
        return "observed"
    return "window spread" if EFFECTS.get(event.event_type, UNKNOWN).in_spread else "window median"


def _draw_series(
    ax: Axes,
    event: Event,
    placed: _Placed,
    neighbours: Sequence[Event],
    unit: str | None,
) -> None:
    style = style_of(event.event_type)
    x, y = placed.x, placed.y
    line_style = dict(OBSERVED_STYLE)
    if x.size > MARKERS_UP_TO:
        line_style["marker"] = None
    ax.plot(x, y, label=_observed_words(event), **line_style)
    ax.plot(x, y - placed.effect, label="with this event's effect removed", **ADJUSTED_STYLE)
    ax.axvline(placed.at, color=style.colour, linestyle=":", linewidth=1.8, zorder=1)
    hit = np.flatnonzero(placed.k == 0)
    if hit.size and not np.isnan(y[hit[0]]):
        ax.plot(
            [x[hit[0]]],
            [y[hit[0]]],
            linestyle="none",
            marker=style.marker,
            markersize=9,
            markerfacecolor=style.colour,
            markeredgecolor=INK,
            zorder=4,
            label=f"this {event.event_type}",
        )
    in_view = _neighbours_in_view(event, neighbours, x, placed.kind, placed.step)
    for kind_name, where in in_view.items():
        own = style_of(kind_name)
        for tick in where:
            ax.axvline(tick, color=own.colour, linestyle=(0, (5, 3)), linewidth=1.3, zorder=1)
        at_rows = np.searchsorted(x, where)
        rows = at_rows[(at_rows < x.size) & ~np.isnan(y[np.minimum(at_rows, x.size - 1)])]
        ax.plot(
            x[rows],
            y[rows],
            linestyle="none",
            marker=own.marker,
            markersize=8,
            markerfacecolor=PAPER,
            markeredgecolor=own.colour,
            markeredgewidth=2.0,
            zorder=4,
            label=f"other {kind_name} of this series",
        )
    ax.set_ylabel(axis_label(event.series_id, unit), color=INK)
    ax.grid(True, color=GRID_COLOUR, linewidth=0.6)
    handles, labels = ax.get_legend_handles_labels()
    ax.legend(
        handles,
        labels,
        loc="lower left",
        bbox_to_anchor=(0.0, 1.01),
        ncols=min(len(labels), 4),
        fontsize=8.5,
        frameon=False,
        borderaxespad=0.0,
    )


def _neighbours_in_view(
    event: Event, neighbours: Sequence[Event], x: np.ndarray, kind: TimeKind, step: float
) -> dict[str, list[Any]]:
    """Ticks of the series' other events inside the drawn span, by type."""
    out: dict[str, list[Any]] = {}
    half = _step_on_axis(step, kind) / 2
    for other in neighbours:
        if other.event_time == event.event_time:
            continue
        try:
            tick = time_tick(other.event_time, kind, event.series_id)
        except SeriesError:
            continue  # a time of another kind cannot be placed on this axis
        if x[0] - half <= tick <= x[-1] + half:
            out.setdefault(other.event_type, []).append(tick)
    return out


def _step_on_axis(step: float, kind: TimeKind) -> Any:
    return np.timedelta64(int(step * 1e9), "ns") if kind == "datetime" else step


def _draw_effect(ax: Axes, event: Event, placed: _Placed, unit: str | None) -> None:
    style = style_of(event.event_type)
    ax.axhline(0.0, color=RULE_COLOUR, linewidth=0.8)
    ax.plot(
        placed.x,
        placed.effect,
        color=style.colour,
        linestyle="-.",
        linewidth=1.6,
        marker=style.marker if placed.x.size <= MARKERS_UP_TO else None,
        markersize=3.5,
        markeredgecolor=INK,
        markeredgewidth=0.4,
    )
    ax.axvline(placed.at, color=style.colour, linestyle=":", linewidth=1.8)
    ax.set_title(
        f"fitted {event.event_type}: {_SHAPE_WORDS.get(event.event_type, '')}",
        loc="left",
        fontsize=9,
        color=INK,
    )
    ax.margins(y=0.15)
    ax.set_ylabel(f"effect [{unit}]" if unit else "effect", color=INK)
    ax.grid(True, color=GRID_COLOUR, linewidth=0.6)


def _format_time_axis(ax: Axes, kind: TimeKind, event: Event) -> None:
    if kind == "datetime":
        from matplotlib import dates as mdates

        # minticks 3: with the default 5, some spans (3 points over 5 days) warn.
        locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
        ax.set_xlabel("time (UTC)", color=INK)  # a naive time is UTC too (timeaxis)
    else:
        ax.set_xlabel("index", color=INK)


def _draw_facts(ax: Axes, event: Event, model: FittedModel | None, verdict: Verdict | None) -> None:
    """The event in words on a card framed in the type's colour, filling its own panel."""
    style = style_of(event.event_type)
    ax.set_xticks([])
    ax.set_yticks([])
    for spine in ax.spines.values():
        spine.set_edgecolor(style.colour)
        spine.set_linewidth(1.5)
    heading = ax.text(
        0.04,
        0.96,
        event.event_type,
        transform=ax.transAxes,
        va="top",
        ha="left",
        fontsize=FACT_FONT + 1.5,
        fontweight="bold",
        color=style.text,
        bbox={"boxstyle": "square,pad=0.3", "facecolor": style.colour, "edgecolor": "none"},
    )
    ax.annotate(
        type_name(event.event_type),
        xy=(1.0, 0.5),
        xycoords=heading,
        xytext=(8, 0),
        textcoords="offset points",
        va="center",
        ha="left",
        fontsize=FACT_FONT + 1.5,
        fontweight="bold",
        color=INK,
    )
    lines = [*describe_event(event, model)[1:], verdict_line(verdict)]  # type: the heading
    wrapped = [
        part
        for line in lines
        for part in textwrap.wrap(
            line.replace(" %", "\u00a0%"),  # a number and its % sign stay on one line
            width=FACT_WIDTH,
            subsequent_indent="  ",
            break_on_hyphens=False,
        )
    ]
    ax.text(
        0.04,
        0.84,
        "\n".join(wrapped),
        transform=ax.transAxes,
        va="top",
        ha="left",
        fontsize=FACT_FONT,
        linespacing=1.4,
        color=INK,
    )


def _draw_weights(ax: Axes, event: Event) -> None:
    weights = event.weights
    kinds = list(weights) if weights else list(EVENT_TYPES)
    rows = np.arange(len(kinds))[::-1]
    for row, kind_name in zip(rows, kinds, strict=True):
        own = style_of(kind_name)
        share = weights.get(kind_name, 0.0)
        # The hatch in white on the dark fill, then the outline (thick for the event's type).
        ax.barh(row, share, color=own.colour, hatch=own.hatch, edgecolor=PAPER, linewidth=0.0)
        ax.barh(
            row,
            share,
            fill=False,
            edgecolor=INK,
            linewidth=2.2 if kind_name == event.event_type else 0.6,
        )
        inside = share > 0.75  # label inside a long bar, on a white box
        ax.text(
            share - 0.03 if inside else share + 0.03,
            row,
            f"{share:.2f}",
            va="center",
            ha="right" if inside else "left",
            fontsize=9,
            color=INK,
            bbox={"facecolor": PAPER, "edgecolor": "none", "pad": 1.0} if inside else None,
        )
    ax.set_yticks(rows, kinds)
    ax.set_xlim(0.0, 1.0)
    ax.set_title("type weights", fontsize=9, loc="left", color=INK)
    ax.grid(True, axis="x", color=GRID_COLOUR, linewidth=0.6)


def _tick_text(tick: Any) -> str:
    if isinstance(tick, np.datetime64):
        return str(pd.Timestamp(tick))
    return f"{float(tick):g}"
