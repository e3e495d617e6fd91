"""Series attributes: the labels a run read, stored once, and every change logged.

``series_labels`` holds the current value of each label of each series (long
form: one row per series and label, so a fleet can add a label without a
schema change); ``series_label_changes`` logs every change (old value, new
value, run).  :func:`write_labels` writes what a run read, and only what
changed: writing the same labels again changes nothing.  :func:`read_labels`
reads them back per series; :func:`read_fleet_labels` gives the whole fleet
as one frame, for the incidents' label shares
(:mod:`changekind.tasks.persist.incidents`).
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any

import pandas as pd
import sqlalchemy as sa

from changekind.tasks.errors import ConfigError
from changekind.tasks.incidents.values import label_text
from changekind.tasks.persist.convert import _chunks, _now, _upsert
from changekind.tasks.persist.engines import _engine
from changekind.tasks.persist.schema import (
    Database,
    series_events,
    series_label_changes,
    series_labels,
    series_models,
)

__all__ = ["read_fleet_labels", "read_labels", "write_labels"]


def write_labels(
    db: Database,
    run_id: str,
    labels: pd.DataFrame,
    *,
    at: datetime | None = None,
) -> int:
    """Store the labels a run read; log each change.  Returns the number of changes.

    Parameters
    ----------
    labels : pandas.DataFrame
        One row per series: ``series_id``, optionally ``observed_at`` (text),
        and one column per label (values as text; None or NaN for empty).  A
        label that a series already has and the frame gives again with the
        same value is left untouched (bookkeeping included).
    """
    if not isinstance(labels, pd.DataFrame) or "series_id" not in labels.columns:
        raise ConfigError("labels must be a DataFrame with a series_id column and a label each")
    names = [c for c in labels.columns if c not in ("series_id", "observed_at")]
    if not names or labels.empty:
        return 0
    when = _now(at)
    rows: dict[tuple[str, str], dict[str, Any]] = {}
    sids = [str(s) for s in labels["series_id"].tolist()]
    if "observed_at" in labels.columns:
        seen = [_text_or_none(v) for v in labels["observed_at"].tolist()]
    else:
        seen = [None] * len(sids)
    for name in names:
        values = [_text_or_none(v) for v in labels[name].tolist()]
        for sid, value, at in zip(sids, values, seen, strict=True):
            rows[(sid, str(name))] = {
                "series_id": sid,
                "label": str(name),
                "value": value,
                "observed_at": at,
            }
    series = sorted({k[0] for k in rows})
    changes: list[dict[str, Any]] = []
    with _engine(db) as engine, engine.begin() as conn:
        # One read of the whole table (a row per series and label: small), not
        # thousands of IN lists when a run covers the fleet.
        wanted = set(series)
        stored: dict[tuple[str, str], Any] = {
            (sid, label): value
            for sid, label, value in conn.execute(
                sa.select(series_labels.c.series_id, series_labels.c.label, series_labels.c.value)
            )
            if sid in wanted
        }
        upserts = []
        for key, row in rows.items():
            if key in stored and stored[key] == row["value"]:
                continue
            upserts.append({**row, "last_run_id": run_id, "last_seen": when})
            changes.append(
                {
                    "series_id": key[0],
                    "label": key[1],
                    "old_value": stored.get(key),
                    "new_value": row["value"],
                    "observed_at": row["observed_at"],
                    "run_id": run_id,
                    "changed_at": when,
                }
            )
        _upsert(
            conn,
            series_labels,
            upserts,
            keys=("series_id", "label"),
            update=("value", "observed_at", "last_run_id", "last_seen"),
        )
        if changes:
            conn.execute(sa.insert(series_label_changes), changes)
    return len(changes)


def read_labels(
    db: Database, series_ids: Sequence[str] | None = None
) -> dict[str, dict[str, str | None]]:
    """The current labels: ``series_id -> {label: value}`` (only series that have labels)."""
    query = sa.select(series_labels.c.series_id, series_labels.c.label, series_labels.c.value)
    out: dict[str, dict[str, str | None]] = {}
    with _engine(db) as engine, engine.connect() as conn:
        if series_ids is None:
            rows = list(conn.execute(query))
        else:
            rows = []
            for chunk in _chunks(sorted(set(series_ids))):
                rows.extend(conn.execute(query.where(series_labels.c.series_id.in_(chunk))))
    for sid, label, value in sorted(rows, key=lambda r: (r[0], r[1])):
        out.setdefault(sid, {})[label] = value
    return out


def read_fleet_labels(conn: sa.Connection) -> pd.DataFrame:
    """The fleet (every series with a model, a label or an event) and its labels.

    One row per series (index ``series_id``), one column per label; None where
    a series has no value.
    """
    ids: set[str] = set(conn.execute(sa.select(series_models.c.series_id)).scalars())
    ids |= set(conn.execute(sa.select(series_labels.c.series_id).distinct()).scalars())
    ids |= set(conn.execute(sa.select(series_events.c.series_id).distinct()).scalars())
    rows = conn.execute(
        sa.select(series_labels.c.series_id, series_labels.c.label, series_labels.c.value)
    ).all()
    index = pd.Index(sorted(ids), name="series_id")
    if not rows:
        return pd.DataFrame(index=index)
    long = pd.DataFrame([tuple(r) for r in rows], columns=["series_id", "label", "value"])
    wide = long.pivot(index="series_id", columns="label", values="value")
    frame = wide.reindex(index).astype(object)
    frame = frame.where(frame.notna(), None)
    frame.columns = [str(c) for c in frame.columns]
    return frame


def _text_or_none(value: Any) -> str | None:
    """A label value as stored here: :func:`label_text`, and blank text is missing too."""
    text = label_text(value)
    return text if text is not None and text.strip() else None
