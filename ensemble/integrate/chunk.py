"""Integration of a chunk of members: the run at the requested step, and its step check.

The entry point of the integrate layer.  :func:`integrate_chunk` runs the chunk with the
chosen backend (the numpy reference, :mod:`ensemble.integrate.reference`, or the
generated kernels, :mod:`ensemble.integrate.kernels.launch`), reruns it at the refined
steps the step check asks for, and gathers everything in a
:class:`~ensemble.records.ChunkResult` (:mod:`ensemble.integrate.refine` computes the
check itself).
"""

from __future__ import annotations

import importlib
from fractions import Fraction
from types import ModuleType

import numpy as np

from ensemble.integrate.reference import Trajectory, integrate_fixed
from ensemble.integrate.refine import (mark_failed_checks, mark_low_orders, noise_floor,
                                       observed_order, step_error)
from ensemble.methods import METHODS
from ensemble.model.lower import LoweredModel
from ensemble.records import ChunkResult
from ensemble.sampling import Design
from ensemble.scenario.schema import Solver

__all__ = ["integrate_chunk"]

COMPILED_MODULE = "ensemble.integrate.kernels.launch"
"""The compiled backend, imported on first use (it loads numba)."""


def _compiled_backend() -> ModuleType:
    """The module of the compiled backend."""
    try:
        return importlib.import_module(COMPILED_MODULE)
    except ImportError as error:
        raise RuntimeError("the compiled integration backend is not available "
                           f"({error}); use backend='numpy'") from error


def _integrator(backend: str):
    """The ``integrate_fixed`` of ``backend`` ("numpy" or "compiled")."""
    if backend == "numpy":
        return integrate_fixed
    if backend != "compiled":
        raise ValueError(f"unknown integration backend {backend!r}: "
                         "expected 'numpy' or 'compiled'")
    return _compiled_backend().integrate_fixed_compiled


def integrate_chunk(model: LoweredModel, design: Design, solver: Solver, n_reports: int,
                    backend: str = "numpy", buffers=None) -> ChunkResult:
    """Integrate ``design``'s members over ``n_reports - 1`` report intervals and check
    each member's step.

    Parameters
    ----------
    model, design : the variant's lowered model and the chunk's member inputs.
    solver : method, step, report interval, step check and Newton settings.
    n_reports : reported times, t = 0 included.
    backend : "numpy" (:func:`ensemble.integrate.reference.integrate_fixed`) or
        "compiled" (``ensemble.integrate.kernels.launch.integrate_fixed_compiled``, same
        signature and semantics).
    buffers : an ``ensemble.integrate.kernels.launch.ReportBuffers`` whose arrays the
        compiled backend's runs write into (ignored by the numpy backend).  The
        trajectories of the result are then views of them, valid until the next call
        with the same buffers.

    Returns
    -------
    ChunkResult
        The trajectories of the run at ``solver.step``, in the model's reported rows
        (compartments as the sum of their stages, flows per group); ``step_error``
        (computed on every state; NaN when the check is off or a value is non-finite),
        ``observed_order`` (NaN unless ``levels = 3``),
        and the status bits of every run ORed, with STEP_CHECK_FAILED where the step
        error is above 1 or not finite (members with an impossible start excepted) or
        the observed order more than one below the method's.
    """
    integrate = _integrator(backend)
    method = METHODS[solver.method]
    check = solver.check

    def arguments(refinement: int) -> tuple:
        return (model, design, method, float(Fraction(solver.step) / refinement),
                solver.steps_per_report * refinement, n_reports, solver.newton, check.atol)

    def run(refinement: int) -> Trajectory:
        reuse = ({"buffers": (buffers, f"refined {refinement}")}
                 if buffers is not None and backend == "compiled" else {})
        return integrate(*arguments(refinement), **reuse)

    result = run(1)
    status = result.status.copy()
    n_members = len(design.member_index)
    error = np.full(n_members, np.nan)
    order = np.full(n_members, np.nan)
    if check.enabled and check.levels == 2 and backend == "compiled":
        # compared in the kernel as the refined run goes: the bits of step_error below
        error, refined_status = _compiled_backend().step_error_compiled(
            *arguments(check.refine), result.state, check.refine, method.order, check.rtol)
        status |= refined_status
    elif check.enabled:
        refined = run(check.refine)
        status |= refined.status
        with np.errstate(all="ignore"):
            error = step_error(result.state, refined.state, check.refine, method.order,
                               check.rtol, check.atol)
        if check.levels == 3:
            finest = run(check.refine ** 2)
            status |= finest.status
            order = observed_order(result.state, refined.state, finest.state, check.refine,
                                   noise_floor(method, solver.newton))
            mark_low_orders(order, method.order, status)
    if check.enabled:
        mark_failed_checks(error, status)
    return ChunkResult(members=np.asarray(design.member_index),
                       state=model.reported_state(result.state),
                       flow_count=model.reported_flow_count(result.flow_count),
                       step_error=error, observed_order=order,
                       basic_reproduction_number=design.basic_reproduction_number,
                       status=status, reported=design.reported)
