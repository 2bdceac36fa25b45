"""Fixed-step integration of a chunk of members: the readable numpy reference.

Every member of a chunk is advanced together, the state laid out (n_states, M) so that a
member is a column and each compartment a contiguous row.  All arithmetic is elementwise
over members in a fixed order, with no reduction across members, so a member's numbers
are the same bits whatever other members share its chunk.

Exact semantics (a compiled backend must reproduce them to round-off)
---------------------------------------------------------------------
Notation: h the step, ``t_k = k * h`` the start of step k (computed as a product, never
accumulated), ``R(t, y)`` the flow rates (persons per day, one row per flow element),
``S`` the stoichiometry, and ``y (+) S inc`` the state update below.

State update ``y (+) S inc``: for state row i, ``delta_i`` is the sum of its signed flow
increments taken in increasing flow-element order, starting from the first one (``+inc_f``
for a flow into the compartment, ``-inc_f`` out of it), and the new value is
``y_i + delta_i``; a row no flow touches is copied.

Schedules (:class:`ensemble.model.lower.ScheduleSlot`): a ``"step"`` slot has the value
of its last knot at or before the start of the step for every stage of step k, found on
the integer step grid (knot step ``rint(day / h)`` <= k) so that round-off in ``k * h``
cannot move a jump; before the first knot the first value holds.  A ``"linear"`` slot at
stage time t is ``slope_j * (t - d_j) + v_j`` with ``slope_j = (v_{j+1} - v_j) /
(d_{j+1} - d_j)`` on the knot interval ``d_j <= t < d_{j+1}`` (numpy.interp's formula),
the first value before the first knot and the last from the last knot on.

Explicit tableau (A, b, c) for step k:

- stage i time ``t_k + c_i * h``; stage state ``Y_0 = y`` and, for i > 0,
  ``Y_i = y (+) S (h * sum_j A_ij r_j)`` with the sum over the non-zero ``A_ij`` in
  increasing j, the first term ``A_ij * r_j`` and each further one added;
- ``r_i = R(t_k + c_i h, Y_i)``;
- ``inc = h * sum_i b_i r_i`` (same summation rule), ``y <- y (+) S inc``.

Theta method (theta = 1 backward Euler, 1/2 trapezoid) for step k, from ``y0``:

- ``R0 = R(t_k, y0)``; the Newton iteration starts from the explicit Euler predictor
  ``y1 = y0 (+) S (h * R0)``;
- at ``t_{k+1} = (k + 1) * h``, with the schedules of step k as above,
  ``inc(y1) = h * ((1 - theta) * R0 + theta * R(t_{k+1}, y1))`` and the residual
  ``F(y1) = y1 - (y0 (+) S inc(y1))``;
- Newton update ``d`` solves ``(I - (h * theta) * J) d = -F`` with ``J = S dR/dy`` and
  the rates at ``t_{k+1}`` (see :class:`_NewtonMatrix`; the matrix entries are
  ``(-(h * theta)) * J_ij``, plus 1.0 on the diagonal), ``J`` taken at the first iterate
  (the predictor) for the first :data:`SHARED_MATRIX_ITERATIONS` iterations (simplified
  Newton) and at the current iterate from then on, by LU with partial pivoting (LAPACK
  ``gesv``) per member through numpy.linalg.solve; ``y1 <- y1 + d``; a member
  converges when ``max_i |d_i| <= newton.tol`` and is then frozen (no further
  iterations; the others carry on with compacted copies of their columns).  A member
  whose residual or Jacobian is not finite leaves the iteration (it will be flagged
  non-finite); one whose matrix is singular, or still unconverged after
  ``newton.max_iter`` iterations, gets NEWTON_NOT_CONVERGED and keeps its last iterate;
- ``inc = inc(y1)`` with the final iterate and ``y <- y0 (+) S inc``: the same
  increments move the state and the flow counts.

After every step a member with a non-finite state gets NON_FINITE and is NaN from then on
(state and the flow counts of the interval).  At each reported time a state below -atol
sets BELOW_NEGATIVE_ATOL.  Members with ``design.invalid_start`` get INVALID_START, are
NaN throughout and are not integrated.  Before every step the run ends if it was asked to
stop (:func:`ensemble.integrate.interrupts.stop_if_requested`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ensemble.integrate.interrupts import stop_if_requested
from ensemble.methods import Method
from ensemble.records import (BELOW_NEGATIVE_ATOL, INVALID_START,
                                       NEWTON_NOT_CONVERGED, NON_FINITE)
from ensemble.model.lower import LoweredModel, ScheduleSlot
from ensemble.model.numpy_rates import RateFunctions
from ensemble.sampling import Design
from ensemble.scenario.schema import Newton

SHARED_MATRIX_ITERATIONS = 2
"""Newton iterations of a theta step that share the Newton matrix of the first iterate
(simplified Newton, Hairer & Wanner 1996, *Solving Ordinary Differential Equations II*,
sec. IV.8, cited from memory); later iterations take the matrix of their own iterate.
Most steps of an epidemic converge by the second iteration, so sharing saves a matrix and
its factorisation there, while a hard step (a stiff model at a large step) gets Newton's
quadratic convergence back from the third (measured on an SEIR emptying E at 100 per
day, h = 1: as many members converge as with a fresh matrix at every iteration; with
one matrix for the whole step up to twice as many fail)."""


@dataclass(frozen=True)
class Trajectory:
    """One chunk integrated at one step size.

    Attributes
    ----------
    state : (M, n_states, n_reports) float64 persons at t = k * steps_per_report * step.
    flow_count : (M, n_flow_elements, n_reports) float64 persons moved over each report
        interval; NaN at index 0.
    status : (M,) uint8 OR of NON_FINITE, BELOW_NEGATIVE_ATOL, NEWTON_NOT_CONVERGED and
        INVALID_START (bits of :mod:`ensemble.records`).
    """

    state: np.ndarray
    flow_count: np.ndarray
    status: np.ndarray


class _Stoichiometry:
    """``out = y (+) S inc``: the state after moving ``inc`` persons along the flows."""

    def __init__(self, stoichiometry: np.ndarray, n_members: int):
        if not np.isin(stoichiometry, (-1.0, 0.0, 1.0)).all():
            raise ValueError("stoichiometry entries must be -1, 0 or +1")
        self.terms = tuple(
            tuple((int(f), bool(row[f] > 0)) for f in np.flatnonzero(row))
            for row in stoichiometry)
        self._delta = np.empty(n_members)

    def apply(self, y: np.ndarray, inc: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Write ``y (+) S inc`` to ``out`` (which may be ``y``); columns are members."""
        delta = self._delta[:y.shape[1]]
        for i, terms in enumerate(self.terms):
            if not terms:
                np.copyto(out[i], y[i])
                continue
            (first, inflow), *rest = terms
            if inflow:
                np.copyto(delta, inc[first])
            else:
                np.negative(inc[first], out=delta)
            for f, inflow in rest:
                (np.add if inflow else np.subtract)(delta, inc[f], out=delta)
            np.add(y[i], delta, out=out[i])
        return out


def _weighted_sum(weights: np.ndarray, rates: np.ndarray, out: np.ndarray,
                  scratch: np.ndarray) -> np.ndarray:
    """``out = sum_j weights_j * rates_j`` over non-zero weights, in increasing j."""
    first, *rest = np.flatnonzero(weights)
    np.multiply(rates[first], weights[first], out=out)
    for j in rest:
        np.multiply(rates[j], weights[j], out=scratch)
        np.add(out, scratch, out=out)
    return out


class _Schedules:
    """Fills the per-member schedule values in force at a stage (see module docstring)."""

    def __init__(self, slots: tuple[ScheduleSlot, ...], values: tuple[np.ndarray, ...],
                 step: float):
        self.slots = slots
        self.values = values
        self.knot_steps = tuple(np.rint(slot.days / step).astype(np.int64) for slot in slots)
        with np.errstate(all="ignore"):
            self.slopes = tuple(
                np.diff(v, axis=0) / np.diff(slot.days)[:, None]
                if slot.between == "linear" else None
                for slot, v in zip(slots, values))

    def fill(self, k: int, t: float, out: np.ndarray) -> np.ndarray:
        """Write the values of every slot for a stage at time ``t`` of step ``k``."""
        for i, slot in enumerate(self.slots):
            values = self.values[i]
            if slot.between == "step":
                j = max(int(np.searchsorted(self.knot_steps[i], k, side="right")) - 1, 0)
                np.copyto(out[i], values[j])
                continue
            j = int(np.searchsorted(slot.days, t, side="right")) - 1
            if j < 0:
                np.copyto(out[i], values[0])
            elif j >= len(slot.days) - 1:
                np.copyto(out[i], values[-1])
            else:
                np.multiply(self.slopes[i][j], t - slot.days[j], out=out[i])
                np.add(out[i], values[j], out=out[i])
        return out


class _NewtonMatrix:
    """``I - (h * theta) * J`` per member, with ``J = S dR/dy`` the state Jacobian of
    :meth:`ensemble.model.numpy_rates.RateFunctions.state_jacobian` (every entry a sum of
    +-partials in the evaluator's pattern order)."""

    def __init__(self, functions: RateFunctions, h_theta: float):
        self.functions = functions
        self.h_theta = h_theta

    def __call__(self, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray) -> np.ndarray:
        """(M, n_states, n_states) Newton matrices at state ``y`` (n_states, M)."""
        partials = self.functions.rate_jacobian(t, y, p, s)
        matrix = self.functions.state_jacobian(partials)
        np.multiply(matrix, -self.h_theta, out=matrix)
        diagonal = np.einsum("mii->mi", matrix)
        diagonal += 1.0
        return matrix


def _solve_each(matrices: np.ndarray, rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Solve ``matrices[m] x[m] = rhs[m]``; returns x and which members were solvable.

    numpy.linalg.solve calls LAPACK ``gesv`` on a private copy of each matrix, so a
    member's solution does not depend on the rest of the stack; only if one matrix is
    singular (which makes the whole call fail) are the members solved one by one.
    """
    try:
        return np.linalg.solve(matrices, rhs[..., None])[..., 0], np.ones(len(rhs), bool)
    except np.linalg.LinAlgError:
        solution = np.zeros_like(rhs)
        solved = np.ones(len(rhs), bool)
        for m in range(len(rhs)):
            try:
                solution[m] = np.linalg.solve(matrices[m], rhs[m])
            except np.linalg.LinAlgError:
                solved[m] = False
        return solution, solved


class _ChunkStepper:
    """Advances the state of a chunk by one step, in place, with preallocated buffers."""

    def __init__(self, model: LoweredModel, design: Design, method: Method, step: float,
                 newton: Newton):
        n_members = len(design.member_index)
        self.method = method
        self.step = step
        self.newton = newton
        self.functions = RateFunctions(model)
        self.stoichiometry = _Stoichiometry(model.stoichiometry, n_members)
        self.schedules = _Schedules(model.schedule_slots,
                                    tuple(np.ascontiguousarray(v, dtype=np.float64)
                                          for v in design.schedule_values), step)
        self.parameters = np.ascontiguousarray(design.parameters, dtype=np.float64)
        n_flows = model.n_flow_elements
        self.schedule_now = np.empty((len(model.schedule_slots), n_members))
        self.stage_rates = np.empty((method.n_stages, n_flows, n_members))
        self.increment = np.empty((n_flows, n_members))
        self.scratch = np.empty((n_flows, n_members))
        self.stage_state = np.empty((model.n_states, n_members))
        if method.implicit:
            self.schedule_end = np.empty_like(self.schedule_now)
            self.newton_matrix = _NewtonMatrix(self.functions, step * method.theta)

    def advance(self, k: int, y: np.ndarray, skip: np.ndarray, status: np.ndarray) -> np.ndarray:
        """Take step k from ``y`` in place; return the flow increments (n_flows, M).

        ``skip`` marks members that take no part in a Newton iteration (already NaN).
        """
        if self.method.implicit:
            return self._advance_theta(k, y, skip, status)
        return self._advance_explicit(k, y)

    def _advance_explicit(self, k: int, y: np.ndarray) -> np.ndarray:
        method, h = self.method, self.step
        t_k = k * h
        for i in range(method.n_stages):
            stage_y = y
            if i > 0:
                _weighted_sum(method.a[i, :i], self.stage_rates, self.increment, self.scratch)
                np.multiply(self.increment, h, out=self.increment)
                stage_y = self.stoichiometry.apply(y, self.increment, self.stage_state)
            t = t_k + method.c[i] * h
            self.schedules.fill(k, t, self.schedule_now)
            self.functions.rates(t, stage_y, self.parameters, self.schedule_now,
                                 self.stage_rates[i])
        _weighted_sum(method.b, self.stage_rates, self.increment, self.scratch)
        np.multiply(self.increment, h, out=self.increment)
        self.stoichiometry.apply(y, self.increment, y)
        return self.increment

    def _theta_increment(self, start_rates: np.ndarray, end_rates: np.ndarray,
                         out: np.ndarray, scratch: np.ndarray) -> np.ndarray:
        """``h * ((1 - theta) * R0 + theta * R1)``, written to ``out``; ``scratch`` may be
        ``end_rates`` itself."""
        theta = self.method.theta
        np.multiply(end_rates, theta, out=scratch)
        np.multiply(start_rates, 1.0 - theta, out=out)
        np.add(out, scratch, out=out)
        return np.multiply(out, self.step, out=out)

    def _advance_theta(self, k: int, y: np.ndarray, skip: np.ndarray,
                       status: np.ndarray) -> np.ndarray:
        h = self.step
        t_start, t_end = k * h, (k + 1) * h
        start_rates, end_rates = self.stage_rates[0], self.stage_rates[1]
        self.schedules.fill(k, t_start, self.schedule_now)
        self.functions.rates(t_start, y, self.parameters, self.schedule_now, start_rates)
        self.schedules.fill(k, t_end, self.schedule_end)

        y_end = self.stage_state
        np.multiply(start_rates, h, out=self.increment)
        self.stoichiometry.apply(y, self.increment, y_end)
        self._newton(t_end, y, y_end, np.flatnonzero(~skip), status)

        self.functions.rates(t_end, y_end, self.parameters, self.schedule_end, end_rates)
        self._theta_increment(start_rates, end_rates, self.increment, self.scratch)
        self.stoichiometry.apply(y, self.increment, y)
        return self.increment

    def _newton(self, t_end: float, y: np.ndarray, y_end: np.ndarray, active: np.ndarray,
                status: np.ndarray) -> None:
        """Newton iterations on the members ``active``, updating ``y_end`` in place, the
        first :data:`SHARED_MATRIX_ITERATIONS` with the matrix of the first iterate."""
        n_states = y.shape[0]
        for iteration in range(self.newton.max_iter):
            if active.size == 0:
                return
            y0, y1 = y[:, active], y_end[:, active]
            p, s = self.parameters[:, active], self.schedule_end[:, active]
            end_rates = np.empty((self.stage_rates.shape[1], active.size))
            self.functions.rates(t_end, y1, p, s, end_rates)
            increment = self._theta_increment(self.stage_rates[0][:, active], end_rates,
                                              np.empty_like(end_rates), end_rates)
            residual = np.subtract(y1, self.stoichiometry.apply(y0, increment,
                                                                np.empty_like(y0)))
            if iteration == 0 or iteration >= SHARED_MATRIX_ITERATIONS:
                matrices = self.newton_matrix(t_end, y1, p, s)
                finite_matrix = np.isfinite(matrices.reshape(active.size, -1)).all(axis=1)
            finite = np.isfinite(residual).all(axis=0) & finite_matrix
            update = np.zeros((active.size, n_states))
            solved = np.zeros(active.size, bool)
            update[finite], solved[finite] = _solve_each(matrices[finite],
                                                         -residual[:, finite].T)
            y_end[:, active] = y1 + update.T
            status[active[finite & ~solved]] |= NEWTON_NOT_CONVERGED
            converged = np.abs(update).max(axis=1) <= self.newton.tol
            keep = finite & solved & ~converged
            active, matrices, finite_matrix = active[keep], matrices[keep], finite_matrix[keep]
        status[active] |= NEWTON_NOT_CONVERGED


def integrate_fixed(model: LoweredModel, design: Design, method: Method, step: float,
                    steps_per_report: int, n_reports: int, newton: Newton,
                    atol: float) -> Trajectory:
    """Integrate every member of ``design`` with ``method`` at a fixed ``step``.

    Parameters
    ----------
    model : the lowered model of the variant.
    design : the members' parameters, schedule values and initial states.
    method : one of :data:`ensemble.methods.METHODS`.
    step : h in days.
    steps_per_report : steps between reported times (report interval / h).
    n_reports : reported times, t = 0 included.
    newton : Newton settings (used by the implicit methods only).
    atol : absolute tolerance in persons: a reported state below -atol sets
        BELOW_NEGATIVE_ATOL.

    Returns
    -------
    Trajectory
        States and flow counts at the reported times, and each member's status bits.
        The exact arithmetic is described in the module docstring.
    """
    n_members = len(design.member_index)
    stepper = _ChunkStepper(model, design, method, step, newton)
    state = np.empty((n_members, model.n_states, n_reports))
    flow_count = np.empty((n_members, model.n_flow_elements, n_reports))
    flow_count[:, :, 0] = np.nan
    status = np.zeros(n_members, np.uint8)
    dead = np.array(design.invalid_start, dtype=bool)
    status[dead] |= INVALID_START

    y = np.array(design.initial, dtype=np.float64, order="C")
    y[:, dead] = np.nan
    interval_flows = np.empty((model.n_flow_elements, n_members))
    with np.errstate(all="ignore"):
        for report in range(n_reports):
            if report > 0:
                interval_flows.fill(0.0)
                for k in range((report - 1) * steps_per_report, report * steps_per_report):
                    stop_if_requested()
                    increment = stepper.advance(k, y, dead, status)
                    np.add(interval_flows, increment, out=interval_flows)
                    blown_up = ~np.isfinite(y).all(axis=0) & ~dead
                    status[blown_up] |= NON_FINITE
                    dead |= blown_up
                    y[:, dead] = np.nan
                interval_flows[:, dead] = np.nan
                flow_count[:, :, report] = interval_flows.T
            state[:, :, report] = y.T
            status[(y < -atol).any(axis=0)] |= BELOW_NEGATIVE_ATOL
    return Trajectory(state=state, flow_count=flow_count, status=status)
