"""Parameter design: the values every member of a variant gets.

Draws are made on the uniform scale, one column per uncertain parameter (one per group
element with ``per_group``), and mapped through each family's inverse CDF
(:mod:`ensemble.distributions`).  With the given numbers they are the inputs of the
variant's values constant in time (:class:`~ensemble.model.constants.ConstantTrees`):
derived parameters, schedule values at their knots and initial counts, all evaluated at
once by the model's numpy evaluator of IR trees, so each operation means what it means in
the rates.  Everything is a function of (scenario, variant, member index): the same
member gets the same bits whichever members are asked for with it.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from ensemble.distributions import inverse_cdf
from ensemble.model.constants import ConstantTrees, Element
from ensemble.model.ir import ScalarNode
from ensemble.model.lower import LoweredModel
from ensemble.model.lowering import Vector
from ensemble.model.numpy_program import NumpyProgram
from ensemble.model.spectra import spectral_radii
from ensemble.sampling.reproduction import reproduction_numbers
from ensemble.sampling.uniform import uniform_draws
from ensemble.scenario.schema import (INITIAL_SUM_RTOL, Fixed, GroupDraws, Parameter,
                                      Scenario, Variant, element_distribution)

@dataclass(frozen=True)
class Design:
    """Per-member inputs of one variant for a set of members.

    Attributes
    ----------
    member_index : (M,) int64 member indices (0-based, within the variant).
    parameters : (n_parameter_slots, M) float64, rows as ``LoweredModel.parameter_slots``.
    schedule_values : per ``LoweredModel.schedule_slots`` entry, (n_knots, M) float64.
    initial : (n_states, M) float64 initial state (NaN for invalid starts).
    invalid_start : (M,) bool, the drawn start is impossible (status bit 8).
    reported : parameter name -> (M,) or (n_groups, M) float64: every parameter that is
        constant in time in this variant (sampled, given or derived), for ``param_<name>``.
    basic_reproduction_number : (M,) float64 R0 by the next-generation matrix at the
        disease-free start (:mod:`ensemble.sampling.reproduction`; NaN where undefined).
    """

    member_index: np.ndarray
    parameters: np.ndarray
    schedule_values: tuple[np.ndarray, ...]
    initial: np.ndarray
    invalid_start: np.ndarray
    reported: Mapping[str, np.ndarray]
    basic_reproduction_number: np.ndarray


def make_design(scenario: Scenario, variant: Variant, model: LoweredModel,
                member_index: np.ndarray) -> Design:
    """Draw and derive the inputs of members ``member_index`` of ``variant``.

    Member i's values depend only on the scenario (seed, sampling method, member count)
    and i, never on which other members are asked for at the same time.

    Parameters
    ----------
    scenario : the validated scenario.
    variant : one of ``scenario.variants``.
    model : ``lower_model(scenario, variant)``: its values constant in time, and the
        rows of its parameters and schedules.
    member_index : member indices in [0, scenario.member_count), e.g. ``np.arange(a, b)``.
    """
    member_index = np.asarray(member_index, dtype=np.int64).reshape(-1)
    return _design(scenario, variant, model, member_index,
                   lambda drawn: uniform_draws(scenario, drawn, member_index))


def design_from_uniforms(scenario: Scenario, variant: Variant, model: LoweredModel,
                         uniforms: Mapping[Element, np.ndarray]) -> Design:
    """The inputs of members whose uniform draws are given instead of drawn (the
    particles of a fit): ``uniforms`` maps every column of
    :func:`~ensemble.sampling.uniform.uncertain_columns` to (M,) values in (0, 1); the
    members are numbered 0 .. M - 1."""
    count = len(next(iter(uniforms.values()))) if uniforms else 1
    return _design(scenario, variant, model, np.arange(count, dtype=np.int64),
                   lambda drawn: {key: np.asarray(uniforms[key], dtype=float)
                                  for key in drawn})


def median_design(scenario: Scenario, variant: Variant, model: LoweredModel) -> Design:
    """One member (index 0) whose drawn values are their distributions' medians (every
    uniform draw 1/2), for ``ensemble check``."""
    return _design(scenario, variant, model, np.zeros(1, dtype=np.int64),
                   lambda drawn: {key: np.full(1, 0.5) for key in drawn})


def _design(scenario: Scenario, variant: Variant, model: LoweredModel,
            member_index: np.ndarray, uniforms: Callable[[list[Element]], Mapping]
            ) -> Design:
    """The design of ``member_index`` with the uniform draws ``uniforms`` gives for the
    drawn elements."""
    trees = model.constants
    with np.errstate(all="ignore"):
        inputs = with_radii(trees, input_rows(scenario, variant, trees.inputs,
                                              member_index.size, uniforms))
        values = _Evaluated(trees, inputs)
        counts, invalid = initial_state(scenario, values.initial, member_index.size)
        initial = model.initial_states(counts)
        r0 = reproduction_numbers(scenario, model, initial, values.slots, values.knots,
                                  invalid)
        return Design(member_index=member_index, parameters=values.slots,
                      schedule_values=values.knots, initial=initial, invalid_start=invalid,
                      reported=values.reported, basic_reproduction_number=r0)


def input_rows(scenario: Scenario, variant: Variant, elements: Sequence[Element],
               n_members: int, uniforms: Callable[[list[Element]], Mapping]) -> np.ndarray:
    """(n_inputs, M): each given or drawn parameter element's value per member, the
    drawn ones from the uniform draws ``uniforms`` gives for them."""
    parameters = scenario.variant_parameters(variant)
    drawn = [(name, g) for name, g in elements
             if element_distribution(parameters[name].form, g) is not None]
    draws = uniforms(drawn)
    rows = np.empty((len(elements), n_members))
    for row, (name, g) in enumerate(elements):
        rows[row] = _input_value(parameters[name], g, draws)
    return rows


def with_radii(trees: ConstantTrees, inputs: np.ndarray) -> np.ndarray:
    """``inputs`` (n_inputs, M) followed by a row per entry of ``trees.radii``: the
    spectral radius of each member's matrix (:func:`ensemble.model.spectra.spectral_radii`),
    whose entries are evaluated from the rows before it."""
    if not trees.radii:
        return inputs
    n_members = inputs.shape[1]
    rows = np.empty((inputs.shape[0] + len(trees.radii), n_members))
    rows[:inputs.shape[0]] = inputs
    no_rows = np.empty((0, n_members))
    for j, matrix in enumerate(trees.radii):
        size = len(matrix)
        entries = [(g * size + h, tree) for g, row in enumerate(matrix)
                   for h, tree in enumerate(row) if tree is not None]
        values = np.zeros((size * size, n_members))
        if entries:
            out = np.empty((len(entries), n_members))
            NumpyProgram("radius", [tree for _, tree in entries])(
                0.0, no_rows, rows[:inputs.shape[0] + j], no_rows, out)
            values[[flat for flat, _ in entries]] = out
        stack = np.ascontiguousarray(values.T.reshape(n_members, size, size))
        rows[inputs.shape[0] + j] = spectral_radii(stack)
    return rows


def _input_value(parameter: Parameter, element: int,
                 uniforms: Mapping[Element, np.ndarray]) -> np.ndarray | float:
    form = parameter.form
    if isinstance(form, Fixed):
        return form.value[element] if isinstance(form.value, tuple) else form.value
    distribution = element_distribution(form, element)
    if distribution is not None:
        return inverse_cdf(distribution.family, distribution.arguments,
                           distribution.truncation, uniforms[(parameter.name, element)])
    if isinstance(form, GroupDraws):
        return form.elements[element]  # type: ignore[return-value]
    raise ValueError(f"parameter {parameter.name!r} is neither given nor drawn")


class _Evaluated:
    """The values of every tree of a :class:`ConstantTrees` for a chunk of members.

    Attributes
    ----------
    slots : (n_slots, M) the parameter slots.
    knots : per schedule slot, (n_knots, M).
    initial : per compartment, its (G, M) initial counts, None for the rest.
    reported : (M,) or (G, M) values of each parameter constant in time.
    """

    def __init__(self, trees: ConstantTrees, inputs: np.ndarray):
        parts: list[tuple[ScalarNode, ...]] = [trees.slots, *trees.schedule_knots,
                                               *(c for c in trees.initial if c is not None),
                                               *map(_items, trees.parameters.values())]
        roots = [root for part in parts for root in part]
        n_members = inputs.shape[1]
        out = np.empty((len(roots), n_members))
        no_rows = np.empty((0, n_members))
        NumpyProgram("constants", roots)(0.0, no_rows, inputs, no_rows, out)
        bounds = np.cumsum([0] + [len(part) for part in parts])
        blocks = iter([out[a:b].copy() for a, b in zip(bounds[:-1], bounds[1:])])
        self.slots = next(blocks)
        self.knots = tuple(next(blocks) for _ in trees.schedule_knots)
        self.initial = [None if c is None else next(blocks) for c in trees.initial]
        self.reported = {name: next(blocks) if isinstance(value, Vector) else next(blocks)[0]
                         for name, value in trees.parameters.items()}


def _items(value: ScalarNode | Vector) -> tuple[ScalarNode, ...]:
    return value.items if isinstance(value, Vector) else (value,)


def initial_state(scenario: Scenario, counts_by_compartment: Sequence[np.ndarray | None],
                  n_members: int) -> tuple[np.ndarray, np.ndarray]:
    """The (n_states, M) start, state c * G + g, and which members' starts are impossible.

    ``counts_by_compartment`` gives each compartment's (G, M) counts in order, None for the
    one that takes the rest.  A start is impossible when a count is negative or not
    finite, when the counts other than "rest" exceed the group's population, or (without
    "rest") when they do not add up to it within
    :data:`~ensemble.scenario.schema.INITIAL_SUM_RTOL`.  Such members hold NaN.
    """
    model = scenario.model
    n_groups = model.n_groups
    population = np.asarray(model.population, dtype=np.float64)[:, np.newaxis]
    counts = np.zeros((len(model.compartments), n_groups, n_members))
    rest = None
    for c, given in enumerate(counts_by_compartment):
        if given is None:
            rest = c
        else:
            counts[c] = given
    assigned = _ordered_sum(counts)
    tolerance = INITIAL_SUM_RTOL * population
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


def _ordered_sum(stack: np.ndarray) -> np.ndarray:
    """Sum over the first axis, row 0 + row 1 + ... in that order."""
    total = stack[0].copy()
    for row in stack[1:]:
        total += row
    return total
