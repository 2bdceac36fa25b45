"""A readable text summary of a result dataset (``ensemble summary``), and the members
behind each status bit."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ensemble.records import STATUS_FLAGS

_ROWS = (
    ("peak size", "peak_value_quantile", "compartment"),
    ("peak time", "peak_time_quantile", "compartment"),
    ("flow total", "total_flow_quantile", "flow"),
    ("flow peak", "flow_peak_value_quantile", "flow"),
    ("flow peak time", "flow_peak_time_quantile", "flow"),
)
"""(row title, quantile variable, labelled dimension) of each block of the table."""


def status_counts(status: np.ndarray) -> dict[str, int]:
    """Members behind each status bit: flag word (as in ``flag_meanings``) -> count."""
    return {word: int(np.count_nonzero(status & bit)) for bit, word in STATUS_FLAGS}


def _number(value: float) -> str:
    """A count of persons: whole persons from 100 up, three significant digits below."""
    if not np.isfinite(value):
        return "-"
    return f"{value:,.0f}" if abs(value) >= 100 else f"{value:.3g}"


def _time(value: object, whole_days: bool) -> str:
    """A time as a date (to the nearest day when reports are whole days apart, else to
    the minute) or, without a start date, as ``day x``."""
    if isinstance(value, np.datetime64):
        if np.isnat(value):
            return "-"
        if whole_days:
            return str(np.datetime64(value + np.timedelta64(12, "h"), "D"))
        return np.datetime_as_string(value, unit="m").replace("T", " ")
    number = float(value)  # type: ignore[arg-type]
    if not np.isfinite(number):
        return "-"
    return f"day {number:.0f}" if whole_days else f"day {number:.2f}"


def _whole_days(times: np.ndarray) -> bool:
    """Whether the reported times are whole days apart."""
    steps = np.diff(times)
    if np.issubdtype(steps.dtype, np.timedelta64):
        steps = steps / np.timedelta64(1, "D")
    return bool(np.all(np.isclose(steps, np.round(steps))))


def _align(rows: list[list[str]], left: int) -> list[str]:
    """Lines of ``rows`` with the first ``left`` columns left-aligned, the rest right."""
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    return ["  ".join(cell.ljust(w) if i < left else cell.rjust(w)
                      for i, (cell, w) in enumerate(zip(row, widths))).rstrip()
            for row in rows]


def _labels(dataset: xr.Dataset, dim: str) -> list[str]:
    """Labels of ``dim``, with ``[group]`` per element when the model has groups."""
    names = [str(v) for v in dataset[dim].values]
    if "group" not in dataset.dims:
        return names
    return [f"{name}[{group}]" for name in names for group in dataset["group"].values]


def _behind_quantiles(part: xr.Dataset) -> str:
    """How many members of a variant the quantiles rest on, and why the others were
    left out (the counts of each status bit among them)."""
    text = f"{int(part['members_in_summary'])} members in the quantiles"
    if "members_left_out" not in part:      # written before members were left out by bit
        return text
    left_out = {str(word): int(count) for word, count in zip(
        part["status_bit"].values, part["members_left_out"].values) if count}
    if left_out:
        reasons = ", ".join(f"{word} {count}" for word, count in left_out.items())
        text += f"; left out, by status bit: {reasons}"
    return text


def summary_text(dataset: xr.Dataset) -> str:
    """The summary of a result opened by :func:`ensemble.open_result`: per variant, the
    quantiles over members of R0 (by the next-generation matrix), of each compartment's
    peak size and time and of each flow's total and peak, and the members behind each
    status bit."""
    probabilities = dataset["quantile"].values
    whole_days = _whole_days(dataset["time"].values)
    header = ["", "", *(f"q{p:g}" for p in probabilities)]
    lines = [str(dataset.attrs.get("title", "")),
             f"{dataset.attrs.get('members')} members per variant; quantiles over the "
             "members without any status bit", ""]
    for variant in dataset["variant"].values:
        part = dataset.sel(variant=variant)
        lines.append(f"variant {variant}: {_behind_quantiles(part)}")
        rows = [header]
        if "basic_reproduction_number_quantile" in part:
            rows.append(["R0", "next generation", *(
                f"{v:.3g}" if np.isfinite(v) else "-"
                for v in part["basic_reproduction_number_quantile"].values)])
        for title, name, dim in _ROWS:
            values = part[name].transpose("quantile", dim, ...).values
            values = values.reshape(len(probabilities), -1)
            for index, label in enumerate(_labels(dataset, dim)):
                cells = [_time(v, whole_days) if "time" in name else _number(v)
                         for v in values[:, index]]
                rows.append([title, label, *cells])
        lines.extend("  " + line for line in _align(rows, left=2))
        counts = ", ".join(f"{word} {count}"
                           for word, count in status_counts(part["status"].values).items())
        lines.extend([f"  members by status bit: {counts}", ""])
    lines.append(str(dataset.attrs.get("caution", "")))
    return "\n".join(lines) + "\n"
