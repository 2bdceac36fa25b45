"""Each member's basic reproduction number R0, from its design.

R0 is the spectral radius of the next-generation matrix F V^-1
(:mod:`ensemble.model.reproduction`) at the disease-free state the scenario starts from:
the member's initial state with every infected compartment emptied, the compartment
that takes the rest of the population (``"rest"``) taking their persons back, and the
schedules at their values of day 0 (the project's reference,
``ensemble/scenario/reference.md``, "The basic reproduction number").
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ensemble.model.lower import LoweredModel
from ensemble.model.reproduction import NextGeneration, infected_compartments
from ensemble.scenario.schema import Rest, Scenario


def reproduction_numbers(scenario: Scenario, model: LoweredModel, initial: np.ndarray,
                         parameters: np.ndarray, schedule_values: Sequence[np.ndarray],
                         invalid_start: np.ndarray) -> np.ndarray:
    """(M,) R0 of each member from its design's initial state (n_states, M), parameter
    slots, schedule values at the knots and impossible starts: NaN where the infected
    compartments cannot be told, or where the member's start is impossible or its
    matrices singular or not finite."""
    infected = infected_compartments(scenario.model)
    n_members = initial.shape[1]
    if infected.compartments is None:
        return np.full(n_members, np.nan)
    with np.errstate(all="ignore"):
        start = disease_free_start(scenario, model, initial, infected.compartments)
        next_generation = NextGeneration.for_model(model, infected.compartments)
        values = next_generation.basic_reproduction_number(
            start, parameters, schedules_at_start(model, schedule_values, n_members))
    values[invalid_start] = np.nan
    return values


def disease_free_start(scenario: Scenario, model: LoweredModel, initial: np.ndarray,
                       infected: Sequence[str]) -> np.ndarray:
    """(n_states, M) ``initial`` with the infected compartments' states at 0, their
    persons added (per group, in state order) to the compartment that takes the rest,
    shared equally between its stages; without such a compartment they are dropped."""
    start = initial.copy()
    rest = next((name for name, value in scenario.model.initial.items()
                 if isinstance(value, Rest) and name not in infected), None)
    n_groups = model.n_groups
    for g in range(n_groups):
        removed = np.zeros(initial.shape[1])
        for state, compartment in enumerate(model.state_compartments):
            if compartment in infected and state % n_groups == g:
                removed += start[state]
                start[state] = 0.0
        if rest is None:
            continue
        targets = [state for state, compartment in enumerate(model.state_compartments)
                   if compartment == rest and state % n_groups == g]
        for state in targets:
            start[state] += removed / len(targets)
    return start


def schedules_at_start(model: LoweredModel, knot_values: Sequence[np.ndarray],
                       n_members: int) -> np.ndarray:
    """(n_schedule_slots, M) each schedule's value at t = 0, as the integrators take it:
    the value of the last knot at or before day 0 (the first before the first knot),
    interpolated between knots for a ``"linear"`` schedule."""
    values = np.empty((len(model.schedule_slots), n_members))
    for i, (slot, knots) in enumerate(zip(model.schedule_slots, knot_values)):
        j = int(np.searchsorted(slot.days, 0.0, side="right")) - 1
        if j < 0:
            values[i] = knots[0]
        elif slot.between == "step" or j == len(slot.days) - 1:
            values[i] = knots[j]
        else:
            slope = (knots[j + 1] - knots[j]) / (slot.days[j + 1] - slot.days[j])
            values[i] = slope * (0.0 - slot.days[j]) + knots[j]
    return values

