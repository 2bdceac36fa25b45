"""One step of an explicit Runge-Kutta method for a block of members.

For a tableau (A, b, c) (Butcher 2008, *Numerical Methods for Ordinary Differential
Equations*, 2nd ed., ch. 2-3), stage i evaluates the rates at ``t + c_i h`` on
``Y_i = y (+) S (h sum_{j<i} A_ij r_j)`` and the step moves ``h sum_i b_i r_i`` persons
along the flows: the arithmetic of the numpy reference (:mod:`ensemble.integrate.reference`,
"Explicit tableau"), the weighted sums over the tableau's non-zero weights in increasing
j.  Any tableau of :data:`ensemble.methods.METHODS` is run by this one writer, in one of
three shapes (:attr:`~.form.KernelForm.shape`):

- fused: one loop over groups and members takes the whole step, every stage written out
  in registers from the tableau's numbers (a model whose groups meet only within a flow,
  as a model without groups);
- banded: the same, cut into one loop per stage, the stage's matrix products and sums
  over groups computed between the loops (each loop leaves the next stage's operands);
  the stages' rates are kept in arrays for the later stages;
- staged: a loop over the stages, each a few loops over arrays: the stage's increments
  and state (``combine``, ``apply_moves``) and its rates (``rates_at``, :mod:`.rates`),
  the tableau passed as data (models with single flow elements).
"""

from __future__ import annotations

import numpy as np

from ensemble.integrate.kernels.expressions import signed_sum, weighted_sum
from ensemble.integrate.kernels.rates import Reading, stage_times
from ensemble.integrate.kernels.schedules import schedule_lines
from ensemble.integrate.kernels.step import StepCode
from ensemble.model.grouped import GroupState
from ensemble.model.ir import ScalarNode

MOVES = "touch_start, touch_element, touch_sign, width"
"""The trailing arguments of every call of ``apply_moves``."""

TABLEAU = ("stage_start", "stage_column", "stage_weight", "final_start", "final_column",
           "final_weight", "stage_node")
"""The kernel's arguments holding the tableau of a staged step (:meth:`ExplicitStep.data`)."""


def combine(rates, weight_start, weight_column, weight_value, row, h, out, width):
    """``out = h * (sum_j w_j rates[j])`` for every flow element and the first ``width``
    members, over the weights ``weight_start[row] .. weight_start[row + 1] - 1`` (their
    stages ``weight_column``, values ``weight_value``) in order: the first term, then each
    further one added (0 when there are none)."""
    first = weight_start[row]
    last = weight_start[row + 1]
    for e in range(out.shape[0]):
        if first == last:
            for b in range(width):
                out[e, b] = 0.0
            continue
        for b in range(width):
            out[e, b] = weight_value[first] * rates[weight_column[first], e, b]
        for k in range(first + 1, last):
            for b in range(width):
                out[e, b] = out[e, b] + weight_value[k] * rates[weight_column[k], e, b]
        for b in range(width):
            out[e, b] = h * out[e, b]


class ExplicitStep(StepCode):
    """Kernel code of one step of an explicit method (a Butcher tableau)."""

    def functions(self) -> list[str]:
        """The sums over groups of a banded step."""
        return self.rates.sums_function() if self.form.shape == "banded" else []

    def buffers(self) -> list[str]:
        stages = len(self.method.b)
        shape = self.form.shape
        lines = ["    check = np.empty(BLOCK)"]
        if shape != "fused":
            lines.append(f"    rates = np.empty(({stages}, n_elements, BLOCK))")
        if shape == "staged":
            lines += ["    inc = np.empty((n_elements, BLOCK))",
                      "    stage = np.empty((n_states, BLOCK))"]
        return lines

    def data_arguments(self) -> list[str]:
        return list(TABLEAU) if self.form.shape == "staged" else []

    def data(self) -> list[np.ndarray]:
        """The tableau's non-zero weights as compressed rows (stage i's are ``A[i, :i]``,
        the final ones ``b``) and its nodes ``c``."""
        if self.form.shape != "staged":
            return []
        method = self.method
        stages = [[(j, float(a)) for j, a in enumerate(method.a[i, :i]) if a != 0.0]
                  for i in range(len(method.b))]
        final = [[(j, float(w)) for j, w in enumerate(method.b) if w != 0.0]]
        arrays = []
        for rows in (stages, final):
            arrays += [np.cumsum([0] + [len(row) for row in rows]).astype(np.int64),
                       np.array([j for row in rows for j, _ in row], np.int64),
                       np.array([w for row in rows for _, w in row], np.float64)]
        return arrays + [np.array([float(c) for c in method.c], np.float64)]

    def lines(self, indent: str) -> list[str]:
        return {"fused": self._fused, "banded": self._banded,
                "staged": self._staged}[self.form.shape](indent)

    def _staged(self, indent: str) -> list[str]:
        """Stage by stage over arrays, then the increments, the new state and the flow
        counts."""
        schedules = self.form.model.schedule_slots
        inner = indent + "    "
        lines = [f"{indent}t = step * h",
                 f"{indent}for i in range({len(self.method.b)}):",
                 f"{inner}time = t + stage_node[i] * h",
                 f"{inner}source = y",
                 f"{inner}if i > 0:",
                 f"{inner}    combine(rates, stage_start, stage_column, stage_weight, i, h, "
                 "inc, width)",
                 f"{inner}    apply_moves(y, inc, stage, {MOVES})",
                 f"{inner}    source = stage"]
        if schedules:
            lines.append(f"{inner}schedule_values(sv, i, step, time, knot_steps, knot_days, "
                         "slot_knots, slot_linear, knot_values, m0, width)")
        lines.append(self.rates.call(inner, "source", "i", "time", "i"))
        lines += [f"{indent}combine(rates, final_start, final_column, final_weight, 0, h, "
                  "inc, width)",
                  f"{indent}apply_moves(y, inc, stage, {MOVES})"]
        return lines + finish(indent)

    # ------------------------------------------------------------------ in registers

    def _context(self, indent: str) -> tuple[list[str], list[Reading]]:
        """Per step, outside the loops over members: every stage's time, schedule values
        and subtrees of time alone; and how each stage is read (its state in the registers
        ``y_<block>`` for stage 0, ``Y<i>_<block>`` for stage i)."""
        rates, form = self.rates, self.form
        stages = stage_times(self.method)
        lines = [f"{indent}t = step * h"]
        lines += [f"{indent}time{stage} = {time}" for stage, time in stages]
        if form.model.schedule_slots:
            lines += schedule_lines(stages, indent)
        readings = []
        for index, (stage, _) in enumerate(stages):
            body, names = rates.time_subtrees(f"time{stage}", f"u{stage}_", indent)
            lines += body
            state = _register("y_" if index == 0 else f"Y{index}_", form.n_groups)
            readings.append(Reading(f"time{stage}", str(index), names, state))
        return lines, readings

    def _loop(self, indent: str) -> tuple[list[str], dict]:
        """The head of a loop over groups and members: the member's parameters and its
        state at the start of the step in the registers ``y_<block>``."""
        rates, form = self.rates, self.form
        inner = indent + "        "
        prelude, base = rates.member_prelude(inner, [*rates.templates, *rates.operands])
        lines = [f"{indent}for g in range(n_groups):",
                 f"{indent}    for b in range(width):", *prelude]
        lines += [f"{inner}y_{k} = y[{k * form.n_groups} + g, b]" for k in range(form.n_blocks)]
        return lines, base

    def _fused(self, indent: str) -> list[str]:
        """The whole step in one loop over groups and members, every stage in registers."""
        lines, readings = self._context(indent)
        inner = indent + "        "
        head, base = self._loop(indent)
        lines += [f"{indent}for b in range(width):", f"{indent}    check[b] = 0.0", *head]
        stage_rates: list[list[str]] = []
        for i, reading in enumerate(readings):
            if i > 0:
                lines += self._stage_state(inner, i, stage_rates)
            body, values = self.rates.evaluate(self.rates.templates, reading, base, inner,
                                               f"v{i}_")
            lines += body
            stage_rates.append(values)
        return lines + self._end(indent, stage_rates)

    def _banded(self, indent: str) -> list[str]:
        """A loop over groups and members per stage, the stage's sums over groups computed
        before it from the operands the previous loop left (the first ones from the state
        at the start of the step); a stage's rates are kept for the later stages."""
        rates, form = self.rates, self.form
        lines, readings = self._context(indent)
        inner = indent + "        "
        head, base = self._loop(indent)
        lines += head + self._operands(inner, readings[0], base, 0)
        lines += [f"{indent}for b in range(width):", f"{indent}    check[b] = 0.0"]
        last = len(readings) - 1
        for i, reading in enumerate(readings):
            lines.append(rates.sums_call(indent, str(i), reading.time))
            head, base = self._loop(indent)
            lines += head
            stage_rates = [[f"v{j}_{f}" for f in range(len(form.families))] for j in range(i)]
            lines += [f"{inner}v{j}_{f} = rates[{j}, {family.first} + g, b]"
                      for j in range(i) for f, family in enumerate(form.families)]
            if i > 0:
                lines += self._stage_state(inner, i, stage_rates)
            body, values = rates.evaluate(rates.templates, reading, base, inner, f"v{i}_")
            lines += body
            stage_rates.append(values)
            if i == last:
                return lines + self._end(indent, stage_rates)
            lines += [f"{inner}rates[{i}, {family.first} + g, b] = {value}"
                      for family, value in zip(form.families, values)]
            lines += self._stage_state(inner, i + 1, stage_rates)
            lines += self._operands(inner, readings[i + 1], base, i + 1)
        raise AssertionError("a tableau without stages")

    def _operands(self, inner: str, reading: Reading, base: dict, stage: int) -> list[str]:
        """The operands of the sums over groups at a stage, into ``operand_<x>[g, b]``."""
        body, values = self.rates.evaluate(self.rates.operands, reading, base, inner,
                                           f"o{stage}_")
        return body + [f"{inner}operand_{x}[g, b] = {value}" for x, value in enumerate(values)]

    def _end(self, indent: str, stage_rates: list[list[str]]) -> list[str]:
        """In the loop over groups and members: the increments ``h sum_i b_i r_i``, the
        new state and the flow counts; after it, the members no longer finite marked."""
        form, method = self.form, self.method
        inner = indent + "        "
        blocks = range(form.n_blocks)
        lines = []
        for f in range(len(form.families)):
            total = weighted_sum([float(w) for w in method.b], [r[f] for r in stage_rates])
            lines.append(f"{inner}inc_{f} = h * ({total})")
        lines += self._moved(inner, "inc_", "z_")
        lines.append(f"{inner}check[b] = check[b] + "
                     + " + ".join(f"(z_{k} - z_{k})" for k in blocks))
        lines += [f"{inner}y[{k * form.n_groups} + g, b] = z_{k}" for k in blocks]
        lines += [f"{inner}fc[{family.first} + g, b] = fc[{family.first} + g, b] + inc_{f}"
                  for f, family in enumerate(form.families)]
        return lines + [f"{indent}mark_bad(y, fc, bad, check, width)"]

    def _stage_state(self, indent: str, i: int, stage_rates: list[list[str]]) -> list[str]:
        """``Y_i = y (+) S (h sum_j A_ij r_j)`` of stage i > 0, as ``Y<i>_<block>``."""
        lines = []
        for f in range(len(self.form.families)):
            combination = weighted_sum([float(a) for a in self.method.a[i, :i]],
                                       [stage_rates[j][f] for j in range(i)])
            lines.append(f"{indent}k{i}_{f} = "
                         + (f"h * ({combination})" if combination is not None else "0.0"))
        return lines + self._moved(indent, f"k{i}_", f"Y{i}_")

    def _moved(self, indent: str, increments: str, new: str) -> list[str]:
        """``new<k> = y_<k> + sum of signed increments`` for every block of states
        (``y (+) S inc`` of the reference: increments in increasing element order)."""
        lines = []
        index = {family: f for f, family in enumerate(self.form.families)}
        for k in range(self.form.n_blocks):
            change = signed_sum([(sign, f"{increments}{index[family]}")
                                 for sign, family in self.form.family_terms(k)])
            lines.append(f"{indent}{new}{k} = y_{k}"
                         + ("" if change == "0.0" else f" + ({change})"))
        return lines


def finish(indent: str) -> list[str]:
    """The new state (in ``stage``) stored and the increments (in ``inc``) added to the
    flow counts; members no longer finite marked."""
    return [f"{indent}for b in range(width):",
            f"{indent}    check[b] = 0.0",
            f"{indent}for s in range(n_states):",
            f"{indent}    for b in range(width):",
            f"{indent}        check[b] += stage[s, b] - stage[s, b]",
            f"{indent}        y[s, b] = stage[s, b]",
            f"{indent}for e in range(n_elements):",
            f"{indent}    for b in range(width):",
            f"{indent}        fc[e, b] = fc[e, b] + inc[e, b]",
            f"{indent}mark_bad(y, fc, bad, check, width)"]


def _register(prefix: str, n_groups: int):
    """Spelling of a state held in the registers ``<prefix><block>``."""
    def spell(node: ScalarNode) -> str:
        if not isinstance(node, GroupState):
            raise AssertionError(node)
        return f"{prefix}{node.first // n_groups}"
    return spell
