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
from ensemble.model.lowering import (ExpressionLowering, Matrix, Value, Vector,
                                     constant_matrix, fold_sum)
from ensemble.scenario.schema import Derived, Parameter, Scenario, Schedule, Variant


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

    Attributes
    ----------
    compartments, groups : labels (``groups`` is None without strata).
    n_groups : 1 without strata.
    flows : flow names.
    state_labels : one per state row, ``"S"`` or ``"S[child]"``; index c * n_groups + g.
    rates : one scalar tree per flow element, index f * n_groups + g (persons per day).
    rate_derivatives : per flow element, the non-zero partial derivatives
        ``(state index, tree)`` of that rate with respect to the state, states ascending
        (:mod:`ensemble.model.derivatives`).
    stoichiometry : (n_states, n_flow_elements) float64 of -1, 0, +1.
    parameter_slots : names of the rows of the per-member constant parameter array,
        ``"beta"`` or ``"susceptibility[child]"``.
    schedule_slots : the rows of time-varying values (:class:`ScheduleSlot`).
    population : (n_groups,) float64.
    closed : True when no flow enters or leaves the model (population conserved).
    constants : the values constant in time per member: the parameter slots, the
        schedule values at their knots and the initial counts, as trees of the drawn and
        given values (:mod:`ensemble.model.constants`).
    """

    compartments: tuple[str, ...]
    groups: tuple[str, ...] | None
    n_groups: int
    flows: tuple[str, ...]
    state_labels: tuple[str, ...]
    rates: tuple[ScalarNode, ...]
    rate_derivatives: tuple[tuple[tuple[int, ScalarNode], ...], ...]
    stoichiometry: np.ndarray
    parameter_slots: tuple[str, ...]
    schedule_slots: tuple[ScheduleSlot, ...]
    population: np.ndarray
    closed: bool
    constants: ConstantTrees

    @property
    def n_states(self) -> int:
        return len(self.state_labels)

    @property
    def n_flow_elements(self) -> int:
        return len(self.rates)


def lower_model(scenario: Scenario, variant: Variant) -> LoweredModel:
    """Lower ``scenario``'s model with ``variant``'s parameters and matrices.

    Every flow's rate becomes one scalar tree per group element: compartments and ``N``
    become state rows, parameters constant in time become per-member slots (only those a
    rate uses, in file order), schedules become schedule slots, and derived parameters
    that vary in time (or are matrices) are substituted into the rates.  Matrices are
    constants whose zero entries are structural (:mod:`ensemble.model.lowering`).
    Constants are folded in float64 (:func:`ensemble.model.ir.apply`).
    """
    lowering = _RateLowering(scenario, variant)
    model = scenario.model
    n_groups = model.n_groups
    rates: list[ScalarNode] = []
    for flow in model.flows:
        rates.extend(lowering.elements(lowering.lower(flow.rate.tree), flow.rate.key))
    index = {name: i for i, name in enumerate(model.compartments)}
    stoichiometry = np.zeros((len(model.compartments) * n_groups, len(rates)))
    for f, flow in enumerate(model.flows):
        for g in range(n_groups):
            if flow.source is not None:
                stoichiometry[index[flow.source] * n_groups + g, f * n_groups + g] -= 1.0
            if flow.target is not None:
                stoichiometry[index[flow.target] * n_groups + g, f * n_groups + g] += 1.0
    return LoweredModel(
        compartments=tuple(model.compartments),
        groups=tuple(model.groups) if model.groups else None,
        n_groups=n_groups,
        flows=tuple(flow.name for flow in model.flows),
        state_labels=tuple(_element_labels(model.compartments, model.groups)),
        rates=tuple(rates),
        rate_derivatives=tuple(partial_derivatives(rate) for rate in rates),
        stoichiometry=_read_only(stoichiometry),
        parameter_slots=lowering.parameter_slots,
        schedule_slots=lowering.schedule_slots,
        population=_read_only(np.asarray(model.population, dtype=np.float64)),
        closed=all(flow.source is not None and flow.target is not None
                   for flow in model.flows),
        constants=lower_constants(scenario, variant, lowering.slot_elements,
                                  [(slot.parameter, slot.element)
                                   for slot in lowering.schedule_slots]),
    )


def _element_labels(names: tuple[str, ...], groups: tuple[str, ...] | None) -> list[str]:
    """``name`` or ``name[group]`` for each element, name-major."""
    if not groups:
        return list(names)
    return [f"{name}[{group}]" for name in names for group in groups]


def _read_only(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


class _RateLowering(ExpressionLowering):
    """Names in rates: compartments and ``N`` are state rows, ``t`` the time, parameters
    constant in time per-member slots, schedules schedule slots; derived parameters that
    vary in time (or are matrices) are substituted."""

    def __init__(self, scenario: Scenario, variant: Variant):
        model = scenario.model
        super().__init__(model.n_groups)
        self._groups = model.groups
        self._grouped = bool(model.groups)
        self._compartments = {name: i for i, name in enumerate(model.compartments)}
        in_n = [self._compartments[c] for c in model.compartments
                if c not in model.exclude_from_N]
        self._n_total = tuple(fold_sum([StateRef(c * self.n_groups + g) for c in in_n])
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

    def elements(self, value: Value, key: str) -> list[ScalarNode]:
        """The per-group scalar trees of a rate (one tree without groups)."""
        if self._grouped and isinstance(value, Vector):
            return list(value.items)
        if not self._grouped and not isinstance(value, (Vector, Matrix)):
            return [value]
        raise ValueError(f"{key}: a rate must be a {'vector' if self._grouped else 'scalar'}")

    def name(self, name: str) -> Value:
        if name == "t":
            return TimeRef()
        if name == "pi":
            return Const(float(np.pi))
        if name == "N":
            return self._grouped_value(self._n_total)
        if name in self._compartments:
            first = self._compartments[name] * self.n_groups
            return self._grouped_value(tuple(StateRef(first + g)
                                             for g in range(self.n_groups)))
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
