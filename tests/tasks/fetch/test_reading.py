"""Reading series and windows with pushdown (tasks/fetch/reading.py, arrow.py, sql.py).

Reference: pandas as the oracle (see this package's ``__init__``).
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from numpy.testing import assert_array_equal

from changekind.tasks.fetch import (
    SeriesWindow,
    arrow,
    iter_batches,
    list_series,
    open_source,
    read_series,
    read_windows,
    reading,
)
from tests.tasks.fetch.sources import (
    FLEET,
    IDS,
    N_POINTS,
    T0,
    _count_scanned,
    _utc,
    as_utc,
    assert_rows,
    oracle,
    varied_windows,
    write_csv_file,
    write_parquet_files,
)

# ---------------------------------------------------------------------------
# Reading with pushdown, checked against pandas
# ---------------------------------------------------------------------------

CASES = [
    pytest.param(["pump-02", "pump-07"], None, None, id="two-series-all-time"),
    pytest.param(
        ["pump-01", "pump-05", "pump-12"], "2031-05-02T00:00", "2031-05-03T12:00", id="span"
    ),
    pytest.param(["pump-03"], pd.Timestamp("2031-05-02T06:00+02:00"), None, id="aware-start"),
    pytest.param(None, "2031-05-04T20:30", None, id="all-series-half-hour-start"),
    pytest.param(["pump-09", "pump-99"], None, datetime(2031, 5, 2, 3), id="unknown-id-naive-end"),
    pytest.param(["pump-06"], "2031-06-01", None, id="empty"),
]


@pytest.mark.parametrize(("ids", "start", "end"), CASES)
def test_read_series_matches_pandas(source, ids, start, end):
    got = read_series(source, ids, start=start, end=end)
    assert_rows(got, oracle(FLEET, ids, _utc(start), _utc(end)))


def test_timestamps_keep_the_source_representation(source):
    got = read_series(source, ["pump-02"], end="2031-05-01T06:00")
    if source.kind == "csv":
        # Text stays the exact text of the file.
        assert got["timestamp"].tolist() == [f"2031-05-01T0{h}:00:00Z" for h in range(1, 6)]
    elif source.kind == "parquet":
        assert str(got["timestamp"].dtype) == "datetime64[us, UTC]"
    else:  # SQLite DATETIME holds naive times
        assert got["timestamp"].dt.tz is None
        assert pd.api.types.is_datetime64_any_dtype(got["timestamp"].dtype)
    assert got["series_id"].dtype == object or pd.api.types.is_string_dtype(got["series_id"].dtype)
    assert got["value"].dtype == np.float64


def test_parquet_pushdown_reads_only_the_requested_rows(tmp_path: Path, monkeypatch):
    spec = open_source(write_parquet_files(tmp_path, FLEET))
    seen = _count_scanned(monkeypatch, arrow._ArrowReader)
    ids, start, end = ["pump-03", "pump-08"], "2031-05-02T00:00", "2031-05-02T10:00"
    got = read_series(spec, ids, start=start, end=end)
    expected = oracle(FLEET, ids, _utc(start), _utc(end))
    assert_rows(got, expected)
    # Exact pushdown: the scanner handed over no row beyond the answer
    # (out of 1,152 stored).
    assert seen == [len(expected)] == [20]


def test_csv_filters_series_while_streaming_and_time_in_memory(tmp_path: Path, monkeypatch):
    spec = open_source(write_csv_file(tmp_path, FLEET))
    seen = _count_scanned(monkeypatch, arrow._ArrowReader)
    got = read_series(spec, ["pump-03"], start="2031-05-02T00:00", end="2031-05-02T10:00")
    assert len(got) == 10
    # Text timestamps cannot be compared in the scan: every row of the series.
    assert seen == [N_POINTS]


def test_sql_pushdown_uses_bound_parameters(sqlite_db: str):
    spec = open_source(sqlite_db, table="pump_readings")
    statements: list[tuple[str, object]] = []
    hostile = "pump-01'; DROP TABLE pump_readings; --"

    def record(conn, cursor, statement, parameters, context, executemany):
        statements.append((statement, parameters))

    # The listener sits on the Engine class: read_series makes its own engine.
    sa.event.listen(sa.Engine, "before_cursor_execute", record)
    try:
        got = read_series(spec, ["pump-04", hostile], start="2031-05-02", end="2031-05-03")
    finally:
        sa.event.remove(sa.Engine, "before_cursor_execute", record)
    assert_rows(got, oracle(FLEET, ["pump-04"], _utc("2031-05-02"), _utc("2031-05-03")))
    statement, params = statements[-1]
    assert "pump-04" not in statement and "DROP" not in statement and "2031" not in statement
    assert "pump-04" in params and hostile in params
    assert any(isinstance(p, str) and p.startswith("2031-05-02") for p in params)
    assert list_series(spec) == IDS  # the table is still there


def test_sql_query_source_with_column_mapping(sqlite_db: str):
    engine = sa.create_engine(sqlite_db)
    with engine.begin() as conn:
        conn.execute(
            sa.text("CREATE TABLE flow (station TEXT, read_at INTEGER, litres REAL, note TEXT)")
        )
        conn.execute(
            sa.text("INSERT INTO flow VALUES (:s, :t, :v, 'x')"),
            [{"s": f"st-{i % 3}", "t": 1000 + 60 * i, "v": float(i)} for i in range(30)],
        )
    engine.dispose()
    spec = open_source(
        sqlite_db,
        query="SELECT station, read_at, litres FROM flow WHERE note = 'x';",
        columns={"series_id": "station", "timestamp": "read_at", "value": "litres"},
    )
    assert spec.time_kind == "numeric"
    got = read_series(spec, ["st-1"], start=1200, end=1800)
    # Oracle: by hand from the rows inserted above (i % 3 == 1, 1200 <= t < 1800).
    expected_i = [i for i in range(30) if i % 3 == 1 and 1200 <= 1000 + 60 * i < 1800]
    assert got["timestamp"].tolist() == [1000 + 60 * i for i in expected_i]
    assert got["value"].tolist() == [float(i) for i in expected_i]


@pytest.mark.postgres
def test_postgres_table_matches_pandas(pg_table: tuple[str, str]):
    url, table = pg_table
    spec = open_source(url, table=table)
    assert spec.time_kind == "datetime"
    assert list_series(spec) == IDS
    for ids, start, end in [
        (["pump-01", "pump-05"], "2031-05-02T00:00", "2031-05-03T12:00"),
        (["pump-11"], pd.Timestamp("2031-05-02T06:00+02:00"), None),
        (None, None, "2031-05-01T10:00"),
    ]:
        got = read_series(spec, ids, start=start, end=end)
        assert_rows(got, oracle(FLEET, ids, _utc(start), _utc(end)))
        assert got["timestamp"].dt.tz is not None  # timestamptz stays aware


@pytest.mark.postgres
def test_postgres_query_and_batches(pg_table: tuple[str, str]):
    url, table = pg_table
    spec = open_source(
        url,
        query=f'SELECT series_id AS pump, "timestamp" AS at, value AS v FROM {table}',
        columns={"series_id": "pump", "timestamp": "at", "value": "v"},
    )
    batches = list(iter_batches(spec, IDS[:5], batch_size=2, start="2031-05-03"))
    assert [len(b) for b in batches] == [2, 2, 1]
    for batch in batches:
        for sid, frame in batch:
            expected = oracle(FLEET, [sid], _utc("2031-05-03"))
            assert_array_equal(
                as_utc(frame["timestamp"]).to_numpy(), expected["timestamp"].to_numpy()
            )
            assert_array_equal(frame["value"].to_numpy(), expected["value"].to_numpy())


# ---------------------------------------------------------------------------
# Windows and context
# ---------------------------------------------------------------------------


def test_read_windows_matches_per_series_filter(source):
    wins, oracle_windows = varied_windows()
    assert_rows(read_windows(source, wins), oracle(FLEET, windows=oracle_windows))


def test_one_condition_per_window_gives_the_same_rows(source, monkeypatch):
    wins, oracle_windows = varied_windows()
    monkeypatch.setattr(reading, "MAX_FILTER_GROUPS", 10**6)
    assert_rows(read_windows(source, wins), oracle(FLEET, windows=oracle_windows))


def test_context_reads_before_start(source):
    start = "2031-05-03T00:00"
    got = read_series(source, ["pump-02", "pump-10"], start=start, context="6h")
    assert_rows(got, oracle(FLEET, ["pump-02", "pump-10"], _utc(start) - pd.Timedelta("6h")))
    per_series = read_series(
        source, ["pump-02", "pump-10"], start=start, context={"pump-10": 3 * 3600}
    )
    expected = oracle(
        FLEET,
        windows={
            "pump-02": (_utc(start), None),
            "pump-10": (_utc(start) - pd.Timedelta("3h"), None),
        },
    )
    assert_rows(per_series, expected)


def test_after_watermark_reads_new_points_plus_context(source):
    watermark = T0 + pd.Timedelta(hours=60)
    win = SeriesWindow.after_watermark(
        "pump-05", watermark, context_points=24, step=pd.Timedelta("1h")
    )
    got = read_windows(source, [win])
    ts = as_utc(got["timestamp"])
    old = FLEET[(FLEET["series_id"] == "pump-05") & (FLEET["timestamp"] <= watermark)]
    new = FLEET[(FLEET["series_id"] == "pump-05") & (FLEET["timestamp"] > watermark)]
    assert (ts <= watermark).sum() == 24 <= len(old)
    assert (ts > watermark).sum() == len(new)
    assert ts.iloc[0] == watermark - pd.Timedelta(hours=23)
    none_before = SeriesWindow.after_watermark("pump-05", watermark, context_points=0, step=3600)
    assert none_before.start == watermark + pd.Timedelta(hours=1)
