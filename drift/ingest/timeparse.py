"""Dates and years to day numbers, and the accounting of values that are not dates.

Every document's time becomes a day number (days since 1970-01-01, as numpy's ``datetime64[D]``).
Recognised without help: years (``1990``, also ``1990.0`` as spreadsheets write them), year-month
(``1990-03``), ISO dates (``1990-03-01``, ``1990/03/01``, ``19900301``) and ISO date-times with
or without a zone (``1990-03-01T12:30:00+01:00``); a date-time counts on the calendar day written
in it (the zone is not applied). Typed columns (Parquet timestamps and dates, integer years) are
read directly. Any other layout needs ``date_format`` (a ``strptime`` format such as
``%d/%m/%Y``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from drift.errors import DriftError

_TIME_OF_DAY = (
    r"(?:[T ][0-9]{1,2}(?::?[0-9]{2}(?::?[0-9]{2}(?:[.,][0-9]+)?)?)?"
    r"\s*(?:Z|UTC|GMT|[+-][0-9]{2}(?::?[0-9]{2})?)?)?"
)
#: year, year-month, year-month-day (- or / separated) with an optional time of day and zone
_ISO_PATTERN = (
    r"^\s*(?P<y>[0-9]{4})(?:\.0+|[-/](?P<m>[0-9]{1,2})(?:[-/](?P<d>[0-9]{1,2})"
    + _TIME_OF_DAY
    + r")?)?\s*$"
)
#: the ISO "basic" form 19900301
_BASIC_PATTERN = r"^\s*(?P<y>[0-9]{4})(?P<m>[0-9]{2})(?P<d>[0-9]{2})" + _TIME_OF_DAY + r"\s*$"
_EXAMPLES_KEPT = 3


def days_from_parts(
    years: np.ndarray, months: np.ndarray, days: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Day numbers for (year, month, day) triples and a mask of the triples that are real dates."""
    years, months, days = (np.asarray(a, dtype=np.int64) for a in (years, months, days))
    ok = (
        (years >= 1) & (years <= 9999) & (months >= 1) & (months <= 12) & (days >= 1) & (days <= 31)
    )
    month_number = np.where(ok, (years - 1970) * 12 + (months - 1), 0)
    first_day = month_number.astype("datetime64[M]").astype("datetime64[D]").astype(np.int64)
    result = first_day + np.where(ok, days - 1, 0)
    same_month = (
        result.astype("datetime64[D]").astype("datetime64[M]").astype(np.int64) == month_number
    )
    ok = ok & same_month  # rejects 1990-02-30
    return np.where(ok, result, 0).astype(np.int32), ok


def _parts_from_strings(values: pa.StringArray, pattern: str) -> tuple[np.ndarray, ...]:
    """Year, month, day (1 where absent) of each string matching ``pattern``, and the match mask."""
    parts = pc.extract_regex(values, pattern)
    matched = parts.is_valid().to_numpy(zero_copy_only=False)

    def number(name: str, default: int) -> np.ndarray:
        if name not in {f.name for f in parts.type}:
            return np.full(len(values), default, dtype=np.int64)
        text = pc.fill_null(pc.struct_field(parts, name), "")
        text = pc.if_else(pc.equal(text, ""), str(default), text)
        return pc.cast(text, pa.int64()).to_numpy(zero_copy_only=False)

    return number("y", 0), number("m", 1), number("d", 1), matched


def _parse_strings(values: pa.StringArray) -> tuple[np.ndarray, np.ndarray]:
    years, months, days, matched = _parts_from_strings(values, _ISO_PATTERN)
    if not matched.all():
        b_years, b_months, b_days, b_matched = _parts_from_strings(values, _BASIC_PATTERN)
        use_basic = ~matched & b_matched
        years = np.where(use_basic, b_years, years)
        months = np.where(use_basic, b_months, months)
        days = np.where(use_basic, b_days, days)
        matched = matched | b_matched
    result, ok = days_from_parts(years, months, days)
    return result, ok & matched


def _parse_with_format(values: pa.Array, date_format: str) -> tuple[np.ndarray, np.ndarray]:
    series = values.to_pandas()
    try:
        parsed = pd.to_datetime(series, format=date_format, errors="coerce")
    except ValueError:  # several zone offsets in one column: compare them on one clock
        parsed = pd.to_datetime(series, format=date_format, errors="coerce", utc=True)
    if getattr(parsed.dt, "tz", None) is not None:
        parsed = parsed.dt.tz_localize(None)
    ok = parsed.notna().to_numpy()
    result = np.zeros(len(series), dtype=np.int32)
    if ok.any():
        result[ok] = parsed[ok].to_numpy().astype("datetime64[D]").astype(np.int64)
    return result, ok


def _parse_numbers(values: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """Integer (or integral float) values are years."""
    numbers = values.cast(pa.float64()).to_numpy(zero_copy_only=False)
    with np.errstate(invalid="ignore"):
        integral = np.isfinite(numbers) & (np.floor(numbers) == numbers)
    years = np.where(integral, numbers, 0).astype(np.int64)
    ones = np.ones(len(years), dtype=np.int64)
    result, ok = days_from_parts(years, ones, ones)
    return result, ok & integral


def parse_times(
    values: pa.Array | pa.ChunkedArray, date_format: str | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Day numbers (int32, days since 1970-01-01) of raw time values, and a mask of the values
    that parsed."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks() if values.num_chunks else pa.array([], pa.string())
    if pa.types.is_dictionary(values.type):
        values = values.dictionary_decode()
    kind = values.type
    if pa.types.is_null(kind):
        return np.zeros(len(values), np.int32), np.zeros(len(values), bool)
    if pa.types.is_timestamp(kind):
        if kind.tz is not None:
            values = pc.local_timestamp(values)
        values = values.cast(pa.date32())
        kind = values.type
    if pa.types.is_date(kind):
        ok = values.is_valid().to_numpy(zero_copy_only=False)
        result = pc.fill_null(values.cast(pa.date32()).cast(pa.int32()), 0).to_numpy(
            zero_copy_only=False
        )
        return result.astype(np.int32), ok
    if pa.types.is_integer(kind) or pa.types.is_floating(kind):
        result, ok = _parse_numbers(values)
    else:
        if not (pa.types.is_string(kind) or pa.types.is_large_string(kind)):
            values = values.cast(pa.string())
        values = values.cast(pa.string())
        if date_format:
            result, ok = _parse_with_format(values, date_format)
        else:
            result, ok = _parse_strings(values)
    ok = ok & values.is_valid().to_numpy(zero_copy_only=False)
    return result, ok


def day_to_iso(day: int) -> str:
    """ISO date of a day number."""
    return str(np.datetime64(int(day), "D"))


def iso_to_day(text: str) -> int:
    """Day number of an ISO date or a year; DriftError when it is neither."""
    result, ok = parse_times(pa.array([text], pa.string()))
    if not ok[0]:
        raise DriftError(f"'{text}' is not a year or an ISO date (such as 1990 or 1990-03-01).")
    return int(result[0])


def year_of(days: np.ndarray) -> np.ndarray:
    """Calendar year of each day number."""
    return (
        np.asarray(days, dtype=np.int64)
        .astype("datetime64[D]")
        .astype("datetime64[Y]")
        .astype(np.int64)
        + 1970
    )


def _show(value: object) -> str:
    if value is None or (isinstance(value, str) and not value.strip()):
        return "(empty)"
    text = str(value)
    return repr(text if len(text) <= 40 else text[:37] + "...")


@dataclass
class BadDates:
    """How many time values did not parse, with the first few of them as examples."""

    count: int = 0
    examples: list[str] = field(default_factory=list)

    def add(self, values: pa.Array, ok: np.ndarray) -> None:
        """Count the values where ``ok`` is False and keep up to three distinct examples."""
        bad = np.flatnonzero(~ok)
        self.count += len(bad)
        for position in bad[:50]:
            if len(self.examples) >= _EXAMPLES_KEPT:
                break
            shown = _show(values[int(position)].as_py())
            if shown not in self.examples:
                self.examples.append(shown)

    def error(
        self,
        column: str,
        total: int | None = None,
        first_only: bool = False,
        text_files: bool = False,
        skipping: bool = False,
    ) -> DriftError:
        """The DriftError that reports these bad values (``text_files``: dates of .txt files;
        ``skipping``: --skip-bad-dates was given, so the advice cannot be to give it)."""
        examples = ", ".join(self.examples)
        if text_files:
            if skipping:
                problem = f"None of the {self.count:,} text files has a date that parses"
            elif first_only:
                problem = f"None of the first {self.count:,} text files has a date that parses"
            else:
                problem = (
                    f"{self.count:,} of {total or self.count:,} text files have no date that parses"
                )
            fix = (
                "put a year or ISO date in their file or folder names (as a whole word, such as "
                "1905 or 1905-03-02), or list them in an index.csv (file, date)"
            )
            if skipping:
                return DriftError(
                    f"{problem} (e.g. {examples}), so --skip-bad-dates would leave nothing; {fix}."
                )
            return DriftError(
                f"{problem} (e.g. {examples}); {fix}, or drop them with --skip-bad-dates."
            )
        if skipping:
            return DriftError(
                f"None of the {self.count:,} values in the time column '{column}' is a date (e.g. "
                f"{examples}), so --skip-bad-dates would leave nothing; give their layout with "
                "--date-format (e.g. '%d/%m/%Y') or choose another column with --time-col."
            )
        if first_only:
            problem = (
                f"None of the first {self.count:,} values in the time column '{column}' is a date"
            )
        else:
            amount = f"{self.count:,} of {total:,} values" if total else f"{self.count:,} values"
            if self.count == 1:
                amount = amount.removesuffix("values") + ("values" if total else "value")
            verb = "is not a date" if self.count == 1 else "are not dates"
            problem = f"{amount} in the time column '{column}' {verb}"
        return DriftError(
            f"{problem} (e.g. {examples}); give their "
            "layout with --date-format (e.g. '%d/%m/%Y'), choose another column with --time-col, "
            "or drop those documents with --skip-bad-dates."
        )
