"""A file of observed counts: a CSV table with the columns ``date,value``.

A date is an ISO date (``2027-03-08``), the end of the counting window it closes, or,
for a scenario without a ``start``, a number of days since the start of the projection.
A value is a count of persons, a whole number at least 0, or empty when nothing was
reported. Lines starting with ``#`` are comments (a note that the numbers are invented,
say). Errors name the file, the line and the value (``ensemble/scenario/
reference.md``, ``[[observations]]``).
"""

from __future__ import annotations

import csv
import datetime
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ensemble.errors import InputError, UsageError

_COLUMNS = ("date", "value")


@dataclass(frozen=True)
class ObservedCounts:
    """The rows of a counts file, in file order.

    Attributes
    ----------
    file : the path as given.
    dates : each row's date: ``datetime.date`` or float days.
    values : the counts (float, NaN where missing).
    lines : each row's line number in the file (the header is line 1).
    error : the error a bad row raises (a scenario error for a scenario's observations).
    """

    file: str
    dates: tuple[datetime.date | float, ...]
    values: np.ndarray
    lines: tuple[int, ...]
    error: type[InputError] = UsageError

    def days_since(self, start: datetime.date | None) -> np.ndarray:
        """Each row's date as days since ``start`` (numbers are already days)."""
        days = []
        for date, line in zip(self.dates, self.lines):
            if isinstance(date, datetime.date) != (start is not None):
                raise self.refused(line, "date", date,
                                 "dates must be ISO dates when the scenario has a start, "
                                 "numbers of days when it has none")
            days.append(float((date - start).days) if start is not None else date)
        return np.array(days, dtype=float)

    def refused(self, line: int, column: str, value: object, message: str,
              hint: str | None = None) -> InputError:
        """An error naming this file, the line and the column."""
        return self.error(self.file, f"line {line}, {column}", value, message, hint)


def read_counts(path: str | Path, *, error: type[InputError] = UsageError) -> ObservedCounts:
    """Read a counts file, refusing a missing column, a bad date, a repeated date, a
    negative, fractional or non-numeric count, naming the file and line."""
    file = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as problem:
        raise error(file, "", None, f"cannot read the counts file: {problem}") from None
    rows = [(number, row) for number, row in enumerate(csv.reader(text.splitlines()), 1)
            if any(cell.strip() for cell in row) and not row[0].lstrip().startswith("#")]
    first, header = (rows[0][0], [c.strip().lower() for c in rows[0][1]]) if rows else (1, [])
    if header != list(_COLUMNS):
        raise error(file, f"line {first}", ",".join(header),
                    "the first line that is not a comment must name the columns date,value")
    dates, values, lines = [], [], []
    for number, row in rows[1:]:
        if len(row) != 2:
            raise error(file, f"line {number}", ",".join(row),
                        "a row holds a date and a value")
        date = _date(row[0].strip(), file, number, error)
        if date in dates:
            raise error(file, f"line {number}, date", row[0], "the date appears twice")
        dates.append(date)
        values.append(_count(row[1].strip(), file, number, error))
        lines.append(number)
    if not dates:
        raise error(file, "", None, "the file holds no rows")
    return ObservedCounts(file, tuple(dates), np.array(values, dtype=float), tuple(lines),
                          error)


def _date(text: str, file: str, line: int, error: type[InputError]) -> datetime.date | float:
    try:
        return datetime.date.fromisoformat(text)
    except ValueError:
        pass
    try:
        days = float(text)
    except ValueError:
        days = math.nan
    if not math.isfinite(days):
        raise error(file, f"line {line}, date", text,
                    "a date is an ISO date (2027-03-08) or a number of days")
    return days


def _count(text: str, file: str, line: int, error: type[InputError]) -> float:
    if text == "":
        return math.nan
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not math.isfinite(value) or value < 0 or value != round(value):
        raise error(file, f"line {line}, value", text,
                    "a count is a whole number at least 0 (or empty when missing)")
    return value
