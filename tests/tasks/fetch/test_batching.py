"""Reading a batch at a time (tasks/fetch/batching.py).

Reference: pandas as the oracle (see this package's ``__init__``).
"""

from __future__ import annotations

from pathlib import Path

import pytest
from numpy.testing import assert_array_equal

from changekind.tasks.fetch import (
    arrow,
    iter_batches,
    iter_window_batches,
    open_source,
    split_batches,
    sql,
)
from tests.tasks.fetch.sources import (
    FLEET,
    IDS,
    N_SERIES,
    _count_scanned,
    _utc,
    as_utc,
    oracle,
    varied_windows,
    write_parquet_files,
    write_parquet_hive,
)

# ---------------------------------------------------------------------------
# Batches
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["parquet-hive", "sqlite"])
def test_iter_batches_reads_one_batch_at_a_time(kind, tmp_path: Path, monkeypatch, request):
    if kind == "sqlite":
        spec = open_source(request.getfixturevalue("sqlite_db"), table="pump_readings")
        seen = _count_scanned(monkeypatch, sql._SqlReader)
    else:
        spec = open_source(write_parquet_hive(tmp_path, FLEET))
        seen = _count_scanned(monkeypatch, arrow._ArrowReader)
    batches = iter_batches(spec, None, batch_size=5, start="2031-05-02")
    assert seen == []  # nothing read before the first batch is asked for
    first = next(batches)
    assert len(seen) == 1
    rest = list(batches)
    per_batch = oracle(FLEET, start=_utc("2031-05-02")).groupby("series_id").size()
    # Each scan held exactly its own batch's rows, never more.
    assert seen == [int(per_batch[IDS[i : i + 5]].sum()) for i in range(0, N_SERIES, 5)]
    assert max(seen) < len(oracle(FLEET, start=_utc("2031-05-02")))
    got = [sid for batch in [first, *rest] for sid, _ in batch]
    assert got == IDS
    for sid, frame in first:
        assert list(frame.columns) == ["timestamp", "value"]
        expected = oracle(FLEET, [sid], _utc("2031-05-02"))
        assert_array_equal(as_utc(frame["timestamp"]).to_numpy(), expected["timestamp"].to_numpy())
        assert_array_equal(frame["value"].to_numpy(), expected["value"].to_numpy())


def test_iter_batches_keeps_series_without_rows(source):
    (batch,) = list(iter_batches(source, ["pump-01", "pump-99"], batch_size=10, start="2031-05-05"))
    assert [sid for sid, _ in batch] == ["pump-01", "pump-99"]
    assert len(batch[0][1]) == len(oracle(FLEET, ["pump-01"], _utc("2031-05-05")))
    assert batch[1][1].empty and list(batch[1][1].columns) == ["timestamp", "value"]


def test_iter_window_batches_groups_close_starts(tmp_path: Path, monkeypatch):
    spec = open_source(write_parquet_files(tmp_path, FLEET))
    wins, oracle_windows = varied_windows()
    order = [
        sid for batch in iter_window_batches(spec, wins[::-1], batch_size=4) for sid, _ in batch
    ]
    # Sorted by start, the open start (pump-01) first.
    assert order == IDS
    frames = dict(item for batch in iter_window_batches(spec, wins, batch_size=4) for item in batch)
    for sid, (lo, hi) in oracle_windows.items():
        expected = oracle(FLEET, windows={sid: (lo, hi)})
        assert_array_equal(
            as_utc(frames[sid]["timestamp"]).to_numpy(), expected["timestamp"].to_numpy()
        )


def test_split_batches():
    assert split_batches(list("abcdefg"), 3) == [["a", "b", "c"], ["d", "e", "f"], ["g"]]
    assert split_batches([], 3) == []
