"""Series attributes from the source: columns that describe a series (rack, host, firmware).

A fleet's source often carries, beside ``series_id``, ``timestamp`` and
``value``, columns that describe the series: the rack a host sits in, the
firmware it runs, its region.  :func:`read_labels` reads the columns named as
labels (``--label-column``) and keeps, for each series, the values of its
latest row (by timestamp; the last of equal times), since attributes change
(a firmware upgrade) and the current value is what an incident is compared
with.  Empty cells are missing values.  The values are text.

Parquet and CSV sources are read through the same dataset the fetch step
opens (files it excluded stay excluded); only the id, timestamp and label
columns are read.  SQL sources are read with one ``SELECT``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import sqlalchemy as sa

from changekind.tasks import fetch
from changekind.tasks.errors import ConfigError, SourceError
from changekind.tasks.fetch.reading import _READERS

__all__ = [
    "LABEL_OPTION",
    "SeriesLabels",
    "check_label_columns",
    "check_label_names",
    "read_labels",
    "source_columns",
]

LABEL_OPTION = "--label-column"
_RESERVED = ("series_id", "observed_at")


@dataclass(frozen=True, slots=True, eq=False)
class SeriesLabels:
    """The labels of each series: ``frame`` has ``series_id``, ``observed_at``
    (the source time of the row the values come from, as text) and one column
    per label (text or None), one row per series, sorted by series id."""

    names: tuple[str, ...]
    frame: pd.DataFrame

    @property
    def n_series(self) -> int:
        return len(self.frame)

    def as_mapping(self) -> dict[str, dict[str, str | None]]:
        return {
            row["series_id"]: {n: row[n] for n in self.names}
            for row in self.frame.to_dict("records")
        }


def check_label_names(names: Sequence[str] | None) -> tuple[str, ...]:
    """Label column names, validated (unique, non-empty, not reserved)."""
    if names is None:
        return ()
    if isinstance(names, str):
        names = [names]
    out: list[str] = []
    for name in names:
        if not isinstance(name, str) or not name.strip():
            raise ConfigError(f"{LABEL_OPTION} {name!r} is empty; give a source column's name")
        if name in _RESERVED:
            raise ConfigError(
                f"{LABEL_OPTION} {name!r} is a reserved name; rename the source column "
                f"(names {', '.join(_RESERVED)} are used for the series and the time)"
            )
        if name in out:
            raise ConfigError(f"{LABEL_OPTION} {name!r} is given twice; give each column once")
        out.append(name)
    return tuple(out)


def source_columns(spec: fetch.SourceSpec) -> list[str]:
    """The column names of a source (partition keys of a Parquet dataset included)."""
    if spec.kind == "sql":
        with _SqlSource(spec) as (_conn, src):
            return list(src.c.keys())
    reader = _READERS[spec.kind](spec)
    try:
        return list(reader.dataset.schema.names)
    finally:
        reader.close()


def _check_present(spec: fetch.SourceSpec, names: Sequence[str], available: Sequence[str]) -> None:
    mapped = set(spec.columns.source_names())
    for name in names:
        if name in mapped:
            raise ConfigError(
                f"{LABEL_OPTION} {name!r} is the source's series, time or value column; "
                "name a column that describes the series"
            )
    missing = [n for n in names if n not in available]
    if missing:
        others = [c for c in available if c not in mapped]
        raise ConfigError(
            f"{spec.describe} has no column {', '.join(map(repr, missing))} for "
            f"{LABEL_OPTION}; its columns are {', '.join(available)}"
            + (f" (those that could describe a series: {', '.join(others)})" if others else "")
        )


def read_labels(spec: fetch.SourceSpec, names: Sequence[str]) -> SeriesLabels:
    """The latest value of each label column for each series of a source.

    Parameters
    ----------
    spec : SourceSpec
        The source, as :func:`changekind.tasks.fetch.open_source` returns it.
    names : sequence of str
        Source columns that describe a series.

    Returns
    -------
    SeriesLabels

    Raises
    ------
    ConfigError
        A name that is not a column of the source (the message lists the
        columns that are), or the series, time or value column.

    Notes
    -----
    1. Check the names against the source's columns.
    2. Read the id, timestamp and label columns.
    3. Order each series' rows by time (date-times, numbers, or ISO text read
       as UTC date-times; rows whose time cannot be read come first) and keep
       its last row.
    """
    wanted = check_label_names(names)
    if not wanted:
        return SeriesLabels((), pd.DataFrame({"series_id": [], "observed_at": []}, dtype=object))
    # Step 1 and 2
    if spec.kind == "sql":
        frame = _read_sql(spec, wanted)
    else:
        frame = _read_arrow(spec, wanted)
    # Step 3
    sid, ts = spec.columns.series_id, spec.columns.timestamp
    frame = frame[frame[sid].notna()]
    order = _time_order(frame[ts])
    frame = frame.assign(_order=order, _row=np.arange(len(frame)))
    frame = frame.sort_values([sid, "_order", "_row"], kind="stable", na_position="first")
    last = frame.drop_duplicates(sid, keep="last")
    out = pd.DataFrame(
        {
            "series_id": last[sid].astype(str).to_numpy(dtype=object),
            "observed_at": [_text(v) for v in last[ts].tolist()],
            **{n: [_text(v) for v in last[n].tolist()] for n in wanted},
        }
    )
    out = out.sort_values("series_id", kind="stable").reset_index(drop=True)
    return SeriesLabels(wanted, out)


def _text(value: object) -> str | None:
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, float) and np.isnan(value):
        return None
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    text = str(value)
    return text if text.strip() else None


def _time_order(times: pd.Series) -> np.ndarray:
    """A sortable float per row (NaN where the time cannot be read)."""
    if pd.api.types.is_datetime64_any_dtype(times):
        stamps = pd.to_datetime(times, utc=True) if times.dt.tz is None else times
        values = stamps.dt.tz_convert("UTC").astype("int64").to_numpy(dtype=float)
        values[times.isna().to_numpy()] = np.nan
        return values
    if pd.api.types.is_numeric_dtype(times):
        return times.to_numpy(dtype=float, na_value=np.nan)
    codes, uniques = pd.factorize(times, use_na_sentinel=True)
    texts = pd.Series(uniques, dtype=object).astype(str)
    parsed = pd.to_datetime(texts, utc=True, errors="coerce", format="ISO8601")
    if parsed.notna().any():
        keys = parsed.astype("int64").to_numpy(dtype=float)
        keys[parsed.isna().to_numpy()] = np.nan
    else:
        keys = pd.to_numeric(texts, errors="coerce").to_numpy(dtype=float)
    out = np.full(len(times), np.nan)
    ok = codes >= 0
    out[ok] = keys[codes[ok]]
    return out


def _read_arrow(spec: fetch.SourceSpec, names: Sequence[str]) -> pd.DataFrame:
    reader = _READERS[spec.kind](spec)
    try:
        dataset = reader.dataset
        _check_present(spec, names, dataset.schema.names)
        sid, ts = spec.columns.series_id, spec.columns.timestamp
        try:
            table = dataset.to_table(columns=[sid, ts, *names])
        except (pa.ArrowInvalid, pa.ArrowTypeError, OSError) as exc:
            raise SourceError(
                f"{spec.describe}: the label columns could not be read ({exc}); check the files"
            ) from None
        cols = {}
        for name in table.column_names:
            col = table.column(name)
            if name in names and not pa.types.is_string(col.type):
                col = pc.cast(col, pa.string()) if not pa.types.is_null(col.type) else col
            cols[name] = col
        return pa.table(cols).to_pandas()
    finally:
        reader.close()


class _SqlSource:
    """A connection to a SQL source and the table or query as a selectable."""

    def __init__(self, spec: fetch.SourceSpec) -> None:
        self.spec = spec

    def __enter__(self) -> tuple[sa.Connection, sa.FromClause]:
        spec = self.spec
        self.engine = sa.create_engine(spec.location)
        try:
            self.conn = self.engine.connect()
        except sa.exc.DBAPIError as exc:
            self.engine.dispose()
            raise SourceError(f"{spec.describe}: cannot connect ({exc.orig})") from None
        if spec.table is not None:
            schema, _, name = spec.table.rpartition(".")
            src = sa.Table(name, sa.MetaData(), schema=schema or None, autoload_with=self.conn)
        else:
            probe = sa.text(spec.query).columns().subquery("changekind_labels")  # type: ignore[arg-type]
            result = self.conn.execute(
                sa.select(sa.literal_column("*")).select_from(probe).limit(0)
            )
            available = list(result.keys())
            result.close()
            src = (
                sa.text(spec.query)  # type: ignore[arg-type]
                .columns(*(sa.column(n) for n in available))
                .subquery("changekind_labels")
            )
        return self.conn, src

    def __exit__(self, *exc: object) -> None:
        self.conn.close()
        self.engine.dispose()


def _read_sql(spec: fetch.SourceSpec, names: Sequence[str]) -> pd.DataFrame:
    with _SqlSource(spec) as (conn, src):
        _check_present(spec, names, list(src.c.keys()))
        sid, ts = spec.columns.series_id, spec.columns.timestamp
        # One row per series and distinct label values, with its latest time: the
        # database does the reduction.
        keys = [src.c[sid], *(src.c[n] for n in names)]
        query = sa.select(*keys, sa.func.max(src.c[ts]).label(ts)).group_by(*keys)
        rows = conn.execute(query).all()
    return pd.DataFrame([tuple(r) for r in rows], columns=[sid, *names, ts])


def check_label_columns(spec: fetch.SourceSpec, names: Sequence[str] | None) -> tuple[str, ...]:
    """Validate label column names against a source (reads its columns only).

    Raises ConfigError naming the columns the source has when one is missing.
    """
    wanted = check_label_names(names)
    if wanted:
        _check_present(spec, wanted, source_columns(spec))
    return wanted
