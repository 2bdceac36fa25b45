"""Fixed-step integration of a chunk of members: the readable numpy reference."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ensemble.integrate.methods import Method
from ensemble.model.compile import CompiledModel
from ensemble.sampling import Design
from ensemble.scenario.schema import Newton


@dataclass(frozen=True)
class Trajectory:
    """One chunk integrated at one step size.

    Attributes
    ----------
    state : (M, n_states, n_reports) float64 persons at t = k * steps_per_report * step.
    flow_count : (M, n_flow_elements, n_reports) float64 persons moved over each report
        interval; NaN at index 0.
    status : (M,) uint8 OR of NON_FINITE, BELOW_NEGATIVE_ATOL, NEWTON_NOT_CONVERGED and
        INVALID_START (bits of :mod:`ensemble.integrate.check`).
    """

    state: np.ndarray
    flow_count: np.ndarray
    status: np.ndarray


def integrate_fixed(model: CompiledModel, design: Design, method: Method, step: float,
                    steps_per_report: int, n_reports: int, newton: Newton,
                    atol: float) -> Trajectory:
    """Integrate every member of ``design`` with ``method`` at a fixed ``step``."""
    raise NotImplementedError
