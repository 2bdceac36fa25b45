"""One step of a theta method for a block of members, with its Newton iterations.

The theta methods solve ``y1 = y0 + h S [(1 - theta) R(t, y0) + theta R(t + h, y1)]``
(Hairer & Wanner 1996, *Solving Ordinary Differential Equations II*, sec. IV.3) by
Newton iterations per member (ibid., sec. IV.8; sections cited from memory) from the
explicit Euler predictor, the first
:data:`~ensemble.integrate.reference.SHARED_MATRIX_ITERATIONS` sharing the matrix
``I - h theta S dR/dy`` of the predictor (simplified Newton): the arithmetic of the numpy
reference (:mod:`ensemble.integrate.reference`, "Theta method").  The matrix is planned
and filled by :mod:`.newton_matrix` and factored by :mod:`.block_lu`, every member of the
block at once; each member converges, or fails, on its own.  Every evaluation of the
rates is a few loops over arrays (:mod:`.rates`).  Any theta of
:data:`ensemble.methods.METHODS` is run by this one writer.
"""

from __future__ import annotations


import numpy as np

from ensemble.integrate.kernels.explicit import MOVES, finish
from ensemble.integrate.kernels.expressions import literal
from ensemble.integrate.kernels.newton_matrix import NewtonMatrixPlan
from ensemble.integrate.kernels.rates import RateCode
from ensemble.integrate.kernels.step import StepCode
from ensemble.integrate.reference import SHARED_MATRIX_ITERATIONS

PATTERN = "lower_start, lower, upper_start, upper"
"""The kernel's arguments holding the factors' pattern (:func:`.sparsity.factor_pattern`)."""


class ThetaStep(StepCode):
    """Kernel code of one step of a theta method."""

    def __init__(self, rates: RateCode):
        super().__init__(rates)
        self.plan = NewtonMatrixPlan(rates)

    def data_arguments(self) -> list[str]:
        return ["place", *PATTERN.split(", ")]

    def data(self) -> list[np.ndarray]:
        return list(self.plan.arrays)

    def buffers(self) -> list[str]:
        """The rates at both ends of the step, the iterates, the Newton matrices and
        right-hand sides, and the factorisation's work arrays."""
        return ["    check = np.empty(BLOCK)",
                "    rates = np.empty((2, n_elements, BLOCK))",
                "    inc = np.empty((n_elements, BLOCK))",
                "    stage = np.empty((n_states, BLOCK))",
                "    y1 = np.empty((n_states, BLOCK))",
                "    jac = np.zeros((n_states, n_states, BLOCK))",
                "    upd = np.empty((n_states, BLOCK))",
                "    size = np.empty(BLOCK)",
                "    active = np.empty(BLOCK, np.bool_)",
                "    moving = np.empty(BLOCK, np.bool_)",
                "    pivots = np.empty((n_states, BLOCK), np.int64)",
                "    first = n_states",
                "    pivot_size = np.empty(BLOCK)",
                "    factor = np.empty(BLOCK)",
                "    trouble = np.empty(BLOCK, np.int8)",
                "    columns = np.empty(n_states, np.int64)",
                *self.plan.buffers()]

    def functions(self) -> list[str]:
        """The function filling the Newton matrix."""
        return self.plan.function()

    def lines(self, indent: str) -> list[str]:
        """One loop whose passes evaluate the rates once each (so that ``rates_at`` is
        called from one place): at the start of the step, then at each Newton iterate,
        the last pass at the final iterate ending the step."""
        rates = self.rates
        inner, deep = indent + "    ", indent + "        "
        lines = [f"{indent}t = step * h",
                 f"{indent}time = (step + 1) * h"]
        if self.form.model.schedule_slots:
            lines += [f"{indent}for index in range(2):",
                      f"{inner}at = t if index == 0 else time",
                      f"{inner}schedule_values(sv, index, step, at, knot_steps, knot_days, "
                      "slot_knots, slot_linear, knot_values, m0, width)"]
        lines += [f"{indent}iteration = 0",
                  f"{indent}finishing = newton_max_iter == 0",
                  f"{indent}for phase in range(newton_max_iter + 2):",
                  f"{inner}row = 0 if phase == 0 else 1",
                  f"{inner}source = y if phase == 0 else y1",
                  f"{inner}at = t if phase == 0 else time",
                  rates.call(inner, "source", "row", "at", "row"),
                  f"{inner}if phase == 0:",
                  f"{deep}for e in range(n_elements):",
                  f"{deep}    for b in range(width):",
                  f"{deep}        inc[e, b] = h * rates[0, e, b]",
                  f"{deep}apply_moves(y, inc, y1, {MOVES})",
                  f"{deep}for b in range(width):",
                  f"{deep}    active[b] = not bad[b]",
                  f"{deep}continue"]
        lines += self._increments(inner)
        lines += [f"{inner}if finishing:",
                  f"{deep}for b in range(width):",
                  f"{deep}    if active[b]:",
                  f"{deep}        status[m0 + b] |= NEWTON_NOT_CONVERGED",
                  f"{deep}apply_moves(y, inc, stage, {MOVES})"]
        lines += finish(deep)
        lines += [f"{deep}break",
                  f"{inner}apply_moves(y, inc, stage, {MOVES})",
                  f"{inner}for s in range(n_states):",
                  f"{inner}    place_row = place[s]",
                  f"{inner}    for b in range(width):",
                  f"{inner}        upd[place_row, b] = y1[s, b] - stage[s, b]"]
        lines += self._matrix_refresh(inner)
        lines.append(f"{inner}solve_factored(jac, upd, {PATTERN}, first, pivots)")
        lines += self._moves(inner)
        lines += [f"{inner}iteration += 1",
                  f"{inner}finishing = remaining == 0 or iteration == newton_max_iter"]
        return lines

    def _increments(self, indent: str) -> list[str]:
        """``inc = h * ((1 - theta) * r0 + theta * r1)`` for every flow element."""
        theta = float(self.method.theta)
        return [f"{indent}for e in range(n_elements):",
                f"{indent}    for b in range(width):",
                f"{indent}        inc[e, b] = h * ({literal(1.0 - theta)} * rates[0, e, b] + "
                f"{literal(theta)} * rates[1, e, b])"]

    def _matrix_refresh(self, indent: str) -> list[str]:
        """The matrix of the first iterate serves the first iterations (simplified
        Newton), later ones take their own, factored at once; outside the factors'
        pattern it must be zero, so it is cleared after a factorisation that interchanged
        rows."""
        deep = indent + "    "
        return [f"{indent}if iteration == 0 or iteration >= {SHARED_MATRIX_ITERATIONS}:",
                f"{deep}if first < n_states:",
                f"{deep}    jac[:, :, :] = 0.0",
                self.plan.call(deep),
                f"{deep}first = factor_block(jac, {PATTERN}, pivots, pivot_size, factor, "
                "trouble, columns)"]

    def _moves(self, indent: str) -> list[str]:
        """Each active member moves by the solved update: a singular one is not
        converged, a non-finite one leaves (it will be flagged non-finite), the others
        stop once the update is <= tol; ``remaining`` counts those still active."""
        return [f"{indent}for b in range(width):",
                f"{indent}    size[b] = 0.0",
                f"{indent}for s in range(n_states):",
                f"{indent}    for b in range(width):",
                f"{indent}        size[b] = _max(size[b], abs(upd[s, b]))",
                f"{indent}remaining = 0",
                f"{indent}for b in range(width):",
                f"{indent}    moving[b] = False",
                f"{indent}    if active[b]:",
                f"{indent}        if trouble[b] == 1:",
                f"{indent}            status[m0 + b] |= NEWTON_NOT_CONVERGED",
                f"{indent}            active[b] = False",
                f"{indent}        elif trouble[b] == 2 or size[b] - size[b] != 0.0:",
                f"{indent}            active[b] = False",
                f"{indent}        else:",
                f"{indent}            moving[b] = True",
                f"{indent}            if size[b] <= newton_tol:",
                f"{indent}                active[b] = False",
                f"{indent}    remaining += active[b]",
                f"{indent}for s in range(n_states):",
                f"{indent}    place_row = place[s]",
                f"{indent}    for b in range(width):",
                f"{indent}        if moving[b]:",
                f"{indent}            y1[s, b] -= upd[place_row, b]"]
