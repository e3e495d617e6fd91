"""The per-series model cache: fitted models, watermarks and analysed spans,
and the batch write that stores a batch's events and models in one transaction.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import sqlalchemy as sa

from changekind.tasks.errors import (
    ConfigError,
    ModelError,
)
from changekind.tasks.persist.convert import _chunks, _now, _text, _upsert
from changekind.tasks.persist.engines import _engine
from changekind.tasks.persist.events import WriteSummary, write_events
from changekind.tasks.persist.runs import record_failures, record_source_problems
from changekind.tasks.persist.schema import Database, series_models
from changekind.tasks.types import Event, FittedModel

# --------------------------------------------------------------------------- models


def _arima_order(model: FittedModel) -> str:
    p, d, q = model.order
    P, D, Q, s = model.seasonal_order
    return f"({p},{d},{q})({P},{D},{Q},{s})"


# Kept by save_models: the key, and the analysed span (written by set_coverage).
_NOT_SAVED = ("series_id", "analysed_from", "reanalyse_until")


def save_models(
    db: Database,
    models: Sequence[FittedModel],
    *,
    watermarks: Mapping[str, str],
    fitted_at: datetime | None = None,
) -> int:
    """Store fitted models (one per series), replacing the series' previous one.

    Parameters
    ----------
    db : Engine or str
        The database (see the module notes).
    models : sequence of FittedModel
        At most one per series.
    watermarks : mapping of series_id to str
        The last timestamp tested for each series; a series missing here keeps
        its stored watermark (NULL for a first save).
    fitted_at : datetime, optional
        When the models were fitted; now (UTC) by default.

    Returns
    -------
    int
        The number of models written.
    """
    when = _now(fitted_at)
    seen: set[str] = set()
    rows = []
    for model in models:
        if not isinstance(model, FittedModel):
            raise ConfigError(f"expected a FittedModel, got {type(model).__name__}")
        series_id = _text(model.series_id, "model series_id")
        if series_id in seen:
            raise ConfigError(f"the batch holds two models for series {series_id!r}; give one")
        seen.add(series_id)
        mark = watermarks.get(series_id)
        rows.append(
            {
                "series_id": series_id,
                "model_json": model.to_json(),
                "arima_order": _arima_order(model),
                "sigma2": float(model.sigma2),
                "nobs": int(model.nobs),
                "fitted_through": model.fitted_through,
                "fingerprint": model.fingerprint,
                "fitted_at": when,
                "watermark": None if mark is None else _text(mark, f"watermark of {series_id!r}"),
            }
        )
    with _engine(db) as engine, engine.begin() as conn:
        _upsert(
            conn,
            series_models,
            rows,
            keys=("series_id",),
            update=[c.name for c in series_models.columns if c.name not in _NOT_SAVED],
            keep_when_null=("watermark",),
        )
    return len(rows)


def load_models(db: Database, series_ids: Sequence[str] | None = None) -> dict[str, FittedModel]:
    """The cached models, by series id (series without one are absent).

    Raises
    ------
    ModelError
        A stored model cannot be read; the message names the series to refit.
    """
    query = sa.select(series_models.c.series_id, series_models.c.model_json)
    out: dict[str, FittedModel] = {}
    for series_id, text in _select_by_series(db, query, series_models, series_ids):
        try:
            out[series_id] = FittedModel.from_json(text)
        except ModelError as exc:
            raise ModelError(f"series {series_id!r}: {exc}") from None
    return out


def load_watermarks(db: Database, series_ids: Sequence[str] | None = None) -> dict[str, str]:
    """The scan watermark (last timestamp tested) of each series that has one."""
    query = sa.select(series_models.c.series_id, series_models.c.watermark).where(
        series_models.c.watermark.is_not(None)
    )
    return dict(_select_by_series(db, query, series_models, series_ids))


def _select_by_series(
    db: Database, query: sa.Select[Any], table: sa.Table, series_ids: Sequence[str] | None
) -> list[tuple[Any, ...]]:
    with _engine(db) as engine, engine.connect() as conn:
        if series_ids is None:
            return [tuple(r) for r in conn.execute(query)]
        ids = sorted({_text(s, "series_id") for s in series_ids})
        rows: list[tuple[Any, ...]] = []
        for chunk in _chunks(ids):
            rows.extend(tuple(r) for r in conn.execute(query.where(table.c.series_id.in_(chunk))))
        return rows


def update_watermarks(db: Database, watermarks: Mapping[str, str]) -> int:
    """Move the scan watermark of series that have a cached model.

    Returns the number of series updated; series without a cached model have
    nowhere to keep a watermark and are not counted (save their model first).
    """
    marks = {
        _text(series_id, "series_id"): _text(mark, f"watermark of {series_id!r}")
        for series_id, mark in watermarks.items()
    }
    if not marks:
        return 0
    stmt = (
        sa.update(series_models)
        .where(series_models.c.series_id == sa.bindparam("key"))
        .values(watermark=sa.bindparam("mark"))
    )
    with _engine(db) as engine, engine.begin() as conn:
        cached = [
            series_id
            for chunk in _chunks(sorted(marks))
            for series_id in conn.execute(
                sa.select(series_models.c.series_id).where(series_models.c.series_id.in_(chunk))
            ).scalars()
        ]
        if cached:  # rowcount of an executemany is not reliable on every driver
            conn.execute(stmt, [{"key": s, "mark": marks[s]} for s in sorted(cached)])
    return len(cached)


@dataclass(frozen=True, slots=True)
class Coverage:
    """The span of a series that runs have analysed: ``analysed_from .. watermark``.

    ``analysed_from`` None means from the start of the series' data;
    ``reanalyse_until`` is set while a backfill analyses the series again from
    an earlier start (the watermark it must reach again).
    """

    analysed_from: str | None = None
    watermark: str | None = None
    reanalyse_until: str | None = None


def load_coverage(db: Database, series_ids: Sequence[str] | None = None) -> dict[str, Coverage]:
    """The analysed span of each series that has a cached model."""
    query = sa.select(
        series_models.c.series_id,
        series_models.c.analysed_from,
        series_models.c.watermark,
        series_models.c.reanalyse_until,
    )
    return {
        row[0]: Coverage(row[1], row[2], row[3])
        for row in _select_by_series(db, query, series_models, series_ids)
    }


def set_coverage(
    db: Database,
    *,
    analysed_from: Mapping[str, str | None] | None = None,
    reanalyse_until: Mapping[str, str | None] | None = None,
) -> None:
    """Set ``analysed_from`` / ``reanalyse_until`` of series with a cached model.

    A series present in a mapping gets that value (None writes NULL); absent
    series keep theirs.
    """
    with _engine(db) as engine, engine.begin() as conn:
        for column, values in (
            ("analysed_from", analysed_from),
            ("reanalyse_until", reanalyse_until),
        ):
            if not values:
                continue
            update = (
                sa.update(series_models)
                .where(series_models.c.series_id == sa.bindparam("key"))
                .values({column: sa.bindparam("value")})
            )
            conn.execute(
                update,
                [{"key": _text(k, "series_id"), "value": v} for k, v in sorted(values.items())],
            )


def write_batch(
    db: Database,
    run_id: str,
    *,
    events: Sequence[Event] = (),
    retract: Sequence[tuple[str, str]] = (),
    models: Sequence[FittedModel] = (),
    watermarks: Mapping[str, str] | None = None,
    failures: Sequence[tuple[str, str, str]] = (),
    analysed_from: Mapping[str, str | None] | None = None,
    reanalyse_until: Mapping[str, str | None] | None = None,
    problems: Sequence[tuple[str, int | None, str | None, str]] = (),
    at: datetime | None = None,
) -> WriteSummary:
    """Write everything one batch of series produced, in one transaction.

    Events and retractions (:func:`write_events`), new models with their
    watermarks (:func:`save_models`), watermarks of series whose model is
    kept (:func:`update_watermarks`), the series' analysed spans
    (:func:`set_coverage`) and failures (:func:`record_failures`) commit
    together or not at all, so a run killed mid-way leaves every series either
    before or after its batch: a rerun continues from there and ends with the
    tables an uninterrupted run leaves.
    """
    marks = dict(watermarks or {})
    modelled = {m.series_id for m in models}
    with _engine(db) as engine, engine.begin() as conn:
        summary = write_events(conn, run_id, events, retract=retract, at=at)
        if models:
            save_models(conn, models, watermarks=marks, fitted_at=at)
        rest = {k: v for k, v in marks.items() if k not in modelled}
        if rest:
            update_watermarks(conn, rest)
        if analysed_from or reanalyse_until:
            set_coverage(conn, analysed_from=analysed_from, reanalyse_until=reanalyse_until)
        if failures:
            record_failures(conn, run_id, failures, at=at)
        if problems:
            record_source_problems(conn, run_id, problems, at=at)
    return summary
