"""The incidents page of the report: each incident's members side by side, and what they share.

For each stored incident (newest first) the page ``incidents.html`` shows
its summary (when, how many series and what share of the fleet, the dominant
type, the median effect), the attribute values its members share more than
the fleet does (with the counts and the test, see
:func:`changekind.tasks.incidents.label_shares`), one picture of small
panels -- each member's series on a common time axis in hours from the
incident's start, its own event marked -- and the members with their
attributes.  An incident, like an event, is statistical evidence for a
person to judge: several series changed the same way at about the same time.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from changekind.tasks.errors import ConfigError
from changekind.tasks.incidents import Incident, IncidentMember
from changekind.tasks.report.files import fresh_folder, write_page
from changekind.tasks.report.style import (
    FALLBACK_STYLE,
    GRID_COLOUR,
    INK,
    MUTED_INK,
    PAGE_COLOURS,
    PAPER,
    RULE_COLOUR,
    TYPE_STYLES,
    VERDICT_COLOURS,
    style_of,
)
from changekind.tasks.timeaxis import parse_times
from changekind.tasks.types import number

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = [
    "INCIDENTS_PAGE",
    "INCIDENT_PICTURE_PATTERN",
    "MAX_PANELS",
    "incident_figure",
    "render_incidents",
    "write_incident_report",
]

INCIDENTS_PAGE = "incidents.html"
INCIDENT_PICTURE_PATTERN = "incident-*.png"
MAX_PANELS = 24
"""Most member panels in one incident's picture (the strongest members by |t|;
every member is listed in the table)."""
PANEL_SIZE = (3.1, 1.9)
"""Inches per panel."""
PANEL_COLUMNS = 4
PAD_HOURS_MIN = 6.0
"""Shown before the incident's start and after its end: at least this many hours."""
PAD_STEPS = 36
"""... or this many samples of the member's series, whichever is longer."""


@dataclass(frozen=True, slots=True)
class MemberSeries:
    """One member's observations around the incident (UTC times, values)."""

    member: IncidentMember
    timestamps: pd.DatetimeIndex
    values: np.ndarray


def shown_span(incident: Incident, step_seconds: float | None) -> tuple[pd.Timestamp, pd.Timestamp]:
    """The span the panels show: the incident padded on both sides."""
    pad = PAD_HOURS_MIN * 3600.0
    if step_seconds and math.isfinite(step_seconds):
        pad = max(pad, PAD_STEPS * float(step_seconds))
    padding = pd.Timedelta(seconds=pad)
    return incident.start - padding, incident.end + padding


def _hours(stamps: pd.DatetimeIndex, origin: pd.Timestamp) -> np.ndarray:
    return np.asarray((stamps - origin) / pd.Timedelta(hours=1), dtype=float)


def incident_figure(
    incident: Incident,
    series: Sequence[MemberSeries],
    *,
    labels: Mapping[str, Mapping[str, str | None]] | None = None,
    dpi: int = 100,
) -> Figure:
    """Small panels, one per member, aligned on the incident's start (hour 0).

    Parameters
    ----------
    incident : Incident
    series : sequence of MemberSeries
        The members' observations (members without observations are left out).
    labels : mapping, optional
        ``series_id -> {label: value}``: the shared labels' values are written
        under each panel's title.
    """
    if not series:
        raise ConfigError(f"incident {incident.incident_id} has no observations to draw")
    shown = sorted(series, key=lambda s: (-abs(s.member.t_stat), s.member.series_id))
    shown = sorted(shown[:MAX_PANELS], key=lambda s: (s.member.event_ts, s.member.series_id))
    n = len(shown)
    cols = min(PANEL_COLUMNS, n)
    rows = math.ceil(n / cols)
    from matplotlib.figure import Figure  # here: 0.4 s of start-up

    fig = Figure(figsize=(PANEL_SIZE[0] * cols, PANEL_SIZE[1] * rows + 0.5), dpi=dpi)
    fig.patch.set_facecolor(PAPER)
    shared = list(incident.shared_labels)
    axes = fig.subplots(rows, cols, squeeze=False, sharex=True)
    end_h = _hours(pd.DatetimeIndex([incident.end]), incident.start)[0]
    for k, ax in enumerate(axes.ravel()):
        if k >= n:
            ax.set_visible(False)
            continue
        item = shown[k]
        m = item.member
        x = _hours(item.timestamps, incident.start)
        ax.plot(x, item.values, color=INK, linewidth=0.9)
        ax.axvspan(0.0, max(end_h, 0.0), color=GRID_COLOUR, alpha=0.6, linewidth=0)
        ax.axvline(0.0, color=RULE_COLOUR, linewidth=0.8)
        style = style_of(m.event_type)
        at = _hours(pd.DatetimeIndex([m.event_ts]), incident.start)[0]
        ax.axvline(at, color=style.colour, linewidth=1.2, linestyle="--")
        near = np.argmin(np.abs(x - at)) if x.size else None
        if near is not None and np.isfinite(item.values[near]):
            ax.plot([x[near]], [item.values[near]], marker=style.marker, color=style.colour)
        title = f"{m.series_id}"
        extra = ", ".join(
            f"{name}={(labels or {}).get(m.series_id, {}).get(name)}" for name in shared
        )
        ax.set_title(title + (f"\n{extra}" if extra else ""), fontsize=7.5, color=INK)
        ax.text(
            0.02,
            0.95,
            f"{m.event_type} {number(m.effect_pct, '+.1f')} %",
            transform=ax.transAxes,
            fontsize=7,
            color=style.colour,
            va="top",
        )
        ax.tick_params(labelsize=6.5, colors=MUTED_INK)
        ax.grid(True, color=GRID_COLOUR, linewidth=0.5)
    for ax in axes[-1]:
        ax.set_xlabel("hours from the incident's start", fontsize=7, color=INK)
    more = len(series) - n
    fig.suptitle(
        f"{incident.n_series} series {incident.direction} from {incident.start:%Y-%m-%d %H:%M} "
        f"UTC" + (f" ({more} more members in the table)" if more > 0 else ""),
        fontsize=9,
        color=INK,
    )
    fig.tight_layout()
    return fig


@dataclass(frozen=True, slots=True)
class _Card:
    incident: Incident
    anchor: str
    picture: str | None
    note: str | None
    state: str | None
    members: tuple[tuple[IncidentMember, tuple[tuple[str, str | None], ...]], ...]
    label_names: tuple[str, ...]


def render_incidents(
    incidents: Sequence[Incident],
    pictures: Mapping[str, str],
    *,
    labels: Mapping[str, Mapping[str, str | None]] | None = None,
    states: Mapping[str, str] | None = None,
    notes: Mapping[str, str] | None = None,
    title: str = "changekind incidents",
    facts: Sequence[tuple[str, str]] = (),
    events_page: str | None = "index.html",
) -> str:
    """The incidents page as one HTML document (inline CSS, no script, every text escaped)."""
    from changekind.tasks.report.html import _environment

    labels = labels or {}
    names = tuple(sorted({n for row in labels.values() for n in row}))
    cards = [
        _Card(
            incident=inc,
            anchor=f"incident-{k + 1}",
            picture=pictures.get(inc.incident_id),
            note=(notes or {}).get(inc.incident_id),
            state=(states or {}).get(inc.incident_id),
            members=tuple(
                (m, tuple((n, labels.get(m.series_id, {}).get(n)) for n in names))
                for m in inc.members
            ),
            label_names=names,
        )
        for k, inc in enumerate(incidents)
    ]
    page = _environment().get_template("incidents.html.j2")
    return page.render(
        title=title,
        facts=list(facts),
        cards=cards,
        events_page=events_page,
        type_styles=TYPE_STYLES,
        fallback=FALLBACK_STYLE,
        colours=PAGE_COLOURS,
        verdict_colours=VERDICT_COLOURS,
    )


def write_incident_report(
    out_dir: str | Path,
    incidents: Sequence[Incident],
    series: Mapping[str, Sequence[MemberSeries]],
    *,
    labels: Mapping[str, Mapping[str, str | None]] | None = None,
    states: Mapping[str, str] | None = None,
    facts: Sequence[tuple[str, str]] = (),
    events_page: str | None = "index.html",
    dpi: int = 100,
) -> Path:
    """Draw each incident's panels and write ``incidents.html`` beside them.

    Earlier incident pictures in ``out_dir`` are removed first.
    """
    out = fresh_folder(out_dir, INCIDENT_PICTURE_PATTERN)
    pictures: dict[str, str] = {}
    notes: dict[str, str] = {}
    for k, inc in enumerate(incidents, start=1):
        mine = series.get(inc.incident_id, ())
        if not mine:
            notes[inc.incident_id] = "the source holds no observations of its members"
            continue
        fig = incident_figure(inc, mine, labels=labels, dpi=dpi)
        name = f"incident-{k:04d}.png"
        try:
            fig.savefig(out / name, format="png", dpi=dpi)
        except OSError as exc:
            raise ConfigError(f"cannot write {out / name}: {exc.strerror or exc}") from None
        pictures[inc.incident_id] = name
    page = render_incidents(
        incidents,
        pictures,
        labels=labels,
        states=states,
        notes=notes,
        facts=facts,
        events_page=events_page,
    )
    return write_page(out / INCIDENTS_PAGE, page)


def read_member_series(
    spec: Any, incidents: Sequence[Incident], steps: Mapping[str, float]
) -> dict[str, list[MemberSeries]]:
    """The members' observations around each incident, read from the source.

    Date-time sources only; one read per incident (its members over its
    padded span).
    """
    from changekind.tasks.fetch import read_series

    out: dict[str, list[MemberSeries]] = {}
    for inc in incidents:
        step = max((steps.get(s, 0.0) for s in inc.series_ids), default=0.0) or None
        lo, hi = shown_span(inc, step)
        data = read_series(spec, list(inc.series_ids), start=_bound(lo, spec), end=_bound(hi, spec))
        found = []
        for m in inc.members:
            part = data[data["series_id"] == m.series_id]
            if part.empty:
                continue
            utc = parse_times(m.series_id, part["timestamp"]).utc_naive()  # timeaxis' rule
            stamps = pd.DatetimeIndex(utc).tz_localize("UTC")
            found.append(MemberSeries(m, stamps, part["value"].to_numpy(dtype=float)))
        out[inc.incident_id] = found
    return out


def _bound(stamp: pd.Timestamp, spec: Any) -> Any:
    """A UTC bound in the form the source compares (naive for naive date-time sources)."""
    if getattr(spec, "time_kind", "datetime") == "text":
        return stamp.isoformat()
    return stamp
