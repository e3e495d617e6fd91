"""Bad parts of a source: skipped and named, the rest read.

Reference: pandas as the oracle (see this package's ``__init__``).
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from changekind.tasks import fetch
from changekind.tasks.errors import SourceError
from changekind.tasks.fetch import (
    open_source,
    read_series,
)
from tests.tasks.fetch.sources import _parquet

# ---------------------------------------------------------------------------
# Bad parts of a source: skipped and named, the rest read (issue 12, finding 2)
# ---------------------------------------------------------------------------


def test_bad_parquet_files_of_a_dataset_are_skipped_and_named(tmp_path: Path):
    ts = pa.array([datetime(2031, 5, 1, h) for h in range(3)], pa.timestamp("us"))
    root = tmp_path / "d"
    root.mkdir()
    _parquet(root / "a.parquet", series_id=["a"] * 3, timestamp=ts, value=[1.0, 2.0, 3.0])
    _parquet(root / "b.parquet", series_id=["b"] * 3, timestamp=ts, level=[1.0] * 3)
    _parquet(root / "c.parquet", series_id=["c"] * 3, timestamp=ts, value=["x"] * 3)
    good = (root / "a.parquet").read_bytes()
    (root / "d.parquet").write_bytes(good[: len(good) // 2])  # truncated
    (root / "e.parquet").write_bytes(b"PAR1" + b"\0" * 64 + b"PAR1")  # garbage
    spec = open_source(root)
    excluded = dict(spec.excluded)
    assert sorted(Path(p).name for p in excluded) == [
        "b.parquet",
        "c.parquet",
        "d.parquet",
        "e.parquet",
    ]
    assert "no 'value'" in excluded[str(root / "b.parquet")]
    assert "type string, not numbers" in excluded[str(root / "c.parquet")]
    assert "not readable as Parquet" in excluded[str(root / "d.parquet")]
    survey = fetch.survey_source(spec)
    assert survey.series_ids == ["a"]
    assert len(survey.problems) == 4
    frame = read_series(spec, ["a"])
    assert frame["value"].tolist() == [1.0, 2.0, 3.0]
    # A source whose every file is bad is refused, with the reasons.
    (root / "a.parquet").unlink()
    with pytest.raises(SourceError, match="no file can be read"):
        open_source(root)


def test_bad_csv_rows_and_files_are_skipped_and_named(tmp_path: Path):
    root = tmp_path / "c"
    root.mkdir()
    (root / "a.csv").write_text(
        "series_id,timestamp,value\n"
        "a,2031-05-01T00:00,1\n"
        "a,2031-05-01T01:00,2,9\n"  # line 3: ragged
        "a,2031-05-01T02:00,n/a?\n"  # line 4: not a number
        ",2031-05-01T03:00,4\n"  # line 5: no series id
        "a,2031-05-01T04:00,\n"  # line 6: missing value (allowed)
        "b,2031-05-01T00:00,7\n"
    )
    (root / "empty.csv").write_text("")
    (root / "header.csv").write_text("series_id,timestamp,value\n   ,2031-05-01T00:00,3\n")
    spec = open_source(root)
    assert [Path(p).name for p, _ in spec.excluded] == ["empty.csv"]
    survey = fetch.survey_source(spec)
    assert survey.series_ids == ["a", "b"]
    described = sorted(p.describe() for p in survey.problems)
    assert any("empty.csv" in d and "not readable as CSV" in d for d in described)
    ragged = [p for p in survey.problems if "wrong number of cells" in p.problem]
    assert [(Path(p.location).name, p.row) for p in ragged] == [("a.csv", 3)]
    blank = sorted(
        (Path(p.location).name, p.row)
        for p in survey.problems
        if "without a series id" in p.problem
    )
    assert blank == [("a.csv", 5), ("header.csv", 2)]
    problems: list = []
    frame = fetch.read_windows(
        spec, [fetch.SeriesWindow("a"), fetch.SeriesWindow("b")], problems=problems
    )
    a = frame[frame.series_id == "a"]["value"].tolist()
    assert a[0] == 1.0 and np.isnan(a[1]) and np.isnan(a[2]) and len(a) == 3
    assert frame[frame.series_id == "b"]["value"].tolist() == [7.0]
    assert [(p.series_id, "'n/a?'" in p.problem) for p in problems] == [("a", True)]
    with pytest.raises(SourceError, match=r"value 'n/a\?' at .* is not a number"):
        fetch.read_windows(spec, [fetch.SeriesWindow("a")])
