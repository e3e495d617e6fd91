"""Reading the INPUT of ``changekind detect``: one file or a folder, as series.

Through the fleet commands' own reader (:func:`~changekind.tasks.fetch.reading.open_source`,
:func:`~changekind.tasks.fetch.reading.read_windows`), so ``detect`` and
``scan``/``backfill`` accept the same paths, suffixes and folders, and read
them into the same series.  Two layouts, in CSV (optionally gzip-compressed)
or Parquet:

* long form: columns ``series_id``, ``timestamp``, ``value`` (any others are
  ignored), one row per observation, any number of series;
* one series: columns ``timestamp``, ``value`` in a single file, named after
  the file (``latency.csv`` -> ``latency``).

Series come in id order.  Parts that cannot be read (a file of a folder, a
row without a series id, a value cell that is not a number) are skipped and
handed back as :class:`~changekind.tasks.fetch.values.SourceProblem` values,
as ``scan`` records them.  Checking each series' values and timestamps is the
engine's job (it raises a ``SeriesError`` that names the series).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from changekind.tasks.errors import SourceError
from changekind.tasks.fetch.reading import open_source, read_windows, survey_source
from changekind.tasks.fetch.values import SeriesWindow, SourceProblem


@dataclass(frozen=True, slots=True, eq=False)
class SeriesInput:
    """One series as read from INPUT, in time order.

    ``timestamps`` are as the source hands them on (text for CSV date/times,
    the column's own type for Parquet, numbers for numeric times); ``values``
    are float64, a cell that is not a number being missing.
    """

    series_id: str
    timestamps: pd.Index
    values: np.ndarray

    @property
    def nobs(self) -> int:
        return len(self.values)


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
        Receives the parts that could not be read (see the module docstring);
        without it, the first such part raises SourceError.

    Returns
    -------
    list of SeriesInput
        In order of series id.

    Raises
    ------
    SourceError
        The path is missing, unreadable, empty, has the wrong columns, or
        holds no series at all.
    """
    path = Path(path)
    if not path.exists():
        raise SourceError(
            f"{path}: no such file or folder; give the path of a CSV or Parquet file "
            "or of a folder of them"
        )
    spec = open_source(path)
    survey = survey_source(spec)
    found = list(survey.problems)
    frame = read_windows(spec, [SeriesWindow(s) for s in survey.series_ids], problems=found)
    if frame.empty:
        if found:
            raise SourceError(f"{path}: no series can be read: {found[0].describe()}")
        raise SourceError(f"{path}: the file has a header but no data rows; add data rows")
    if problems is None and found:
        raise SourceError(found[0].describe())
    if problems is not None:
        problems.extend(found)
    return [
        SeriesInput(
            series_id=str(series_id),
            timestamps=pd.Index(rows["timestamp"].to_numpy(), name="timestamp"),
            values=rows["value"].to_numpy(dtype=float),
        )
        for series_id, rows in frame.groupby("series_id", sort=True)
    ]
