"""Straight-line scalar code of :mod:`ensemble.model.ir` trees.

Each distinct subtree is computed once and given a variable (a dict keyed by node: equal
subtrees are equal nodes), so shared subexpressions cost nothing twice.  Only our own
identifiers and ``repr`` of floats appear in the text; the trees were validated before
they were lowered.  Every operation is spelled so that it has the float64 meaning of
:data:`ensemble.model.ir.OPERATION_MEANINGS`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable

from ensemble.integrate.kernels.scalars import OPERATION_HELPERS
from ensemble.model.grouped import GroupParam, GroupSchedule, GroupState
from ensemble.model.ir import (Apply, Const, ParamRef, ScalarNode, ScheduleRef, StateRef,
                               TimeRef, walk)

INFIX = {"add": "+", "sub": "-", "mul": "*", "div": "/", "pow": "**"}
"""Operations written as Python's binary operators."""

MATH_CALLS = {"exp": "math.exp", "log": "math.log", "sqrt": "math.sqrt", "sin": "math.sin",
              "cos": "math.cos", "abs": "abs"}
"""Operations written as a call of Python's ``math`` module or a builtin."""


def literal(value: float) -> str:
    """A float literal for the generated text (inf and NaN spelled through math)."""
    if math.isnan(value):
        return "math.nan"
    if math.isinf(value):
        return "math.inf" if value > 0 else "(-math.inf)"
    return repr(float(value))


def signed_sum(terms: list[tuple[float, str]]) -> str:
    """``a + b - c`` from (sign, name) pairs; "0.0" when empty."""
    if not terms:
        return "0.0"
    text = ""
    for sign, name in terms:
        if not text:
            text = name if sign > 0 else f"-{name}"
        else:
            text += f" + {name}" if sign > 0 else f" - {name}"
    return text


def weighted_sum(weights: list[float], names: list[str]) -> str | None:
    """``w0 * a + w1 * b`` skipping zero weights; None when all are zero."""
    terms = []
    for weight, name in zip(weights, names):
        if weight == 0.0:
            continue
        terms.append(name if weight == 1.0 else f"{literal(weight)} * {name}")
    return " + ".join(terms) if terms else None


_LEAF_READS: dict[type, frozenset[str]] = {
    StateRef: frozenset({"state"}), GroupState: frozenset({"state", "group"}),
    ParamRef: frozenset({"param"}), GroupParam: frozenset({"param", "group"}),
    ScheduleRef: frozenset({"schedule"}), GroupSchedule: frozenset({"schedule", "group"}),
    TimeRef: frozenset({"time"}), Const: frozenset(),
}
"""What each kind of leaf reads; a sum over groups (:data:`ensemble.model.grouped.STRUCTURED`)
reads the state, at the group at hand."""


class ExpressionWriter:
    """Straight-line code for rate trees, each distinct subtree computed once; remembers
    what each subtree reads, so that code can be hoisted out of the loops it does not
    depend on."""

    def __init__(self) -> None:
        self._depends: dict[ScalarNode, frozenset[str]] = {}

    def depends(self, node: ScalarNode) -> frozenset[str]:
        """What ``node`` reads: a subset of {"state", "param", "schedule", "time",
        "group"} ("group": the group at hand, :mod:`ensemble.model.grouped`)."""
        known = self._depends.get(node)
        if known is not None:
            return known
        for current in walk(node):
            if current not in self._depends:
                self._depends[current] = self._reads(current)
        return self._depends[node]

    def _reads(self, node: ScalarNode) -> frozenset[str]:
        """What ``node`` reads, its arguments' already known."""
        if isinstance(node, Apply):
            return frozenset().union(*(self._depends[a] for a in node.args))
        return _LEAF_READS.get(type(node), frozenset({"state", "group"}))

    def time_only(self, roots: list[ScalarNode]) -> list[ScalarNode]:
        """Subtrees of the roots that read the time and nothing else (the same for every
        member and group: computed once per stage)."""
        return [node for node in walk(*roots)
                if isinstance(node, Apply) and self.depends(node) == {"time"}]

    def emit(self, roots: Iterable[ScalarNode], names: dict[ScalarNode, str], prefix: str,
             lines: list[str], leaf: Callable[[ScalarNode], str]) -> list[str]:
        """Append assignments computing ``roots`` to ``lines``; return their expressions.

        ``names`` maps nodes already computed to variable names (it is extended);
        ``leaf(node)`` spells a non-Apply, non-Const node.  New variables are named
        ``prefix`` and a number.
        """
        roots = tuple(roots)
        for node in walk(*roots):
            if node in names:
                continue
            if isinstance(node, Const):
                names[node] = literal(node.value)
            elif not isinstance(node, Apply):
                names[node] = leaf(node)
            else:
                variable = f"{prefix}{len(names)}"
                lines.append(f"{variable} = {_operation(node, [names[a] for a in node.args])}")
                names[node] = variable
        return [names[root] for root in roots]


def _operation(node: Apply, args: list[str]) -> str:
    """The expression of ``node``'s operation on the expressions ``args``."""
    if node.op in INFIX:
        return f"{args[0]} {INFIX[node.op]} {args[1]}"
    if node.op == "neg":
        return f"-{args[0]}"
    if node.op == "select_le":
        return f"{args[2]} if {args[0]} <= {args[1]} else {args[3]}"
    if node.op in OPERATION_HELPERS:
        return f"{OPERATION_HELPERS[node.op].__name__}({', '.join(args)})"
    return f"{MATH_CALLS[node.op]}({args[0]})"
