"""Dates and years to day numbers, checked against Python's datetime and pandas."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drift.errors import DriftError
from drift.ingest.timeparse import (
    BadDates,
    day_to_iso,
    days_from_parts,
    iso_to_day,
    parse_times,
    year_of,
)

EPOCH = dt.date(1970, 1, 1)


def day_number(date: dt.date) -> int:
    return (date - EPOCH).days


def parse_one(value, date_format=None):
    days, ok = parse_times(pa.array([value]), date_format)
    return int(days[0]) if ok[0] else None


@settings(max_examples=300, deadline=None)
@given(st.dates(min_value=dt.date(1, 1, 1), max_value=dt.date(9999, 12, 31)))
def test_iso_dates_match_python_calendar(date):
    # Reference: Python's proleptic Gregorian calendar (datetime.date).
    text = date.isoformat()
    assert parse_one(text) == day_number(date)
    assert parse_one(text.replace("-", "/")) == day_number(date)
    assert parse_one(text.replace("-", "")) == day_number(date)


@settings(max_examples=200, deadline=None)
@given(
    st.datetimes(min_value=dt.datetime(1000, 1, 1), max_value=dt.datetime(9999, 12, 30)),
    st.sampled_from(
        [
            None,
            dt.timezone.utc,
            dt.timezone(dt.timedelta(hours=5, minutes=30)),
            dt.timezone(-dt.timedelta(hours=8)),
        ]
    ),
    st.sampled_from(["T", " "]),
)
def test_iso_datetimes_count_on_the_written_calendar_day(moment, zone, separator):
    # Reference: datetime.isoformat / fromisoformat (ISO 8601 as Python writes and reads it).
    moment = moment.replace(tzinfo=zone)
    text = moment.isoformat(sep=separator)
    assert parse_one(text) == day_number(dt.datetime.fromisoformat(text).date())


@pytest.mark.parametrize(
    "text, expected",
    [
        ("1990", dt.date(1990, 1, 1)),
        (" 1990 ", dt.date(1990, 1, 1)),
        ("1990.0", dt.date(1990, 1, 1)),
        ("1990-03", dt.date(1990, 3, 1)),
        ("1990/3", dt.date(1990, 3, 1)),
        ("1990-03-01T12:30Z", dt.date(1990, 3, 1)),
        ("1990-03-01 23:59:59.123456+01:00", dt.date(1990, 3, 1)),
        ("2000-02-29", dt.date(2000, 2, 29)),
    ],
)
def test_recognised_layouts(text, expected):
    assert parse_one(text) == day_number(expected)


@pytest.mark.parametrize(
    "text",
    [
        "1990-02-30",
        "1900-02-29",
        "1990-13",
        "0000",
        "abc",
        "",
        "  ",
        "03/01/1990",
        "90",
        "1990-03-01x",
    ],
)
def test_values_that_are_not_dates(text):
    assert parse_one(text) is None


def test_null_is_not_a_date():
    days, ok = parse_times(pa.array([None, "1990"], pa.string()))
    assert ok.tolist() == [False, True]


def test_date_format_matches_strptime():
    # Reference: datetime.strptime with the same format.
    values = ["01/03/1990", "31/12/1899", "29/02/2001", "garbage"]
    days, ok = parse_times(pa.array(values), "%d/%m/%Y")
    for value, day, good in zip(values, days, ok, strict=False):
        try:
            expected = day_number(dt.datetime.strptime(value, "%d/%m/%Y").date())
        except ValueError:
            assert not good
        else:
            assert good and day == expected


def test_date_format_with_mixed_zones():
    days, ok = parse_times(
        pa.array(["01/03/1990 10:00 +0100", "02/03/1990 10:00 -0500"]), "%d/%m/%Y %H:%M %z"
    )
    assert ok.all()
    assert [day_to_iso(d) for d in days] == ["1990-03-01", "1990-03-02"]


def test_typed_columns():
    date_days, ok = parse_times(pa.array([dt.date(1990, 3, 1), None]))
    assert ok.tolist() == [True, False] and date_days[0] == day_number(dt.date(1990, 3, 1))
    stamps = pa.array([dt.datetime(1990, 3, 1, 12)], pa.timestamp("s"))
    assert parse_times(stamps)[0][0] == day_number(dt.date(1990, 3, 1))
    # 1990-03-02 03:00 UTC is still 1 March in New York: the local calendar day counts.
    zoned = pa.array(
        [pd.Timestamp("1990-03-02 03:00", tz="UTC")], pa.timestamp("s", tz="America/New_York")
    )
    assert parse_times(zoned)[0][0] == day_number(dt.date(1990, 3, 1))
    years, ok = parse_times(pa.array([1990, 0, 12000, None], pa.int64()))
    assert ok.tolist() == [True, False, False, False] and years[0] == day_number(
        dt.date(1990, 1, 1)
    )
    float_years, ok = parse_times(pa.array([1990.0, 1990.5, float("nan")]))
    assert ok.tolist() == [True, False, False]
    dictionary = pa.array(["1990", "1991", "1990"]).dictionary_encode()
    assert parse_times(dictionary)[1].all()
    assert not parse_times(pa.array([None, None], pa.null()))[1].any()


def test_days_from_parts_rejects_impossible_days():
    days, ok = days_from_parts(
        np.array([2001, 2004, 1990]), np.array([2, 2, 4]), np.array([29, 29, 31])
    )
    assert ok.tolist() == [False, True, False]
    assert days[1] == day_number(dt.date(2004, 2, 29))


def test_helpers():
    assert day_to_iso(0) == "1970-01-01"
    assert iso_to_day("1990") == day_number(dt.date(1990, 1, 1))
    assert year_of(np.array([iso_to_day("1899-12-31"), iso_to_day("2024-06-01")])).tolist() == [
        1899,
        2024,
    ]
    with pytest.raises(DriftError, match="not a year or an ISO date"):
        iso_to_day("last year")


def test_bad_dates_keep_count_and_three_distinct_examples():
    bad = BadDates()
    values = pa.array(["x", "1990", "x", "", None, "n.d.", "soon"])
    days, ok = parse_times(values)
    bad.add(values, ok)
    assert bad.count == 6
    assert bad.examples == ["'x'", "(empty)", "'n.d.'"]
    message = str(bad.error("date", total=7))
    assert (
        "6 of 7 values" in message
        and "'x', (empty), 'n.d.'" in message
        and "--skip-bad-dates" in message
    )
