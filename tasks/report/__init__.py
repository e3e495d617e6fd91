"""Pictures and an HTML page of stored events, for people to look at.

One module a job, each readable top to bottom:

- :mod:`.data` -- what a report shows, gathered from the database (events,
  verdicts, neighbours, models) and the source (the observations);
  :func:`write_stored_report` and its Prefect task;
- :mod:`.files` -- :func:`write_report`: the pictures and ``index.html`` in one folder;
- :mod:`.figure` -- :func:`event_figure`: one matplotlib figure per event;
- :mod:`.html` -- :func:`render_report`: the page, from the Jinja2 templates
  in ``templates/``;
- :mod:`.order` -- counts by type and group, and the order of the list
  (``--sort``; dismissed events last);
- :mod:`.span` -- which stretch of the series a picture shows (the event's
  reach and its neighbours);
- :mod:`.curve` -- the fitted effect of an event on its series;
- :mod:`.axis` -- timestamps as ticks, an event's tick, grid steps;
- :mod:`.words` -- an event, its series and a verdict in words;
- :mod:`.views` -- :class:`EventView` (one event and what its picture needs),
  :class:`Verdict`, events and verdicts from stored rows;
- :mod:`.style` -- colours, markers and hatches, every text colour pair
  checked for contrast.

Importing the report does not import Prefect.
"""

from changekind.tasks.report.curve import effect_curve
from changekind.tasks.report.data import WrittenReport, write_stored_report
from changekind.tasks.report.figure import event_figure
from changekind.tasks.report.files import PICTURE_PATTERN, picture_name, write_report
from changekind.tasks.report.html import render_report
from changekind.tasks.report.order import (
    DEFAULT_SORT,
    SORT_ORDERS,
    ReportSummary,
    series_group,
    summarize_events,
)
from changekind.tasks.report.span import Span, shown_span, slice_window, window_bounds
from changekind.tasks.report.style import ADJUSTED_STYLE, OBSERVED_STYLE, TYPE_STYLES, TypeStyle
from changekind.tasks.report.views import EventView, Verdict, event_from_record
from changekind.tasks.report.words import describe_event

__all__ = [
    "ADJUSTED_STYLE",
    "DEFAULT_SORT",
    "OBSERVED_STYLE",
    "PICTURE_PATTERN",
    "SORT_ORDERS",
    "TYPE_STYLES",
    "EventView",
    "ReportSummary",
    "Span",
    "TypeStyle",
    "Verdict",
    "WrittenReport",
    "describe_event",
    "effect_curve",
    "event_figure",
    "event_from_record",
    "picture_name",
    "render_report",
    "series_group",
    "shown_span",
    "slice_window",
    "summarize_events",
    "window_bounds",
    "write_report",
    "write_stored_report",
]
