"""A readable text summary of a result dataset (``ensemble summary``), and the members
behind each status bit.

The summary leads with the scenario's measures (their peaks, totals and days above a
threshold, with units and the share of members whose peak the horizon cuts off), then,
when the result has no measures or with ``--all``, each compartment's and flow's
metrics, and last the stored differences between variants.  Rows that carry no
information are left out: a peak that is at the first or last time in every member (a
stock that only falls or only rises) and a row that is zero in every quantile.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import xarray as xr

from ensemble.present.step_check import flagged_text
from ensemble.present.table import aligned, numbers, peak_times, share, whole_days
from ensemble.records import STATUS_FLAGS

_MODEL_ROWS = (
    ("peak", "peak_value", "compartment"),
    ("peak time", "peak_time", "compartment"),
    ("total", "total_flow", "flow"),
    ("peak", "flow_peak_value", "flow"),
    ("peak time", "flow_peak_time", "flow"),
)
"""(row title, metric, labelled dimension) of the model's own metrics."""

_MEASURE_METRICS = (("peak", "peak_value"), ("peak time", "peak_time"),
                    ("total", "total"), ("days above", "days_above"))
"""(row title, metric) of a measure's rows, in order."""


@dataclass(frozen=True)
class Row:
    """One line of a table: what, which element, units, censored share, cells."""

    title: str
    label: str
    units: str
    censored: str
    cells: list[str]


def status_counts(status: np.ndarray) -> dict[str, int]:
    """Members behind each status bit: flag word (as in ``flag_meanings``) -> count."""
    return {word: int(np.count_nonzero(status & bit)) for bit, word in STATUS_FLAGS}


def measure_names(dataset: xr.Dataset) -> list[str]:
    """The measures of a result, in file order."""
    suffix = "_peak_censored"
    return [str(name)[len("measure_"):-len(suffix)] for name in dataset.data_vars
            if str(name).startswith("measure_") and str(name).endswith(suffix)]


def _units(attrs: dict, times: np.ndarray | None = None) -> str:
    """The units column: ``date`` or ``day`` for times, ``persons`` for counts."""
    if times is not None:
        return "date" if np.issubdtype(times.dtype, np.datetime64) else "day"
    units = str(attrs.get("units", ""))
    return "persons" if units == "1" else units


def _elements(array: xr.DataArray) -> Iterator[tuple[str, dict[str, object],
                                                  np.ndarray]]:
    """(label, selection, values over quantiles) of each element of ``array``: the
    label ``I[0-17]`` for compartment I and group 0-17, ``""`` without other
    dimensions."""
    extra = [d for d in array.dims if d != "quantile"]
    ordered = array.transpose("quantile", *extra)
    for index in np.ndindex(*(array.sizes[d] for d in extra)):
        names = [str(array[d].values[i]) for d, i in zip(extra, index)]
        label = names[0] + "".join(f"[{n}]" for n in names[1:]) if names else ""
        selection = {d: array[d].values[i] for d, i in zip(extra, index)}
        yield label, selection, ordered.values[(slice(None), *index)]


def _informative(values: np.ndarray) -> bool:
    """False for a row that is zero (or undefined) in every quantile."""
    finite = values[np.isfinite(values)] if values.dtype.kind == "f" else values
    return finite.size > 0 and bool(np.any(finite != 0))


def _measure_rows(dataset: xr.Dataset, part: xr.Dataset, name: str,
                  whole: bool) -> list[Row]:
    """The rows of measure ``name`` in one variant."""
    stem = f"measure_{name}"
    censored_all = dataset[f"{stem}_censored_share"].values
    if np.all(censored_all == 1):       # the peak is at an end in every member
        metrics = [m for m in _MEASURE_METRICS if not m[1].startswith("peak")]
    else:
        metrics = list(_MEASURE_METRICS)
    time_dim = dataset[f"{stem}_quantile"].dims[-1]
    axis_times = dataset[time_dim].values
    rows = []
    for title, metric in metrics:
        variable = f"{stem}_{metric}_quantile"
        if variable not in part:
            continue
        array = part[variable]
        censored = part[f"{stem}_censored_share"]
        for label, selection, values in _elements(array):
            share_cell = share(float(censored.sel(selection).values)) \
                if metric.startswith("peak") else ""
            if metric == "peak_time":
                cells = peak_times(values, axis_times, whole)
            else:
                if not _informative(np.asarray(values, dtype=float)):
                    continue
                cells = numbers(values)
            units = _units(array.attrs, values if metric == "peak_time" else None)
            rows.append(Row(f"{name} {title}", label or "all", units, share_cell, cells))
    return rows


def _model_rows(dataset: xr.Dataset, part: xr.Dataset, whole: bool,
                only: Sequence[str]) -> list[Row]:
    """The rows of the compartments' and flows' own metrics in one variant, without
    those that carry no information."""
    times = dataset["time"].values
    rows = []
    for title, metric, dim in _MODEL_ROWS:
        array = part[f"{metric}_quantile"]
        for label, _, values in _elements(array):
            if only and label.split("[")[0] not in only:
                continue
            if "time" in metric:
                if np.all(np.isin(values, [times[0], times[-1]])):
                    continue
                cells = peak_times(values, times, whole)
            else:
                if not _informative(np.asarray(values, dtype=float)):
                    continue
                cells = numbers(values)
            units = _units(array.attrs, values if "time" in metric else None)
            rows.append(Row(f"{dim} {title}", label, units, "", cells))
    return _without_monotone_peaks(rows)


def _without_monotone_peaks(rows: list[Row]) -> list[Row]:
    """Rows without the peak of an element whose peak time was left out (its peak is
    its first or last value in every member)."""
    timed = {(row.title.rsplit(" ", 2)[0], row.label) for row in rows
             if row.title.endswith("peak time")}
    return [row for row in rows if not row.title.endswith(" peak")
            or (row.title.rsplit(" ", 1)[0], row.label) in timed]


def _difference_rows(dataset: xr.Dataset, pair: int, names: Sequence[str]) -> list[Row]:
    """The rows of the stored differences of one pair of variants."""
    rows = []
    for name in names:
        for title, metric in _MEASURE_METRICS:
            variable = f"measure_{name}_{metric}_difference_quantile"
            if variable not in dataset:
                continue
            array = dataset[variable].isel(pair=pair)
            for label, _, values in _elements(array):
                if _informative(np.asarray(values, dtype=float)):
                    units = "days" if metric in ("peak_time", "days_above") \
                        else _units(array.attrs)
                    rows.append(Row(f"{name} {title}", label or "all", units, "",
                                    numbers(values)))
    return rows


def _table(header: list[str], rows: list[tuple[str, Row]]) -> list[str]:
    """The lines of a table whose rows are (variant or pair, row)."""
    cells = [header] + [[first, r.title, r.label, r.units, r.censored, *r.cells]
                        for first, r in rows]
    return ["  " + line for line in aligned(cells, left=4)]


def _variant_heading(part: xr.Dataset, variant: str) -> str:
    title = str(part["variant_title"].values) if "variant_title" in part.coords else ""
    named = f"variant {variant}" + (f": {title}" if title and title != variant else "")
    return f"{named} ({_behind_quantiles(part)})"


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


def summary_text(dataset: xr.Dataset, only: Sequence[str] = (),
                 show_all: bool = False, fitted: str = "") -> str:
    """The summary of a result opened by :func:`ensemble.open_result`.

    Parameters
    ----------
    only : names of measures, compartments or flows: only their rows.
    show_all : also the compartments' and flows' own rows when the result has measures.
    fitted : for a fit's result, the table of the prior and posterior quantiles of the
        parameters it drew, printed after the tables.
    """
    probabilities = dataset["quantile"].values
    whole = whole_days(dataset["time"].values)
    measures = [m for m in measure_names(dataset) if not only or m in only]
    model = show_all or not measure_names(dataset) or bool(
        only and set(only) - set(measure_names(dataset)))
    quantile_header = [f"q{p:g}" for p in probabilities]
    lines = [str(dataset.attrs.get("title", "")),
             f"{dataset.attrs.get('members')} members per variant; quantiles over the "
             "members without any status bit; censored: share of members whose peak is "
             "at the first or last time, its time then printed as a bound", ""]
    rows: list[tuple[str, Row]] = []
    for variant in dataset["variant"].values:
        part = dataset.sel(variant=variant)
        lines.append(_variant_heading(part, str(variant)))
        lines.extend(flagged_text(part, dataset.attrs))
        if "basic_reproduction_number_quantile" in part and not only:
            rows.append((str(variant), Row(
                "R0", "next generation", "1", "",
                numbers(part["basic_reproduction_number_quantile"].values))))
        for name in measures:
            rows.extend((str(variant), row)
                        for row in _measure_rows(dataset, part, name, whole))
        if model:
            rows.extend((str(variant), row) for row in _model_rows(
                dataset, part, whole, [o for o in only if o not in measures]))
    lines.append("")
    lines.extend(_table(["variant", "", "", "units", "censored", *quantile_header], rows))
    differences = [(str(pair), row)
                   for index, pair in enumerate(dataset["pair_name"].values)
                   for row in _difference_rows(dataset, index, measures)] \
        if "pair" in dataset.dims else []
    if differences:
        lines.extend(["", "differences, member by member (the variant minus its "
                          "reference)"])
        lines.extend(_table(["pair", "", "", "units", "", *quantile_header], differences))
    if fitted:
        lines.extend(["", "parameters fitted to the observations (first variant): "
                          "quantiles of the prior and of the posterior members", ""])
        lines.extend("  " + line for line in fitted.splitlines())
    lines.extend(["", str(dataset.attrs.get("caution", ""))])
    return "\n".join(lines) + "\n"
