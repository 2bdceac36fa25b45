"""Scenario model -> :class:`LoweredModel`: scalar rate trees, their state derivatives,
the stoichiometry that turns flow rates into the right-hand side, and the values that are
constant in time per member (:mod:`ensemble.model.constants`).

The right-hand side of every model is ``dy/dt = stoichiometry @ rates(t, y)``; its
Jacobian with respect to the state is ``stoichiometry @ d rates / d y``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from ensemble.model.constants import ConstantTrees, lower_constants, time_varying_parameters
from ensemble.model.derivatives import partial_derivatives
from ensemble.model.ir import Const, ParamRef, ScalarNode, ScheduleRef, StateRef, TimeRef
from ensemble.model.elements import StateLayout, model_elements
from ensemble.model.lowering import Reduction
from ensemble.model.sharing import reduce_shared
from ensemble.model.lowering import (ExpressionLowering, Value, Vector, constant_matrix,
                                     fold_sum)
from ensemble.scenario.schema import Derived, Flow, Parameter, Scenario, Schedule, Variant


@dataclass(frozen=True)
class ScheduleSlot:
    """One row of time-varying values: element ``element`` of schedule parameter
    ``parameter`` (element 0 for a scalar schedule).

    ``days`` are the knots (float64, strictly increasing); the values at the knots are
    per member and come from the parameter design.  ``between == "step"``: every stage
    of a step that starts at t uses the value in force at t (the last knot <= t, the first
    value before the first knot).  ``"linear"``: interpolated at the stage time, held
    constant outside the knots.
    """

    name: str
    parameter: str
    element: int
    days: np.ndarray
    between: Literal["step", "linear"]


@dataclass(frozen=True)
class LoweredModel:
    """One variant's model in the scalar form every integrator backend consumes.

    The states are the stages of the compartments in every group and the flow elements
    the moves between single states (:mod:`ensemble.model.elements`); without stages or
    flows between groups, state ``c * n_groups + g`` is compartment c in group g and flow
    element ``f * n_groups + g`` flow f in group g.  A result reports the rows
    ``reported_states`` and ``reported_flows`` add up.

    Attributes
    ----------
    compartments, groups : the reported compartment labels (``groups`` is None without
        strata).
    n_groups : 1 without strata.
    flows : the reported flow names.
    state_labels : one per state row, ``"S"``, ``"S[child]"`` or ``"E:2[child]"``.
    state_compartments : the compartment of each state row.
    rates : one scalar tree per flow element (persons per day).
    rate_derivatives : per flow element, the non-zero partial derivatives
        ``(state index, tree)`` of that rate with respect to the state, states ascending
        (:mod:`ensemble.model.derivatives`).
    stoichiometry : (n_states, n_flow_elements) float64 of -1, 0, +1.
    reported_states : per reported state row (``c * n_groups + g``), the state rows whose
        sum it is.
    reported_flows : per reported flow row (``f * n_groups + g``), the flow elements whose
        sum it is.
    parameter_slots : names of the rows of the per-member constant parameter array,
        ``"beta"`` or ``"susceptibility[child]"``.
    schedule_slots : the rows of time-varying values (:class:`ScheduleSlot`).
    population : (n_groups,) float64.
    closed : True when no flow enters or leaves the model (population conserved).
    constants : the values constant in time per member: the parameter slots, the
        schedule values at their knots and the initial counts, as trees of the drawn and
        given values (:mod:`ensemble.model.constants`).
    reductions : every ``sum`` and matrix-times-vector the rates hold, as lowered
        (:class:`ensemble.model.lowering.Reduction`), for code generators that loop over
        groups (:mod:`ensemble.model.grouped`).
    """

    compartments: tuple[str, ...]
    groups: tuple[str, ...] | None
    n_groups: int
    flows: tuple[str, ...]
    state_labels: tuple[str, ...]
    state_compartments: tuple[str, ...]
    rates: tuple[ScalarNode, ...]
    rate_derivatives: tuple[tuple[tuple[int, ScalarNode], ...], ...]
    stoichiometry: np.ndarray
    reported_states: tuple[tuple[int, ...], ...]
    reported_flows: tuple[tuple[int, ...], ...]
    parameter_slots: tuple[str, ...]
    schedule_slots: tuple[ScheduleSlot, ...]
    population: np.ndarray
    closed: bool
    constants: ConstantTrees
    reductions: tuple[Reduction, ...] = ()

    def __reduce__(self) -> tuple:
        """Pickled once per process and rebuilt once per receiving process
        (:mod:`ensemble.model.sharing`): every task of a run carries the model."""
        return reduce_shared(self)

    @property
    def n_states(self) -> int:
        return len(self.state_labels)

    @property
    def n_flow_elements(self) -> int:
        return len(self.rates)

    def reported_state(self, state: np.ndarray) -> np.ndarray:
        """(M, reported state rows, times) from (M, n_states, times): each compartment
        the sum of its stages, added in stage order (``state`` itself when every
        reported row is one state, in order)."""
        return _add_rows(state, self.reported_states)

    def reported_flow_count(self, flow_count: np.ndarray) -> np.ndarray:
        """(M, reported flow rows, times) from (M, n_flow_elements, times): each flow
        per group the sum of its elements, added in element order; a row without
        elements is 0 (NaN where the first element is NaN, as at the first time)."""
        return _add_rows(flow_count, self.reported_flows)

    def initial_states(self, counts: np.ndarray) -> np.ndarray:
        """(n_states, M) initial state from (compartments x groups, M) counts: a
        compartment's count is shared equally between its stages (the occupancy of a
        chain of equal stages under a steady inflow; the dwell time already spent by the
        persons present at the start is not known)."""
        n_rows = len(self.population) * len(set(self.state_compartments))
        if self.n_states == n_rows:
            return counts
        result = np.empty((self.n_states, counts.shape[1]))
        for row, states in enumerate(self.reported_states[:n_rows]):
            for state in states:
                np.divide(counts[row], len(states), out=result[state])
        return result


def _add_rows(values: np.ndarray, rows: tuple[tuple[int, ...], ...]) -> np.ndarray:
    """(M, len(rows), times): row r the sum of ``values[:, rows[r], :]`` in order."""
    if len(rows) == values.shape[1] and all(r == (i,) for i, r in enumerate(rows)):
        return values
    result = np.empty((values.shape[0], len(rows), values.shape[2]))
    for r, parts in enumerate(rows):
        if not parts:
            np.copyto(result[:, r], np.where(np.isnan(values[:, 0]), np.nan, 0.0))
            continue
        np.copyto(result[:, r], values[:, parts[0]])
        for part in parts[1:]:
            np.add(result[:, r], values[:, part], out=result[:, r])
    return result


def lower_model(scenario: Scenario, variant: Variant) -> LoweredModel:
    """Lower ``scenario``'s model with ``variant``'s parameters and matrices.

    Every flow's rate becomes one scalar tree per group element: compartments and ``N``
    become state rows, parameters constant in time become per-member slots (only those a
    rate uses, in file order), schedules become schedule slots, and derived parameters
    that vary in time (or are matrices) are substituted into the rates.  Matrices are
    constants whose zero entries are structural (:mod:`ensemble.model.lowering`).
    Constants are folded in float64 (:func:`ensemble.model.ir.apply`).
    """
    model = scenario.model
    layout = StateLayout.of(model)
    lowering = _RateLowering(scenario, variant, layout)
    parts = model_elements(model, layout, lowering.rate_of, scenario.output.show_stages)
    rates = [element.rate for element in parts.elements]
    stoichiometry = np.zeros((layout.n_states, len(rates)))
    for k, element in enumerate(parts.elements):
        if element.source is not None:
            stoichiometry[element.source, k] -= 1.0
        if element.target is not None:
            stoichiometry[element.target, k] += 1.0
    return LoweredModel(
        compartments=parts.compartments,
        groups=layout.groups,
        n_groups=layout.n_groups,
        flows=parts.flows,
        state_labels=layout.state_labels(),
        state_compartments=layout.state_compartments(),
        rates=tuple(rates),
        rate_derivatives=tuple(partial_derivatives(rate) for rate in rates),
        stoichiometry=_read_only(stoichiometry),
        reported_states=parts.state_rows,
        reported_flows=parts.flow_rows,
        parameter_slots=lowering.parameter_slots,
        schedule_slots=lowering.schedule_slots,
        population=_read_only(np.asarray(model.population, dtype=np.float64)),
        closed=all(e.source is not None and e.target is not None for e in parts.elements),
        constants=lower_constants(scenario, variant, lowering.slot_elements,
                                  [(slot.parameter, slot.element)
                                   for slot in lowering.schedule_slots]),
        reductions=tuple(lowering.reductions),
    )


def _read_only(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


class _RateLowering(ExpressionLowering):
    """Names in rates: compartments and ``N`` are state rows, ``t`` the time, parameters
    constant in time per-member slots, schedules schedule slots; derived parameters that
    vary in time (or are matrices) are substituted."""

    def __init__(self, scenario: Scenario, variant: Variant, layout: StateLayout):
        model = scenario.model
        super().__init__(model.n_groups)
        self._groups = model.groups
        self._grouped = bool(model.groups)
        self._layout = layout
        self._bound: dict[str, Value] = {}
        in_n = [c for c in model.compartments if c not in model.exclude_from_N]
        self._n_total = tuple(fold_sum([StateRef(s) for c in in_n
                                        for s in layout.states_of(c, g)])
                              for g in range(self.n_groups))
        self._parameters = scenario.variant_parameters(variant)
        self._matrices = scenario.variant_matrices(variant)
        self._varying = time_varying_parameters(self._parameters)
        self._values: dict[str, Value] = {}
        self._slot_start: dict[str, int] = {}
        self._schedule_start: dict[str, int] = {}
        self.parameter_slots: tuple[str, ...] = ()
        self.slot_elements: tuple[tuple[str, int], ...] = ()
        self.schedule_slots: tuple[ScheduleSlot, ...] = ()
        self._number_slots(self._parameters_used([flow.rate.names for flow in model.flows]))

    def _number_slots(self, used: set[str]) -> None:
        """Rows of the per-member parameters and of the schedules, file order."""
        groups = self._groups
        slots: list[tuple[str, int]] = []
        schedules: list[ScheduleSlot] = []
        for name, parameter in self._parameters.items():
            if name not in used or self._inlined(name):
                continue
            elements = range(self.n_groups if parameter.shape == "vector" else 1)
            if isinstance(parameter.form, Schedule):
                self._schedule_start[name] = len(schedules)
                days = np.array([float(d) for d in parameter.form.days], dtype=np.float64)
                schedules.extend(
                    ScheduleSlot(_slot_label(name, parameter, groups, g), name, g,
                                 _read_only(days.copy()), parameter.form.between)
                    for g in elements)
            else:
                self._slot_start[name] = len(slots)
                slots.extend((name, g) for g in elements)
        self.slot_elements = tuple(slots)
        self.parameter_slots = tuple(_slot_label(name, self._parameters[name], groups, g)
                                     for name, g in slots)
        self.schedule_slots = tuple(schedules)

    def _inlined(self, name: str) -> bool:
        """Derived parameters that vary in time or are matrices are substituted."""
        parameter = self._parameters[name]
        return isinstance(parameter.form, Derived) and (
            name in self._varying or parameter.shape == "matrix")

    def _parameters_used(self, name_sets: list[frozenset[str]]) -> set[str]:
        """Parameters the rates read, through substituted derived parameters too."""
        used: set[str] = set()
        pending = [n for names in name_sets for n in names]
        while pending:
            name = pending.pop()
            if name in used or name not in self._parameters:
                continue
            used.add(name)
            if self._inlined(name):
                pending.extend(self._parameters[name].form.expression.names)
        return used

    def rate_of(self, flow: Flow, source: Value | None) -> Value:
        """The lowered rate of ``flow``, its source compartment standing for ``source``
        (None: for the compartment's own count, its stages added)."""
        self._bound = {} if source is None else {flow.source: source}  # type: ignore[dict-item]
        try:
            return self.lower(flow.rate.tree)
        finally:
            self._bound = {}

    def name(self, name: str) -> Value:
        if name == "t":
            return TimeRef()
        if name == "pi":
            return Const(float(np.pi))
        if name == "N":
            return self._grouped_value(self._n_total)
        if name in self._bound:
            return self._bound[name]
        if name in self._layout.compartments:
            return self._layout.total_value(name)
        if name in self._matrices:
            return constant_matrix(self._matrices[name])
        if name not in self._values:
            self._values[name] = self._parameter(name)
        return self._values[name]

    def _grouped_value(self, items: tuple[ScalarNode, ...]) -> Value:
        return Vector(items) if self._grouped else items[0]

    def _parameter(self, name: str) -> Value:
        parameter = self._parameters[name]
        if self._inlined(name):
            return self.lower(parameter.form.expression.tree)
        if isinstance(parameter.form, Schedule):
            start, ref = self._schedule_start[name], ScheduleRef
        else:
            start, ref = self._slot_start[name], ParamRef
        if parameter.shape == "vector":
            return Vector(tuple(ref(start + g) for g in range(self.n_groups)))
        return ref(start)


def _slot_label(name: str, parameter: Parameter, groups: tuple[str, ...] | None,
                element: int) -> str:
    """``name``, or ``name[group]`` for an element of a parameter over groups."""
    if parameter.shape == "vector" and groups:
        return f"{name}[{groups[element]}]"
    return name
