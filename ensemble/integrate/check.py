"""Integration of a chunk of members with the per-member step check.

The trajectory is the run at the requested step h; reruns at h/r (and h/r^2 with
``levels = 3``) only estimate its error (SPEC section 3, ``step_error`` and
``observed_order``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ensemble.model.compile import CompiledModel
from ensemble.sampling import Design
from ensemble.scenario.schema import Solver

STEP_CHECK_FAILED = 1
BELOW_NEGATIVE_ATOL = 2
NON_FINITE = 4
INVALID_START = 8
NEWTON_NOT_CONVERGED = 16

STATUS_FLAGS: tuple[tuple[int, str], ...] = (
    (STEP_CHECK_FAILED, "step_check_failed"),
    (BELOW_NEGATIVE_ATOL, "state_below_minus_atol"),
    (NON_FINITE, "non_finite_value"),
    (INVALID_START, "impossible_drawn_start"),
    (NEWTON_NOT_CONVERGED, "newton_not_converged"),
)
"""The status bits of SPEC section 3 and their CF ``flag_meanings`` words."""


@dataclass(frozen=True)
class ChunkResult:
    """What one chunk of members produced.

    Attributes
    ----------
    members : (M,) int64 member indices.
    state : (M, n_states, n_reports) persons at each reported time.
    flow_count : (M, n_flow_elements, n_reports) persons moved over the interval ending at
        each reported time; NaN at the first.
    step_error, observed_order : (M,) float64 (NaN where not computed).
    status : (M,) uint8 bit flags.
    """

    members: np.ndarray
    state: np.ndarray
    flow_count: np.ndarray
    step_error: np.ndarray
    observed_order: np.ndarray
    status: np.ndarray


def integrate_chunk(model: CompiledModel, design: Design, solver: Solver, n_reports: int,
                    backend: str = "numpy") -> ChunkResult:
    """Integrate ``design``'s members over ``n_reports - 1`` report intervals and check
    each member's step."""
    raise NotImplementedError
