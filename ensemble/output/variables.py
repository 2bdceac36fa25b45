"""The one table of trajectory variables: every series a result holds per member and
reported time, and how each is described and reduced.

Each entry says where a chunk's values come from (a series of the chunk's
:class:`~ensemble.records.ChunkResult`, or a function of it), which labelled dimension
its rows run along, its CF attributes, and the per-member metrics made from it.  The
work journal saves every entry of every chunk, the finish reduces each to quantiles over
members (and keeps every member's values when asked), the metrics scan each, and part
files of a sharded run store the chunk result's own series from which the others follow:
a new per-member series is one entry here.

The variables and their attributes are documented in the project's reference
(``ensemble/scenario/reference.md``, result file); units follow CF conventions 1.10
(Eaton et al. 2022, "NetCDF Climate and Forecast (CF) Metadata Conventions", sec. 3.1:
``"1"`` for counts; sec. 7.3 for ``cell_methods``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np

from ensemble.records import ChunkResult

PERSONS = "number of persons"

MetricKind = Literal["peak_value", "peak_time", "total"]
"""What a metric takes of a member's trajectory row: its largest value, the first
reported time of that value, or the sum of its values over the reported times."""


@dataclass(frozen=True)
class Metric:
    """A per-member metric of a trajectory variable (one value per member and row).

    Attributes
    ----------
    name : the result variable, e.g. ``"peak_value"``.
    kind : what it takes of each trajectory row (:data:`MetricKind`).
    long_name : its CF ``long_name``.
    """

    name: str
    kind: MetricKind
    long_name: str


@dataclass(frozen=True)
class TrajectoryVariable:
    """A series with one value per member, row and reported time.

    Attributes
    ----------
    name : the result variable holding every member's values; its quantiles over
        members are ``<name>_quantile``.
    rows : the labelled dimension its rows run along (``"compartment"``, ``"flow"``),
        each split by group when the model has groups (flat rows ``r * n_groups + g``).
    long_name, units : CF attributes.
    source : the :class:`~ensemble.records.ChunkResult` series its values are made from.
    derive : the values from the source's (members, rows, times) array, or None when
        they are the source's own.
    first_report : the first reported time with a value (a count over the interval that
        ends at a time has none at the first time); the metrics start there.
    metrics : the per-member metrics made from it.
    cell_methods : CF ``cell_methods``, or None.
    row_total, time_total : its rows and times when they are not the labels of ``rows``
        times the groups and the reported times (a measure's rows and windows), else None.
    """

    name: str
    rows: str
    long_name: str
    units: str
    source: str
    derive: Callable[[np.ndarray], np.ndarray] | None = None
    first_report: int = 0
    metrics: tuple[Metric, ...] = ()
    cell_methods: str | None = None
    row_total: int | None = None
    time_total: int | None = None

    def values(self, result: ChunkResult) -> np.ndarray:
        """The (members, rows, times) values of a chunk of members."""
        source = getattr(result, self.source)
        return source if self.derive is None else self.derive(source)


TRAJECTORIES: tuple[TrajectoryVariable, ...] = (
    TrajectoryVariable(
        name="state", rows="compartment", source="state", units="1",
        long_name=f"{PERSONS} in the compartment",
        metrics=(Metric("peak_value", "peak_value",
                        f"largest reported {PERSONS} in the compartment"),
                 Metric("peak_time", "peak_time",
                        f"first reported time of the largest {PERSONS} in the compartment"))),
    TrajectoryVariable(
        name="flow_count", rows="flow", source="flow_count", units="1",
        long_name=f"{PERSONS} moved by the flow over the report interval ending at time",
        cell_methods="time: sum", first_report=1,
        metrics=(Metric("flow_peak_value", "peak_value",
                        f"largest {PERSONS} moved by the flow over one report interval"),
                 Metric("flow_peak_time", "peak_time",
                        f"end of the first report interval with the largest {PERSONS} "
                        "moved by the flow"),
                 Metric("total_flow", "total",
                        f"{PERSONS} moved by the flow over the whole horizon"))),
)
"""The trajectory variables of every result, in file order; a result with measures
has one more per measure (:func:`ensemble.output.measures.trajectory_variables`)."""

TRAJECTORY_NAMES = tuple(variable.name for variable in TRAJECTORIES)

METRICS: tuple[tuple[Metric, TrajectoryVariable], ...] = tuple(
    (metric, variable) for variable in TRAJECTORIES for metric in variable.metrics)
"""Every per-member metric with the trajectory variable it is made from, in file order."""

METRIC_NAMES = tuple(metric.name for metric, _ in METRICS)


def trajectory(name: str) -> TrajectoryVariable:
    """The trajectory variable ``name``.

    Raises
    ------
    KeyError : no such trajectory variable.
    """
    for variable in TRAJECTORIES:
        if variable.name == name:
            return variable
    raise KeyError(f"{name!r} is not a trajectory variable")


def metric(name: str) -> tuple[Metric, TrajectoryVariable]:
    """The metric ``name`` and the trajectory variable it is made from.

    Raises
    ------
    KeyError : no such metric.
    """
    for found, variable in METRICS:
        if found.name == name:
            return found, variable
    raise KeyError(f"{name!r} is not a metric")


@dataclass(frozen=True)
class MemberValue:
    """A number per member that is no series in time: a (members,) float64 field of the
    chunk's :class:`~ensemble.records.ChunkResult` of the same name, stored as the result
    variable (variant, member).

    Attributes
    ----------
    name : the field and the result variable.
    long_name, units : CF attributes.
    summarised : its quantiles over members are ``<name>_quantile`` (variant, quantile).
    """

    name: str
    long_name: str
    units: str
    summarised: bool = False


MEMBER_VALUES: tuple[MemberValue, ...] = (
    MemberValue("step_error", "estimated error of the stored trajectory relative to the "
                              "tolerance (the member passes when at most 1)", "1"),
    MemberValue("observed_order", "observed order of convergence of the integration method",
                "1"),
    MemberValue("basic_reproduction_number", "basic reproduction number R0 by the "
                "next-generation matrix at the disease-free start", "1", summarised=True),
)
"""Every per-member value of a result, in file order."""

MEMBER_VALUE_NAMES = tuple(value.name for value in MEMBER_VALUES)


def member_value(name: str) -> MemberValue:
    """The per-member value ``name``.

    Raises
    ------
    KeyError : no such value.
    """
    for value in MEMBER_VALUES:
        if value.name == name:
            return value
    raise KeyError(f"{name!r} is not a per-member value")
