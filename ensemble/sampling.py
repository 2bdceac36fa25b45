"""Parameter design: the values every member of a variant gets.

Draws are made on the uniform scale, one column per uncertain parameter (one per group
element with ``per_group``), and mapped through each family's inverse CDF.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ensemble.model.compile import CompiledModel
from ensemble.scenario.schema import Scenario, Variant


@dataclass(frozen=True)
class Design:
    """Per-member inputs of one variant for a set of members.

    Attributes
    ----------
    members : (M,) int64 member indices (0-based, within the variant).
    parameters : (n_parameter_slots, M) float64, rows as ``CompiledModel.parameter_slots``.
    schedule_values : per ``CompiledModel.schedule_slots`` entry, (n_knots, M) float64.
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


def make_design(scenario: Scenario, variant: Variant, model: CompiledModel,
                members: np.ndarray) -> Design:
    """Draw and derive the inputs of ``members`` of ``variant``.

    Member i's values depend only on the scenario (seed, sampling method, ``members``)
    and i, never on which other members are asked for at the same time.
    """
    raise NotImplementedError
