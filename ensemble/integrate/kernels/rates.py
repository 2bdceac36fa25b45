"""Code of a model's rates at the stages of a step, for one member of a block.

The rates are emitted from :mod:`ensemble.model.ir` trees, each distinct subtree once per
stage (:class:`~.expressions.ExpressionWriter`); subtrees of parameters alone are hoisted
out of the stages (computed once per member and step), subtrees of time alone out of the
members loop (once per stage).  Variables of the generated code, for stage ``<k>``:
``time<k>`` the stage time, ``s<k>_<i>`` schedule slot i, ``p_<i>`` parameter i,
``y_<s>`` the member's state at the start of the step, ``m`` the member's column and
``b`` its lane in the block.

This is the one place that turns the model into scalar code; :mod:`.explicit`,
:mod:`.implicit` and :mod:`.newton_matrix` only arrange where it is evaluated.
"""

from __future__ import annotations

from ensemble.integrate.kernels.expressions import ExpressionWriter, literal, signed_sum
from ensemble.integrate.kernels.schedules import ScheduleCode
from ensemble.methods import Method
from ensemble.model.ir import ParamRef, ScalarNode, ScheduleRef, StateRef, TimeRef, walk
from ensemble.model.lower import LoweredModel

Names = dict[ScalarNode, str]
"""Variables already holding the value of some subtrees."""


def stage_times(method: Method) -> list[tuple[str, str]]:
    """(stage name, its time as code) of every rate evaluation in a step of ``method``,
    ``t`` being the start of step ``step``: the tableau's nodes ``t + c_i h``, or a theta
    method's start and end of step (the end as ``(step + 1) * h``, as the reference
    computes it)."""
    if method.implicit:
        return [("0", "t"), ("1", "(step + 1) * h")]
    return [(str(i), "t" if c == 0.0 else f"t + {literal(float(c))} * h")
            for i, c in enumerate(method.c)]


class RateCode:
    """Scalar code of ``model``'s rates (and, for an implicit ``method``, their partial
    derivatives) at the stages of ``method``."""

    def __init__(self, model: LoweredModel, method: Method):
        self.model = model
        self.method = method
        self.writer = ExpressionWriter()
        self.schedules = ScheduleCode(model.schedule_slots)
        stoichiometry = model.stoichiometry
        # per state, the (sign, flow element) of every flow into or out of it, ascending
        self.into_state: list[list[tuple[float, int]]] = [
            [(float(stoichiometry[s, f]), f) for f in range(model.n_flow_elements)
             if stoichiometry[s, f] != 0]
            for s in range(model.n_states)]
        trees = [*model.rates, *self.derivative_trees()]
        self.used_parameters = sorted({n.index for n in walk(*trees)
                                       if isinstance(n, ParamRef)})
        self.used_schedules = {n.index for n in walk(*trees) if isinstance(n, ScheduleRef)}

    def derivative_trees(self) -> list[ScalarNode]:
        """The partial derivatives of the rates an implicit method needs (none for an
        explicit one)."""
        if not self.method.implicit:
            return []
        return [tree for entries in self.model.rate_derivatives for _, tree in entries]

    def step_context(self, indent: str, stages: list[tuple[str, str]],
                     time_only: list[ScalarNode]) -> tuple[list[str], dict[str, Names]]:
        """Scalar code of step ``step`` outside the members loop: the step's time ``t``,
        the knots in force, each stage's time and "linear" segments, and the subtrees of
        time alone; returns the lines and, per stage, the names of those subtrees."""
        lines = [f"{indent}t = step * h"]
        lines += self.schedules.step_prelude(indent)
        for stage, time in stages:
            lines.append(f"{indent}time{stage} = {time}")
            lines += self.schedules.stage_prelude(stage, f"time{stage}", indent)
        time_names: dict[str, Names] = {}
        for stage, _ in stages:
            names: Names = {}
            body: list[str] = []
            self.writer.emit(time_only, names, f"u{stage}_", body,
                             lambda node, s=stage: f"time{s}")
            lines += [indent + line for line in body]
            time_names[stage] = {n: v for n, v in names.items() if n in set(time_only)}
        return lines, time_names

    def member_prelude(self, indent: str, param_only: list[ScalarNode],
                       state: bool = True) -> tuple[list[str], Names]:
        """Load the member's state (unless ``state`` is False) and parameters; compute its
        parameter-only subtrees."""
        lines = [f"{indent}m = m0 + b"]
        if state:
            lines += [f"{indent}y_{s} = y[{s}, b]" for s in range(self.model.n_states)]
        lines += [f"{indent}p_{i} = p[{i}, m]" for i in self.used_parameters]
        names: Names = {}
        body: list[str] = []
        self.writer.emit(param_only, names, "q_", body, lambda node: f"p_{node.index}")
        lines += [indent + line for line in body]
        return lines, names

    def at_stage(self, stage: str, state: list[str], member_names: Names,
                 time_names: Names, indent: str,
                 roots: list[ScalarNode]) -> tuple[list[str], list[str]]:
        """Code evaluating ``roots`` at ``stage`` with the member's state held in the
        variables ``state``; returns the lines and the roots' expressions."""
        lines = [indent + line
                 for line in self.schedules.values(stage, self.used_schedules)]
        names = dict(member_names)
        names.update(time_names)

        def leaf(node: ScalarNode) -> str:
            if isinstance(node, StateRef):
                return state[node.index]
            if isinstance(node, ParamRef):
                return f"p_{node.index}"
            if isinstance(node, ScheduleRef):
                return f"s{stage}_{node.index}"
            if isinstance(node, TimeRef):
                return f"time{stage}"
            raise AssertionError(node)

        body: list[str] = []
        values = self.writer.emit(roots, names, f"v{stage}_", body, leaf)
        lines += [indent + line for line in body]
        return lines, values

    def moved_state(self, indent: str, old: list[str], increments: list[str],
                    new: str) -> list[str]:
        """``new_s = old_s + sum of signed increments`` for every state (``y (+) S inc``
        of the reference: increments in increasing flow order)."""
        lines = []
        for s, terms in enumerate(self.into_state):
            change = signed_sum([(sign, increments[f]) for sign, f in terms])
            lines.append(f"{indent}{new}{s} = {old[s]}" +
                         ("" if change == "0.0" else f" + ({change})"))
        return lines

    def finish_member(self, indent: str, new: str, increments: list[str]) -> list[str]:
        """Store the new state and add the increments to the flow counts; a member whose
        state is no longer finite is marked and holds NaN from then on."""
        n = self.model.n_states
        lines = [f"{indent}check = " + " + ".join(f"({new}{s} - {new}{s})" for s in range(n))]
        lines.append(f"{indent}if check != 0.0:")
        lines.append(f"{indent}    bad[b] = 1")
        lines.append(f"{indent}if bad[b]:")
        for s in range(n):
            lines.append(f"{indent}    {new}{s} = math.nan")
        for s in range(n):
            lines.append(f"{indent}y[{s}, b] = {new}{s}")
        for f, inc in enumerate(increments):
            lines.append(f"{indent}fc[{f}, b] = math.nan if bad[b] else fc[{f}, b] + {inc}")
        return lines
