"""``changekind detect``: input layouts, the JSON contract, bad series, bad usage.

References
----------
- The test series are simulated AR(1) processes with a known injected level
  shift; the true shift is the reference for the effect, and statsmodels'
  ARIMA with the true step regressor at the true time is the oracle for its
  standard error ("oracle spread" as in the project's method notes).
- Exit codes 0 / 1 / 2 are the project's own contract (README, "Usage").
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from statsmodels.tsa.arima.model import ARIMA
from typer.testing import CliRunner

from changekind.flows.cli import app
from changekind.flows.cli.detect import analyse_inputs
from changekind.tasks.fetch import open_source, read_series
from changekind.tasks.fetch.inputs import SeriesInput, read_series_file
from changekind.tasks.simulate import arma_filter, injected, innovations
from changekind.tasks.types import EVENT_TYPES
from tests.contract import RECORD_FIELDS
from tests.fresh import run_python

N, T_SHIFT, PHI, SHIFT = 300, 150, 0.5, 8.0  # shift of 8 innovation sds at t = 150
STAMP_FORMAT = "%Y-%m-%d %H:%M"  # deliberately not ISO's "T": must come back as given

runner = CliRunner()


def ar1_with_shift(seed: int, *, n: int = N, t_shift: int | None = T_SHIFT) -> np.ndarray:
    """AR(1), phi = 0.5, unit innovations, mean 20, plus SHIFT from t_shift on."""
    rng = np.random.default_rng(seed)
    y = 20.0 + arma_filter(innovations("gauss", n + 100, rng), ar=(PHI,))[100:]
    if t_shift is not None:
        y = y + injected(n, t_shift, "LS", SHIFT)
    return y


def stamps(n: int = N) -> list[str]:
    return list(pd.date_range("2030-01-07 00:00", periods=n, freq="5min").strftime(STAMP_FORMAT))


def long_frame(series: dict[str, np.ndarray]) -> pd.DataFrame:
    return pd.concat(
        [
            pd.DataFrame({"series_id": sid, "timestamp": stamps(len(y)), "value": y})
            for sid, y in series.items()
        ],
        ignore_index=True,
    )


def run_json(path: Path, *args: str):
    result = runner.invoke(app, ["detect", str(path), "--json", *args])
    records = json.loads(result.stdout)  # stdout must be pure JSON
    return result, records


def oracle_step(y: np.ndarray) -> tuple[float, float]:
    """statsmodels AR(1) + mean + the true step regressor: (omega hat, its se)."""
    step = (np.arange(y.size) >= T_SHIFT).astype(float)
    fit = ARIMA(y, exog=step, order=(1, 0, 0), trend="c").fit(cov_type="oim")
    return float(fit.params[1]), float(fit.bse[1])


def the_shift(records: list[dict], series_id: str) -> dict:
    mine = [r for r in records if r["series_id"] == series_id]
    at = [r for r in mine if r["event_time"] == stamps()[T_SHIFT]]
    assert len(at) == 1, f"no single event at the shift time in {mine}"
    return at[0]


# --------------------------------------------------------------------------- events


def test_long_form_csv_finds_the_level_shift(tmp_path):
    y = ar1_with_shift(1)
    path = tmp_path / "fleet.csv"
    long_frame({"ctl-7/latency": y}).to_csv(path, index=False)
    result, records = run_json(path)
    assert result.exit_code == 0, result.stderr
    event = the_shift(records, "ctl-7/latency")
    assert event["event_type"] == "LS"
    # Effect within 3 standard errors of the true shift; the event's own se
    # agrees with the statsmodels oracle's (true regressor, true time) within
    # a factor of two.
    _, oracle_se = oracle_step(y)
    assert abs(event["effect"] - SHIFT) < 3 * event["se"]
    assert oracle_se / 2 < event["se"] < oracle_se * 2
    assert event["t_stat"] > 5
    assert event["type_weights"]["LS"] == max(event["type_weights"].values())


def test_json_records_follow_the_contract(tmp_path):
    path = tmp_path / "fleet.csv"
    long_frame({"a": ar1_with_shift(2), "b": ar1_with_shift(3)}).to_csv(path, index=False)
    result, records = run_json(path)
    assert result.exit_code == 0, result.stderr
    assert records, "the injected shifts should give events"
    given = set(stamps())
    for r in records:
        assert set(r) == set(RECORD_FIELDS)
        assert r["series_id"] in {"a", "b"}
        assert r["event_time"] in given  # the input's own text
        assert r["event_type"] in EVENT_TYPES
        assert r["status"] in {"provisional", "confirmed"}
        assert isinstance(r["effect"], float) and isinstance(r["t_stat"], float)
        assert r["effect_pct"] is None or isinstance(r["effect_pct"], float)
        assert set(r["type_weights"]) <= set(EVENT_TYPES)
        assert sum(r["type_weights"].values()) == pytest.approx(1.0, abs=1e-6)
        if r["event_type"] == "TC":
            assert 0 < r["decay"] < 1
        else:
            assert r["decay"] is None
        assert isinstance(r["model"], str) and r["model"].startswith("ARIMA(")
    # Series in id order, then time.
    order = [(r["series_id"], stamps().index(r["event_time"])) for r in records]
    assert order == sorted(order)


def test_two_column_csv_is_named_after_its_stem(tmp_path):
    y = ar1_with_shift(4)
    path = tmp_path / "write-latency.csv"
    pd.DataFrame({"timestamp": stamps(), "value": y}).to_csv(path, index=False)
    result, records = run_json(path)
    assert result.exit_code == 0, result.stderr
    assert {r["series_id"] for r in records} == {"write-latency"}
    assert the_shift(records, "write-latency")["event_type"] == "LS"


def test_parquet_gives_the_same_events_as_csv(tmp_path):
    frame = long_frame({"p": ar1_with_shift(5), "q": ar1_with_shift(6)})
    csv, parquet = tmp_path / "f.csv", tmp_path / "f.parquet"
    frame.to_csv(csv, index=False)
    typed = frame.assign(timestamp=pd.to_datetime(frame["timestamp"]).dt.tz_localize("UTC"))
    typed.to_parquet(parquet, index=False)
    _, from_csv = run_json(csv)
    result, from_parquet = run_json(parquet)
    assert result.exit_code == 0, result.stderr
    assert len(from_csv) == len(from_parquet) > 0
    for a, b in zip(from_csv, from_parquet, strict=True):
        assert (a["series_id"], a["event_type"]) == (b["series_id"], b["event_type"])
        assert pd.Timestamp(a["event_time"]).tz_localize("UTC") == pd.Timestamp(b["event_time"])
        assert a["effect"] == pytest.approx(b["effect"], rel=1e-9)


def test_parallel_run_keeps_input_order_and_matches_in_process(tmp_path):
    names = ["zeta", "alpha", "mid", "beta"]
    path = tmp_path / "four.csv"
    long_frame({name: ar1_with_shift(10 + i) for i, name in enumerate(names)}).to_csv(
        path, index=False
    )
    items = read_series_file(path)
    assert [i.series_id for i in items] == sorted(names)  # the fleet reader's id order
    items = [next(i for i in items if i.series_id == name) for name in names]
    parallel = analyse_inputs(items, max_workers=2)
    serial = analyse_inputs(items, max_workers=1)
    assert [o.series_id for o in parallel] == names
    for a, b in zip(parallel, serial, strict=True):
        assert a.ok and b.ok
        assert [e.to_record() for e in a.result.events] == [e.to_record() for e in b.result.events]
    _, records = run_json(path)
    seen = list(dict.fromkeys(r["series_id"] for r in records))
    assert seen == sorted(names)
    for name in names:
        assert the_shift(records, name)["event_type"] == "LS"


def test_human_output_has_a_table_and_the_model(tmp_path):
    path = tmp_path / "one.csv"
    long_frame({"array-2/ctl-a": ar1_with_shift(7)}).to_csv(path, index=False)
    result = runner.invoke(app, ["detect", str(path)])
    assert result.exit_code == 0, result.stderr
    out = result.stdout
    assert "array-2/ctl-a" in out
    assert stamps()[T_SHIFT] in out
    assert "model: ARIMA(" in out
    for header in ("time", "type", "effect", "type weights", "status", "half-life"):
        assert header in out
    assert "LS " in out  # a type weight such as "LS 0.97"


def test_season_and_critical_reach_the_engine(tmp_path):
    path = tmp_path / "one.csv"
    long_frame({"s": ar1_with_shift(8)}).to_csv(path, index=False)
    _, strict = run_json(path, "--critical", "50")
    assert strict == []  # no |t| reaches 50
    result, seasonal = run_json(path, "--season", "12")
    assert result.exit_code == 0, result.stderr
    assert "season=12" in the_shift(seasonal, "s")["model"]


# --------------------------------------------------------------------------- bad series


def test_bad_series_are_named_on_stderr_and_the_good_one_still_printed(tmp_path):
    path = tmp_path / "mixed.csv"
    frame = long_frame(
        {
            "flat": np.full(100, 5.0),
            "good": ar1_with_shift(9),
            "short": np.arange(10, dtype=float),
        }
    )
    frame.to_csv(path, index=False)
    result, records = run_json(path)
    assert result.exit_code == 1
    assert the_shift(records, "good")["event_type"] == "LS"
    assert {r["series_id"] for r in records} == {"good"}
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 2
    assert "'flat'" in lines[0] and "constant" in lines[0]
    assert "'short'" in lines[1] and "at least" in lines[1]
    human = runner.invoke(app, ["detect", str(path)])
    assert human.exit_code == 1
    assert "good" in human.stdout and "'flat'" in human.stderr


def test_non_numeric_values_name_their_series(tmp_path):
    path = tmp_path / "junk.csv"
    frame = long_frame({"good": ar1_with_shift(12), "junk": ar1_with_shift(13)})
    frame["value"] = frame["value"].astype(object)
    frame.loc[frame.index[-5], "value"] = "n/a?"
    frame.to_csv(path, index=False)
    result, records = run_json(path)
    # The cell is skipped and named (series, time, text), as scan records it; exit 1.
    assert result.exit_code == 1
    assert "'junk'" in result.stderr and "'n/a?'" in result.stderr
    assert "not a number" in result.stderr
    assert the_shift(records, "good")["event_type"] == "LS"


# --------------------------------------------------------------------------- bad usage


def _one_clear_line(result) -> str:
    assert result.exit_code == 2
    assert "Traceback" not in result.stderr + result.stdout
    assert result.stdout == ""
    return result.stderr


def test_missing_file_is_one_clear_message(tmp_path):
    err = _one_clear_line(runner.invoke(app, ["detect", str(tmp_path / "nope.csv")]))
    assert "nope.csv" in err and "no such file" in err
    assert len(err.strip().splitlines()) == 1


@pytest.mark.parametrize(
    ("name", "content", "expected"),
    [
        ("cols.csv", "time,val\n2030-01-01,1\n", "wrong columns"),
        ("empty.csv", "", "empty"),
        ("header.csv", "series_id,timestamp,value\n", "no data rows"),
        ("noid.csv", "series_id,timestamp,value\n,2030-01-01,1\n", "without a series id"),
        ("data.txt", "timestamp,value\n", "unknown file type"),
        ("bad.parquet", "this is not parquet", "not readable as Parquet"),
    ],
)
def test_unreadable_inputs_exit_2(tmp_path, name, content, expected):
    path = tmp_path / name
    path.write_text(content)
    err = _one_clear_line(runner.invoke(app, ["detect", str(path)]))
    assert expected in err
    assert len(err.strip().splitlines()) == 1


@pytest.mark.parametrize(
    "args",
    [["--season", "1"], ["--season", "day"], ["--critical", "0"], ["--critical", "nan"]],
)
def test_bad_options_exit_2(tmp_path, args):
    path = tmp_path / "one.csv"
    long_frame({"s": ar1_with_shift(1)}).to_csv(path, index=False)
    result = runner.invoke(app, ["detect", str(path), *args])
    err = _one_clear_line(result)
    assert args[0] in err


# --------------------------------------------------------------------------- the process


def _console_script() -> list[str]:
    script = Path(sys.executable).with_name("changekind")
    return [str(script)] if script.exists() else [sys.executable, "-m", "changekind.flows.cli"]


@pytest.mark.integration  # a fresh interpreter
def test_console_script_exit_codes_and_streams(tmp_path):
    path = tmp_path / "mixed.csv"
    long_frame({"good": ar1_with_shift(14), "flat": np.full(60, 1.0)}).to_csv(path, index=False)
    done = subprocess.run(
        [*_console_script(), "detect", str(path), "--json"],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert done.returncode == 1
    assert the_shift(json.loads(done.stdout), "good")["event_type"] == "LS"
    assert done.stderr.count("\n") == 1 and "'flat'" in done.stderr
    missing = subprocess.run(
        [*_console_script(), "detect", str(tmp_path / "gone.parquet")],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert missing.returncode == 2 and "Traceback" not in missing.stderr


@pytest.mark.integration  # a fresh interpreter
def test_detect_does_not_import_prefect(tmp_path):
    path = tmp_path / "two.csv"
    long_frame({"a": ar1_with_shift(15), "b": ar1_with_shift(16)}).to_csv(path, index=False)
    code = (
        "import sys\n"
        "from typer.testing import CliRunner\n"
        "from changekind.flows.cli import app\n"
        f"r = CliRunner().invoke(app, ['detect', {str(path)!r}, '--json'])\n"
        "assert r.exit_code == 0, r.stderr\n"
        "print('prefect' in sys.modules)\n"
    )
    done = run_python(code)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "False"


def test_series_input_keeps_the_given_text(tmp_path):
    path = tmp_path / "t.csv"
    pd.DataFrame({"timestamp": stamps(30), "value": np.arange(30.0)}).to_csv(path, index=False)
    (item,) = read_series_file(path)
    assert isinstance(item, SeriesInput)
    assert item.series_id == "t"
    assert list(item.timestamps) == stamps(30)
    assert item.values.dtype == np.float64


# -- one reader for files, numeric times, merged duplicates (issue 12, finding 5) --------


def _shifted_series(n: int = 300, seed: int = 12) -> np.ndarray:
    """AR(1), phi 0.5, with a level shift of 8 at n // 2 (the injected truth)."""
    rng = np.random.default_rng(seed)
    return 20.0 + arma_filter(rng.normal(size=n), ar=(0.5,)) + injected(n, n // 2, "LS", 8.0)


@pytest.mark.parametrize(
    "times",
    [
        lambda n: [str(1_900_000_000 + 3600 * i) for i in range(n)],  # epoch seconds
        lambda n: [str(1_900_000_000_000 + 3_600_000 * i) for i in range(n)],  # milliseconds
        lambda n: [str(i) for i in range(n)],  # plain 0..N
    ],
    ids=["epoch-s", "epoch-ms", "plain"],
)
def test_numeric_timestamps_in_csv_are_accepted(tmp_path, times):
    """README: timestamps may be plain numbers; CSV refused them (Parquet took them)."""
    y = _shifted_series()
    stamps = times(len(y))
    path = tmp_path / "numeric.csv"
    pd.DataFrame({"timestamp": stamps, "value": y}).to_csv(path, index=False)
    result = runner.invoke(app, ["detect", str(path), "--json"])
    assert result.exit_code == 0, result.output
    events = json.loads(result.stdout)
    shifts = [e for e in events if e["event_type"] == "LS"]
    assert [e["event_time"] for e in shifts] == [stamps[len(y) // 2]]  # the injected shift


def test_detect_reads_what_scan_reads_parq_files_and_folders(tmp_path):
    y = _shifted_series()
    stamps = pd.date_range("2030-01-01", periods=len(y), freq="h")
    frame = pd.DataFrame({"series_id": "disk-1", "timestamp": stamps, "value": y})
    frame.to_parquet(tmp_path / "one.parq", index=False)
    folder = tmp_path / "fleet"
    folder.mkdir()
    frame.iloc[:150].to_parquet(folder / "a.parquet", index=False)
    frame.iloc[150:].to_parquet(folder / "b.parquet", index=False)
    by_file = runner.invoke(app, ["detect", str(tmp_path / "one.parq"), "--json"])
    by_folder = runner.invoke(app, ["detect", str(folder), "--json"])
    assert by_file.exit_code == 0 and by_folder.exit_code == 0, by_file.output + by_folder.output
    assert json.loads(by_file.stdout) == json.loads(by_folder.stdout)
    (shift,) = [e for e in json.loads(by_file.stdout) if e["event_type"] == "LS"]
    assert pd.Timestamp(shift["event_time"]) == stamps[len(y) // 2]


def test_merged_duplicate_timestamps_are_reported(tmp_path):
    y = _shifted_series()
    stamps = pd.date_range("2030-01-01", periods=len(y), freq="h").strftime("%Y-%m-%dT%H:%M")
    frame = pd.DataFrame({"timestamp": stamps, "value": y})
    doubled = pd.concat([frame, frame.iloc[[10, 20, 20]]]).sort_index(kind="stable")
    path = tmp_path / "dups.csv"
    doubled.to_csv(path, index=False)
    human = runner.invoke(app, ["detect", str(path)])
    assert human.exit_code == 0, human.output
    assert "3 duplicate timestamp(s)" in human.stdout  # rows 10 once and 20 twice again
    as_json = runner.invoke(app, ["detect", str(path), "--json"])
    assert "3 duplicate timestamp(s)" in as_json.stderr
    json.loads(as_json.stdout)  # stdout stays pure JSON


def test_detect_and_scan_accept_the_same_gzip_csv_files_and_folders(tmp_path):
    # One suffix rule for every command (tasks/fetch/files.py): .csv.gz files,
    # and folders of them, are read by detect and by the fleet reader alike.
    y = _shifted_series()
    stamps = pd.date_range("2030-01-01", periods=len(y), freq="h").strftime("%Y-%m-%dT%H:%M")
    frame = pd.DataFrame({"series_id": "disk-1", "timestamp": stamps, "value": y})
    frame.to_csv(tmp_path / "one.csv.gz", index=False)
    folder = tmp_path / "fleet"
    folder.mkdir()
    frame.iloc[:150].to_csv(folder / "a.csv.gz", index=False)
    frame.iloc[150:].to_csv(folder / "b.csv.gz", index=False)
    for path in (tmp_path / "one.csv.gz", folder):
        spec = open_source(path)
        assert spec.kind == "csv"
        read = read_series(spec, ["disk-1"])
        assert read["timestamp"].tolist() == stamps.tolist()
        np.testing.assert_array_equal(read["value"].to_numpy(), y)
    by_file = runner.invoke(app, ["detect", str(tmp_path / "one.csv.gz"), "--json"])
    by_folder = runner.invoke(app, ["detect", str(folder), "--json"])
    assert by_file.exit_code == 0 and by_folder.exit_code == 0, by_file.output + by_folder.output
    assert json.loads(by_file.stdout) == json.loads(by_folder.stdout)
    (shift,) = [e for e in json.loads(by_file.stdout) if e["event_type"] == "LS"]
    assert shift["event_time"] == stamps[len(y) // 2]


def test_human_output_fits_80_columns_and_cuts_no_cell(tmp_path):
    """At 80 columns every line fits; times, effects and t statistics show whole
    (the --json records of the same run are the reference for the cells)."""
    sid = "eu-central-1/storage-array-2/controller-a/write-latency-ms"
    path = tmp_path / "one.csv"
    long_frame({sid: ar1_with_shift(7)}).to_csv(path, index=False)
    result = runner.invoke(app, ["detect", str(path)], env={"COLUMNS": "80"})
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.splitlines()
    assert max(len(line) for line in lines) <= 80, result.stdout
    _, records = run_json(path)
    assert records
    for rec in records:
        row = next(line for line in lines if rec["event_time"] in line)  # the time whole
        assert f"{rec['effect']:+.4g}" in row
        assert f"{rec['t_stat']:+.2f}" in row
    assert "…" not in result.stdout.replace(sid, "")  # nothing but the long id shortened


def test_false_budget_sets_the_critical_value_from_the_spacing(tmp_path):
    # Two days of minute points, AR(1), one spike of 5 innovation sds (|t|
    # about 4.8).  By the length (2,880 points, 4 types tested, 0.2 false
    # events an analysis) the line is about 4.30 and the spike is an event;
    # a budget of 0.05 false events per 30 days at minute spacing puts it at
    # about 5.13 and the spike is not.  Reference for both lines: scipy's
    # normal quantile of the Bonferroni allowance (Gaussian residuals here).
    from scipy.stats import norm

    rng = np.random.default_rng(11)
    n = 2880
    values = 20 + arma_filter(rng.normal(size=n), ar=(0.5,)) + injected(n, 2000, "AO", 5.0)
    stamps = pd.date_range("2026-03-01", periods=n, freq="min")
    path = tmp_path / "minute.csv"
    pd.DataFrame({"timestamp": stamps.strftime("%Y-%m-%dT%H:%M:%S"), "value": values}).to_csv(
        path, index=False
    )
    by_length = norm.isf(0.2 / (2 * 4 * n))
    by_budget = norm.isf(0.05 / (2 * 4 * 30 * 1440))
    assert 4.2 < by_length < 4.4 and 5.0 < by_budget < 5.3
    result, default = run_json(path)
    assert result.exit_code == 0, result.stderr
    assert [(r["event_type"], r["event_time"]) for r in default] == [("AO", "2026-03-02T09:20:00")]
    assert by_length < abs(default[0]["t_stat"]) < by_budget
    result, strict = run_json(path, "--false-budget", "0.05")
    assert result.exit_code == 0, result.stderr
    assert strict == []
    refused = runner.invoke(app, ["detect", str(path), "--false-budget", "0"])
    assert refused.exit_code == 2 and "--false-budget" in refused.stderr
