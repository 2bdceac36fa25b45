"""One step of a theta method for a block of members, with its Newton iterations.

The theta methods solve ``y1 = y0 + h S [(1 - theta) R(t, y0) + theta R(t + h, y1)]``
(Hairer & Wanner 1996, *Solving Ordinary Differential Equations II*, sec. IV.3) by
Newton iterations per member (ibid., sec. IV.8; sections cited from memory) from the
explicit Euler predictor, the first
:data:`~ensemble.integrate.reference.SHARED_MATRIX_ITERATIONS` sharing the matrix
``I - h theta S dR/dy`` of the predictor (simplified Newton): the arithmetic of the numpy
reference (:mod:`ensemble.integrate.reference`, "Theta method").  The matrix is planned
and filled by :mod:`.newton_matrix` and factored by :mod:`.block_lu`, every member of the
block at once; each member converges, or fails, on its own.  Any theta of
:data:`ensemble.methods.METHODS` is run by this one writer.
"""

from __future__ import annotations

from collections.abc import Callable

from ensemble.integrate.kernels.block_lu import factor_block, factor_pivoting, solve_factored
from ensemble.integrate.kernels.expressions import literal
from ensemble.integrate.kernels.newton_matrix import NewtonMatrixPlan
from ensemble.integrate.kernels.rates import Names, RateCode
from ensemble.integrate.kernels.step import StepCode
from ensemble.integrate.reference import SHARED_MATRIX_ITERATIONS
from ensemble.methods import Method
from ensemble.model.ir import ScalarNode

PATTERN_NAMES = ("LOWER_START", "LOWER", "UPPER_START", "UPPER")
"""The module constants holding the factors' pattern (:func:`.sparsity.factor_pattern`)."""


class ThetaStep(StepCode):
    """Kernel code of one step of a theta method."""

    def __init__(self, rates: RateCode, method: Method):
        super().__init__(rates, method)
        self.plan = NewtonMatrixPlan(rates)

    def constants(self) -> list[str]:
        """The factors' pattern, as int64 arrays."""
        return [f"{name} = np.array({values!r}, dtype=np.int64)"
                for name, values in zip(PATTERN_NAMES, self.plan.factor_pattern)]

    def support(self) -> list[Callable]:
        """The block LU."""
        return [factor_pivoting, factor_block, solve_factored]

    def functions(self) -> list[str]:
        """The functions filling the Newton matrix."""
        return self.plan.functions() + [""]

    def buffers(self) -> list[str]:
        """The start-of-step rates, the iterates, the Newton matrices and right-hand sides,
        and the factorisation's work arrays."""
        return ["    r0 = np.empty((N_FLOWS, BLOCK))",
                "    y1 = np.empty((N_STATES, BLOCK))",
                "    jac = np.zeros((N_STATES, N_STATES, BLOCK))",
                "    upd = np.empty((N_STATES, BLOCK))",
                "    active = np.empty(BLOCK, np.bool_)",
                "    pivots = np.empty((N_STATES, BLOCK), np.int64)",
                "    first = N_STATES",
                "    pivot_size = np.empty(BLOCK)",
                "    factor = np.empty(BLOCK)",
                "    trouble = np.empty(BLOCK, np.int8)",
                "    columns = np.empty(N_STATES, np.int64)"]

    def lines(self, indent: str, param_only: list[ScalarNode],
              time_names: dict[str, Names]) -> list[str]:
        """The predictor, the Newton iterations, and the step from the final iterate."""
        return (self._predictor(indent, param_only, time_names)
                + self._newton_iterations(indent, param_only, time_names)
                + self._end_of_step(indent, param_only, time_names))

    def _increments(self, indent: str, name: str, end_rates: list[str]) -> list[str]:
        """``<name>_f = h * ((1 - theta) * r0_f + theta * R1_f)`` for every flow element."""
        theta = float(self.method.theta)
        return [f"{indent}{name}_{f} = h * ({literal(1.0 - theta)} * r0[{f}, b] + "
                f"{literal(theta)} * {end_rates[f]})"
                for f in range(self.rates.model.n_flow_elements)]

    def _predictor(self, indent: str, param_only: list[ScalarNode],
                   time_names: dict[str, Names]) -> list[str]:
        """Start of step: ``R(t, y0)`` into ``r0`` and the explicit Euler predictor into
        ``y1``; members already non-finite take no part in the iterations."""
        rates = self.rates
        n, n_flows = rates.model.n_states, rates.model.n_flow_elements
        inner = indent + "    "
        state = [f"y_{s}" for s in range(n)]
        prelude, member_names = rates.member_prelude(inner, param_only)
        body, start_rates = rates.at_stage("0", state, member_names, time_names["0"], inner,
                                           list(rates.model.rates))
        lines = [f"{indent}for b in range(BLOCK):", *prelude, *body]
        lines += [f"{inner}r0[{f}, b] = {start_rates[f]}" for f in range(n_flows)]
        lines += rates.moved_state(inner, state, [f"h * {start_rates[f]}"
                                                  for f in range(n_flows)], "pred_")
        lines += [f"{inner}y1[{s}, b] = pred_{s}" for s in range(n)]
        lines.append(f"{inner}active[b] = not bad[b]")
        return lines

    def _newton_iterations(self, indent: str, param_only: list[ScalarNode],
                           time_names: dict[str, Names]) -> list[str]:
        """Up to ``newton_max_iter`` iterations: residuals, the matrix when it is due, the
        solve, and the members' moves; ends when no member of the block is active."""
        lines = [f"{indent}for iteration in range(newton_max_iter):"]
        lines += self._residuals(indent + "    ", param_only, time_names)
        lines += self._matrix_refresh(indent + "    ")
        lines.append(f"{indent}    solve_factored(jac, upd, LOWER_START, LOWER, UPPER_START, "
                     "UPPER, first, pivots)")
        lines += self._moves(indent + "    ")
        lines.append(f"{indent}    if remaining == 0:")
        lines.append(f"{indent}        break")
        return lines

    def _residuals(self, indent: str, param_only: list[ScalarNode],
                   time_names: dict[str, Names]) -> list[str]:
        """``upd = F(w) = w - y0 - h S [(1 - theta) r0 + theta R(t + h, w)]`` at every
        member's iterate ``w``, in the order of elimination."""
        rates = self.rates
        n = rates.model.n_states
        deep = indent + "    "
        prelude, member_names = rates.member_prelude(deep, param_only)
        lines = [f"{indent}for b in range(BLOCK):", *prelude]
        lines += [f"{deep}w_{s} = y1[{s}, b]" for s in range(n)]
        body, end_rates = rates.at_stage("1", [f"w_{s}" for s in range(n)], member_names,
                                         time_names["1"], deep, list(rates.model.rates))
        lines += body
        lines += self._increments(deep, "g", end_rates)
        increments = [f"g_{f}" for f in range(rates.model.n_flow_elements)]
        lines += rates.moved_state(deep, [f"y_{s}" for s in range(n)], increments,
                                   "target_")
        lines += [f"{deep}upd[{self.plan.place[s]}, b] = w_{s} - target_{s}"
                  for s in range(n)]
        return lines

    def _matrix_refresh(self, indent: str) -> list[str]:
        """The matrix of the first iterate serves the first iterations (simplified
        Newton), later ones take their own, factored at once; outside the factors'
        pattern it must be zero, so it is cleared after a factorisation that interchanged
        rows."""
        return [f"{indent}if iteration == 0 or iteration >= {SHARED_MATRIX_ITERATIONS}:",
                f"{indent}    if first < N_STATES:",
                f"{indent}        jac[:, :, :] = 0.0",
                *self.plan.call(indent + "    "),
                f"{indent}    first = factor_block(jac, LOWER_START, LOWER, UPPER_START, "
                "UPPER, pivots, pivot_size, factor, trouble, columns)"]

    def _moves(self, indent: str) -> list[str]:
        """Each active member moves by the solved update: a singular one is not
        converged, a non-finite one leaves (it will be flagged non-finite), the others
        stop once the update is <= tol; ``remaining`` counts those still active."""
        place, n = self.plan.place, self.rates.model.n_states
        deep = indent + "    "
        lines = [f"{indent}remaining = 0",
                 f"{indent}for b in range(BLOCK):",
                 f"{deep}size = 0.0"]
        lines += [f"{deep}size = _max(size, abs(upd[{place[s]}, b]))" for s in range(n)]
        lines += [f"{deep}if active[b]:",
                  f"{deep}    if trouble[b] == 1:",
                  f"{deep}        status[m0 + b] |= NEWTON_NOT_CONVERGED",
                  f"{deep}        active[b] = False",
                  f"{deep}    elif trouble[b] == 2 or size - size != 0.0:",
                  f"{deep}        active[b] = False",
                  f"{deep}    else:"]
        lines += [f"{deep}        y1[{s}, b] -= upd[{place[s]}, b]" for s in range(n)]
        lines += [f"{deep}        if size <= newton_tol:",
                  f"{deep}            active[b] = False",
                  f"{deep}remaining += active[b]"]
        return lines

    def _end_of_step(self, indent: str, param_only: list[ScalarNode],
                     time_names: dict[str, Names]) -> list[str]:
        """End of step: a member still active did not converge; the increments from the
        final iterate move the state and the flow counts."""
        rates = self.rates
        n = rates.model.n_states
        inner = indent + "    "
        prelude, member_names = rates.member_prelude(inner, param_only)
        lines = [f"{indent}for b in range(BLOCK):", *prelude,
                 f"{inner}if active[b]:",
                 f"{inner}    status[m] |= NEWTON_NOT_CONVERGED"]
        lines += [f"{inner}w_{s} = y1[{s}, b]" for s in range(n)]
        body, end_rates = rates.at_stage("1", [f"w_{s}" for s in range(n)], member_names,
                                         time_names["1"], inner, list(rates.model.rates))
        lines += body
        lines += self._increments(inner, "inc", end_rates)
        increments = [f"inc_{f}" for f in range(rates.model.n_flow_elements)]
        lines += rates.moved_state(inner, [f"y_{s}" for s in range(n)], increments, "z_")
        lines += rates.finish_member(inner, "z_", increments)
        return lines
