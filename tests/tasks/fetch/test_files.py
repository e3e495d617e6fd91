"""Recognising sources: which kind a location is (tasks/fetch/files.py).

Reference: pandas as the oracle (see this package's ``__init__``).
"""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from changekind.tasks.fetch import (
    list_series,
    open_source,
    read_series,
)
from tests.tasks.fetch.sources import FLEET, IDS, assert_rows, oracle

# ---------------------------------------------------------------------------
# Recognising sources
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("source", "kind", "time_kind"),
    [
        ("parquet-hive", "parquet", "datetime"),
        ("parquet-files", "parquet", "datetime"),
        ("csv-file", "csv", "text"),
        ("csv-dir", "csv", "text"),
        ("sqlite", "sql", "datetime"),
    ],
    indirect=["source"],
)
def test_open_source_infers_kind_and_timestamp_type(source, kind, time_kind):
    assert (source.kind, source.time_kind) == (kind, time_kind)


def test_open_source_single_parquet_file(tmp_path: Path):
    path = tmp_path / "one.parquet"
    pq.write_table(pa.Table.from_pandas(FLEET, preserve_index=False), path)
    spec = open_source(path)
    assert (spec.kind, spec.time_kind) == ("parquet", "datetime")
    assert_rows(read_series(spec, ["pump-04"]), oracle(FLEET, ["pump-04"]))


def test_list_series(source):
    assert list_series(source) == IDS
