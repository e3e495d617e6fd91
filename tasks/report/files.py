"""Writing a report: the pictures and ``index.html`` beside them in one folder."""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path

from changekind.tasks.errors import ConfigError, SeriesError
from changekind.tasks.report.figure import event_figure
from changekind.tasks.report.html import render_report
from changekind.tasks.report.order import DEFAULT_SORT, summarize_events
from changekind.tasks.report.style import FIGURE_DPI
from changekind.tasks.report.views import EventKey, EventView
from changekind.tasks.types import Event

__all__ = ["INDEX_NAME", "PICTURE_PATTERN", "picture_name", "write_report"]

INDEX_NAME = "index.html"
PICTURE_PATTERN = "event-*.png"
"""Names of the pictures a report writes (earlier ones are removed first)."""


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
    sort: str = DEFAULT_SORT,
    dpi: int = FIGURE_DPI,
    on_progress: Callable[[int, int], None] | None = None,
    incidents_page: str | None = None,
    labels: Mapping[str, Mapping[str, str | None]] | None = None,
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
        Shown at the top of the page; the order and the time the report was
        made are added.
    sort : {"effect_pct", "effect", "t", "time"}, default="effect_pct"
        The order of the events (see :mod:`changekind.tasks.report.order`);
        dismissed events come last whatever the order.
    dpi : int, default=100
    on_progress : callable, optional
        Called with (done, total) after each picture.
    incidents_page : str, optional
        The incidents page beside it (linked from the page).
    labels : mapping of series_id to {label: value}, optional
        The series' attributes, shown with their events.

    Returns
    -------
    Path
        The ``index.html`` written.

    Notes
    -----
    1. Order the events and name each picture after its rank.
    2. Draw each picture; an event whose data cannot be drawn (none in the
       source, times that do not meet) is listed with the reason instead.
    3. Write the page; it links only to the pictures just written.
    """
    events = [v.event for v in views]
    keys = [v.key for v in views]
    if len(set(keys)) != len(keys):
        raise ConfigError("an event (series, time) is given twice; give each event once")
    verdicts = {v.key: v.verdict for v in views if v.verdict is not None}
    # Step 1: order and names (a bad sort is refused before anything is written).
    summary = summarize_events(events, sort=sort, verdicts=verdicts)
    out = fresh_folder(out_dir, PICTURE_PATTERN)
    pictures: dict[EventKey, str] = {}
    notes: dict[EventKey, str] = {}
    # Step 2: pictures.
    for done, i in enumerate(summary.order, start=1):
        view = views[i]
        if view.timestamps is None or view.values is None:
            notes[view.key] = view.note or "the source holds no observations of this series"
        else:
            try:
                fig = event_figure(
                    view.event,
                    view.timestamps,
                    view.values,
                    view.model,
                    neighbours=view.neighbours,
                    unit=view.unit,
                    verdict=view.verdict,
                    dpi=dpi,
                )
            except (SeriesError, ConfigError) as exc:
                notes[view.key] = getattr(exc, "problem", None) or str(exc)
            else:
                name = picture_name(done, view.event)
                try:
                    fig.savefig(out / name, format="png", dpi=dpi)
                except OSError as exc:
                    raise ConfigError(f"cannot write {out / name}: {exc.strerror or exc}") from None
                pictures[view.key] = name
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
        verdicts=verdicts,
        incidents_page=incidents_page,
        labels=labels,
    )
    return write_page(out / INDEX_NAME, page)


def fresh_folder(out_dir: str | Path, pattern: str) -> Path:
    """The report folder, made if missing, without the earlier pictures matching
    ``pattern``; a ConfigError naming the folder if it cannot be written."""
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
        for old in out.glob(pattern):
            old.unlink()
    except OSError as exc:
        raise ConfigError(f"cannot write the report to {out}: {exc.strerror or exc}") from None
    return out


def write_page(path: Path, page: str) -> Path:
    """Write a report page (UTF-8); a ConfigError naming the file if it cannot be written."""
    try:
        path.write_text(page, encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot write {path}: {exc.strerror or exc}") from None
    return path
