"""Reading the INPUT of ``changekind detect``: one file or a folder, as series.

The paths, suffixes and folders are those of the fleet commands
(:func:`~changekind.tasks.fetch.files.file_format`); a folder is read by the
fleet reader itself.  Two layouts are accepted, in CSV (optionally
gzip-compressed) or Parquet:

* long form: columns ``series_id``, ``timestamp``, ``value`` (any others are
  ignored), one row per observation, any number of series;
* two columns: ``timestamp``, ``value``; the file holds one series, named after
  the file's stem (``latency.csv`` -> ``latency``).

CSV cells are read as text so that timestamps reach the engine, and come back
in the events, exactly as the file wrote them.  Checking the values and
timestamps of each series is the engine's job (it raises a ``SeriesError`` that
names the series); this module only refuses files it cannot read at all.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from changekind.tasks.errors import SourceError
from changekind.tasks.fetch.files import file_format
from changekind.tasks.fetch.reading import open_source, read_windows, survey_source
from changekind.tasks.fetch.times import numeric_text
from changekind.tasks.fetch.values import (
    CSV_SUFFIXES,
    LONG_COLUMNS,
    PARQUET_SUFFIXES,
    SeriesWindow,
    SourceProblem,
)

SHORT_COLUMNS = ("timestamp", "value")


@dataclass(frozen=True, slots=True, eq=False)
class SeriesInput:
    """One series as read from the INPUT file, in file order.

    ``timestamps`` are as the file holds them (text for CSV, the column's own
    type for Parquet); ``values`` are float64 where every cell parses as a
    number, otherwise the raw cells, so that the engine can say which series is
    not numeric.
    """

    series_id: str
    timestamps: pd.Index
    values: np.ndarray

    @property
    def nobs(self) -> int:
        return len(self.values)


def _suffix(path: Path) -> str:
    name = path.name.lower()
    for suffix in sorted(CSV_SUFFIXES + PARQUET_SUFFIXES, key=len, reverse=True):
        if name.endswith(suffix):
            return suffix
    return path.suffix.lower()


def series_name(path: Path) -> str:
    """The series id a two-column file stands for: its name without the suffix."""
    suffix = _suffix(path)
    name = path.name
    if name.lower().endswith(suffix):
        return name[: len(name) - len(suffix)] or name
    return path.stem


def _read_frame(path: Path, problems: list[SourceProblem] | None) -> pd.DataFrame:
    if not path.exists():
        raise SourceError(f"{path}: no such file; give the path of a CSV or Parquet file")
    if path.is_dir():
        return _read_folder(path, problems)
    kind = file_format(path)
    try:
        if kind == "csv":
            return pd.read_csv(path, dtype=str, skipinitialspace=True)
        if kind == "parquet":
            return pd.read_parquet(path)
    except PermissionError as exc:
        raise SourceError(f"{path}: permission denied ({exc.strerror})") from exc
    except pd.errors.EmptyDataError as exc:
        raise SourceError(
            f"{path} is empty; it needs a header row "
            f"({', '.join(LONG_COLUMNS)} or {', '.join(SHORT_COLUMNS)}) and data rows"
        ) from exc
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise SourceError(f"{path} is not readable as CSV: {exc}") from exc
    except (OSError, ValueError) as exc:
        # pyarrow's ArrowInvalid is a ValueError; a gzip error is an OSError.
        name = "CSV" if kind == "csv" else "Parquet"
        raise SourceError(f"{path} is not readable as {name}: {exc}") from exc
    raise SourceError(
        f"{path}: unknown file type {path.suffix or '(no suffix)'!r}; "
        "INPUT must end in .csv, .csv.gz, .parquet, .parq or .pq (or be a folder of them)"
    )


def _read_folder(path: Path, problems: list[SourceProblem] | None) -> pd.DataFrame:
    """A folder of long-form files, read as the fleet commands read it.

    Files and rows that cannot be read are skipped and added to ``problems``,
    as ``scan`` records them.
    """
    spec = open_source(path)
    survey = survey_source(spec)
    found = list(survey.problems)
    frame = read_windows(spec, [SeriesWindow(s) for s in survey.series_ids], problems=found)
    if problems is not None:
        problems.extend(found)
    return frame


def _as_values(raw: pd.Series) -> np.ndarray:
    """Float64 values where every cell is a number (or missing), else the raw cells."""
    if pd.api.types.is_numeric_dtype(raw.dtype) and not pd.api.types.is_bool_dtype(raw.dtype):
        return raw.to_numpy(dtype=float, na_value=np.nan)
    try:
        return pd.to_numeric(raw, errors="raise").to_numpy(dtype=float, na_value=np.nan)
    except (ValueError, TypeError):
        return raw.to_numpy(dtype=object)


def frame_to_series(frame: pd.DataFrame, *, default_id: str, source: str) -> list[SeriesInput]:
    """Split a long-form or two-column frame into series, in order of first appearance.

    Parameters
    ----------
    frame : pandas.DataFrame
        Columns ``series_id, timestamp, value`` or ``timestamp, value``.
    default_id : str
        The series id of a two-column frame.
    source : str
        Where the frame came from, for error messages.

    Returns
    -------
    list of SeriesInput
        One per series, in the order each series first appears; rows keep
        their order within a series.

    Raises
    ------
    SourceError
        Missing columns, no rows, or rows without a series id.
    """
    frame = frame.rename(columns=lambda c: str(c).strip())
    columns = list(frame.columns)
    if all(c in columns for c in LONG_COLUMNS):
        ids = frame["series_id"]
        missing = int(ids.isna().sum())
        if missing:
            raise SourceError(
                f"{source}: {missing} row(s) have no series_id; fill them in or drop them"
            )
        ids = ids.astype(str).str.strip()
        long_form = True
    elif all(c in columns for c in SHORT_COLUMNS):
        ids = None
        long_form = False
    else:
        found = ", ".join(repr(c) for c in columns) or "none"
        raise SourceError(
            f"{source}: wrong columns (found {found}); expected either "
            f"{', '.join(LONG_COLUMNS)} (long form, many series) or "
            f"{', '.join(SHORT_COLUMNS)} (one series named after the file)"
        )
    if frame.empty:
        raise SourceError(f"{source}: the file has a header but no data rows")

    if not long_form:
        return [_one(default_id, frame)]
    out = []
    for series_id, rows in frame.groupby(ids, sort=False):
        out.append(_one(str(series_id), rows))
    return out


def _one(series_id: str, rows: pd.DataFrame) -> SeriesInput:
    stamps = rows["timestamp"]
    if not pd.api.types.is_numeric_dtype(stamps.dtype) and not pd.api.types.is_datetime64_any_dtype(
        stamps.dtype
    ):
        text = stamps.astype(object)
        observed = text[text.notna()]
        if len(observed) and numeric_text(observed):  # epoch times or sample numbers, as text
            stamps = pd.to_numeric(text)
    return SeriesInput(
        series_id=series_id,
        timestamps=pd.Index(stamps, name="timestamp"),
        values=_as_values(rows["value"]),
    )


def read_series_file(
    path: str | Path, *, problems: list[SourceProblem] | None = None
) -> list[SeriesInput]:
    """Read every series of a CSV or Parquet INPUT file, or of a folder of them.

    Parameters
    ----------
    path : str or pathlib.Path
        A ``.csv``, ``.csv.gz``, ``.parquet``, ``.parq`` or ``.pq`` file in long
        form or with two columns (see the module docstring), or a folder of
        long-form files.
    problems : list, optional
        Receives the files and rows of a folder that could not be read (they
        are skipped, as the fleet commands skip them).

    Returns
    -------
    list of SeriesInput
        In order of first appearance in the file.

    Raises
    ------
    SourceError
        The file is missing, unreadable, empty or has the wrong columns.
    """
    path = Path(path)
    frame = _read_frame(path, problems)
    return frame_to_series(frame, default_id=series_name(path), source=str(path))
