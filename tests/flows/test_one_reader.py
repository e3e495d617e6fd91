"""One reader for files: ``detect`` and the fleet commands read the same inputs the same way.

References
----------
- The injected truth: the series written to each file (values and times) is
  what both readers must hand on, and the level shift injected into it is the
  event a scan of a one-series file must find (AR(1), phi 0.5, shift of 8
  innovation sds at the middle; simulated by changekind.tasks.simulate with a
  seeded generator).
- pandas' own writers (``to_csv``, ``to_parquet``) make the files: CSV,
  gzip-compressed CSV, Parquet under its three suffixes, a folder of files.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from changekind.flows.cli import app
from changekind.tasks import persist
from changekind.tasks.fetch import SeriesWindow, open_source, read_windows, survey_source
from changekind.tasks.fetch.inputs import read_series_file
from changekind.tasks.simulate import arma_filter, injected

runner = CliRunner()
N = 240
SHIFT_AT, SHIFT = N // 2, 8.0


def shifted(seed: int) -> np.ndarray:
    """AR(1) around 30 with a level shift of SHIFT from SHIFT_AT on (the injected truth)."""
    rng = np.random.default_rng(seed)
    y = 30.0 + arma_filter(rng.normal(size=N + 100), ar=(0.5,))[100:]
    return y + injected(N, SHIFT_AT, "LS", SHIFT)


STAMPS = pd.date_range("2031-02-02", periods=N, freq="h")
FLEET = {"unit-b/temp": shifted(1), "unit-a/temp": shifted(2)}


def long_frame() -> pd.DataFrame:
    return pd.concat(
        [pd.DataFrame({"series_id": s, "timestamp": STAMPS, "value": y}) for s, y in FLEET.items()],
        ignore_index=True,
    )


def write(kind: str, root) -> tuple[object, dict[str, np.ndarray]]:
    """One input of ``kind`` and the series it holds (the truth)."""
    frame = long_frame()
    if kind == "two-column.csv":
        path = root / "unit-a-temp.csv"
        frame[frame.series_id == "unit-a/temp"][["timestamp", "value"]].to_csv(path, index=False)
        return path, {"unit-a-temp": FLEET["unit-a/temp"]}
    if kind == "two-column.parquet":
        path = root / "unit-a-temp.parquet"
        frame[frame.series_id == "unit-a/temp"][["timestamp", "value"]].to_parquet(path)
        return path, {"unit-a-temp": FLEET["unit-a/temp"]}
    if kind == "folder":
        path = root / "fleet"
        path.mkdir()
        frame.iloc[: len(frame) // 3].to_parquet(path / "a.parquet", index=False)
        frame.iloc[len(frame) // 3 :].to_parquet(path / "b.parquet", index=False)
        return path, FLEET
    path = root / f"fleet.{kind}"
    if kind.startswith("csv"):
        frame.to_csv(path, index=False)
    else:
        frame.to_parquet(path, index=False)
    return path, FLEET


KINDS = ["csv", "csv.gz", "parquet", "parq", "pq", "folder", "two-column.csv", "two-column.parquet"]


@pytest.mark.parametrize("kind", KINDS)
def test_detect_and_scan_read_the_same_series(tmp_path, kind):
    path, truth = write(kind, tmp_path)
    # detect's INPUT reader
    items = read_series_file(path)
    # what a scan reads: its source, every series over an open window (tasks/batch.py)
    spec = open_source(path)
    survey = survey_source(spec)
    scanned = read_windows(spec, [SeriesWindow(s) for s in survey.series_ids])
    assert survey.problems == ()
    assert [i.series_id for i in items] == survey.series_ids == sorted(truth)
    for item in items:
        rows = scanned[scanned.series_id == item.series_id]
        np.testing.assert_array_equal(item.values, rows["value"].to_numpy())
        np.testing.assert_array_equal(item.values, truth[item.series_id])  # exact round trip
        assert list(item.timestamps) == list(rows["timestamp"])
        assert list(pd.to_datetime(item.timestamps)) == list(STAMPS)


def test_a_cell_that_is_not_a_number_is_skipped_and_named_by_both(tmp_path):
    path = tmp_path / "fleet.csv"
    frame = long_frame()
    frame["value"] = frame["value"].astype(object)
    bad_row = frame.index[(frame.series_id == "unit-b/temp")][10]
    frame.loc[bad_row, "value"] = "offline"
    frame.to_csv(path, index=False)
    problems: list = []
    items = read_series_file(path, problems=problems)
    spec = open_source(path)
    found: list = []
    read_windows(spec, [SeriesWindow(s) for s in FLEET], problems=found)
    assert problems == found
    (problem,) = problems
    assert problem.series_id == "unit-b/temp" and "'offline'" in problem.problem
    b = next(i for i in items if i.series_id == "unit-b/temp")
    assert np.isnan(b.values[10]) and np.isnan(b.values).sum() == 1
    result = runner.invoke(app, ["detect", str(path), "--json"])
    assert result.exit_code == 1  # some rows failed, the others done (README exit codes)
    assert "'offline'" in result.stderr and "'unit-b/temp'" in result.stderr
    assert {r["series_id"] for r in json.loads(result.stdout)} == set(FLEET)


def test_scan_takes_a_one_series_file_named_after_it(prefect_server, tmp_path):
    path, _ = write("two-column.csv", tmp_path)
    db = f"sqlite:///{tmp_path / 'one.db'}"
    result = runner.invoke(app, ["scan", "--source", str(path), "--db", db, "--json"])
    assert result.exit_code == 0, result.stderr
    events = persist.read_events(db)
    assert set(events["series_id"]) == {"unit-a-temp"}
    shifts = events[events.event_type == "LS"]
    assert list(pd.to_datetime(shifts["event_time"])) == [STAMPS[SHIFT_AT]]  # the injected shift
    detected = runner.invoke(app, ["detect", str(path), "--json"])
    assert detected.exit_code == 0, detected.stderr
    (ls,) = [r for r in json.loads(detected.stdout) if r["event_type"] == "LS"]
    assert ls["series_id"] == "unit-a-temp"
    assert pd.Timestamp(ls["event_time"]) == STAMPS[SHIFT_AT]
