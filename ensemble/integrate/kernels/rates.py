"""Code of a model's rates at a stage, for a block of members: the one place that turns
the model into scalar code (:mod:`.explicit`, :mod:`.implicit` and :mod:`.newton_matrix`
only arrange where it is evaluated).

The rates come from a :class:`~.form.KernelForm`: a family of flow elements is one tree
in the group index (:mod:`ensemble.model.grouped`), evaluated in a loop over the groups
``g`` with the members ``b`` innermost (so that the compiler vectorises across members);
a single element is its own tree, evaluated in a loop over members alone; a matrix
product is a loop over the matrix's structural non-zeros (its entries computed from their
skeletons and the per-entry values of :class:`~.form.MatrixPlan`), a sum over groups a
loop over the groups.  Each distinct subtree of a loop's body is computed once
(:class:`~.expressions.ExpressionWriter`); subtrees of the time alone are computed once
per evaluation, outside the loops.

In a staged step (:attr:`~.form.KernelForm.shape`) all of it is one generated function,
``rates_at``, that the step calls at each stage (the code does not grow with the stages
of the method); a fused or banded step instead writes the rates inline, the states in
registers (:meth:`RateCode.evaluate`), with the sums over groups between its passes
(:meth:`RateCode.reductions`).

Variables of the generated code: ``m0`` the block's first member, ``width`` its members,
``b`` a member's lane and ``m = m0 + b`` its column, ``g`` the group at hand, ``p`` the
per-member parameters (``p_<i>`` row i, ``gp_<i>`` row i + g), ``sv[stage, slot, b]`` the
schedule values in force, ``value_<x>[g, b]`` and ``total_<x>[b]`` the sums over groups
at the stage.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from ensemble.integrate.kernels.expressions import ExpressionWriter, literal
from ensemble.integrate.kernels.form import (EntryConst, EntryParam, EntrySchedule,
                                             KernelForm)
from ensemble.integrate.kernels.scalars import COMPILED
from ensemble.methods import Method
from ensemble.model.grouped import (STRUCTURED, Contract, GroupParam, GroupSchedule,
                                    GroupState)
from ensemble.model.ir import ParamRef, ScalarNode, ScheduleRef, StateRef, TimeRef, walk

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


@dataclass(frozen=True)
class Reading:
    """Where code reads the values of a stage: its time, its row of ``sv``, the names
    of its subtrees of time alone, and how a state is spelled (a register, or a row of
    an array)."""

    time: str
    index: str
    time_names: Names
    state: Callable[[ScalarNode], str]

    @staticmethod
    def array(name: str) -> Callable[[ScalarNode], str]:
        """The spelling of a state held in rows of the array ``name``."""
        def spell(node: ScalarNode) -> str:
            if isinstance(node, GroupState):
                return f"{name}[{node.first} + g, b]"
            return f"{name}[{node.index}, b]"
        return spell


class RateCode:
    """Scalar code of the rates of ``form``'s model."""

    def __init__(self, form: KernelForm):
        self.form = form
        self.model = form.model
        self.writer = ExpressionWriter()
        self.templates = [family.template for family in form.families]
        self.operands = [node.operand for node in form.structured]
        self.single_trees = [self.model.rates[e] for e in form.singles]
        self.time_only = self.writer.time_only(
            [*self.templates, *self.operands, *self.single_trees])

    def time_subtrees(self, time: str, prefix: str, indent: str,
                      roots: Sequence[ScalarNode] | None = None) -> tuple[list[str], Names]:
        """Code computing the subtrees of time alone of ``roots`` (default: the rates') at
        ``time``, outside every loop; returns the lines and their names."""
        wanted = self.time_only if roots is None else self.writer.time_only(list(roots))
        names: Names = {}
        body: list[str] = []
        self.writer.emit(wanted, names, prefix, body, lambda node: time)
        return [indent + line for line in body], {n: names[n] for n in wanted}

    def member_prelude(self, indent: str, roots: Sequence[ScalarNode]) -> tuple[list[str], Names]:
        """At the top of a loop body over members (and groups): the member's column, the
        parameters ``roots`` read, and the subtrees of parameters alone, whose names every
        stage of the body shares."""
        lines = [f"{indent}m = m0 + b"]
        names: Names = {}
        leaves = sorted({leaf for leaf in walk(*roots)
                         if isinstance(leaf, (ParamRef, GroupParam))},
                        key=lambda leaf: (isinstance(leaf, GroupParam), _row(leaf)))
        for leaf in leaves:
            if isinstance(leaf, ParamRef):
                names[leaf] = f"p_{leaf.index}"
                lines.append(f"{indent}p_{leaf.index} = p[{leaf.index}, m]")
            else:
                names[leaf] = f"gp_{leaf.first}"
                lines.append(f"{indent}gp_{leaf.first} = p[{leaf.first} + g, m]")
        param_only = [node for node in walk(*roots)
                      if self.writer.depends(node) - {"group"} == {"param"}]
        body: list[str] = []
        self.writer.emit(param_only, names, "q_", body, _unexpected)
        return lines + [indent + line for line in body], names

    def evaluate(self, roots: Sequence[ScalarNode], reading: Reading, base: Names,
                 indent: str, prefix: str) -> tuple[list[str], list[str]]:
        """Code evaluating ``roots`` at the stage of ``reading`` inside a loop body whose
        prelude gave ``base``; returns the lines and the roots' expressions."""
        names = dict(base)
        names.update(reading.time_names)
        body: list[str] = []
        values = self.writer.emit(roots, names, prefix, body,
                                  lambda node: self.leaf(node, reading))
        return [indent + line for line in body], values

    def leaf(self, node: ScalarNode, reading: Reading) -> str:
        """The spelling of a leaf of the rates at the stage of ``reading``."""
        if isinstance(node, (GroupState, StateRef)):
            return reading.state(node)
        if isinstance(node, ScheduleRef):
            return f"sv[{reading.index}, {node.index}, b]"
        if isinstance(node, GroupSchedule):
            return f"sv[{reading.index}, {node.first} + g, b]"
        if isinstance(node, TimeRef):
            return reading.time
        if isinstance(node, STRUCTURED):
            x = self.form.index_of(node)
            return f"value_{x}[g, b]" if isinstance(node, Contract) else f"total_{x}[b]"
        raise AssertionError(node)

    # ------------------------------------------------------------------ rates_at

    def arguments(self) -> list[str]:
        """The arguments of ``rates_at`` after the state, stage, time and output row:
        the members, the parameters and schedule values, the matrices' data and the
        arrays the sums over groups are computed in."""
        return ["m0", "width", "sizes", "p", "sv", *self.data_arguments(),
                *self.work_arguments()]

    def call(self, indent: str, state: str, stage: str, time: str, row: str) -> str:
        """A call of ``rates_at``: the rates at ``state``, ``stage`` (row of ``sv``) and
        ``time`` into ``rates[row]``."""
        return (f"{indent}rates_at({state}, {stage}, {time}, rates, {row}, "
                f"{', '.join(self.arguments())})")

    def function(self) -> list[str]:
        """The generated ``rates_at``: the sums over groups, then the rate of every flow
        element into ``rates[row, e, b]``."""
        time_lines, time_names = self.time_subtrees("time", "u_", "    ")
        reading = Reading("time", "stage", time_names, Reading.array("state"))
        lines = ["", "", COMPILED,
                 f"def rates_at(state, stage, time, rates, row, {', '.join(self.arguments())}):",
                 '    """The rate of every flow element at a stage."""',
                 "    n_groups = sizes[2]", *time_lines]
        lines += self._structured_values(reading, "    ")
        lines += self._rates(reading, "    ")
        return lines + ["    return"]

    def sums_call(self, indent: str, stage: str, time: str) -> str:
        """A call of ``sums_at``: the sums over groups at ``stage`` (row of ``sv``) and
        ``time``, from the operands at every group."""
        return f"{indent}sums_at({stage}, {time}, {', '.join(self.arguments())})"

    def sums_function(self) -> list[str]:
        """The generated ``sums_at`` (:meth:`reductions`), for steps that compute the
        operands themselves."""
        roots = [self.form.plans[node].skeletons[k] for node in self.form.plans
                 for k in range(len(self.form.plans[node].skeletons))]
        time_lines, time_names = self.time_subtrees("time", "u_", "    ", roots)
        reading = Reading("time", "stage", time_names, _no_state)
        return ["", "", COMPILED,
                f"def sums_at(stage, time, {', '.join(self.arguments())}):",
                '    """The sums over groups at a stage."""',
                "    n_groups = sizes[2]", *time_lines,
                *self.reductions(reading, "    "), "    return"]

    def _structured_values(self, reading: Reading, indent: str) -> list[str]:
        """Every operand at every group, then the sums over groups."""
        if not self.form.structured:
            return []
        inner = indent + "        "
        prelude, base = self.member_prelude(inner, self.operands)
        body, values = self.evaluate(self.operands, reading, base, inner, "o")
        lines = [f"{indent}for g in range(n_groups):",
                 f"{indent}    for b in range(width):", *prelude, *body]
        lines += [f"{inner}operand_{x}[g, b] = {value}" for x, value in enumerate(values)]
        return lines + self.reductions(reading, indent)

    def reductions(self, reading: Reading, indent: str) -> list[str]:
        """Each matrix product row by row over its entries (``value_<x>``) and each sum
        over groups (``total_<x>``), from the operands at every group (``operand_<x>``)."""
        lines: list[str] = []
        for x, node in enumerate(self.form.structured):
            if isinstance(node, Contract):
                lines += self._contract(x, reading, indent)
            else:
                lines += _total(x, indent)
        return lines

    def _rates(self, reading: Reading, indent: str) -> list[str]:
        """The families in a loop over groups, the single elements in a loop over
        members."""
        lines: list[str] = []
        if self.form.families:
            inner = indent + "        "
            prelude, base = self.member_prelude(inner, self.templates)
            body, values = self.evaluate(self.templates, reading, base, inner, "r")
            lines += [f"{indent}for g in range(n_groups):",
                      f"{indent}    for b in range(width):", *prelude, *body]
            lines += [f"{inner}rates[row, {family.first} + g, b] = {value}"
                      for family, value in zip(self.form.families, values)]
        if self.form.singles:
            inner = indent + "    "
            prelude, base = self.member_prelude(inner, self.single_trees)
            body, values = self.evaluate(self.single_trees, reading, base, inner, "s")
            lines += [f"{indent}for b in range(width):", *prelude, *body]
            lines += [f"{inner}rates[row, {e}, b] = {value}"
                      for e, value in zip(self.form.singles, values)]
        return lines

    def entry(self, x: int, reading: Reading, indent: str) -> tuple[list[str], list[str], str]:
        """Entry ``e`` of matrix product ``x``: lines before the loop over members (the
        entry's values from the tables), lines in it (at ``indent`` plus four), and the
        expression.  With entries of more than one skeleton, the entries were computed
        beforehand into ``matrix_<x>[e, b]`` (:meth:`_materialise`)."""
        plan = self.form.plans[self.form.structured[x]]
        if len(plan.skeletons) > 1:
            return [], [], f"matrix_{x}[e, b]"
        return self._skeleton(x, plan.skeletons[0], reading, indent)

    def _skeleton(self, x: int, shape: ScalarNode, reading: Reading, indent: str
                  ) -> tuple[list[str], list[str], str]:
        outer: list[str] = []
        inner: list[str] = []
        names: Names = dict(reading.time_names)

        def leaf(node: ScalarNode) -> str:
            if isinstance(node, EntryConst):
                outer.append(f"{indent}ec_{node.number} = numbers_{x}[e, {node.number}]")
                return f"ec_{node.number}"
            if isinstance(node, EntryParam):
                outer.append(f"{indent}ep_{node.number} = params_{x}[e, {node.number}]")
                return f"p[ep_{node.number}, m0 + b]"
            if isinstance(node, EntrySchedule):
                outer.append(f"{indent}es_{node.number} = schedules_{x}[e, {node.number}]")
                return f"sv[{reading.index}, es_{node.number}, b]"
            return self.leaf(node, reading)

        value, = self.writer.emit([shape], names, f"w{x}_", inner, leaf)
        return outer, [indent + "    " + line for line in inner], value

    def _materialise(self, x: int, reading: Reading, indent: str) -> list[str]:
        """Every entry of matrix product ``x`` at the stage, into ``matrix_<x>[e, b]``, by
        its skeleton."""
        plan = self.form.plans[self.form.structured[x]]
        lines = [f"{indent}for e in range(column_{x}.shape[0]):",
                 f"{indent}    kind = class_{x}[e]"]
        for number, shape in enumerate(plan.skeletons):
            keyword = "if" if number == 0 else "elif"
            outer, inner, value = self._skeleton(x, shape, reading, indent + "        ")
            lines += [f"{indent}    {keyword} kind == {number}:", *outer,
                      f"{indent}        for b in range(width):", *inner,
                      f"{indent}            matrix_{x}[e, b] = {value}"]
        return lines

    def _contract(self, x: int, reading: Reading, indent: str) -> list[str]:
        """Row g of matrix product ``x``: its first term, then each further one added,
        in the order of the columns (0 for a row without entries)."""
        plan = self.form.plans[self.form.structured[x]]
        lines = self._materialise(x, reading, indent) if len(plan.skeletons) > 1 else []
        deep = indent + "        "
        outer, inner, entry = self.entry(x, reading, deep)
        lines += [f"{indent}for g in range(n_groups):",
                  f"{indent}    row_first = row_start_{x}[g]",
                  f"{indent}    for b in range(width):",
                  f"{indent}        value_{x}[g, b] = 0.0",
                  f"{indent}    for e in range(row_first, row_start_{x}[g + 1]):",
                  f"{deep}col = column_{x}[e]", *outer,
                  f"{deep}if e == row_first:",
                  f"{deep}    for b in range(width):", *_deeper(inner, 4),
                  f"{deep}        value_{x}[g, b] = {entry} * operand_{x}[col, b]",
                  f"{deep}else:",
                  f"{deep}    for b in range(width):", *_deeper(inner, 4),
                  f"{deep}        value_{x}[g, b] = value_{x}[g, b] + "
                  f"{entry} * operand_{x}[col, b]"]
        return lines

    def _work_arrays(self) -> list[tuple[str, str]]:
        """(name, shape) of each per-block array the sums over groups are computed in."""
        arrays = []
        for x, node in enumerate(self.form.structured):
            arrays.append((f"operand_{x}", "(n_groups, BLOCK)"))
            if isinstance(node, Contract):
                arrays.append((f"value_{x}", "(n_groups, BLOCK)"))
                if len(self.form.plans[node].skeletons) > 1:
                    arrays.append((f"matrix_{x}", f"(column_{x}.shape[0], BLOCK)"))
            else:
                arrays.append((f"total_{x}", "BLOCK"))
        return arrays

    def buffers(self) -> list[str]:
        """Allocations, per block, of the schedule values and of the arrays the sums over
        groups are computed in."""
        slots = len(self.model.schedule_slots)
        return [f"    sv = np.empty(({len(stage_times(self.form.method))}, {max(slots, 1)}, "
                "BLOCK))",
                *(f"    {name} = np.empty({shape})" for name, shape in self._work_arrays())]

    def data_arguments(self) -> list[str]:
        """The kernel's arguments holding the matrices' data, in the order of
        :meth:`~.form.MatrixPlan.arrays`."""
        names = []
        for x, node in enumerate(self.form.structured):
            if isinstance(node, Contract):
                names += [f"{name}_{x}" for name in
                          ("row_start", "column", "class", "numbers", "params", "schedules")]
        return names

    def work_arguments(self) -> list[str]:
        """The per-block arrays of the sums over groups (:meth:`buffers`)."""
        return [name for name, _ in self._work_arrays()]

def _row(leaf: ScalarNode) -> int:
    return leaf.first if isinstance(leaf, GroupParam) else leaf.index


def _no_state(node: ScalarNode) -> str:
    raise AssertionError(f"a matrix entry reads the state: {node!r}")


def _unexpected(node: ScalarNode) -> str:
    raise AssertionError(f"a leaf without a name: {node!r}")


def _deeper(lines: list[str], spaces: int) -> list[str]:
    return [" " * spaces + line for line in lines]


def _total(x: int, indent: str) -> list[str]:
    """Sum over groups ``x``: its operand at every group, added in group order."""
    return [f"{indent}for b in range(width):",
            f"{indent}    total_{x}[b] = operand_{x}[0, b]",
            f"{indent}for g in range(1, n_groups):",
            f"{indent}    for b in range(width):",
            f"{indent}        total_{x}[b] = total_{x}[b] + operand_{x}[g, b]"]
