"""What a run reads from the database and writes to it.

The stored state of a run's series (models, watermarks, known events), a
batch's outcomes as the rows of one transaction, and the comparable key of a
stored time label.  The flows run these as Prefect tasks (``flows/steps.py``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import pandas as pd

from changekind.tasks import persist
from changekind.tasks.batch import SeriesOutcome
from changekind.tasks.fetch import SourceProblem
from changekind.tasks.timeaxis import parse_instant

if TYPE_CHECKING:
    from changekind.flows.pipeline import Reach


class BatchOutcomes(Sequence[SeriesOutcome]):
    """One batch's outcomes as a single opaque value for a Prefect task.

    A plain sequence class, not a list: Prefect walks lists and dataclasses in
    a task's parameters looking for futures (see
    :class:`~changekind.tasks.batch.WorkBatch`) and passes this through.
    """

    __slots__ = ("_outcomes",)

    def __init__(self, outcomes: Sequence[SeriesOutcome]) -> None:
        self._outcomes = tuple(outcomes)

    def __len__(self) -> int:
        return len(self._outcomes)

    def __getitem__(self, i):
        return self._outcomes[i]


def time_key(value: object, time_kind: str):
    """A time label as a comparable key: a float, or a naive UTC timestamp."""
    if value is None:
        return None
    if time_kind == "numeric":
        return float(value)  # type: ignore[arg-type]
    stamp = parse_instant(value, what="time")  # a naive time is UTC (timeaxis' rule)
    return stamp.tz_localize(None) if isinstance(stamp, pd.Timestamp) else stamp


def stored_state(db: str, series_ids: Sequence[str] | None = None):
    """Models, watermarks and known events of the series, and a (type, status) index."""
    models = persist.load_models(db, series_ids)
    marks = persist.load_watermarks(db, series_ids)
    known = persist.load_known_events(db, series_ids)
    index = {
        (sid, e.event_time): (e.event_type, e.status) for sid, evs in known.items() for e in evs
    }
    return models, marks, known, index


def write_outcomes(
    db: str,
    run_id: str,
    outcomes: Sequence[SeriesOutcome],
    *,
    reach: Mapping[str, Reach] | None = None,
    time_kind: str = "datetime",
    problems: Sequence[SourceProblem] = (),
):
    """Write one batch's outcomes in one transaction (events, models, watermarks, failures).

    With ``reach``, a cold analysis records where its series' analysed span
    begins, and ``reanalyse_until`` is kept while the watermark is short of it.
    """
    events = [e for o in outcomes for e in o.events]
    retract = [(o.series_id, t) for o in outcomes for t in o.retract]
    models = [o.model for o in outcomes if o.model is not None]
    marks = {o.series_id: o.watermark for o in outcomes if o.watermark is not None}
    failures = [(o.series_id, *o.failure) for o in outcomes if o.failure is not None]
    analysed_from: dict[str, str | None] = {}
    until: dict[str, str | None] = {}
    for o in outcomes:
        r = (reach or {}).get(o.series_id)
        if r is None or o.watermark is None:
            continue
        if o.mode == "cold" and o.model is not None:
            analysed_from[o.series_id] = r.report_from
        if r.until is not None:
            short = time_key(o.watermark, time_kind) < time_key(r.until, time_kind)
            until[o.series_id] = r.until if short else None
    return persist.write_batch(
        db,
        run_id,
        events=events,
        retract=retract,
        models=models,
        watermarks=marks,
        failures=failures,
        analysed_from=analysed_from,
        reanalyse_until=until,
        problems=problem_rows(problems),
    )


def problem_rows(
    problems: Sequence[SourceProblem],
) -> list[tuple[str, int | None, str | None, str]]:
    """Source problems as the rows of ``source_problems``."""
    return [(p.location, p.row, p.series_id, p.problem) for p in problems]
