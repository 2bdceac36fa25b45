"""Record types every layer shares: what a chunk of members produced, how a chunk is
named, and the per-member status bits.

The status bits are stored as a CF flag variable (``flag_masks`` and ``flag_meanings``;
CF conventions 1.10, sec. 3.5); their meanings are documented in the project's reference
(``ensemble/scenario/reference.md``, result file).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

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
"""The status bits and their CF ``flag_meanings`` words."""

ChunkKey = tuple[int, int, int]
"""A chunk of members: (variant index, first member, one past the last member)."""


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
    basic_reproduction_number : (M,) float64 R0 by the next-generation matrix (NaN where
        undefined).
    status : (M,) uint8 bit flags.
    reported : the members' parameters constant in time (``Design.reported``: name ->
        (M,) or (n_groups, M)), which the series as observed with noise use for their
        reporting fraction and dispersion; None when not at hand.
    """

    members: np.ndarray
    state: np.ndarray
    flow_count: np.ndarray
    step_error: np.ndarray
    observed_order: np.ndarray
    basic_reproduction_number: np.ndarray
    status: np.ndarray
    reported: Mapping[str, np.ndarray] | None = None
