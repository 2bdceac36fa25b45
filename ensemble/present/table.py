"""Cells and columns of the text tables ``ensemble summary`` prints: numbers with one
format per row, times as dates or days (a censored peak time as a bound), and columns
aligned."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


def number_format(values: Sequence[float]) -> str:
    """One format for every number of a row, from the largest: whole numbers with
    thousands separators from 100 up, else enough decimals for three significant
    digits of the largest."""
    finite = [abs(float(v)) for v in values if np.isfinite(v)]
    largest = max(finite, default=0.0)
    if largest >= 100:
        return "{:,.0f}"
    if largest >= 10:
        return "{:,.1f}"
    if largest >= 1:
        return "{:,.2f}"
    return "{:,.3f}" if largest >= 0.01 or largest == 0 else "{:.2e}"


def numbers(values: Sequence[float]) -> list[str]:
    """The cells of a row of numbers (``-`` where undefined)."""
    shape = number_format(values)
    return [shape.format(float(v)) if np.isfinite(v) else "-" for v in values]


def whole_days(times: np.ndarray) -> bool:
    """Whether the times are whole days apart."""
    steps = np.diff(np.asarray(times))
    if np.issubdtype(steps.dtype, np.timedelta64):
        steps = steps / np.timedelta64(1, "D")
    return bool(np.all(np.isclose(steps, np.round(steps))))


def time_cell(value: object, whole: bool) -> str:
    """A time as a date (to the nearest day when reports are whole days apart, else to
    the minute) or, without a start date, as ``day x``."""
    if isinstance(value, np.datetime64):
        if np.isnat(value):
            return "-"
        if whole:
            return str(np.datetime64(value + np.timedelta64(12, "h"), "D"))
        return np.datetime_as_string(value, unit="m").replace("T", " ")
    number = float(value)  # type: ignore[arg-type]
    if not np.isfinite(number):
        return "-"
    return f"day {number:.0f}" if whole else f"day {number:.2f}"


def peak_times(values: np.ndarray, axis_times: np.ndarray, whole: bool) -> list[str]:
    """Cells of peak-time quantiles on a time axis ``axis_times``: a time at the axis's
    last (first) time is a censored peak, whose true time may be later (earlier), so it
    is printed as ``≥ <last>`` (``≤ <first>``)."""
    cells = []
    for value in values:
        cell = time_cell(value, whole)
        if cell != "-" and len(axis_times) > 1:
            if value == axis_times[-1]:
                cell = "≥ " + cell
            elif value == axis_times[0]:
                cell = "≤ " + cell
        cells.append(cell)
    return cells


def aligned(rows: list[list[str]], left: int) -> list[str]:
    """Lines of ``rows`` with the first ``left`` columns left-aligned, the rest right."""
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    return ["  ".join(cell.ljust(w) if i < left else cell.rjust(w)
                      for i, (cell, w) in enumerate(zip(row, widths))).rstrip()
            for row in rows]


def share(value: float) -> str:
    """A share as a whole percentage (``<1%`` for a few members, ``-`` when undefined)."""
    if not np.isfinite(value):
        return "-"
    if 0 < value < 0.01:
        return "<1%"
    return f"{100 * value:.0f}%"
