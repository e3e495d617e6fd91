"""Read metric series in long form from Parquet, CSV or SQL sources.

Every source is read as three columns, ``series_id``, ``timestamp`` and
``value`` (the source's own column names are mapped onto them by a
:class:`ColumnMap`).  A run reads only what it needs: the series it asks for,
and for each the span it asks for, with the filters pushed down to the storage
where the storage can apply them:

==========  ==============================  ===================================
source      series filter                   time filter
==========  ==============================  ===================================
Parquet     pyarrow.dataset expression;     pyarrow.dataset expression on
            prunes hive partitions and      date/time or numeric columns
            row groups by statistics
CSV         applied while streaming (CSV    applied while streaming for numeric
            has no index: every read scans  timestamps, in memory for text
            the files)
SQL         ``WHERE ... IN`` with bound     ``WHERE`` with bound parameters on
            parameters                      date/time or numeric columns
==========  ==============================  ===================================

Timestamps stored as text (always the case in CSV) cannot be compared in the
storage; they are filtered in memory after the series filter.  For large
fleets keep the data in Parquet (sorted by series id, or partitioned by it) or
in a SQL table with a date/time column and an index on (series id, time).

Timestamps are handed on as the source typed them: a date/time column stays
date/time (naive or time-zone aware, as stored), text stays the exact text, so
the engine can quote an event's time as the input gave it.  Two conversions
are made because the source carries no type of its own: text that is all
numbers (a CSV column of epoch seconds or sample numbers) becomes numbers, and
numbers declared as epoch times with ``timestamp_unit`` become UTC date/times.
A naive time is UTC (the rule of :mod:`changekind.tasks.timeaxis`), bounds
included; a source that declares the zone of its naive stamps (``timezone``)
has them handed on aware, text with its offset.  Rows without a series id or
a timestamp cannot be placed and are skipped.  Bounds are ``start <= t < end``.

Modules: ``values`` (what a source is and what is read from it), ``files``
(which kind a location is, the data files of a folder), ``times`` (bounds and
comparable keys), ``arrow`` and ``sql`` (the two readers), ``reading`` (open,
survey and read), ``batching`` (a batch at a time).
"""

from __future__ import annotations

from changekind.tasks.fetch.batching import iter_batches, iter_window_batches, split_batches
from changekind.tasks.fetch.reading import (
    list_series,
    open_source,
    read_series,
    read_windows,
    survey_source,
)
from changekind.tasks.fetch.times import numeric_text
from changekind.tasks.fetch.values import (
    CONNECT_TIMEOUT_S,
    CSV_SUFFIXES,
    LONG_COLUMNS,
    MAX_FILTER_GROUPS,
    MAX_ROWS_NAMED,
    PARQUET_SUFFIXES,
    SAMPLE_ROWS,
    TIMESTAMP_UNITS,
    Bound,
    ColumnMap,
    SeriesWindow,
    SourceKind,
    SourceProblem,
    SourceSpec,
    SourceSurvey,
    Span,
    TimeKind,
)

__all__ = [
    "CONNECT_TIMEOUT_S",
    "CSV_SUFFIXES",
    "LONG_COLUMNS",
    "MAX_FILTER_GROUPS",
    "MAX_ROWS_NAMED",
    "PARQUET_SUFFIXES",
    "SAMPLE_ROWS",
    "TIMESTAMP_UNITS",
    "Bound",
    "ColumnMap",
    "SeriesWindow",
    "SourceKind",
    "SourceProblem",
    "SourceSpec",
    "SourceSurvey",
    "Span",
    "TimeKind",
    "iter_batches",
    "iter_window_batches",
    "list_series",
    "numeric_text",
    "open_source",
    "read_series",
    "read_windows",
    "split_batches",
    "survey_source",
]
