"""The invented fleet of the fetch tests, its sources in every format, and the oracle."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
import sqlalchemy as sa
from numpy.testing import assert_array_equal

from changekind.tasks.fetch import (
    SeriesWindow,
    SourceSpec,
    open_source,
)

N_SERIES = 12
N_POINTS = 96
T0 = pd.Timestamp("2031-05-01T00:00:00", tz="UTC")


# ---------------------------------------------------------------------------
# The fleet and its sources
# ---------------------------------------------------------------------------


def make_fleet() -> pd.DataFrame:
    """12 pumps, 96 hourly points each, series i starting i hours after T0.

    Values are a per-series level plus noise, with a few missing values.
    Rows are shuffled so that every reader has to sort.
    """
    rng = np.random.default_rng(20310501)
    parts = []
    for i in range(N_SERIES):
        stamps = pd.date_range(T0 + pd.Timedelta(hours=i), periods=N_POINTS, freq="h")
        values = 40.0 + 3.0 * i + rng.normal(0.0, 1.5, N_POINTS)
        values[rng.integers(0, N_POINTS, 3)] = np.nan
        parts.append(
            pd.DataFrame({"series_id": f"pump-{i + 1:02d}", "timestamp": stamps, "value": values})
        )
    fleet = pd.concat(parts, ignore_index=True)
    fleet["timestamp"] = fleet["timestamp"].dt.as_unit("us")
    return fleet.sample(frac=1.0, random_state=7).reset_index(drop=True)


FLEET = make_fleet()
IDS = sorted(FLEET["series_id"].unique())


def oracle(
    fleet: pd.DataFrame, ids=None, start=None, end=None, *, windows: dict | None = None
) -> pd.DataFrame:
    """Rows of ``fleet`` selected by pandas masks, sorted by series id and time."""
    ts = fleet["timestamp"]
    if windows is not None:
        keep = np.zeros(len(fleet), dtype=bool)
        for sid, (lo, hi) in windows.items():
            m = fleet["series_id"].eq(sid).to_numpy().copy()
            if lo is not None:
                m &= (ts >= pd.Timestamp(lo)).to_numpy()
            if hi is not None:
                m &= (ts < pd.Timestamp(hi)).to_numpy()
            keep |= m
    else:
        keep = np.ones(len(fleet), dtype=bool)
        if ids is not None:
            keep &= fleet["series_id"].isin(ids).to_numpy()
        if start is not None:
            keep &= (ts >= pd.Timestamp(start)).to_numpy()
        if end is not None:
            keep &= (ts < pd.Timestamp(end)).to_numpy()
    out = fleet[keep].sort_values(["series_id", "timestamp"], kind="mergesort")
    return out.reset_index(drop=True)


def as_utc(column: pd.Series) -> pd.Series:
    """A read timestamp column as UTC date/times (naive ones are UTC here)."""
    if pd.api.types.is_datetime64_any_dtype(column.dtype):
        parsed = column
    else:
        parsed = pd.to_datetime(column, format="ISO8601")
    if parsed.dt.tz is None:
        parsed = parsed.dt.tz_localize("UTC")
    return parsed.dt.tz_convert("UTC").dt.as_unit("us")


def assert_rows(got: pd.DataFrame, expected: pd.DataFrame) -> None:
    assert list(got.columns) == ["series_id", "timestamp", "value"]
    assert len(got) == len(expected)
    assert_array_equal(
        got["series_id"].to_numpy(dtype=object), expected["series_id"].to_numpy(dtype=object)
    )
    assert_array_equal(
        as_utc(got["timestamp"]).to_numpy(), as_utc(expected["timestamp"]).to_numpy()
    )
    # NaN compares equal here; values must survive each format exactly.
    assert_array_equal(got["value"].to_numpy(), expected["value"].to_numpy())


def thirds(frame: pd.DataFrame) -> list[pd.DataFrame]:
    cut = len(frame) // 3
    return [frame.iloc[:cut], frame.iloc[cut : 2 * cut], frame.iloc[2 * cut :]]


def write_parquet_hive(root: Path, fleet: pd.DataFrame) -> Path:
    path = root / "hive"
    ds.write_dataset(
        pa.Table.from_pandas(fleet, preserve_index=False),
        path,
        format="parquet",
        partitioning=["series_id"],
        partitioning_flavor="hive",
    )
    return path


def write_parquet_files(root: Path, fleet: pd.DataFrame) -> Path:
    path = root / "files"
    path.mkdir()
    for k, chunk in enumerate(thirds(fleet)):
        pq.write_table(
            pa.Table.from_pandas(chunk, preserve_index=False),
            path / f"part-{k}.parquet",
            row_group_size=100,
        )
    (path / "_SUCCESS").write_text("")  # writer marker files are skipped
    return path


def text_times(fleet: pd.DataFrame) -> pd.DataFrame:
    return fleet.assign(timestamp=fleet["timestamp"].dt.strftime("%Y-%m-%dT%H:%M:%SZ"))


def write_csv_file(root: Path, fleet: pd.DataFrame) -> Path:
    path = root / "fleet.csv"
    text_times(fleet).to_csv(path, index=False)
    return path


def write_csv_dir(root: Path, fleet: pd.DataFrame) -> Path:
    path = root / "csvs"
    path.mkdir()
    orders = [["series_id", "timestamp", "value"], ["value", "series_id", "timestamp"]]
    for k, chunk in enumerate(thirds(text_times(fleet))):
        chunk[orders[k % 2]].to_csv(path / f"day-{k}.csv", index=False)
    return path


def create_table(engine: sa.Engine, name: str, fleet: pd.DataFrame, *, aware: bool) -> None:
    meta = sa.MetaData()
    table = sa.Table(
        name,
        meta,
        sa.Column("series_id", sa.String(40), nullable=False),
        sa.Column("timestamp", sa.DateTime(timezone=aware), nullable=False),
        sa.Column("value", sa.Float),
    )
    meta.create_all(engine)
    stamps = fleet["timestamp"] if aware else fleet["timestamp"].dt.tz_localize(None)
    rows = [
        {"series_id": s, "timestamp": t.to_pydatetime(), "value": None if np.isnan(v) else v}
        for s, t, v in zip(fleet["series_id"], stamps, fleet["value"], strict=True)
    ]
    with engine.begin() as conn:
        conn.execute(table.insert(), rows)


@pytest.fixture
def sqlite_db(sqlite_url: str) -> str:
    """The shared SQLite file (tests/conftest.py) holding the fleet, naive UTC times."""
    engine = sa.create_engine(sqlite_url)
    create_table(engine, "pump_readings", FLEET, aware=False)
    engine.dispose()
    return sqlite_url


@pytest.fixture
def pg_table(pg_url: str) -> tuple[str, str]:
    """(URL, table): the fleet in a fresh PostgreSQL schema from tests/conftest.py.

    The schema (and the table with it) is dropped by that fixture afterwards.
    """
    engine = sa.create_engine(pg_url, poolclass=sa.pool.NullPool)
    create_table(engine, "pump_readings", FLEET, aware=True)
    engine.dispose()
    return pg_url, "pump_readings"


SOURCES = ["parquet-hive", "parquet-files", "csv-file", "csv-dir", "sqlite"]


@pytest.fixture(params=SOURCES)
def source(request, tmp_path: Path) -> SourceSpec:
    kind = request.param
    if kind == "sqlite":
        return open_source(request.getfixturevalue("sqlite_db"), table="pump_readings")
    writer = {
        "parquet-hive": write_parquet_hive,
        "parquet-files": write_parquet_files,
        "csv-file": write_csv_file,
        "csv-dir": write_csv_dir,
    }[kind]
    return open_source(writer(tmp_path, FLEET))


def _parquet(path: Path, **columns) -> Path:
    pq.write_table(pa.table(columns), path)
    return path


def _utc(value):
    if value is None:
        return None
    stamp = pd.Timestamp(value)
    return stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")


def varied_windows() -> tuple[list[SeriesWindow], dict]:
    wins, oracle_windows = [], {}
    for i, sid in enumerate(IDS):
        lo = None if i == 0 else T0 + pd.Timedelta(hours=30 + 5 * i)
        hi = None if i % 4 == 3 else T0 + pd.Timedelta(hours=70 + i)
        wins.append(SeriesWindow(sid, lo, hi))
        oracle_windows[sid] = (lo, hi)
    return wins, oracle_windows


def _count_scanned(monkeypatch, reader_class) -> list[int]:
    """Record how many rows each storage scan hands over."""
    seen: list[int] = []
    original = reader_class.scan

    def counting(self, groups, axis):
        frame = original(self, groups, axis)
        seen.append(len(frame))
        return frame

    monkeypatch.setattr(reader_class, "scan", counting)
    return seen
