"""The report page, rendered from the Jinja2 templates beside this module.

``templates/report.html.j2`` is the page and ``templates/report.css.j2`` its
stylesheet (inlined, so the page is one file beside its pictures).  Every text
is escaped by Jinja2's autoescaping; colours come from
:mod:`changekind.tasks.report.style` by name, so the page uses no colour that
the contrast test has not checked.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from jinja2 import Environment, PackageLoader, StrictUndefined

from changekind.tasks.errors import ConfigError
from changekind.tasks.report.order import SORT_ORDERS, ReportSummary
from changekind.tasks.report.style import (
    FALLBACK_STYLE,
    FIGURE_DPI,
    FIGURE_SIZE,
    PAGE_COLOURS,
    TYPE_STYLES,
    VERDICT_COLOURS,
)
from changekind.tasks.report.views import EventKey, Verdict, event_key
from changekind.tasks.report.words import describe_event, type_name
from changekind.tasks.types import REPORTED_TYPES, Event, number

__all__ = ["PAGE_TEMPLATE", "render_report"]

PAGE_TEMPLATE = "report.html.j2"


@dataclass(frozen=True, slots=True)
class _Row:
    """One event as the page lists it."""

    rank: int
    anchor: str
    event: Event
    picture: str | None
    note: str | None
    verdict: Verdict | None
    alt: str
    words: tuple[str, ...]
    labels: tuple[tuple[str, str | None], ...] = ()


def _environment() -> Environment:
    env = Environment(
        loader=PackageLoader("changekind.tasks.report", "templates"),
        autoescape=True,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters["number"] = number
    env.globals["type_name"] = type_name
    return env


def render_report(
    events: Sequence[Event],
    pictures: Mapping[EventKey, str],
    summary: ReportSummary,
    *,
    title: str = "changekind events",
    facts: Sequence[tuple[str, str]] = (),
    notes: Mapping[EventKey, str] | None = None,
    verdicts: Mapping[EventKey, Verdict] | None = None,
    incidents_page: str | None = None,
    labels: Mapping[str, Mapping[str, str | None]] | None = None,
) -> str:
    """The report page as one self-contained HTML document.

    Parameters
    ----------
    events : sequence of Event
    pictures : mapping of (series_id, event_time) to str
        Relative path of each event's picture; events without one are listed
        without a picture (with their entry of ``notes``, if any).
    summary : ReportSummary
        From :func:`~changekind.tasks.report.order.summarize_events` of the
        same ``events`` (it holds their order).
    title : str
    facts : sequence of (name, value)
        Shown at the top (database, source, selection, when made...).
    notes : mapping of (series_id, event_time) to str, optional
        Why an event has no picture.
    verdicts : mapping of (series_id, event_time) to Verdict, optional
        People's verdicts on the events, shown in a column and with each event.
    incidents_page : str, optional
        Relative path of the incidents page, linked from the page when given.
    labels : mapping of series_id to {label: value}, optional
        The series' attributes, shown with each of its events.

    Returns
    -------
    str
        HTML5 with inline CSS and no script; every text escaped.
    """
    if summary.n_events != len(events) or sorted(summary.order) != list(range(len(events))):
        raise ConfigError(
            f"the summary counts {summary.n_events} events but {len(events)} were given; "
            "make it with summarize_events(events)"
        )
    notes = notes or {}
    verdicts = verdicts or {}
    rows = []
    for rank, i in enumerate(summary.order, start=1):
        e = events[i]
        key = event_key(e)
        verdict = verdicts.get(key)
        rows.append(
            _Row(
                rank=rank,
                anchor=f"event-{i + 1}",
                event=e,
                picture=pictures.get(key),
                note=notes.get(key, "no picture was drawn"),
                verdict=verdict,
                alt=(
                    f"{type_name(e.event_type)} in {e.series_id} at {e.event_time}: "
                    "observed series, series with the effect removed, fitted effect, "
                    "facts and type weights"
                ),
                words=tuple(describe_event(e)),
                labels=tuple(sorted((labels or {}).get(e.series_id, {}).items())),
            )
        )
    page = _environment().get_template(PAGE_TEMPLATE)
    return page.render(
        title=title,
        facts=list(facts),
        summary=summary,
        rows=rows,
        order_words=SORT_ORDERS[summary.sort].words,
        reported_types=REPORTED_TYPES,
        type_styles=TYPE_STYLES,
        fallback=FALLBACK_STYLE,
        colours=PAGE_COLOURS,
        verdict_colours=VERDICT_COLOURS,
        incidents_page=incidents_page,
        picture_size=(int(FIGURE_SIZE[0] * FIGURE_DPI), int(FIGURE_SIZE[1] * FIGURE_DPI)),
    )
