"""Scenario model -> :class:`CompiledModel`: scalar rate trees, their state derivatives,
and the stoichiometry that turns flow rates into the right-hand side.

The right-hand side of every model is ``dy/dt = stoichiometry @ rates(t, y)``; its
Jacobian with respect to the state is ``stoichiometry @ d rates / d y``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from ensemble.model.ir import ScalarNode
from ensemble.scenario.schema import Scenario, Variant


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
class CompiledModel:
    """One variant's model in the scalar form every integrator backend consumes.

    Attributes
    ----------
    compartments, groups : labels (``groups`` is None without strata).
    n_groups : 1 without strata.
    flows : flow names.
    state_labels : one per state row, ``"S"`` or ``"S[child]"``; index c * n_groups + g.
    rates : one scalar tree per flow element, index f * n_groups + g (persons per day).
    rate_derivatives : per flow element, the non-zero partial derivatives
        ``(state index, tree)`` of that rate with respect to the state.
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


def compile_model(scenario: Scenario, variant: Variant) -> CompiledModel:
    """Compile ``scenario``'s model with ``variant``'s parameters and matrices."""
    raise NotImplementedError
