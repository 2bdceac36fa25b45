"""The values of one variant that are constant in time, as scalar IR trees.

A member's derived parameters, the values of its schedules at their knots and its initial
counts are computed once per member, from its drawn and given parameter values, before
it is integrated (never per step).  They are lowered by the same
:class:`~ensemble.model.lowering.ExpressionLowering` as the rates, so every operation
means the same wherever it is written, and evaluated by the same numpy evaluator of IR
trees (:class:`~ensemble.model.numpy_program.NumpyProgram`).

In these trees :class:`~ensemble.model.ir.ParamRef` ``i`` is row ``i`` of the *input*
array: one row per element of each parameter drawn from a distribution or given as a
number (:attr:`ConstantTrees.inputs`).  No tree reads a state, a schedule or the time.

A matrix-valued intermediate is a :class:`~ensemble.model.lowering.Matrix` of one tree per
entry, held per member (``R0 * contacts`` depends on the member's draw).  A
``spectral_radius`` of such a matrix is no scalar operation: it becomes one more row of the
input array (:attr:`ConstantTrees.radii`), computed per member from the values of the
matrix's entries before the trees that read it are evaluated.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from ensemble.model.ir import Const, ParamRef, ScalarNode
from ensemble.model.lowering import (ExpressionLowering, Matrix, Value, Vector,
                                     constant_matrix)
from ensemble.scenario.schema import (Derived, Distribution, Expression, Fixed, GroupDraws,
                                      InitialValue, Parameter, Rest, Scenario, Schedule, Variant)

Element = tuple[str, int]
"""(parameter name, element): element g of a parameter over groups, 0 for a scalar."""


@dataclass(frozen=True)
class ConstantTrees:
    """Everything of one variant that is constant in time, per member.

    Attributes
    ----------
    inputs : the first rows of the input array, file order: every element of each
        parameter drawn from a distribution or given as a number.
    radii : the matrices whose spectral radii are the next rows of the input array, in
        order: row ``len(inputs) + j`` is the spectral radius of ``radii[j]`` (rows of
        entries, None for a structural zero), whose trees read only earlier rows.
    parameters : every parameter constant in time (given, drawn or derived), file order:
        one tree, or a :class:`~ensemble.model.lowering.Vector` for a parameter over groups.
    slots : the value of each row of ``LoweredModel.parameter_slots``.
    schedule_knots : per ``LoweredModel.schedule_slots`` entry, its value at each knot.
    initial : per compartment, its initial count in each group, or None for the
        compartment that takes the rest of the population.
    """

    inputs: tuple[Element, ...]
    radii: tuple[tuple[tuple[ScalarNode | None, ...], ...], ...]
    parameters: Mapping[str, ScalarNode | Vector]
    slots: tuple[ScalarNode, ...]
    schedule_knots: tuple[tuple[ScalarNode, ...], ...]
    initial: tuple[tuple[ScalarNode, ...] | None, ...]


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


def lower_constants(scenario: Scenario, variant: Variant, slots: Sequence[Element],
                    schedule_slots: Sequence[Element]) -> ConstantTrees:
    """The constant values of ``variant``: its parameters, the given ``slots`` (the
    per-member parameter rows the rates read), the knots of ``schedule_slots`` (schedule
    parameter, element) and the initial counts."""
    lowering = _ConstantLowering(scenario, variant)
    varying = time_varying_parameters(lowering.parameters)
    parameters = {name: lowering.name(name) for name in lowering.parameters
                  if name not in varying}
    slot_values = tuple(_element(parameters[name], element) for name, element in slots)
    knots = tuple(lowering.knots(name, element) for name, element in schedule_slots)
    initial = tuple(lowering.initial(scenario.model.initial.get(compartment, 0.0))
                    for compartment in scenario.model.compartments)
    return ConstantTrees(
        inputs=lowering.inputs,
        radii=tuple(matrix.rows for matrix in lowering.radii),
        parameters=parameters,  # type: ignore[arg-type]
        slots=slot_values,
        schedule_knots=knots,
        initial=initial,
    )


def _element(value: Value, element: int) -> ScalarNode:
    """Element ``element`` of a vector (a scalar is the same for every element)."""
    if isinstance(value, Vector):
        return value.items[element]
    if isinstance(value, Matrix):
        raise ValueError("a matrix has no element per group")
    return value


class _ConstantLowering(ExpressionLowering):
    """Names in constant expressions: parameters (given and drawn ones are input rows,
    derived ones their own lowered expressions), matrices and pi."""

    def __init__(self, scenario: Scenario, variant: Variant):
        super().__init__(scenario.model.n_groups)
        self.parameters = scenario.variant_parameters(variant)
        self._matrices = scenario.variant_matrices(variant)
        self._values: dict[str, Value] = {}
        inputs: list[Element] = []
        self._first_input: dict[str, int] = {}
        for name, parameter in self.parameters.items():
            if isinstance(parameter.form, (Fixed, Distribution, GroupDraws)):
                self._first_input[name] = len(inputs)
                elements = self.n_groups if parameter.shape == "vector" else 1
                inputs.extend((name, g) for g in range(elements))
        self.inputs = tuple(inputs)
        self.radii: dict[Matrix, int] = {}

    def spectral_radius(self, matrix: Matrix) -> ScalarNode:
        """The input row holding the spectral radius of ``matrix`` (one row per distinct
        matrix, after the given and drawn rows)."""
        if matrix not in self.radii:
            self.radii[matrix] = len(self.radii)
        return ParamRef(len(self.inputs) + self.radii[matrix])

    def name(self, name: str) -> Value:
        if name == "pi":
            return Const(float(np.pi))
        if name in self._matrices:
            return constant_matrix(self._matrices[name])
        if name not in self._values:
            self._values[name] = self._parameter(name)
        return self._values[name]

    def _parameter(self, name: str) -> Value:
        parameter = self.parameters[name]
        if isinstance(parameter.form, Derived):
            return self.lower(parameter.form.expression.tree)
        if name not in self._first_input:
            raise ValueError(f"parameter {name!r} varies in time")
        first = self._first_input[name]
        if parameter.shape == "vector":
            return Vector(tuple(ParamRef(first + g) for g in range(self.n_groups)))
        return ParamRef(first)

    def knots(self, name: str, element: int) -> tuple[ScalarNode, ...]:
        """The value of element ``element`` of schedule ``name`` at each of its knots."""
        schedule = self.parameters[name].form
        if not isinstance(schedule, Schedule):
            raise ValueError(f"parameter {name!r} is not a schedule")
        return tuple(self._given_or_lowered(value)[element] for value in schedule.values)

    def initial(self, value: InitialValue) -> tuple[ScalarNode, ...] | None:
        """A compartment's initial count per group; None for the rest."""
        return None if isinstance(value, Rest) else self._given_or_lowered(value)

    def _given_or_lowered(self, value: float | tuple[float, ...] | Expression
                          ) -> tuple[ScalarNode, ...]:
        """One tree per group of a number (the same in every group), one number per
        group, or an expression."""
        if isinstance(value, Expression):
            lowered = self.lower(value.tree)
            if isinstance(lowered, Vector):
                return lowered.items
            return (_element(lowered, 0),) * self.n_groups
        if isinstance(value, tuple):
            return tuple(Const(float(v)) for v in value)
        return (Const(float(value)),) * self.n_groups
