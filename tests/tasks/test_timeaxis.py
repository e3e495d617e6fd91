"""The time axis: the naive-is-UTC rule, parsing, labels, offsets, windows, stored times.

References, named beside each check:

- Python's standard library (``datetime`` with ``zoneinfo``) for epoch seconds
  and for converting wall times of a zone to UTC: a second implementation of
  the tz database arithmetic, independent of pandas' parser.
- pandas as the reference parser of ISO 8601 text and for ``tz_convert`` /
  ``Timestamp.floor``: the module must agree with it wherever it uses its rule.
- The EU daylight-saving rule (clocks go forward at 01:00 UTC on the last
  Sunday of March, back at 01:00 UTC on the last Sunday of October; in 2030
  those are 31 March and 27 October), from memory, and checked against
  ``zoneinfo`` in ``test_the_dst_dates_used_here``.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

from changekind.tasks.errors import ConfigError, TimestampError
from changekind.tasks.timeaxis import (
    Stamps,
    TimeAxis,
    parse_instant,
    parse_step,
    parse_times,
    utc_datetime,
)

PARIS = ZoneInfo("Europe/Paris")
HOUR = 3600.0


def ns_of(moment: datetime) -> int:
    """Nanoseconds since the epoch by the standard library (the reference instant)."""
    return round(moment.timestamp()) * 1_000_000_000


def test_the_dst_dates_used_here():
    # Standard library: the offsets either side of the 2030 EU changes.
    assert datetime(2030, 3, 31, 0, 59, tzinfo=UTC).astimezone(PARIS).utcoffset() == timedelta(
        hours=1
    )
    assert datetime(2030, 3, 31, 1, 0, tzinfo=UTC).astimezone(PARIS).utcoffset() == timedelta(
        hours=2
    )
    assert datetime(2030, 10, 27, 1, 0, tzinfo=UTC).astimezone(PARIS).utcoffset() == timedelta(
        hours=1
    )


# ---------------------------------------------------------------------------
# The rule: a naive time is UTC
# ---------------------------------------------------------------------------

NAIVE_TEXT = ["2030-01-10T11:00:00", "2030-01-10T12:00:00", "2030-01-10T13:00:00"]
UTC_NS = [ns_of(datetime(2030, 1, 10, h, tzinfo=UTC)) for h in (11, 12, 13)]


@pytest.mark.parametrize(
    "stamps",
    [
        pytest.param(NAIVE_TEXT, id="naive-text"),
        pytest.param([t.replace("T", " ") for t in NAIVE_TEXT], id="naive-text-space"),
        pytest.param(pd.to_datetime(NAIVE_TEXT).to_numpy(), id="naive-datetime64"),
        pytest.param([datetime(2030, 1, 10, h) for h in (11, 12, 13)], id="naive-datetime"),
        pytest.param([t + "Z" for t in NAIVE_TEXT], id="utc-text-Z"),
        pytest.param([t + "+00:00" for t in NAIVE_TEXT], id="utc-text-offset"),
        pytest.param(
            [
                t + "+01:00"
                for t in ["2030-01-10T12:00:00", "2030-01-10T13:00:00", "2030-01-10T14:00:00"]
            ],
            id="paris-text",
        ),
        pytest.param(
            pd.date_range("2030-01-10 12:00", periods=3, freq="h", tz=PARIS), id="paris-typed"
        ),
    ],
)
def test_every_form_of_the_same_instants_parses_to_them(stamps):
    # Reference: the standard library's epoch seconds of 11:00, 12:00, 13:00 UTC.
    got = parse_times("s", stamps)
    assert got.axis.kind == "datetime"
    assert got.instants.tolist() == UTC_NS


def test_a_naive_label_is_utc_on_an_aware_axis():
    paris = TimeAxis("s", "datetime", "Europe/Paris")
    naive = paris.instant("2030-01-10T12:00:00")
    # Standard library: 12:00 UTC, not 12:00 in Paris (which is 11:00 UTC).
    assert naive.value == ns_of(datetime(2030, 1, 10, 12, tzinfo=UTC))
    assert naive.value != ns_of(datetime(2030, 1, 10, 12, tzinfo=PARIS))
    # ... and the same on a naive axis and a UTC axis: one rule, whatever the axis.
    for axis in (TimeAxis("s", "datetime"), TimeAxis("s", "datetime", "UTC")):
        assert axis.instant("2030-01-10T12:00:00") == naive


def test_comparisons_follow_the_rule_across_zones():
    paris = TimeAxis("s", "datetime", "Europe/Paris")
    # 12:30+01:00 is 11:30 UTC: before a naive (UTC) bound of 12:00, after one of 11:00.
    assert not paris.at_or_after("2030-01-10T12:30:00+01:00", "2030-01-10T12:00:00")
    assert paris.at_or_after("2030-01-10T12:30:00+01:00", "2030-01-10T11:00:00")
    assert paris.at_or_after("2030-01-10T12:00:00", "2030-01-10T13:00:00+01:00")  # equal
    assert not paris.after("2030-01-10T12:00:00", "2030-01-10T13:00:00+01:00")
    assert paris.after("2030-01-10T12:00:01", "2030-01-10T13:00:00+01:00")
    assert paris.after("2030-01-10T12:00:00", None)  # no watermark: everything is new
    numbers = TimeAxis("n", "numeric")
    assert numbers.at_or_after("10", 9.5) and not numbers.after(10, "10.0")


def test_stored_utc_datetimes_follow_the_rule():
    # Standard library astimezone as the reference.
    want = datetime(2030, 7, 1, 10, 0, tzinfo=PARIS).astimezone(UTC)
    assert utc_datetime("2030-07-01T10:00:00+02:00") == want
    assert utc_datetime(datetime(2030, 7, 1, 10, 0, tzinfo=PARIS)) == want
    assert utc_datetime("2030-07-01T10:00:00") == datetime(2030, 7, 1, 10, tzinfo=UTC)
    assert utc_datetime(pd.Timestamp("2030-07-01T10:00:00")).tzinfo is not None
    assert utc_datetime("17") is None and utc_datetime(2.5) is None  # numeric labels: no time


# ---------------------------------------------------------------------------
# Zones, daylight saving and labels
# ---------------------------------------------------------------------------

ACROSS_SPRING = pd.date_range("2030-03-30 23:00", periods=6, freq="h", tz=PARIS)


def test_a_zoned_series_across_the_spring_change():
    got = parse_times("dst", ACROSS_SPRING)
    assert got.axis.zone == "Europe/Paris"
    # Standard library: each wall time's UTC instant (one hour apart throughout).
    want = [ns_of(t.to_pydatetime()) for t in ACROSS_SPRING]
    assert got.instants.tolist() == want
    assert np.diff(got.instants).tolist() == [3_600_000_000_000] * 5
    # Labels are written in the zone, with the offset of their own date.
    labels = [got.label(i) for i in range(len(got))]
    assert labels[0] == "2030-03-30T23:00:00+01:00"
    assert labels[2] == "2030-03-31T01:00:00+01:00"
    assert labels[3] == "2030-03-31T03:00:00+02:00"  # 02:00 does not exist that day
    # pandas as the reference for the index in the zone.
    assert got.to_index().equals(ACROSS_SPRING.as_unit("ns"))


def test_text_with_two_offsets_is_one_axis_in_utc_and_keeps_its_text():
    text = [t.isoformat() for t in ACROSS_SPRING]  # +01:00, then +02:00
    got = parse_times("dst", text)
    assert got.axis.zone == "UTC"
    assert got.instants.tolist() == parse_times("dst", ACROSS_SPRING).instants.tolist()
    assert [got.label(i) for i in range(len(got))] == text  # the input's own text
    # pandas as the reference: to_datetime(utc=True) of the same text.
    ref = pd.to_datetime(pd.Series(text), utc=True).dt.as_unit("ns")
    assert got.instants.tolist() == ref.astype("int64").tolist()


def test_naive_text_among_aware_text_is_utc():
    got = parse_times("mix", ["2030-01-10T12:00:00+01:00", "2030-01-10T12:00:00"])
    # 12:00+01:00 is 11:00 UTC; the naive 12:00 is 12:00 UTC.
    assert np.diff(got.instants).tolist() == [3_600_000_000_000]
    assert got.axis.zone == "UTC"


def test_a_declared_zone_makes_naive_stamps_aware_and_writes_their_offset():
    text = ["2030-10-27T00:30:00", "2030-10-27T02:30:00", "2030-03-31T02:30:00"]
    got = parse_times("local", text, naive_zone="Europe/Paris")
    assert got.axis.zone == "Europe/Paris"
    # 00:30 in Paris in summer time is 22:30 UTC the day before (standard library).
    assert got.instants[0] == ns_of(datetime(2030, 10, 27, 0, 30, tzinfo=PARIS))
    # 02:30 on 27 October happens twice; the first (summer, +02:00) is taken:
    # fold=0 in the standard library.
    assert got.instants[1] == ns_of(datetime(2030, 10, 27, 2, 30, fold=0, tzinfo=PARIS))
    assert got.label(1) == "2030-10-27T02:30:00+02:00"
    # 02:30 on 31 March does not exist; it moves forward to 03:00+02:00 = 01:00 UTC
    # (the EU rule, by hand).
    assert got.instants[2] == ns_of(datetime(2030, 3, 31, 1, 0, tzinfo=UTC))
    assert got.label(2) == "2030-03-31T03:00:00+02:00"
    # The labels read back to the same instants without the declaration.
    again = parse_times("local", [got.label(i) for i in range(len(got))])
    assert again.instants.tolist() == got.instants.tolist()


def test_a_declared_zone_leaves_aware_stamps_alone():
    text = ["2030-01-10T12:00:00+00:00", "2030-01-10T13:00:00"]
    got = parse_times("mix", text, naive_zone="Europe/Paris")
    # 13:00 Paris is 12:00 UTC: the two stamps are one instant.
    assert got.instants[0] == got.instants[1] == ns_of(datetime(2030, 1, 10, 12, tzinfo=UTC))
    assert got.label(0) == text[0] and got.label(1) == "2030-01-10T13:00:00+01:00"


def test_labels_of_typed_and_numeric_stamps():
    naive = parse_times("s", pd.date_range("2030-01-10", periods=2, freq="500ms"))
    assert (
        naive.label(0) == "2030-01-10T00:00:00" and naive.label(1) == "2030-01-10T00:00:00.500000"
    )
    ints = parse_times("n", np.arange(3))
    assert [ints.label(i) for i in range(3)] == ["0", "1", "2"]
    floats = parse_times("n", np.array([0.1, 0.2]))
    assert floats.label(0) == "0.1" and float(floats.label(1)) == 0.2
    text = parse_times("n", ["7", "8.50", "9e0"])
    assert text.axis.kind == "numeric" and text.instants.tolist() == [7.0, 8.5, 9.0]
    assert text.label(1) == "8.50"  # the input's own text


# ---------------------------------------------------------------------------
# Numbers
# ---------------------------------------------------------------------------


def test_numbers_are_index_units_unless_an_epoch_unit_is_declared():
    seconds = [1_900_000_000, 1_900_000_060]
    plain = parse_times("n", seconds)
    assert plain.axis.kind == "numeric" and plain.instants.tolist() == [1.9e9, 1.90000006e9]
    epoch = parse_times("n", seconds, epoch_unit="s")
    assert epoch.axis == TimeAxis("n", "datetime", "UTC")
    # Standard library: datetime.fromtimestamp of the same seconds.
    want = datetime.fromtimestamp(1_900_000_000, UTC)
    assert epoch.instant(0).to_pydatetime() == want
    assert epoch.label(0) == want.isoformat()
    millis = parse_times("n", [1_900_000_000_000, 1_900_000_060_000], epoch_unit="ms")
    assert millis.instants.tolist() == epoch.instants.tolist()
    as_text = parse_times("n", ["1900000000", "1900000060"], epoch_unit="s")
    assert as_text.instants.tolist() == epoch.instants.tolist()


# ---------------------------------------------------------------------------
# Round trips
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "stamps",
    [
        pytest.param(NAIVE_TEXT, id="naive-text"),
        pytest.param(pd.date_range("2030-01-10", periods=4, freq="37ms"), id="naive-typed-ms"),
        pytest.param(pd.DatetimeIndex(["2030-01-10T00:00:00.000000001"]), id="nanosecond"),
        pytest.param(ACROSS_SPRING, id="paris-typed"),
        pytest.param([t.isoformat() for t in ACROSS_SPRING], id="two-offsets-text"),
        pytest.param(pd.date_range("2030-01-10", periods=3, freq="D", tz="UTC"), id="utc-typed"),
        pytest.param(np.arange(4), id="integers"),
        pytest.param(np.array([0.1, 0.25, 1e-7, 3.0e12]), id="floats"),
    ],
)
def test_parse_label_parse(stamps):
    first = parse_times("s", stamps)
    labels = [first.label(i) for i in range(len(first))]
    again = parse_times("s", labels)
    assert again.instants.tolist() == first.instants.tolist()
    assert [again.label(i) for i in range(len(again))] == labels
    for i, label in enumerate(labels):  # each label alone, through the axis
        assert first.axis.instant(label) == first.instant(i)


@pytest.mark.parametrize(
    ("axis", "anchor", "step"),
    [
        (TimeAxis("s", "datetime", "Europe/Paris"), "2030-03-30T22:00:00+01:00", HOUR),
        (TimeAxis("s", "datetime"), "2030-01-10T00:00:00", 0.25),
        (TimeAxis("s", "datetime", "UTC"), "2030-01-10T00:00:00Z", 86_400.0),
        (TimeAxis("n", "numeric"), "0", 0.1),
        (TimeAxis("n", "numeric"), 1.5e9, 60.0),
    ],
)
@pytest.mark.parametrize("k", [-700, -1, 0, 1, 2, 3, 5_000])
def test_instant_offset_instant(axis, anchor, step, k):
    there = axis.shift(anchor, k, step=step)
    assert axis.offset(there, anchor=anchor, step=step) == k
    assert axis.offset(axis.label(there), anchor=anchor, step=step) == k
    assert axis.shift(anchor, axis.offset(there, anchor=anchor, step=step), step=step) == there


def test_offsets_across_the_spring_change_count_real_hours():
    axis = TimeAxis("dst", "datetime", "Europe/Paris")
    # 01:00+01:00 to 03:00+02:00 is one hour (standard library difference).
    a = datetime(2030, 3, 31, 1, tzinfo=PARIS)
    b = datetime(2030, 3, 31, 3, tzinfo=PARIS)
    assert b.timestamp() - a.timestamp() == HOUR  # (b - a) alone would say 2 h: same tzinfo
    assert axis.offset(b.isoformat(), anchor=a.isoformat(), step=HOUR) == 1
    got = axis.offsets(ACROSS_SPRING, anchor=ACROSS_SPRING[0].isoformat(), step=HOUR)
    assert got.tolist() == list(range(6))
    stamps = parse_times("dst", [t.isoformat() for t in ACROSS_SPRING])
    assert axis.offsets(stamps, anchor=stamps.label(2), step=HOUR).tolist() == list(range(-2, 4))


def test_off_grid_times_are_an_error_unless_snapped():
    axis = TimeAxis("s", "datetime")
    with pytest.raises(TimestampError, match=r"12:20:00 is 0\.333333 steps .* not on its grid"):
        axis.offset("2030-01-10T12:20:00", anchor="2030-01-10T12:00:00", step=HOUR)
    assert (
        axis.offset("2030-01-10T12:20:00", anchor="2030-01-10T12:00:00", step=HOUR, snap=True) == 0
    )
    assert (
        axis.offset("2030-01-10T12:31:00", anchor="2030-01-10T12:00:00", step=HOUR, snap=True) == 1
    )
    assert (
        axis.offset("2030-01-10T11:29:00", anchor="2030-01-10T12:00:00", step=HOUR, snap=True) == -1
    )
    numbers = TimeAxis("n", "numeric")
    assert numbers.offset(0.3, anchor=0.0, step=0.1) == 3  # 2.9999999999999996 steps
    with pytest.raises(TimestampError, match=r"0\.35 is 3\.5 steps"):
        numbers.offset(0.35, anchor=0.0, step=0.1)


# ---------------------------------------------------------------------------
# Windows and steps
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("width", ["10s", "1min", "1h", "1D"])
@pytest.mark.parametrize(
    "when", ["2030-03-31T02:59:59.5+02:00", "2030-03-31T00:00:00", "1999-12-31T23:59:59Z"]
)
def test_windows_are_floors_in_utc(width, when):
    axis = TimeAxis("s", "datetime", "Europe/Paris")
    start, end = axis.window(when, width=width)
    # pandas as the reference: Timestamp.floor of the UTC instant.
    at = pd.Timestamp(when)
    at = at.tz_localize("UTC") if at.tzinfo is None else at.tz_convert("UTC")
    assert start == at.floor(width) and end == at.floor(width) + pd.Timedelta(width)
    assert start <= axis.instant(when) < end


def test_a_day_window_of_a_paris_time_starts_at_midnight_utc():
    axis = TimeAxis("s", "datetime", "Europe/Paris")
    start, end = axis.window("2030-01-10T00:30:00+01:00", width="1D")
    assert axis.label(start) == "2030-01-09T01:00:00+01:00"  # 00:00 UTC, written in Paris
    assert axis.label(end) == "2030-01-10T01:00:00+01:00"


def test_numeric_windows_and_span_text():
    numbers = TimeAxis("n", "numeric")
    assert numbers.window(17.5, width=5) == (15.0, 20.0)
    assert numbers.window(-0.5, width=5) == (-5.0, 0.0)
    assert numbers.span_text(12) == "12 index units"
    assert TimeAxis("s", "datetime").span_text(210) == "3.5 min"


@pytest.mark.parametrize(
    ("value", "kind", "seconds"),
    [
        ("5min", "datetime", 300.0),
        (timedelta(hours=2), "datetime", 7200.0),
        (pd.Timedelta("1D"), "datetime", 86400.0),
        (0.5, "datetime", 0.5),
        (3, "numeric", 3.0),
    ],
)
def test_steps(value, kind, seconds):
    assert parse_step(value, kind=kind) == seconds


# ---------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------

BAD_STAMPS = [
    (
        ["2030-01-10T00:00:00", None],
        TimestampError,
        r"1 timestamp\(s\) are missing \(first at row 1\)",
    ),
    (["2030-01-10T00:00:00", "  "], TimestampError, "are missing"),
    ([True, False], TimestampError, "true/false"),
    (np.array([0.0, np.inf]), TimestampError, "must be finite"),
    (
        ["05/03/2030", "06/03/2030"],
        TimestampError,
        r"2 timestamp\(s\) are not ISO 8601 \(first: '05/03/2030'\); day and month order",
    ),
    (["2030-01-10", "March 5 2030"], TimestampError, r"not ISO 8601 \(first: 'March 5 2030'\)"),
    (["2030-13-01"], TimestampError, "not ISO 8601"),
    (["2030-01-10T00:00:00", "7"], TimestampError, r"not ISO 8601 \(first: '7'\)"),
    ([datetime(2030, 1, 1, tzinfo=UTC), 7], TimestampError, "is a number among date-times"),
    (["2300-01-01T00:00:00"], TimestampError, "1677-2262"),
]


@pytest.mark.parametrize(("stamps", "error", "match"), BAD_STAMPS)
def test_bad_stamps(stamps, error, match):
    with pytest.raises(error, match=match) as caught:
        parse_times("pump-7", stamps)
    assert "pump-7" in str(caught.value)  # the series is named


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (
            {"epoch_unit": "minutes"},
            r"epoch unit 'minutes' is not one of \['s', 'ms', 'us', 'ns'\]",
        ),
        ({"naive_zone": "Mars/Olympus"}, "time zone 'Mars/Olympus' is unknown"),
    ],
)
def test_bad_options(kwargs, match):
    with pytest.raises(ConfigError, match=match):
        parse_times("s", [1, 2], **kwargs)


def test_an_epoch_unit_for_date_times_is_refused():
    with pytest.raises(ConfigError, match="date-times already; drop the epoch unit"):
        parse_times("s", NAIVE_TEXT, epoch_unit="s")


@pytest.mark.parametrize(
    ("value", "match"),
    [
        ("05/03/2030", r"'05/03/2030' is not ISO 8601 .*\(day and month order is ambiguous\)"),
        ("yesterday", "'yesterday' is not ISO 8601"),
        ("", "is missing"),
        (None, "is missing"),
        (True, "true/false"),
        (float("inf"), "not a finite number"),
        ([2030, 1, 1], "is a list, not a time"),
    ],
)
def test_bad_option_times(value, match):
    with pytest.raises(ConfigError, match=match):
        parse_instant(value, what="--since")


@pytest.mark.parametrize(
    ("axis", "value", "match"),
    [
        (TimeAxis("s", "datetime"), "17", "is a number but the series' times are date-times"),
        (TimeAxis("s", "datetime"), 17.0, "is a number"),
        (TimeAxis("s", "numeric"), "2030-01-10", "is a date-time but the series' times are plain"),
        (TimeAxis("s", "numeric"), date(2030, 1, 10), "is a date-time"),
        (TimeAxis("s", "datetime"), "10/01/2030", "ambiguous"),
    ],
)
def test_a_time_of_the_wrong_kind_names_the_series(axis, value, match):
    with pytest.raises(TimestampError, match=match) as caught:
        axis.instant(value)
    assert caught.value.series_id == "s"


@pytest.mark.parametrize(
    ("value", "kind", "match"),
    [
        (0, "datetime", "must be positive"),
        (-5.0, "numeric", "must be positive"),
        (float("nan"), "numeric", "must be positive and finite"),
        ("often", "datetime", "'often' is not a duration"),
        ("5min", "numeric", "not a number of index units"),
        (True, "numeric", "not a number of index units"),
    ],
)
def test_bad_steps(value, kind, match):
    with pytest.raises(ConfigError, match=match):
        parse_step(value, kind=kind)


@pytest.mark.parametrize(
    ("args", "match"),
    [
        (("s", "weekly"), "time kind 'weekly'"),
        (("s", "numeric", "UTC"), "a numeric axis has no time zone"),
        (("s", "datetime", "Mars/Olympus"), "time zone 'Mars/Olympus' is unknown"),
        (("s", "datetime", ""), "time zone '' is unknown"),
        (("s", "datetime", 5), "time zone 5 is unknown"),  # pandas would read 5 s east of UTC
    ],
)
def test_bad_axes(args, match):
    with pytest.raises(ConfigError, match=match):
        TimeAxis(*args)


def test_stamps_of_an_index_and_its_axis():
    index = pd.date_range("2030-01-10", periods=3, freq="h", tz=PARIS)
    axis = TimeAxis.of_index("s", index)
    assert axis == TimeAxis("s", "datetime", "Europe/Paris")
    assert TimeAxis.of_index("s", pd.Index([0.0, 1.0])).kind == "numeric"
    stamps = Stamps(axis, index.as_unit("ns").tz_convert("UTC").asi8)
    assert stamps.to_index().equals(index.as_unit("ns"))
    assert stamps.utc_naive().dtype == np.dtype("datetime64[ns]")
