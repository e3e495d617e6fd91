"""Parquet and CSV sources, read through one ``pyarrow.dataset``."""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from changekind.tasks.errors import SourceError
from changekind.tasks.fetch.files import _data_files, series_name
from changekind.tasks.fetch.times import _Axis, _Group, _time_kind_of_text
from changekind.tasks.fetch.values import (
    _OPTION,
    CSV_SUFFIXES,
    LONG_COLUMNS,
    MAX_ROWS_NAMED,
    PARQUET_SUFFIXES,
    SAMPLE_ROWS,
    SourceProblem,
    SourceSpec,
    TimeKind,
    missing_column,
)

# ---------------------------------------------------------------------------
# Parquet and CSV through pyarrow.dataset
# ---------------------------------------------------------------------------


def _arrow_category(dtype: pa.DataType) -> str:
    if pa.types.is_dictionary(dtype):
        dtype = dtype.value_type
    if pa.types.is_timestamp(dtype) or pa.types.is_date(dtype):
        return "datetime"
    if pa.types.is_integer(dtype):
        return "integer"
    if pa.types.is_floating(dtype) or pa.types.is_decimal(dtype):
        return "float"
    if pa.types.is_string(dtype) or pa.types.is_large_string(dtype):
        return "text"
    if pa.types.is_null(dtype):
        return "null"
    return "other"


class _ArrowReader:
    """Parquet files or CSV files read through one ``pyarrow.dataset``."""

    def __init__(self, spec: SourceSpec, *, check: bool = False) -> None:
        self.spec = spec
        cols = spec.columns
        self.problems: list[SourceProblem] = []
        self.excluded: list[tuple[str, str]] = list(spec.excluded)
        self._file: str | None = None  # the CSV file being surveyed (for ragged rows)
        self._ragged: dict[tuple[str, int], str] = {}
        self.dataset, self.files = self._open(check=check)
        names = self.dataset.schema.names
        self.one_series = self._one_series(names)
        for role in self._roles():
            name = getattr(cols, role)
            if name not in names:
                if role == "series_id" and not Path(spec.location).is_dir():
                    raise SourceError(
                        f"{spec.describe} has wrong columns ({', '.join(names)}); give "
                        f"{', '.join(LONG_COLUMNS)} (long form, many series) or "
                        f"{cols.timestamp}, {cols.value} (one series, named after the file), "
                        "or pass --series-column, --timestamp-column, --value-column to name them"
                    )
                raise missing_column(spec.describe, name, role, names)
        self.types = {
            role: self.dataset.schema.field(getattr(cols, role)).type for role in self._roles()
        }
        if self.one_series is not None:
            self.types["series_id"] = pa.string()
        self._check_types()
        if check:
            self._check_files()

    def _one_series(self, names: list[str]) -> str | None:
        """The id of the one series of a single file without a series id column, or None.

        A file with the timestamp and value columns but no (unmapped) ``series_id``
        column holds one series, named after the file (``latency.csv`` -> ``latency``).
        """
        cols = self.spec.columns
        root = Path(self.spec.location)
        if root.is_dir() or cols.series_id != "series_id" or cols.series_id in names:
            return None
        if cols.timestamp in names and cols.value in names:
            return series_name(root)
        return None

    def _roles(self) -> tuple[str, ...]:
        """The columns read from the data (a one-series file has no series id column)."""
        return LONG_COLUMNS[1:] if self.one_series is not None else LONG_COLUMNS

    def _format(self) -> ds.FileFormat:
        spec = self.spec
        if spec.kind == "parquet":
            return ds.ParquetFileFormat()
        # Every cell as text: values are made numbers in _finish, so one cell
        # that is not a number fails its series, not the source; a row with
        # the wrong number of cells is skipped and reported (_ragged_row).
        return ds.CsvFileFormat(
            parse_options=pacsv.ParseOptions(invalid_row_handler=self._ragged_row),
            convert_options=pacsv.ConvertOptions(
                column_types={
                    spec.columns.series_id: pa.string(),
                    spec.columns.timestamp: pa.string(),
                    spec.columns.value: pa.string(),
                },
                strings_can_be_null=True,
            ),
        )

    def _ragged_row(self, row: Any) -> str:
        if self._file is not None:
            self._ragged.setdefault((self._file, int(row.number)), str(row.text))
        return "skip"

    def _file_problem(self, path: str) -> str | None:
        """Why one file of a directory cannot be read as part of the source, or None."""
        spec = self.spec
        try:
            if spec.kind == "parquet":
                schema = pq.read_schema(path)
            else:
                with pacsv.open_csv(
                    path,
                    parse_options=pacsv.ParseOptions(invalid_row_handler=_skip_row),
                    convert_options=pacsv.ConvertOptions(
                        column_types=dict.fromkeys(spec.columns.source_names(), pa.string())
                    ),
                ) as stream:
                    schema = stream.schema
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError, OSError) as exc:
            kind = "Parquet" if spec.kind == "parquet" else "CSV"
            return f"not readable as {kind} ({_arrow_message(exc)}); the file is skipped"
        partition_keys = {part.split("=", 1)[0] for part in Path(path).parts[:-1] if "=" in part}
        missing = [
            name
            for name in spec.columns.source_names()
            if name not in schema.names and name not in partition_keys
        ]
        if missing:
            return (
                f"wrong columns: no {', '.join(repr(m) for m in missing)} (columns: "
                f"{', '.join(schema.names)}); the file is skipped"
            )
        if spec.kind == "parquet":
            value_type = schema.field(spec.columns.value).type
            if _arrow_category(value_type) not in ("integer", "float", "null"):
                return f"value column has type {value_type}, not numbers; the file is skipped"
        return None

    def _open(self, *, check: bool = False) -> tuple[ds.Dataset, list[str]]:
        spec = self.spec
        suffixes = PARQUET_SUFFIXES if spec.kind == "parquet" else CSV_SUFFIXES
        fmt = self._format()
        root = Path(spec.location)
        if not root.exists():
            raise SourceError(f"{spec.describe} does not exist (any more); check the path")
        try:
            if root.is_dir():
                skip = {path for path, _ in self.excluded}
                files = [f for f in _data_files(root, suffixes) if f not in skip]
                if check:
                    good = []
                    for path in files:
                        why = self._file_problem(path)
                        if why is None:
                            good.append(path)
                        else:
                            self.excluded.append((path, why))
                    if files and not good:
                        reasons = "; ".join(f"{p}: {w}" for p, w in self.excluded[:3])
                        raise SourceError(
                            f"{spec.describe}: no file can be read ({reasons}); fix or "
                            "replace the files"
                        )
                    files = good
                if not files:
                    raise SourceError(
                        f"{spec.describe} holds no {'/'.join(suffixes)} files; point at the "
                        "directory the data was written to"
                    )
                keys = sorted(
                    {
                        part.split("=", 1)[0]
                        for f in files
                        for part in Path(f).relative_to(root).parts[:-1]
                        if "=" in part
                    }
                )
                partitioning = (
                    ds.partitioning(pa.schema([(k, pa.string()) for k in keys]), flavor="hive")
                    if keys
                    else None
                )
                dataset = ds.dataset(
                    files, format=fmt, partitioning=partitioning, partition_base_dir=str(root)
                )
            else:
                if root.stat().st_size == 0:
                    raise SourceError(
                        f"{spec.describe} is empty; it needs a header row "
                        f"({', '.join(spec.columns.source_names())}, or "
                        f"{spec.columns.timestamp}, {spec.columns.value} for one series) "
                        "and data rows"
                    )
                files = [str(root)]
                dataset = ds.dataset(str(root), format=fmt)
        except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError) as exc:
            raise self._unreadable(exc) from None
        return dataset, files

    def _unreadable(self, exc: Exception) -> SourceError:
        spec = self.spec
        message = _arrow_message(exc)
        if "conversion error to double" in message:
            detail = (
                message[message.find("In CSV column") :] if "In CSV column" in message else message
            )
            return SourceError(
                f"{spec.describe}: value column {spec.columns.value!r} holds something that is not "
                f"a number ({detail}); fix those rows or pass {_OPTION['value']} to choose the "
                "right column"
            )
        name = "Parquet" if spec.kind == "parquet" else "CSV"
        return SourceError(
            f"{spec.describe} is not readable as {name}: {message}; check that the files "
            "are complete and of that format"
        )

    def _check_files(self) -> None:
        """Every file must hold the mapped columns (a file without one reads as nulls)."""
        spec = self.spec
        dataset = self.dataset
        partition_names = set(dataset.partitioning.schema.names) if dataset.partitioning else set()
        try:
            fragments = list(dataset.get_fragments())
            schemas = [(f.path, f.physical_schema) for f in fragments]
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            raise self._unreadable(exc) from None
        for path, schema in schemas:
            present = set(schema.names) | partition_names
            for role in self._roles():
                name = getattr(spec.columns, role)
                if name not in present:
                    raise SourceError(
                        f"{spec.describe}: file {path!r} has no column {name!r} "
                        f"(columns: {', '.join(schema.names)}); rewrite the "
                        f"file or pass {_OPTION[role]} if the column is named differently"
                    )
            if spec.columns.value not in schema.names:
                continue  # a partition field: typed by the partitioning
            value_type = schema.field(spec.columns.value).type
            if spec.kind == "csv":
                continue  # text, made numbers cell by cell (_finish)
            if _arrow_category(value_type) not in ("integer", "float", "null"):
                raise SourceError(
                    f"{spec.describe}: value column {spec.columns.value!r} in file "
                    f"{path!r} has type {value_type}, not numbers; store numbers or "
                    f"pass {_OPTION['value']} to choose the right column"
                )

    def _check_types(self) -> None:
        spec = self.spec
        cols = spec.columns
        numeric = ("integer", "float", "null") + (("text",) if spec.kind == "csv" else ())
        if _arrow_category(self.types["value"]) not in numeric:
            raise SourceError(
                f"{spec.describe}: value column {cols.value!r} has type {self.types['value']}, "
                f"not numbers; store numbers or pass {_OPTION['value']} to choose the right column"
            )
        if _arrow_category(self.types["timestamp"]) in ("other", "null"):
            raise SourceError(
                f"{spec.describe}: timestamp column {cols.timestamp!r} has type "
                f"{self.types['timestamp']}, not dates/times, numbers or text; pass "
                f"{_OPTION['timestamp']} to choose the right column"
            )
        if _arrow_category(self.types["series_id"]) not in ("text", "integer"):
            raise SourceError(
                f"{spec.describe}: series id column {cols.series_id!r} has type "
                f"{self.types['series_id']}; ids must be text or whole numbers (pass "
                f"{_OPTION['series_id']} to choose the right column)"
            )

    def time_kind(self) -> TimeKind:
        category = _arrow_category(self.types["timestamp"])
        if category == "datetime":
            return "datetime"
        if category in ("integer", "float"):
            return "numeric"
        name = self.spec.columns.timestamp
        try:
            sample = self.dataset.head(
                SAMPLE_ROWS, columns=[name], filter=ds.field(name).is_valid()
            ).column(0)
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            raise self._unreadable(exc) from None
        return _time_kind_of_text(pd.Series(sample.to_pylist(), dtype=object), self.spec)

    def _id_expr(self) -> ds.Expression:
        if self.one_series is not None:
            return ds.scalar(self.one_series)
        field = ds.field(self.spec.columns.series_id)
        dtype = self.types["series_id"]
        if pa.types.is_string(dtype) or pa.types.is_large_string(dtype):
            return field
        return field.cast(pa.string())

    def _id_filter(self, ids: Sequence[str]) -> ds.Expression:
        if self.one_series is not None:
            return ds.scalar(self.one_series in ids)
        dtype = self.types["series_id"]
        field = ds.field(self.spec.columns.series_id)
        # The range guard beside isin lets Parquet min/max statistics skip files
        # and row groups (isin alone did not: 56 ms vs 11 ms for 100 of 1,000
        # series in 10 files, tests/benchmarks/bench_fetch.py layout by-series).
        if _arrow_category(dtype) == "integer":
            numbers = [int(s) for s in ids if re.fullmatch(r"[+-]?\d+", s)]
            if not numbers:
                return ds.scalar(False)
            guard = (field >= min(numbers)) & (field <= max(numbers))
            return guard & field.isin(pa.array(numbers, type=pa.int64()))
        if pa.types.is_string(dtype) or pa.types.is_large_string(dtype):
            guard = (field >= min(ids)) & (field <= max(ids))
            return guard & field.isin(pa.array(list(ids), type=dtype))
        return self._id_expr().isin(pa.array(list(ids), type=pa.string()))

    def _time_scalar(self, key: Any, axis: _Axis) -> pa.Scalar | None:
        """``key`` as a scalar of the stored type (see :func:`_stored_bound`)."""
        dtype = self.types["timestamp"]
        if pa.types.is_timestamp(dtype):
            # A scalar in the column's own unit: a finer one makes Arrow cast
            # every stored value (30 ms vs 5 ms per batch in bench_fetch.py).
            stamp = _stored_bound(key, axis, "timestamp", unit=dtype.unit, tz=dtype.tz)
            return pa.scalar(stamp.as_unit(dtype.unit), type=dtype)
        if pa.types.is_date(dtype):
            return pa.scalar(_stored_bound(key, axis, "date"), type=dtype)
        category = _arrow_category(dtype)
        if category == "integer":
            number = _stored_bound(key, axis, "integer", unit=self.spec.timestamp_unit)
            return pa.scalar(number, type=pa.int64())
        if category == "float":
            number = _stored_bound(key, axis, "float", unit=self.spec.timestamp_unit)
            return pa.scalar(number, type=pa.float64())
        return None  # text: filtered in memory

    def _filter(self, groups: Sequence[_Group], axis: _Axis) -> ds.Expression:
        field = ds.field(self.spec.columns.timestamp)
        expr: ds.Expression | None = None
        for group in groups:
            cond = self._id_filter(group.ids)
            if group.start is not None:
                lo = self._time_scalar(group.start, axis)
                if lo is not None:
                    cond = cond & (field >= lo)
            if group.end is not None:
                hi = self._time_scalar(group.end, axis)
                if hi is not None:
                    cond = cond & (field < hi)
            expr = cond if expr is None else expr | cond
        assert expr is not None
        return expr

    def scan(self, groups: Sequence[_Group], axis: _Axis) -> pd.DataFrame:
        cols = self.spec.columns
        value = ds.field(cols.value)
        projection = {
            "series_id": self._id_expr(),
            "timestamp": ds.field(cols.timestamp),
            "value": value if self.spec.kind == "csv" else value.cast(pa.float64()),
        }
        condition = self._filter(groups, axis)
        try:
            table = self.dataset.to_table(columns=projection, filter=condition)
        except (pa.ArrowInvalid, pa.ArrowTypeError, OSError) as exc:
            if len(self.files) < 2:
                raise self._unreadable(exc) from None
            # One file is damaged beyond its footer (found only when its pages
            # are read): read file by file, and leave out the series it may hold.
            table = self._scan_by_file(projection, condition, groups)
        return table.to_pandas(date_as_object=False)

    def _scan_by_file(
        self, projection: dict[str, ds.Expression], condition: ds.Expression, groups
    ) -> pa.Table:
        parts = []
        wanted = sorted({sid for g in groups for sid in g.ids})
        for fragment in self.dataset.get_fragments():
            try:
                parts.append(
                    fragment.to_table(
                        schema=self.dataset.schema, columns=projection, filter=condition
                    )
                )
            except (pa.ArrowInvalid, pa.ArrowTypeError, OSError) as exc:
                held = self._ids_in_file(fragment.path, wanted)
                self.problems.append(
                    SourceProblem(
                        fragment.path,
                        f"could not be read ({_arrow_message(exc)}); the file is skipped",
                    )
                )
                self.problems.extend(
                    SourceProblem(
                        fragment.path,
                        "some of its rows may be in a file that could not be read; not "
                        "analysed in this run (fix or replace the file)",
                        series_id=sid,
                        skip_series=True,
                    )
                    for sid in held
                )
        if not parts:
            raise SourceError(f"{self.spec.describe}: no file of this read can be read")
        return pa.concat_tables(parts)

    def _ids_in_file(self, path: str, wanted: Sequence[str]) -> list[str]:
        """Of ``wanted``, the ids a damaged Parquet file may hold (its footer's statistics)."""
        if self.spec.kind != "parquet":
            return list(wanted)
        try:
            meta = pq.ParquetFile(path).metadata
            index = meta.schema.to_arrow_schema().get_field_index(self.spec.columns.series_id)
            ranges = []
            for g in range(meta.num_row_groups):
                stats = meta.row_group(g).column(index).statistics
                if stats is None or not stats.has_min_max:
                    return list(wanted)
                ranges.append((str(stats.min), str(stats.max)))
        except (pa.ArrowInvalid, OSError, ValueError, IndexError):
            return list(wanted)
        if _arrow_category(self.types["series_id"]) == "integer":
            return [
                s
                for s in wanted
                if re.fullmatch(r"[+-]?\d+", s)
                and any(int(lo) <= int(s) <= int(hi) for lo, hi in ranges)
            ]
        return [s for s in wanted if any(lo <= s <= hi for lo, hi in ranges)]

    def distinct_ids(self) -> list[str]:
        """The series ids, file by file; rows without an id and ragged rows become problems."""
        seen: set[str] = set()
        self._ragged.clear()
        try:
            for fragment in self.dataset.get_fragments():
                path = fragment.path
                self._file = path
                blank: list[int] = []
                offset = 0
                scanner = fragment.scanner(
                    schema=self.dataset.schema, columns={"series_id": self._id_expr()}
                )
                for batch in scanner.to_batches():
                    ids = batch.column(0)
                    empty = pc.or_kleene(
                        pc.is_null(ids), pc.equal(pc.utf8_trim_whitespace(ids), "")
                    ).fill_null(True)
                    if pc.any(empty).as_py():
                        blank.extend(offset + int(i) for i in np.flatnonzero(empty))
                    seen.update(pc.unique(pc.filter(ids, pc.invert(empty))).to_pylist())
                    offset += batch.num_rows
                if blank:
                    self.problems.append(self._blank_problem(path, blank))
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            raise self._unreadable(exc) from None
        finally:
            self._file = None
        for (path, line), text in sorted(self._ragged.items()):
            self.problems.append(
                SourceProblem(
                    path,
                    f"wrong number of cells ({text[:80]!r}); the row is skipped: give it "
                    f"the {len(self.dataset.schema.names)} columns of the header",
                    row=line if line > 0 else None,
                )
            )
        return sorted(seen)

    def _blank_problem(self, path: str, positions: list[int]) -> SourceProblem:
        """Rows without a series id, named by their line (CSV: header is line 1) or row."""
        csv = self.spec.kind == "csv"
        skipped = sorted(line for p, line in self._ragged if p == path and line > 0)
        rows = []
        for position in positions:
            row = position + (2 if csv else 1)  # a CSV's line 1 is its header
            for line in skipped:  # ragged lines were skipped before this row was counted
                if line <= row:
                    row += 1
            rows.append(row)
        shown = ", ".join(str(r) for r in rows[:MAX_ROWS_NAMED])
        more = f" and {len(rows) - MAX_ROWS_NAMED} more" if len(rows) > MAX_ROWS_NAMED else ""
        where = f"{'line' if csv else 'row'}s {shown}{more}"
        return SourceProblem(
            path,
            f"{len(rows)} row(s) without a series id ({where}); they are skipped: fill in "
            f"the {self.spec.columns.series_id!r} column or drop them",
            row=rows[0],
        )

    def close(self) -> None:
        pass


def _skip_row(row: Any) -> str:
    return "skip"


def _arrow_message(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


_NS_PER_UNIT = {"s": 1_000_000_000, "ms": 1_000_000, "us": 1_000, "ns": 1}


def _stored_bound(
    key: Any, axis: _Axis, stored: str, *, unit: str | None = None, tz: str | None = None
) -> Any:
    """The least value of a stored type that is >= ``key``.

    Stored values are whole units (of a timestamp unit, a day, an integer), so
    for that bound ``b``, ``v >= key`` iff ``v >= b`` and ``v < key`` iff
    ``v < b``: the pushed-down filter is exact.

    Parameters
    ----------
    key : pandas.Timestamp (UTC) or float
        A time key from :meth:`_Axis.bound`.
    stored : {"timestamp", "date", "integer", "float"}
    unit : str, optional
        Timestamp unit of the column, or epoch unit of numbers (temporal axis).
    tz : str, optional
        Zone of an aware timestamp column; None for naive columns (read in
        ``axis.tz``).
    """
    if stored == "timestamp":
        stamp = key if unit in (None, "ns") else key.ceil(unit)
        return stamp.tz_convert(tz) if tz else stamp.tz_convert(axis.tz).tz_localize(None)
    if stored == "date":
        return key.tz_convert(axis.tz).tz_localize(None).ceil("D").date()
    per = _NS_PER_UNIT[unit or "s"]
    if stored == "integer":
        return -(-key.value // per) if axis.temporal else math.ceil(key)
    return key.value / per if axis.temporal else float(key)
