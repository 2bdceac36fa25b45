"""Parameter design: the values every member of a variant gets.

Draws are made on the uniform scale, one column per uncertain parameter (one per group
element with ``per_group``), and mapped through each family's inverse CDF; derived
parameters follow in dependency order; schedule knots and initial states are evaluated
from them.  Everything is a function of (scenario, variant, member index): the same member
gets the same bits whichever members are asked for with it.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass
from graphlib import TopologicalSorter

import numpy as np

from ensemble.distributions import inverse_cdf
from ensemble.model.lower import LoweredModel, time_varying_parameters
from ensemble.sampling.evaluate import evaluate, ordered_sum
from ensemble.sampling.uniform import ColumnKey, uniform_draws
from ensemble.scenario.schema import (Derived, Distribution, Expression, Fixed, Parameter,
                                      Rest, Scenario, Schedule, Variant)

INITIAL_RTOL = 1e-9
"""Relative tolerance (of the group's population) of the initial-state sums: a "rest"
this little below zero is zero, and without "rest" the starts must add up to the
population within it (SPEC section 1, ``initial``)."""

_SLOT = re.compile(r"^(?P<name>[A-Za-z_][A-Za-z0-9_]*)(?:\[(?P<label>[^\]]+)\])?$")


@dataclass(frozen=True)
class Design:
    """Per-member inputs of one variant for a set of members.

    Attributes
    ----------
    members : (M,) int64 member indices (0-based, within the variant).
    parameters : (n_parameter_slots, M) float64, rows as ``LoweredModel.parameter_slots``.
    schedule_values : per ``LoweredModel.schedule_slots`` entry, (n_knots, M) float64.
    initial : (n_states, M) float64 initial state (NaN for invalid starts).
    invalid_start : (M,) bool, the drawn start is impossible (status bit 8).
    reported : parameter name -> (M,) or (n_groups, M) float64: every parameter that is
        constant in time in this variant (sampled, fixed or derived), for ``param_<name>``.
    """

    members: np.ndarray
    parameters: np.ndarray
    schedule_values: tuple[np.ndarray, ...]
    initial: np.ndarray
    invalid_start: np.ndarray
    reported: Mapping[str, np.ndarray]


def make_design(scenario: Scenario, variant: Variant, model: LoweredModel,
                members: np.ndarray) -> Design:
    """Draw and derive the inputs of ``members`` of ``variant``.

    Member i's values depend only on the scenario (seed, sampling method, ``members``)
    and i, never on which other members are asked for at the same time.

    Parameters
    ----------
    scenario : the validated scenario.
    variant : one of ``scenario.variants``.
    model : ``lower_model(scenario, variant)``: names the parameter and schedule rows.
    members : member indices in [0, scenario.members), e.g. ``np.arange(a, b)``.
    """
    members = np.asarray(members, dtype=np.int64).reshape(-1)
    parameters = scenario.variant_parameters(variant)
    with np.errstate(all="ignore"):
        values = constant_values(scenario, variant, members)
        initial, invalid = initial_state(scenario, values, members.size)
        return Design(
            members=members,
            parameters=_parameter_rows(model, scenario, values, members.size),
            schedule_values=tuple(_schedule_knots(parameters[slot.parameter], slot.element,
                                                  values, members.size)
                                  for slot in model.schedule_slots),
            initial=initial,
            invalid_start=invalid,
            reported={name: _full(values[name], members.size) for name in parameters
                      if name in values and values[name].ndim <= 2},
        )


def constant_values(scenario: Scenario, variant: Variant,
                    members: np.ndarray) -> dict[str, np.ndarray]:
    """Values of the matrices and of every parameter constant in time in ``variant``.

    Laid out as :mod:`ensemble.sampling.evaluate` describes (member axis last, of length
    ``members.size`` for drawn or derived values and 1 for fixed ones).
    """
    parameters = scenario.variant_parameters(variant)
    n_groups = scenario.model.n_groups
    varying = time_varying_parameters(parameters)
    values: dict[str, np.ndarray] = {
        name: np.asarray(matrix, dtype=np.float64)[:, :, np.newaxis]
        for name, matrix in scenario.variant_matrices(variant).items()}
    drawn = {name: p.form for name, p in parameters.items()
             if isinstance(p.form, Distribution)}
    keys: list[ColumnKey] = [(name, g) for name, form in drawn.items()
                             for g in range(n_groups if form.per_group else 1)]
    uniforms = uniform_draws(scenario, keys, members)
    derived: dict[str, Expression] = {}
    for name, parameter in parameters.items():
        form = parameter.form
        if isinstance(form, Fixed):
            values[name] = _fixed_value(form.value)
        elif isinstance(form, Distribution):
            values[name] = _distribution_value(name, form, uniforms, n_groups)
        elif isinstance(form, Derived) and name not in varying:
            derived[name] = form.expression
    order = TopologicalSorter({name: expression.names & derived.keys()
                               for name, expression in derived.items()}).static_order()
    for name in order:
        values[name] = evaluate(derived[name].tree, values)
    return values


def _distribution_value(name: str, form: Distribution,
                        uniforms: Mapping[ColumnKey, np.ndarray], n_groups: int) -> np.ndarray:
    """(M,) values of a drawn parameter, (G, M) with ``per_group``."""
    drawn = [inverse_cdf(form.family, form.arguments, form.truncation, uniforms[(name, g)])
             for g in range(n_groups if form.per_group else 1)]
    return np.stack(drawn) if form.per_group else drawn[0]


def initial_state(scenario: Scenario, values: Mapping[str, np.ndarray],
                  n_members: int) -> tuple[np.ndarray, np.ndarray]:
    """The (n_states, M) start, state c * G + g, and which members' starts are impossible.

    A start is impossible when a count is negative or not finite, when the counts other
    than "rest" exceed the group's population, or (without "rest") when they do not add
    up to it within :data:`INITIAL_RTOL`.  Such members hold NaN.
    """
    model = scenario.model
    n_groups = model.n_groups
    population = np.asarray(model.population, dtype=np.float64)[:, np.newaxis]
    counts = np.zeros((len(model.compartments), n_groups, n_members))
    rest = None
    for c, compartment in enumerate(model.compartments):
        value = model.initial.get(compartment, 0.0)
        if isinstance(value, Rest):
            rest = c
        elif isinstance(value, Expression):
            counts[c] = _as_vector(evaluate(value.tree, values), n_groups)
        else:
            counts[c] = _as_vector(_fixed_value(value), n_groups)
    assigned = ordered_sum(counts)
    tolerance = INITIAL_RTOL * population
    if rest is not None:
        left = population - assigned
        counts[rest] = np.where((left < 0) & (left >= -tolerance), 0.0, left)
        mismatch = np.zeros(counts.shape[1:], dtype=bool)
    else:
        mismatch = np.abs(assigned - population) > tolerance
    invalid = (~np.isfinite(counts) | (counts < 0)).any(axis=0) | mismatch
    invalid = invalid.any(axis=0)
    counts[:, :, invalid] = np.nan
    return counts.reshape(len(model.compartments) * n_groups, n_members), invalid


def _fixed_value(value: float | tuple[float, ...]) -> np.ndarray:
    """A number -> (1,); one number per group -> (G, 1)."""
    array = np.asarray(value, dtype=np.float64)
    return array.reshape(array.shape + (1,)) if array.ndim else array.reshape(1)


def _as_vector(value: np.ndarray, n_groups: int) -> np.ndarray:
    """A scalar or vector value -> (G, m), a scalar repeated over groups."""
    return value if value.ndim == 2 else np.broadcast_to(value, (n_groups,) + value.shape)


def _full(value: np.ndarray, n_members: int) -> np.ndarray:
    """A value with member axis of length 1 or M -> a fresh array with length M."""
    return np.array(np.broadcast_to(value, value.shape[:-1] + (n_members,)), dtype=np.float64)


def _element(value: np.ndarray, element: int, n_members: int) -> np.ndarray:
    """Element ``element`` of a vector value (the value itself if scalar), as (M,)."""
    row = value[element] if value.ndim == 2 else value
    return np.broadcast_to(row, (n_members,))


def _parameter_rows(model: LoweredModel, scenario: Scenario,
                    values: Mapping[str, np.ndarray], n_members: int) -> np.ndarray:
    """The (n_parameter_slots, M) array named by ``model.parameter_slots``."""
    groups = scenario.model.groups or ()
    rows = np.empty((len(model.parameter_slots), n_members))
    for row, slot in enumerate(model.parameter_slots):
        match = _SLOT.match(slot)
        if match is None or match["name"] not in values:
            raise ValueError(f"parameter slot {slot!r} names no constant parameter")
        label = match["label"]
        rows[row] = _element(values[match["name"]],
                             groups.index(label) if label is not None else 0, n_members)
    return rows


def _schedule_knots(parameter: Parameter, element: int, values: Mapping[str, np.ndarray],
                    n_members: int) -> np.ndarray:
    """(n_knots, M) values at the knots of element ``element`` of a schedule."""
    schedule = parameter.form
    if not isinstance(schedule, Schedule):
        raise ValueError(f"parameter {parameter.name!r} is not a schedule")
    knots = np.empty((len(schedule.values), n_members))
    for k, value in enumerate(schedule.values):
        knot = (evaluate(value.tree, values) if isinstance(value, Expression)
                else _fixed_value(value))
        knots[k] = _element(knot, element, n_members)
    return knots
