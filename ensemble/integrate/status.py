"""The per-member status bits of SPEC section 3 (``status``, CF ``flag_masks``)."""

from __future__ import annotations

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
