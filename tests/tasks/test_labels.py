"""Series attributes read from Parquet, CSV and SQL sources.

Reference: the input frame itself; the expected labels are each series' last
row by time, worked out here with pandas (sort by time, keep the last), not
with the code under test.  The fleet is invented: three hosts, one of which
is upgraded from firmware 2.1 to 2.2 half-way through the day.
"""

from __future__ import annotations

import pandas as pd
import pytest
import sqlalchemy as sa

from changekind.tasks.errors import ConfigError
from changekind.tasks.fetch import open_source
from changekind.tasks.labels import check_label_names, read_labels, source_columns


def fleet() -> pd.DataFrame:
    times = pd.date_range("2031-02-03", periods=6, freq="4h")
    rows = []
    for host, rack in (("h1", "r1"), ("h2", "r1"), ("h3", "r2")):
        for i, t in enumerate(times):
            firmware = "2.2" if host == "h2" and i >= 3 else "2.1"
            region = None if host == "h3" else "north"
            rows.append((host, t, float(i), rack, firmware, region))
    frame = pd.DataFrame(
        rows, columns=["series_id", "timestamp", "value", "rack", "firmware", "region"]
    )
    return frame.sample(frac=1.0, random_state=7).reset_index(drop=True)  # rows out of order


def expected(frame: pd.DataFrame) -> dict[str, dict[str, str | None]]:
    last = frame.sort_values("timestamp").groupby("series_id").tail(1)
    return {
        r.series_id: {"firmware": r.firmware, "rack": r.rack, "region": r.region}
        for r in last.itertuples()
    }


@pytest.fixture(params=["parquet", "csv", "sql"])
def source(request, tmp_path):
    frame = fleet()
    if request.param == "parquet":
        path = tmp_path / "fleet.parquet"
        frame.to_parquet(path)
        return open_source(path), frame
    if request.param == "csv":
        path = tmp_path / "fleet.csv"
        out = frame.assign(timestamp=frame["timestamp"].dt.strftime("%Y-%m-%dT%H:%M:%S"))
        out.to_csv(path, index=False)
        return open_source(path), frame
    url = f"sqlite:///{tmp_path / 'src.db'}"
    engine = sa.create_engine(url)
    frame.to_sql("metrics", engine, index=False)
    engine.dispose()
    return open_source(url, table="metrics"), frame


def test_latest_value_per_series(source) -> None:
    spec, frame = source
    got = read_labels(spec, ["rack", "firmware", "region"])
    assert got.names == ("rack", "firmware", "region")
    assert got.as_mapping() == expected(frame)
    assert got.as_mapping()["h2"]["firmware"] == "2.2"  # the upgrade is seen
    assert got.frame["series_id"].tolist() == ["h1", "h2", "h3"]
    assert got.frame["observed_at"].str.startswith("2031-02-03T20:00:00").all()


def test_a_missing_label_column_is_named_with_those_that_exist(source) -> None:
    spec, _ = source
    with pytest.raises(ConfigError, match=r"no column 'host'.*columns are .*rack.*firmware"):
        read_labels(spec, ["rack", "host"])
    assert set(source_columns(spec)) >= {"rack", "firmware", "region"}


@pytest.mark.parametrize(
    ("names", "message"),
    [
        (["rack", "rack"], "given twice"),
        ([""], "is empty"),
        (["observed_at"], "reserved"),
    ],
)
def test_bad_label_names(names, message) -> None:
    with pytest.raises(ConfigError, match=message):
        check_label_names(names)


def test_the_value_column_is_not_a_label(tmp_path) -> None:
    path = tmp_path / "f.parquet"
    fleet().to_parquet(path)
    with pytest.raises(ConfigError, match="series, time or value column"):
        read_labels(open_source(path), ["value"])
