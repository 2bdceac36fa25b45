"""Scenario model -> :class:`LoweredModel`: scalar rate trees, their state derivatives,
and the stoichiometry that turns flow rates into the right-hand side.

The right-hand side of every model is ``dy/dt = stoichiometry @ rates(t, y)``; its
Jacobian with respect to the state is ``stoichiometry @ d rates / d y``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal, Union

import numpy as np

from ensemble.model.derivatives import partial_derivatives
from ensemble.model.ir import (Const, ParamRef, ScalarNode, ScheduleRef, StateRef, TimeRef,
                               apply)
from ensemble.scenario.expressions import Call, Name, Negate, Node, Number
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

    @property
    def n_states(self) -> int:
        return len(self.state_labels)

    @property
    def n_flow_elements(self) -> int:
        return len(self.rates)


def lower_model(scenario: Scenario, variant: Variant) -> LoweredModel:
    """Compile ``scenario``'s model with ``variant``'s parameters and matrices.

    Every flow's rate becomes one scalar tree per group element: compartments and ``N``
    become state rows, parameters constant in time become per-member slots (only those a
    rate uses, in file order), schedules become schedule slots, and derived parameters
    that vary in time (or are matrices) are substituted into the rates.  Matrices are
    constants; their zero entries are dropped from ``@`` products and stay zero under
    ``scalar * matrix`` (even for an infinite scalar: a zero contact is no contact).
    Constants are folded in float64 (:func:`ensemble.model.ir.apply`).
    """
    lowering = _Lowering(scenario, variant)
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
    )


def time_varying_parameters(parameters: Mapping[str, Parameter]) -> frozenset[str]:
    """Names of the parameters whose value changes with time: schedules, and derived
    parameters that use ``t`` or another time-varying parameter (directly or not)."""
    varying: dict[str, bool] = {}

    def is_varying(name: str) -> bool:
        if name not in varying:
            form = parameters[name].form
            if isinstance(form, Schedule):
                varying[name] = True
            elif isinstance(form, Derived):
                names = form.expression.names
                varying[name] = "t" in names or any(
                    is_varying(n) for n in names if n in parameters)
            else:
                varying[name] = False
        return varying[name]

    return frozenset(name for name in parameters if is_varying(name))


def _element_labels(names: tuple[str, ...], groups: tuple[str, ...] | None) -> list[str]:
    """``name`` or ``name[group]`` for each element, name-major."""
    if not groups:
        return list(names)
    return [f"{name}[{group}]" for name in names for group in groups]


def _read_only(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


@dataclass(frozen=True)
class _Vector:
    """A value over groups during lowering: one scalar tree per group."""

    items: tuple[ScalarNode, ...]


@dataclass(frozen=True)
class _Matrix:
    """A G x G value during lowering; None marks an entry known to be zero."""

    rows: tuple[tuple[ScalarNode | None, ...], ...]


_Value = Union[ScalarNode, _Vector, _Matrix]

_BINARY_OPS = {"+": "add", "-": "sub", "*": "mul", "/": "div", "**": "pow"}


class _Lowering:
    """Turns one variant's vector-level expression trees into scalar IR trees."""

    def __init__(self, scenario: Scenario, variant: Variant):
        model = scenario.model
        self._groups = model.groups
        self._n_groups = model.n_groups
        self._grouped = bool(model.groups)
        self._compartments = {name: i for i, name in enumerate(model.compartments)}
        in_n = [self._compartments[c] for c in model.compartments
                if c not in model.exclude_from_N]
        self._n_total = tuple(_fold_sum([StateRef(c * self._n_groups + g) for c in in_n])
                              for g in range(self._n_groups))
        self._parameters = scenario.variant_parameters(variant)
        self._matrices = scenario.variant_matrices(variant)
        self._varying = time_varying_parameters(self._parameters)
        self._values: dict[str, _Value] = {}
        used = self._parameters_used([flow.rate.names for flow in model.flows])
        self._slot_start: dict[str, int] = {}
        self._schedule_start: dict[str, int] = {}
        slots: list[str] = []
        schedules: list[ScheduleSlot] = []
        for name, parameter in self._parameters.items():
            if name not in used or self._inlined(name):
                continue
            labels = self._labels(name, parameter)
            if isinstance(parameter.form, Schedule):
                self._schedule_start[name] = len(schedules)
                days = np.array([float(d) for d in parameter.form.days], dtype=np.float64)
                schedules.extend(
                    ScheduleSlot(label, name, element, _read_only(days.copy()),
                                 parameter.form.between)
                    for element, label in enumerate(labels))
            else:
                self._slot_start[name] = len(slots)
                slots.extend(labels)
        self.parameter_slots = tuple(slots)
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

    def _labels(self, name: str, parameter: Parameter) -> list[str]:
        if parameter.shape == "vector":
            return _element_labels((name,), self._groups)
        return [name]

    # -------------------------------------------------------------------- lowering

    def elements(self, value: _Value, key: str) -> list[ScalarNode]:
        """The per-group scalar trees of a rate (one tree without groups)."""
        if self._grouped and isinstance(value, _Vector):
            return list(value.items)
        if not self._grouped and not isinstance(value, (_Vector, _Matrix)):
            return [value]
        raise ValueError(f"{key}: a rate must be a {'vector' if self._grouped else 'scalar'}")

    def lower(self, node: Node) -> _Value:
        """The scalar IR of expression ``node``."""
        if isinstance(node, Number):
            return Const(float(node.value))
        if isinstance(node, Name):
            return self._name(node.id)
        if isinstance(node, Negate):
            return self._map("neg", self.lower(node.operand))
        if isinstance(node, Call):
            args = [self.lower(a) for a in node.args]
            if node.function == "sum":
                return _fold_sum(list(_vector_items(args[0])))
            return self._elementwise(node.function, args)
        left, right = self.lower(node.left), self.lower(node.right)
        if node.op == "@":
            return self._matrix_times_vector(left, right)
        op = _BINARY_OPS[node.op]
        if isinstance(left, _Matrix) or isinstance(right, _Matrix):
            return self._matrix_arithmetic(op, left, right)
        return self._elementwise(op, [left, right])

    def _name(self, name: str) -> _Value:
        if name == "t":
            return TimeRef()
        if name == "pi":
            return Const(float(np.pi))
        if name == "N":
            return self._grouped_value(self._n_total)
        if name in self._compartments:
            first = self._compartments[name] * self._n_groups
            return self._grouped_value(tuple(StateRef(first + g)
                                             for g in range(self._n_groups)))
        if name in self._matrices:
            return _Matrix(tuple(tuple(Const(float(v)) if v != 0 else None for v in row)
                                 for row in self._matrices[name]))
        if name not in self._values:
            self._values[name] = self._parameter(name)
        return self._values[name]

    def _grouped_value(self, items: tuple[ScalarNode, ...]) -> _Value:
        return _Vector(items) if self._grouped else items[0]

    def _parameter(self, name: str) -> _Value:
        parameter = self._parameters[name]
        if self._inlined(name):
            return self.lower(parameter.form.expression.tree)
        if isinstance(parameter.form, Schedule):
            start, ref = self._schedule_start[name], ScheduleRef
        else:
            start, ref = self._slot_start[name], ParamRef
        if parameter.shape == "vector":
            return _Vector(tuple(ref(start + g) for g in range(self._n_groups)))
        return ref(start)

    def _map(self, op: str, value: _Value) -> _Value:
        if isinstance(value, _Matrix):
            return _Matrix(tuple(tuple(None if v is None else apply(op, v) for v in row)
                                 for row in value.rows))
        return self._elementwise(op, [value])

    def _elementwise(self, op: str, args: list[_Value]) -> _Value:
        """``op`` on scalars and vectors, scalars broadcast over groups."""
        if not any(isinstance(a, _Vector) for a in args):
            return apply(op, *args)
        columns = [a.items if isinstance(a, _Vector) else (a,) * self._n_groups for a in args]
        return _Vector(tuple(apply(op, *items) for items in zip(*columns)))

    def _matrix_arithmetic(self, op: str, left: _Value, right: _Value) -> _Matrix:
        """matrix +- matrix, scalar * matrix, matrix * scalar, matrix / scalar."""
        if isinstance(left, _Matrix) and isinstance(right, _Matrix):
            return _Matrix(tuple(tuple(_entry_sum(op, a, b) for a, b in zip(ra, rb))
                                 for ra, rb in zip(left.rows, right.rows)))
        matrix, scalar = (left, right) if isinstance(left, _Matrix) else (right, left)
        if isinstance(scalar, _Vector):
            raise ValueError("a matrix combines only with a scalar or a matrix")

        def entry(v: ScalarNode | None) -> ScalarNode | None:
            if v is None:
                return None
            return apply(op, v, scalar) if matrix is left else apply(op, scalar, v)

        return _Matrix(tuple(tuple(entry(v) for v in row) for row in matrix.rows))

    @staticmethod
    def _matrix_times_vector(matrix: _Value, vector: _Value) -> _Vector:
        if not isinstance(matrix, _Matrix) or not isinstance(vector, _Vector):
            raise ValueError("'@' takes a matrix and a vector")
        return _Vector(tuple(
            _fold_sum([apply("mul", m, v) for m, v in zip(row, vector.items) if m is not None])
            for row in matrix.rows))


def _vector_items(value: _Value) -> tuple[ScalarNode, ...]:
    if not isinstance(value, _Vector):
        raise ValueError("sum() takes a vector over groups")
    return value.items


def _entry_sum(op: str, a: ScalarNode | None, b: ScalarNode | None) -> ScalarNode | None:
    """Entry of matrix +- matrix, a None entry being zero."""
    if b is None:
        return a
    if a is None:
        return b if op == "add" else apply("neg", b)
    return apply(op, a, b)


def _fold_sum(terms: list[ScalarNode]) -> ScalarNode:
    """Left-to-right sum of ``terms`` (0 for none)."""
    if not terms:
        return Const(0.0)
    total = terms[0]
    for term in terms[1:]:
        total = apply("add", total, term)
    return total
