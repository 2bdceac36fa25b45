"""The result variables of the scenario's measures: their names, dimensions and CF
attributes, the coordinates of their windows (CF time bounds), and their summaries over
members (quantile bands in time, quantiles of each metric, the share of censored peaks,
and each member's differences between pairs of variants).

The bands in time are the quantiles of each measure's trajectory variable
(:class:`.measures.MeasureTrajectory`), which the finish computes as it computes those of
``state``: exact, in memory that does not grow with the members.  The metrics' quantiles
use :func:`.quantiles.member_quantiles` over the same members, those behind every other
quantile of the result (:func:`.quantiles.in_summary`).  The variables are documented in the project's reference
(``ensemble/scenario/reference.md``, result file); attributes follow CF conventions 1.10
(Eaton et al. 2022, "NetCDF Climate and Forecast (CF) Metadata Conventions", sec. 7.1
for ``bounds``, sec. 7.3 for ``cell_methods``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from ensemble.output.as_observed import SUFFIX, first_observations, long_name
from ensemble.output.layout import ResultLayout
from ensemble.output.measures import PREFIX, MeasureShape, measure_shapes
from ensemble.output.quantiles import in_summary, member_quantiles
from ensemble.scenario.schema import Observation

BOUND_DIM = "bound"
"""The dimension of a window's two bounds (its first and last day)."""

PAIR_DIM = "pair"
"""The dimension of the pairs of variants whose members' measures are subtracted."""

QUANTIFIED = ("peak_value", "peak_time", "total", "days_above")
"""The metrics with quantiles over members and differences between variants (those a
measure has)."""

METRIC_LONG_NAMES = {
    "peak_value": "largest value of the {what}",
    "peak_time": "first time of the largest value of the {what}",
    "total": "persons moved over the whole horizon by the {what}",
    "days_above": "days on which the {what} is above {threshold:g}",
    "peak_censored": "1 where the peak of the {what} is at the first or last time, so "
                     "that it may lie outside the horizon",
}


@dataclass(frozen=True)
class MeasureVariable:
    """One result variable of a measure.

    Attributes
    ----------
    name : ``measure_<name>`` or ``measure_<name>_<part>``.
    shape : the measure's :class:`~.measures.MeasureShape`.
    dims, dtype, attrs : as in the file.
    """

    name: str
    shape: MeasureShape
    dims: tuple[str, ...]
    dtype: type
    attrs: dict[str, object]


def pairs(layout: ResultLayout) -> tuple[tuple[int, int], ...]:
    """(variant, reference) index pairs whose members' metrics are subtracted: every
    variant against ``compare_to``, then the scenario's ``[output] pairs`` not already
    there."""
    found: list[tuple[int, int]] = []
    reference = layout.compare_index
    if reference is not None:
        found.extend((v, reference) for v in range(len(layout.variants)) if v != reference)
    for first, second in layout.scenario.output.pairs:
        pair = (layout.variants.index(first), layout.variants.index(second))
        if pair not in found:
            found.append(pair)
    return tuple(found)


def _what(shape: MeasureShape) -> str:
    measure = shape.measure
    if measure.description:
        return measure.description
    if measure.flow is not None:
        return (f"persons moved by flow {measure.flow} over windows of "
                f"{shape.width:g} day(s)")
    return f"measure {measure.name} ({measure.of.text})"


def measure_variables(layout: ResultLayout, time_attrs: Mapping[str, str]
                      ) -> tuple[MeasureVariable, ...]:
    """Every result variable of every measure, in file order.

    Parameters
    ----------
    time_attrs : the ``units`` (and ``calendar``) of the result's times.
    """
    found: list[MeasureVariable] = []
    has_pairs = bool(pairs(layout))
    observed = first_observations(layout)
    for shape in measure_shapes(layout):
        bounds = f"{shape.time_dim}_bounds"
        if shape.bounds is not None and all(v.name != bounds for v in found):
            found.append(MeasureVariable(bounds, shape, (shape.time_dim, BOUND_DIM),
                                         np.float64, {
                "long_name": f"first and last day of each window of {shape.width:g} "
                             "day(s)", **time_attrs}))
        measure = shape.measure
        stem = PREFIX + measure.name
        rows = ("group",) if shape.by_group else ()
        what = _what(shape)
        series: dict[str, object] = {"long_name": what, "units": measure.units}
        if shape.is_flow:
            series["cell_methods"] = f"{shape.time_dim}: sum"
        if layout.keep_members:
            found.append(MeasureVariable(stem, shape, ("variant", "member", *rows,
                                                       shape.time_dim), np.float64, series))
        found.append(MeasureVariable(
            f"{stem}_quantile", shape, ("variant", "quantile", *rows, shape.time_dim),
            np.float64, {**series, "long_name": f"quantile over members of the {what}"}))
        if measure.name in observed:
            found.extend(_as_observed_variables(layout, shape, observed[measure.name]))
        for metric in _metrics(shape):
            units = ({"units": measure.units} if metric not in ("peak_time", "days_above")
                     else dict(time_attrs) if metric == "peak_time" else {"units": "days"})
            long_name = METRIC_LONG_NAMES[metric].format(what=what,
                                                         threshold=measure.threshold or 0)
            found.append(MeasureVariable(f"{stem}_{metric}", shape,
                                         ("variant", "member", *rows), np.float64,
                                         {"long_name": long_name, **units}))
            found.append(MeasureVariable(
                f"{stem}_{metric}_quantile", shape, ("variant", "quantile", *rows),
                np.float64, {"long_name": f"quantile over members of the {long_name}",
                             **units}))
        found.append(MeasureVariable(
            f"{stem}_peak_censored", shape, ("variant", "member", *rows), np.uint8,
            {"long_name": METRIC_LONG_NAMES["peak_censored"].format(what=what),
             "units": "1"}))
        found.append(MeasureVariable(
            f"{stem}_censored_share", shape, ("variant", *rows), np.float64,
            {"long_name": f"share of the members behind the quantiles whose peak of the "
                          f"{what} is at the first or last time", "units": "1"}))
        if not has_pairs:
            continue
        for metric in _metrics(shape):
            units = "days" if metric in ("peak_time", "days_above") else measure.units
            long_name = (f"member's {METRIC_LONG_NAMES[metric].format(what=what, threshold=measure.threshold or 0)}"
                         " in the pair's variant minus the same member's in its reference")
            found.append(MeasureVariable(f"{stem}_{metric}_difference", shape,
                                         (PAIR_DIM, "member", *rows), np.float64,
                                         {"long_name": long_name, "units": units}))
            found.append(MeasureVariable(
                f"{stem}_{metric}_difference_quantile", shape,
                (PAIR_DIM, "quantile", *rows), np.float64,
                {"long_name": f"quantile over members of the {long_name}",
                 "units": units}))
    return tuple(found)


def _as_observed_variables(layout: ResultLayout, shape: MeasureShape,
                           observation: Observation) -> list[MeasureVariable]:
    """The variables of an observed measure's series as observed (:mod:`.as_observed`):
    every member's (with kept members) and its quantiles, the predictive intervals of
    the counts."""
    stem = PREFIX + shape.name + SUFFIX
    attrs: dict[str, object] = {"long_name": long_name(observation), "units": "1"}
    if shape.is_flow:
        attrs["cell_methods"] = f"{shape.time_dim}: sum"
    found = []
    if layout.keep_members:
        found.append(MeasureVariable(stem, shape, ("variant", "member", shape.time_dim),
                                     np.float64, attrs))
    found.append(MeasureVariable(
        f"{stem}_quantile", shape, ("variant", "quantile", shape.time_dim), np.float64,
        {**attrs, "long_name": f"quantile over members of the {attrs['long_name']}: "
                               "predictive intervals of the observed counts"}))
    return found


def _metrics(shape: MeasureShape) -> tuple[str, ...]:
    """The quantified metrics ``shape``'s measure has."""
    return tuple(m for m in QUANTIFIED
                 if (m != "total" or shape.is_flow)
                 and (m != "days_above" or shape.measure.threshold is not None))


def measure_coordinates(layout: ResultLayout, time_attrs: Mapping[str, str]
                        ) -> dict[str, tuple[tuple[str, ...], np.ndarray, dict[str, object]]]:
    """The coordinates the measures add, as (dims, values, attrs): each window's end,
    with ``bounds`` naming the variable of its first and last day (CF sec. 7.1;
    :func:`window_bounds`), and the pairs' labels."""
    coords: dict[str, tuple[tuple[str, ...], np.ndarray, dict[str, object]]] = {}
    for shape in measure_shapes(layout):
        if shape.bounds is None or shape.time_dim in coords:
            continue
        coords[shape.time_dim] = ((shape.time_dim,), shape.times, {
            **time_attrs, "long_name": f"end of a window of {shape.width:g} day(s)",
            "bounds": f"{shape.time_dim}_bounds"})
    found = pairs(layout)
    if found:
        names = [layout.variants[v] for v, _ in found]
        references = [layout.variants[r] for _, r in found]
        coords["pair_name"] = ((PAIR_DIM,), np.array(
            [f"{a} minus {b}" for a, b in zip(names, references)], dtype=object),
            {"long_name": "pair of variants: the variant minus its reference"})
        coords["pair_variant"] = ((PAIR_DIM,), np.array(names, dtype=object),
                                  {"long_name": "variant of the pair"})
        coords["pair_reference"] = ((PAIR_DIM,), np.array(references, dtype=object),
                                    {"long_name": "reference variant of the pair"})
    return coords


def window_bounds(layout: ResultLayout) -> dict[str, np.ndarray]:
    """``time_<window>d_bounds`` of every window length: (windows, 2) the first and last
    day of each window, days since the start."""
    return {f"{shape.time_dim}_bounds": shape.bounds for shape in measure_shapes(layout)
            if shape.bounds is not None}


def finish_measures(layout: ResultLayout, per_member: dict[str, np.ndarray],
                    probabilities: Sequence[float]) -> None:
    """Add the measures' summaries of their metrics to ``per_member`` (name ->
    (variant, member, ...) arrays of every chunk; the bands in time are the finish's,
    :class:`.measures.MeasureTrajectory`).

    Adds each metric's ``_quantile`` (variant, quantile, rows), ``_censored_share``
    (variant, rows), and for
    each pair (:func:`pairs`) each metric's ``_difference`` (pair, member, rows) and
    ``_difference_quantile`` (pair, quantile, rows); a member counts in a pair's
    quantiles only when it is behind the quantiles of both variants.
    """
    per_member.update(window_bounds(layout))
    included = in_summary(per_member["status"])
    variants = range(len(layout.variants))
    compared = pairs(layout)
    for shape in measure_shapes(layout):
        stem = PREFIX + shape.name
        censored = per_member[f"{stem}_peak_censored"].astype(np.float64)
        per_member[f"{stem}_censored_share"] = np.stack(
            [censored[v][included[v]].mean(axis=0) if included[v].any()
             else np.full(censored.shape[2:], np.nan) for v in variants])
        for metric in _metrics(shape):
            values = per_member[f"{stem}_{metric}"]
            per_member[f"{stem}_{metric}_quantile"] = np.stack(
                [member_quantiles(values[v], probabilities, included[v]) for v in variants])
            if not compared:
                continue
            difference = np.stack([values[a] - values[b] for a, b in compared])
            both = np.stack([included[a] & included[b] for a, b in compared])
            per_member[f"{stem}_{metric}_difference"] = difference
            per_member[f"{stem}_{metric}_difference_quantile"] = np.stack(
                [member_quantiles(difference[p], probabilities, both[p])
                 for p in range(len(compared))])


def file_values(variable: MeasureVariable, array: np.ndarray) -> np.ndarray:
    """``array`` (with an axis of rows) in the file's shape of ``variable``: the axis of
    rows (before the times of a series, else last) dropped when the measure has one."""
    array = np.asarray(array)
    if variable.shape.by_group or variable.dims[-1] == BOUND_DIM:
        return array
    rows_axis = -2 if variable.dims[-1] == variable.shape.time_dim else -1
    return np.take(array, 0, axis=rows_axis)


def find_variable(layout: ResultLayout, name: str,
                  time_attrs: Mapping[str, str]) -> MeasureVariable | None:
    """The measure variable ``name``, or None when no measure has it."""
    if not name.startswith(PREFIX) and not name.endswith("_bounds"):
        return None
    return next((v for v in measure_variables(layout, time_attrs) if v.name == name), None)
