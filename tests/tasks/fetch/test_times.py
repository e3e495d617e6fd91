"""Timestamp types and zones as the readers hand them on (tasks/fetch/times.py).

Reference: pandas as the oracle (see this package's ``__init__``).
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlalchemy as sa
from numpy.testing import assert_array_equal

from changekind.tasks.errors import ConfigError
from changekind.tasks.fetch import (
    ColumnMap,
    arrow,
    list_series,
    open_source,
    read_series,
    sql,
)
from tests.tasks.fetch.sources import (
    FLEET,
    _count_scanned,
    _utc,
    assert_rows,
    oracle,
    write_parquet_hive,
)

# ---------------------------------------------------------------------------
# Timestamp types and zones
# ---------------------------------------------------------------------------


def test_numeric_and_epoch_timestamps(tmp_path: Path):
    epoch = pd.Timestamp("2031-05-01", tz="UTC").value // 10**9
    frame = pd.DataFrame(
        {
            "series_id": ["a"] * 6 + ["b"] * 6,
            "timestamp": [epoch + 3600 * k for k in range(6)] * 2,
            "value": np.arange(12, dtype=float),
        }
    )
    path = tmp_path / "epoch.csv"
    frame.to_csv(path, index=False)
    plain = open_source(path)
    assert plain.time_kind == "numeric"
    got = read_series(plain, ["b"], start=epoch + 3600, end=epoch + 4 * 3600)
    assert got["timestamp"].tolist() == [epoch + 3600 * k for k in (1, 2, 3)]
    with pytest.raises(ConfigError, match="timestamps are numbers"):
        read_series(plain, ["b"], start="2031-05-01")

    as_time = open_source(path, timestamp_unit="s")
    got = read_series(as_time, ["b"], start="2031-05-01T01:00", end="2031-05-01T04:00")
    # Oracle: pandas' own epoch conversion.
    expected = pd.to_datetime([epoch + 3600 * k for k in (1, 2, 3)], unit="s", utc=True)
    assert_array_equal(got["timestamp"].to_numpy(), expected.to_numpy())
    assert got["value"].tolist() == [7.0, 8.0, 9.0]

    # The same numbers stored as integers in Parquet are pushed down exactly.
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), tmp_path / "epoch.parquet")
    spec = open_source(tmp_path / "epoch.parquet", timestamp_unit="s")
    again = read_series(spec, ["b"], start="2031-05-01T00:30", end="2031-05-01T04:00")
    assert_array_equal(again["timestamp"].to_numpy(), expected.to_numpy())


def test_text_timestamps_with_offsets_are_kept_and_ordered(tmp_path: Path):
    path = tmp_path / "offsets.csv"
    path.write_text(
        "series_id,timestamp,value\n"
        "m,2031-05-01T03:00:00+02:00,3\n"
        "m,2031-05-01T00:00:00Z,1\n"
        "m,2031-05-01T02:30:00+01:00,2\n"
        "m,2031-05-01T04:00:00+03:00,4\n"
    )
    spec = open_source(path)
    got = read_series(spec, ["m"], start="2031-05-01T01:00Z")
    # 03:00+02:00 = 01:00Z, 02:30+01:00 = 01:30Z, 04:00+03:00 = 01:00Z (by hand).
    assert got["timestamp"].tolist() == [
        "2031-05-01T03:00:00+02:00",
        "2031-05-01T04:00:00+03:00",
        "2031-05-01T02:30:00+01:00",
    ]
    assert got["value"].tolist() == [3.0, 4.0, 2.0]


def test_naive_times_are_read_in_the_given_zone(tmp_path: Path):
    naive = FLEET[FLEET["series_id"] == "pump-01"].assign(
        timestamp=lambda f: f["timestamp"].dt.tz_localize(None)
    )
    path = tmp_path / "naive.parquet"
    pq.write_table(pa.Table.from_pandas(naive, preserve_index=False), path)
    start = pd.Timestamp("2031-05-02T00:00+02:00")
    utc_spec = open_source(path)
    got = read_series(utc_spec, ["pump-01"], start=start)
    assert got["timestamp"].iloc[0] == pd.Timestamp("2031-05-01T22:00")
    assert got["timestamp"].dt.tz is None  # handed on as stored
    paris = open_source(path, timezone="Europe/Paris")  # UTC+2 in May
    got = read_series(paris, ["pump-01"], start=start)
    # The declared zone is applied to the stamps once: they are handed on aware, so
    # downstream (where a naive time is UTC) they keep the instant of their row.
    assert got["timestamp"].iloc[0] == pd.Timestamp("2031-05-02T00:00", tz="Europe/Paris")
    assert str(got["timestamp"].dt.tz) == "Europe/Paris"


def test_date_columns_in_parquet_and_sql(tmp_path: Path, monkeypatch):
    days = pd.date_range("2031-05-01", periods=20, freq="D")
    frame = pd.DataFrame(
        {"series_id": "reservoir", "timestamp": days.date, "value": np.arange(20.0)}
    )
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), tmp_path / "daily.parquet")
    url = f"sqlite:///{tmp_path / 'daily.db'}"
    engine = sa.create_engine(url)
    meta = sa.MetaData()
    table = sa.Table(
        "daily",
        meta,
        sa.Column("series_id", sa.String),
        sa.Column("timestamp", sa.Date),
        sa.Column("value", sa.Float),
    )
    meta.create_all(engine)
    with engine.begin() as conn:
        conn.execute(table.insert(), frame.to_dict("records"))
    engine.dispose()
    # Oracle: pandas on the same days; a mid-day start excludes its own day.
    start, end = pd.Timestamp("2031-05-03T12:00"), pd.Timestamp("2031-05-09")
    keep = (days >= start) & (days < end)
    for spec, reader in [
        (open_source(tmp_path / "daily.parquet"), arrow._ArrowReader),
        (open_source(url, table="daily"), sql._SqlReader),
    ]:
        assert spec.time_kind == "datetime"
        seen = _count_scanned(monkeypatch, reader)
        got = read_series(spec, ["reservoir"], start=start, end=end)
        assert_array_equal(
            got["timestamp"].to_numpy(), days[keep].to_numpy().astype(got["timestamp"].dtype)
        )
        assert got["value"].tolist() == frame["value"][keep].tolist()
        assert seen == [int(keep.sum())]  # the day-level pushdown is exact
        monkeypatch.undo()


def test_spec_survives_pickling(tmp_path: Path, sqlite_db: str):
    import pickle

    for spec in [
        open_source(write_parquet_hive(tmp_path, FLEET)),
        open_source(sqlite_db, table="pump_readings"),
    ]:
        again = pickle.loads(pickle.dumps(spec))
        assert again == spec
        assert_rows(read_series(again, ["pump-03"]), oracle(FLEET, ["pump-03"]))


def test_rows_without_id_or_time_are_skipped(tmp_path: Path):
    table = pa.table(
        {
            "series_id": ["a", "a", None, "a"],
            "timestamp": pa.array(
                [datetime(2031, 5, 1, h) if h is not None else None for h in (0, None, 2, 3)],
                pa.timestamp("us"),
            ),
            "value": [1.0, 2.0, 3.0, None],
        }
    )
    pq.write_table(table, tmp_path / "holes.parquet")
    got = read_series(open_source(tmp_path / "holes.parquet"), None)
    assert got["timestamp"].tolist() == [
        pd.Timestamp("2031-05-01T00:00"),
        pd.Timestamp("2031-05-01T03:00"),
    ]
    assert got["value"].iloc[0] == 1.0 and np.isnan(got["value"].iloc[1])


def test_numeric_looking_ids_stay_text_in_hive_partitions(tmp_path: Path):
    frame = FLEET.assign(series_id=FLEET["series_id"].str.replace("pump-", "0", regex=False))
    spec = open_source(write_parquet_hive(tmp_path, frame))
    assert list_series(spec)[:2] == ["001", "002"]
    assert_rows(read_series(spec, ["007"]), oracle(frame, ["007"]))


def test_integer_id_column(tmp_path: Path):
    frame = FLEET.assign(series_id=FLEET["series_id"].str[-2:].astype(int))
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), tmp_path / "int.parquet")
    spec = open_source(tmp_path / "int.parquet")
    assert list_series(spec) == sorted(str(i) for i in range(1, 13))
    got = read_series(spec, ["7", "not-a-number"], start="2031-05-03")
    expected = oracle(
        frame.assign(series_id=frame["series_id"].astype(str)), ["7"], _utc("2031-05-03")
    )
    assert_rows(got, expected)


def test_column_mapping_on_parquet(tmp_path: Path):
    renamed = FLEET.rename(columns={"series_id": "pump", "timestamp": "read_at", "value": "bar"})
    renamed["site"] = "north"
    pq.write_table(pa.Table.from_pandas(renamed, preserve_index=False), tmp_path / "r.parquet")
    spec = open_source(
        tmp_path / "r.parquet",
        columns=ColumnMap(series_id="pump", timestamp="read_at", value="bar"),
    )
    assert_rows(
        read_series(spec, ["pump-06"], end="2031-05-02"),
        oracle(FLEET, ["pump-06"], None, _utc("2031-05-02")),
    )
