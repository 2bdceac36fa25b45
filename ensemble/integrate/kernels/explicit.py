"""One step of an explicit Runge-Kutta method for a block of members.

For a tableau (A, b, c) (Butcher 2008, *Numerical Methods for Ordinary Differential
Equations*, 2nd ed., ch. 2-3), stage i evaluates the rates at ``t + c_i h`` on
``Y_i = y (+) S (h sum_{j<i} A_ij r_j)`` and the step moves ``h sum_i b_i r_i`` persons
along the flows: the arithmetic of the numpy reference (:mod:`ensemble.integrate.reference`,
"Explicit tableau"), written out as straight-line code per member from the tableau's
numbers, zero weights skipped.  Any tableau of :data:`ensemble.methods.METHODS` is run by
this one writer.
"""

from __future__ import annotations

from ensemble.integrate.kernels.expressions import weighted_sum
from ensemble.integrate.kernels.rates import Names
from ensemble.integrate.kernels.step import StepCode
from ensemble.model.ir import ScalarNode


class ExplicitStep(StepCode):
    """Kernel code of one step of an explicit method (a Butcher tableau)."""

    def lines(self, indent: str, param_only: list[ScalarNode],
              time_names: dict[str, Names]) -> list[str]:
        """Code of step ``step`` for every member of the block: the stages, then the
        increments and the new state."""
        rates, method = self.rates, self.method
        model = rates.model
        inner = indent + "    "
        prelude, member_names = rates.member_prelude(inner, param_only)
        lines = [f"{indent}for b in range(BLOCK):", *prelude]
        state = [f"y_{s}" for s in range(model.n_states)]
        stage_rates: list[list[str]] = []
        for i in range(len(method.b)):
            stage = str(i)
            stage_state = state
            if i > 0:
                lines += self._stage_state(inner, stage, stage_rates)
                stage_state = [f"Y{stage}_{s}" for s in range(model.n_states)]
            body, values = rates.at_stage(stage, stage_state, member_names,
                                          time_names[stage], inner, list(model.rates))
            lines += body
            stage_rates.append(values)
        for f in range(model.n_flow_elements):
            total = weighted_sum([float(w) for w in method.b], [r[f] for r in stage_rates])
            lines.append(f"{inner}inc_{f} = h * ({total})")
        increments = [f"inc_{f}" for f in range(model.n_flow_elements)]
        lines += rates.moved_state(inner, state, increments, "z_")
        lines += rates.finish_member(inner, "z_", increments)
        return lines

    def _stage_state(self, indent: str, stage: str,
                     stage_rates: list[list[str]]) -> list[str]:
        """``Y_i = y (+) S (h sum_j A_ij r_j)`` of stage ``stage`` (i > 0), from the
        expressions of the earlier stages' rates, as ``Y<i>_<s>``."""
        i = int(stage)
        n_flows = self.rates.model.n_flow_elements
        lines = []
        for f in range(n_flows):
            combination = weighted_sum([float(a) for a in self.method.a[i, :i]],
                                       [stage_rates[j][f] for j in range(i)])
            lines.append(f"{indent}k{stage}_{f} = "
                         + (f"h * ({combination})" if combination is not None else "0.0"))
        state = [f"y_{s}" for s in range(self.rates.model.n_states)]
        lines += self.rates.moved_state(indent, state, [f"k{stage}_{f}" for f in
                                                        range(n_flows)], f"Y{stage}_")
        return lines
