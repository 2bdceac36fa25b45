"""``ensemble score``: a result file's quantiles against counts observed later, per variant
and horizon, by the weighted interval score and the coverage of the central intervals
(:mod:`ensemble.fit.score`).

The projection scored is a flow measure's predictive quantiles, those of the counts as
they would be observed (``measure_<name>_as_observed_quantile``, observation noise
included: :mod:`ensemble.output.as_observed`) when the result has them (its scenario
observes the measure), else the measure's own (``measure_<name>_quantile``), one value
per window, the window's end as its time; or, for a result without measures, a flow's
counts per report interval (``flow_count_quantile``). Each observed date must be
one of those times; the horizon of a date is its number of days after ``after`` (by
default the last day a fit saw, for the result of ``ensemble fit``, else the projection's
start).
"""

from __future__ import annotations

import datetime
import re
from dataclasses import dataclass

import numpy as np
import xarray as xr

from ensemble.errors import UsageError
from ensemble.fit.counts_file import ObservedCounts
from ensemble.fit.score import interval_coverage, weighted_interval_score
from ensemble.output.as_observed import SUFFIX as AS_OBSERVED


@dataclass(frozen=True)
class ScoreTable:
    """Scores of every variant at every observed date.

    Attributes
    ----------
    series : what was scored (``measure admissions`` or ``flow infection``).
    variants : the variants' names.
    horizons : days after ``after`` of each observed date (observation order).
    observed : the observations (NaN where missing).
    median : (variant, date) the projected medians.
    score : (variant, date) the weighted interval score.
    nominal : each central interval's nominal coverage, widest first.
    inside : (variant, date, interval) 1 inside, 0 outside, NaN where nothing observed.
    """

    series: str
    variants: tuple[str, ...]
    horizons: np.ndarray
    observed: np.ndarray
    median: np.ndarray
    score: np.ndarray
    nominal: np.ndarray
    inside: np.ndarray


def start_of(dataset: xr.Dataset) -> datetime.date | None:
    """The projection's start from the ``time`` units (``days since <start>``), or None."""
    found = re.match(r"days since (\d{4}-\d{2}-\d{2})", str(dataset["time"].attrs.get("units", "")))
    return datetime.date.fromisoformat(found.group(1)) if found else None


def _projection(dataset: xr.Dataset, measure: str | None, flow: str | None,
                file: str) -> tuple[str, xr.DataArray]:
    """The quantiles scored: (description, array over variant, quantile, time)."""
    measures = sorted(name[len("measure_"):-len("_quantile")] for name in dataset.data_vars
                      if re.fullmatch(r"measure_\w+_quantile", name)
                      and dataset[name].dims[-1] != "time"
                      and not re.search(r"_(peak_value|peak_time|total|days_above)"
                                        r"(_difference)?_quantile$", name)
                      and not name.endswith(f"{AS_OBSERVED}_quantile"))
    if flow is not None:
        names = [str(v) for v in dataset["flow_name"].values]
        if flow not in names:
            raise UsageError("--flow", "", flow, f"the result has no flow {flow!r}",
                             f"its flows: {', '.join(names)}")
        return f"flow {flow}", dataset["flow_count_quantile"].isel(flow=names.index(flow))
    if measure is None:
        if len(measures) != 1:
            raise UsageError(file, "", None,
                             "name the series to score with --measure or --flow",
                             f"flow measures in the file: {', '.join(measures) or 'none'}")
        measure = measures[0]
    if measure not in measures:
        raise UsageError("--measure", "", measure, "the result has no flow measure of that name",
                         f"flow measures in the file: {', '.join(measures) or 'none'}")
    predictive = f"measure_{measure}{AS_OBSERVED}_quantile"
    if predictive in dataset:
        return f"measure {measure} as observed (observation noise included)", \
            dataset[predictive]
    array = dataset[f"measure_{measure}_quantile"]
    if "group" in array.dims:
        raise UsageError("--measure", "", measure,
                         "the measure is given per group; score a measure over all groups")
    return f"measure {measure} (without observation noise)", array


def score_result(dataset: xr.Dataset, observed: ObservedCounts, file: str, *,
                 measure: str | None = None, flow: str | None = None,
                 after: str | None = None) -> ScoreTable:
    """Score the result ``dataset`` (opened with ``decode_times=False``) against the
    ``observed`` counts, every observed date a time of the scored series."""
    series, array = _projection(dataset, measure, flow, file)
    start = start_of(dataset)
    days = observed.days_since(start)
    times = np.asarray(dataset[array.dims[-1]].values, dtype=float)
    where = []
    for row, (day, line) in enumerate(zip(days, observed.lines)):
        match = np.flatnonzero(np.isclose(times, day, rtol=0.0, atol=1e-9))
        if match.size == 0:
            raise observed.refused(line, "date", str(observed.dates[row]),
                                   f"not the end of a window of the {series} in {file}",
                                   f"window ends are days {_few(times)} after the start")
        where.append(int(match[0]))
    levels = np.asarray(dataset["quantile"].values, dtype=float)
    quantiles = np.moveaxis(array.transpose("variant", "quantile", ...).values, 1, -1)
    chosen = quantiles[:, where, :]
    nominal, inside = interval_coverage(chosen, levels, observed.values)
    median = chosen[..., int(np.argmin(np.abs(levels - 0.5)))]
    origin = _day_of(after, start) if after is not None else float(
        np.nan_to_num(dataset.attrs.get("fit_last_observed_day", 0.0)))
    return ScoreTable(series, tuple(str(v) for v in dataset["variant_name"].values),
                      days - origin, observed.values, median,
                      weighted_interval_score(chosen, levels, observed.values), nominal,
                      inside)


def _day_of(after: str, start: datetime.date | None) -> float:
    """The day the horizons count from: ``after`` (an ISO date) as days since ``start``."""
    if start is None:
        raise UsageError("--after", "", after,
                         "the result has no start date; its horizons count from day 0")
    try:
        return float((datetime.date.fromisoformat(after) - start).days)
    except ValueError:
        raise UsageError("--after", "", after, "not an ISO date (2027-03-08)") from None


def _few(times: np.ndarray) -> str:
    shown = ", ".join(f"{t:g}" for t in times[:4])
    return shown + (", ..." if times.size > 4 else "")


def format_scores(table: ScoreTable) -> str:
    """The text ``ensemble score`` prints: per variant a row per horizon, then the mean
    score and the empirical coverage of each central interval."""
    lines = [f"scored: {table.series}; weighted interval score (lower is better) and "
             "whether each observation is inside the central intervals"]
    heads = [f"{100 * n:g}%" for n in table.nominal]
    for v, name in enumerate(table.variants):
        lines.append("")
        lines.append(f"variant {name}")
        lines.append("  " + "  ".join(["horizon (days)".rjust(14), "observed".rjust(9),
                                       "median".rjust(9), "score".rjust(9),
                                       *(h.rjust(5) for h in heads)]))
        for d, horizon in enumerate(table.horizons):
            marks = ["-" if np.isnan(x) else ("in" if x else "out")
                     for x in table.inside[v, d]]
            lines.append("  " + "  ".join([f"{horizon:14g}", _number(table.observed[d]),
                                           _number(table.median[v, d]),
                                           _number(table.score[v, d]),
                                           *(m.rjust(5) for m in marks)]))
        seen = ~np.isnan(table.observed)
        coverage = ", ".join(f"{h} interval {100 * np.mean(table.inside[v, seen, k]):.0f}%"
                             for k, h in enumerate(heads)) if seen.any() else "-"
        mean = np.mean(table.score[v, seen]) if seen.any() else np.nan
        lines.append(f"  mean score {_number(mean).strip()} over {int(seen.sum())} "
                     f"observations; coverage: {coverage}")
    return "\n".join(lines) + "\n"


def _number(value: float) -> str:
    return "-".rjust(9) if not np.isfinite(value) else f"{value:9.1f}"
