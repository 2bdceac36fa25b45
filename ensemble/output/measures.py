"""The scenario's measures per member: each measure's series from a chunk's
trajectories, and its metrics (peak value and time, whether the peak is censored, the
total of a flow, the days above a threshold).

A measure of compartments (a stock) is the expression of its ``of`` key, lowered by the
model's one lowering of the expression language (:mod:`ensemble.model.lowering`) and
evaluated by its numpy evaluator (:class:`ensemble.model.numpy_program.NumpyProgram`)
over the reported states, at every reported time.  A measure of a flow adds the flow's
counts over windows of whole report intervals: window ``k`` covers the days
``[k w, (k + 1) w]`` from the start and is labelled by its end; a last window the
horizon cuts short is left out (the project's reference, ``ensemble/scenario/reference.md``,
``[[measures]]``).  Groups are added up in group order, so a member's values are the same
bits whatever chunk it was computed in.

Each measure's series is a trajectory variable of its own (:class:`MeasureTrajectory`):
the work journal saves it with a chunk's trajectories (past the pilot only its
candidates for the quantiles), and the finish reduces it to exact quantile bands as it
reduces ``state``, so memory does not grow with the members when they are not kept.  Its
metrics, one number per member and row, are computed when a chunk is saved.  A measure
that an ``[[observations]]`` table observes has a second trajectory variable, the measure
as it would be observed (:class:`AsObservedTrajectory`, :mod:`.as_observed`), reduced the
same way (it has no metrics).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ensemble.model.ir import StateRef
from ensemble.model.lowering import ExpressionLowering, Value, Vector
from ensemble.model.numpy_program import NumpyProgram
from ensemble.output.as_observed import SUFFIX, as_observed, first_observations, long_name
from ensemble.output.layout import ResultLayout
from ensemble.output.variables import TRAJECTORIES, TrajectoryVariable
from ensemble.records import ChunkResult
from ensemble.scenario.schema import Measure, Observation

PREFIX = "measure_"
"""Every result variable of a measure is named ``measure_<name>...``."""


@dataclass(frozen=True)
class MeasureShape:
    """Where a measure's values lie in the result.

    Attributes
    ----------
    measure : the scenario's measure.
    group_rows : its rows: one per group (``groups = "each"`` with model groups), else
        one; each a tuple of the group indices added up.
    times : (n,) the times its values are labelled by, days since the start (a flow's:
        the ends of its windows).
    bounds : (n, 2) each value's first and last day, or None for a stock (values at an
        instant).
    time_dim : the dimension of ``times``: ``"time"`` for a stock, else one per window
        length (:func:`window_dim`).
    """

    measure: Measure
    group_rows: tuple[tuple[int, ...], ...]
    times: np.ndarray
    bounds: np.ndarray | None
    time_dim: str

    @property
    def name(self) -> str:
        return self.measure.name

    @property
    def is_flow(self) -> bool:
        """Whether the measure counts a flow over windows (else it is a stock)."""
        return self.measure.flow is not None

    @property
    def by_group(self) -> bool:
        """Whether the result gives one row per group (a ``group`` dimension)."""
        return self.measure.groups == "each" and len(self.group_rows) > 1

    @property
    def width(self) -> float:
        """Days one value covers: a flow's window, or a stock's report interval."""
        if self.bounds is not None:
            return float(self.bounds[0, 1] - self.bounds[0, 0])
        return float(self.times[1] - self.times[0]) if len(self.times) > 1 else 0.0


def window_dim(window_days: float) -> str:
    """The dimension of the windows of ``window_days`` days: ``time_7d``, ``time_0_5d``."""
    text = f"{window_days:g}".replace(".", "_").replace("-", "_")
    return f"time_{text}d"


def measure_shapes(layout: ResultLayout) -> tuple[MeasureShape, ...]:
    """The :class:`MeasureShape` of every measure of the layout's scenario, in file
    order."""
    shapes = []
    groups = layout.groups or ()
    for measure in layout.scenario.measures:
        if measure.groups == "each" and groups:
            rows = tuple((g,) for g in range(len(groups)))
        elif isinstance(measure.groups, tuple):
            rows = (tuple(groups.index(g) for g in measure.groups),)
        else:
            rows = (tuple(range(layout.n_groups)),)
        if measure.flow is None:
            shapes.append(MeasureShape(measure, rows, np.asarray(layout.times), None,
                                       "time"))
            continue
        every = float(layout.scenario.solver.report_every)
        per_window = int(measure.window / layout.scenario.solver.report_every)
        count = (layout.n_reports - 1) // per_window
        ends = np.asarray(layout.times[per_window::per_window][:count], dtype=np.float64)
        bounds = np.stack([ends - per_window * every, ends], axis=1)
        shapes.append(MeasureShape(measure, rows, ends, bounds,
                                   window_dim(float(measure.window))))
    return tuple(shapes)


class _CompartmentLowering(ExpressionLowering):
    """A measure's expression with each compartment's name standing for its reported
    rows (``c * n_groups + g``)."""

    def __init__(self, layout: ResultLayout):
        super().__init__(layout.n_groups)
        self.layout = layout

    def name(self, name: str) -> Value:
        first = self.layout.compartments.index(name) * self.layout.n_groups
        rows = tuple(StateRef(first + g) for g in range(self.layout.n_groups))
        return Vector(rows) if self.layout.groups else rows[0]


def _by_group(layout: ResultLayout, measure: Measure, state: np.ndarray) -> np.ndarray:
    """(members, groups, times) values of a stock measure's expression per group."""
    value = _CompartmentLowering(layout).lower(measure.of.tree)
    roots = list(value.items) if isinstance(value, Vector) else [value] * layout.n_groups
    program = NumpyProgram(f"measure_{measure.name}", roots)
    members, rows, times = state.shape
    flat = np.ascontiguousarray(state.transpose(1, 0, 2)).reshape(rows, members * times)
    out = np.empty((layout.n_groups, members * times))
    program(0.0, flat, np.empty((0, members * times)), np.empty((0, members * times)), out)
    return out.reshape(layout.n_groups, members, times).transpose(1, 0, 2)


def _added_groups(values: np.ndarray, rows: tuple[tuple[int, ...], ...]) -> np.ndarray:
    """(members, len(rows), times): each row the sum of its groups, in group order."""
    result = np.empty((values.shape[0], len(rows), values.shape[2]))
    for r, groups in enumerate(rows):
        result[:, r] = values[:, groups[0]]
        for g in groups[1:]:
            result[:, r] += values[:, g]
    return result


def measure_series(layout: ResultLayout, shape: MeasureShape,
                   trajectories: Mapping[str, np.ndarray]) -> np.ndarray:
    """(members, rows, times) a measure's values of a chunk of members.

    Parameters
    ----------
    trajectories : ``state`` and ``flow_count`` of the chunk, (members, rows, n_reports).
    """
    measure = shape.measure
    if measure.flow is None:
        return _added_groups(_by_group(layout, measure, trajectories["state"]),
                             shape.group_rows)
    flow = layout.flows.index(measure.flow) * layout.n_groups
    counts = trajectories["flow_count"][:, flow:flow + layout.n_groups]
    per_window = int(measure.window / layout.scenario.solver.report_every)
    count = len(shape.times)
    used = counts[:, :, 1:1 + count * per_window]
    windows = used.reshape(used.shape[0], used.shape[1], count, per_window)
    summed = windows[..., 0].copy()
    for k in range(1, per_window):
        summed += windows[..., k]
    return _added_groups(summed, shape.group_rows)


def flow_totals(layout: ResultLayout, shape: MeasureShape,
                trajectories: Mapping[str, np.ndarray]) -> np.ndarray:
    """(members, rows) persons a flow measure moved over the whole horizon (every report
    interval, the last window's remainder included), added in time order."""
    flow = layout.flows.index(shape.measure.flow) * layout.n_groups
    counts = trajectories["flow_count"][:, flow:flow + layout.n_groups, 1:]
    total = np.zeros(counts.shape[:2])
    for t in range(counts.shape[2]):
        total += counts[:, :, t]
    return _added_groups(total[:, :, np.newaxis], shape.group_rows)[:, :, 0]


@dataclass(frozen=True)
class MeasureTrajectory(TrajectoryVariable):
    """A measure's series as a trajectory variable: (members, rows, times) of a chunk,
    rows and times the measure's own (:class:`MeasureShape`).

    Attributes
    ----------
    layout : the result's layout, which the series is computed in.
    shape : the measure's :class:`MeasureShape`.
    """

    layout: ResultLayout | None = None
    shape: MeasureShape | None = None

    def values(self, result: ChunkResult) -> np.ndarray:
        """The (members, rows, times) measure of a chunk of members."""
        return measure_series(self.layout, self.shape, {
            variable.name: variable.values(result) for variable in TRAJECTORIES})


@dataclass(frozen=True)
class AsObservedTrajectory(MeasureTrajectory):
    """An observed measure's series as it would be observed (:mod:`.as_observed`):
    (members, 1, times) of a chunk, the measure's times.

    Attributes
    ----------
    observation : the ``[[observations]]`` table whose distribution it follows.
    """

    observation: Observation | None = None

    def values(self, result: ChunkResult) -> np.ndarray:
        """The (members, 1, times) series as observed of a chunk of members."""
        return as_observed(self.observation, self.layout.scenario.seed,
                           super().values(result), result)


def measure_trajectories(layout: ResultLayout) -> tuple[MeasureTrajectory, ...]:
    """One :class:`MeasureTrajectory` per measure of the layout's scenario, in file
    order, then one :class:`AsObservedTrajectory` per observed measure."""
    shapes = measure_shapes(layout)
    observed = first_observations(layout)
    return tuple(
        MeasureTrajectory(name=PREFIX + shape.name, rows="measure", source="state"
                          if shape.measure.flow is None else "flow_count",
                          long_name=shape.measure.description or shape.name,
                          units=shape.measure.units, row_total=len(shape.group_rows),
                          time_total=len(shape.times), layout=layout, shape=shape)
        for shape in shapes) + tuple(
        AsObservedTrajectory(name=PREFIX + shape.name + SUFFIX, rows="measure",
                             source="state" if shape.measure.flow is None else "flow_count",
                             long_name=long_name(observed[shape.name]), units="1",
                             row_total=1, time_total=len(shape.times), layout=layout,
                             shape=shape, observation=observed[shape.name])
        for shape in shapes if shape.name in observed)


def trajectory_variables(layout: ResultLayout) -> tuple[TrajectoryVariable, ...]:
    """Every trajectory variable of the layout's result: those of
    :data:`~.variables.TRAJECTORIES`, then one per measure."""
    return (*TRAJECTORIES, *measure_trajectories(layout))


def find_trajectory(layout: ResultLayout, name: str) -> TrajectoryVariable:
    """The trajectory variable ``name`` of the layout's result.

    Raises
    ------
    KeyError : no such trajectory variable.
    """
    for variable in trajectory_variables(layout):
        if variable.name == name:
            return variable
    raise KeyError(f"{name!r} is not a trajectory variable")


def chunk_trajectories(layout: ResultLayout, result: ChunkResult) -> dict[str, np.ndarray]:
    """Every trajectory variable's (members, rows, times) values of a chunk, each
    measure computed once from the chunk's ``state`` and ``flow_count`` (and each
    observed measure's series as observed from the measure's)."""
    values = {variable.name: variable.values(result) for variable in TRAJECTORIES}
    for shape in measure_shapes(layout):
        values[PREFIX + shape.name] = measure_series(layout, shape, values)
    seed = layout.scenario.seed
    for name, observation in first_observations(layout).items():
        values[PREFIX + name + SUFFIX] = as_observed(observation, seed,
                                                     values[PREFIX + name], result)
    return values


def series_metrics(shape: MeasureShape, series: np.ndarray) -> dict[str, np.ndarray]:
    """Per-member metrics of (members, rows, times) ``series``: ``peak_value``,
    ``peak_time`` (the first time of the peak), ``peak_censored`` (1 where the peak is at
    the first or last time, so the true peak may lie outside the horizon) and, with a
    threshold, ``days_above`` (days of the values above it: the report interval for each
    time of a stock, the window for each window of a flow).  A member with a NaN has no
    peak (NaN) and is not censored."""
    with np.errstate(invalid="ignore"):
        missing = np.isnan(series).any(axis=-1)
        index = np.argmax(np.where(np.isnan(series), -np.inf, series), axis=-1)
        peak = np.take_along_axis(series, index[..., np.newaxis], axis=-1)[..., 0]
        peak[missing] = np.nan
        when = shape.times[index]
        when[missing] = np.nan
        last = series.shape[-1] - 1
        censored = ((index == 0) | (index == last)) & ~missing
        metrics = {"peak_value": peak, "peak_time": when,
                   "peak_censored": censored.astype(np.uint8)}
        threshold = shape.measure.threshold
        if threshold is not None:
            above = (series > threshold).sum(axis=-1) * shape.width
            above[missing] = np.nan
            metrics["days_above"] = above.astype(np.float64)
    return metrics


def member_measures(layout: ResultLayout, trajectories: Mapping[str, np.ndarray]
                    ) -> dict[str, np.ndarray]:
    """Every measure's per-member metrics of a chunk, ``measure_<name>_<metric>``
    (members, rows), from its ``trajectories`` (:func:`chunk_trajectories`, the
    measures' series included)."""
    arrays: dict[str, np.ndarray] = {}
    for shape in measure_shapes(layout):
        stem = PREFIX + shape.name
        for metric, values in series_metrics(shape, trajectories[stem]).items():
            arrays[f"{stem}_{metric}"] = values
        if shape.is_flow:
            arrays[f"{stem}_total"] = flow_totals(layout, shape, trajectories)
    return arrays
