"""The parts of a scenario's expressions made of numbers alone must be finite numbers.

``10 ** 10 ** 10`` in a rate is no mistake of syntax, and every literal in it is finite,
but its value is not: folded as every backend folds it (:func:`ensemble.model.ir.apply`,
float64 as numpy computes it) it is ``inf``, and every member of the run would be flagged.
So each largest sub-expression without a name is folded here by the lowering the
integrators use (:class:`~ensemble.model.lowering.ExpressionLowering`), and a result that
is infinite or NaN is refused, naming the key, before anything is computed.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

from ensemble.errors import ScenarioError, ScenarioErrors
from ensemble.model.ir import Const
from ensemble.model.lowering import ExpressionLowering, Value
from ensemble.scenario import expressions
from ensemble.scenario.expressions import Binary, Call, Negate, Node, Number
from ensemble.scenario.schema import Derived, Expression, Scenario, Schedule


class _NumbersOnly(ExpressionLowering):
    """The lowering of a sub-expression without names (one group: no vectors arise)."""

    def __init__(self) -> None:
        super().__init__(n_groups=1)

    def name(self, name: str) -> Value:
        raise ValueError(f"a sub-expression of numbers alone uses the name {name!r}")


def refuse_non_finite_constants(scenario: Scenario) -> None:
    """Raise a :class:`~ensemble.errors.ScenarioError` (or several) for each expression
    of ``scenario`` (rates, initial values, derived parameters and schedule values, the
    variants' included) with a part made of numbers alone whose value is not finite."""
    errors = []
    for expression in _expressions(scenario):
        for part in _number_parts(expression.tree):
            value = _NumbersOnly().lower(part)
            if isinstance(value, Const) and not math.isfinite(value.value):
                errors.append(ScenarioError(
                    scenario.source.path, expression.key, expression.text,
                    f"its part {_text(part)} is made of numbers alone and is not a finite "
                    f"number ({value.value})", "write the number it should be"))
    if len(errors) == 1:
        raise errors[0]
    if errors:
        raise ScenarioErrors(errors)


def _expressions(scenario: Scenario) -> Iterator[Expression]:
    """Every expression of the scenario, each once."""
    seen: set[int] = set()
    candidates: list[object] = [flow.rate for flow in scenario.model.flows]
    candidates += list(scenario.model.initial.values())
    for parameters in [scenario.parameters, *(v.parameters for v in scenario.variants)]:
        for parameter in parameters.values():
            if isinstance(parameter.form, Derived):
                candidates.append(parameter.form.expression)
            elif isinstance(parameter.form, Schedule):
                candidates += list(parameter.form.values)
    for candidate in candidates:
        if isinstance(candidate, Expression) and id(candidate) not in seen:
            seen.add(id(candidate))
            yield candidate


def _number_parts(node: Node) -> Iterator[Node]:
    """The largest sub-trees of ``node`` without names that compute something (a literal
    on its own, or negated, is finite by the parser's rule)."""
    if not expressions.names_in(node):
        if not isinstance(node, Number) and not (isinstance(node, Negate)
                                                 and isinstance(node.operand, Number)):
            yield node
        return
    if isinstance(node, Negate):
        yield from _number_parts(node.operand)
    elif isinstance(node, Binary):
        yield from _number_parts(node.left)
        yield from _number_parts(node.right)
    elif isinstance(node, Call):
        for argument in node.args:
            yield from _number_parts(argument)


def _text(node: Node) -> str:
    """``node`` written out, operations inside operations in parentheses."""
    if isinstance(node, Number):
        small_whole = node.value.is_integer() and abs(node.value) < 1e15
        return repr(int(node.value)) if small_whole else repr(node.value)
    if isinstance(node, Negate):
        return f"-{_inner(node.operand)}"
    if isinstance(node, Binary):
        return f"{_inner(node.left)} {node.op} {_inner(node.right)}"
    if isinstance(node, Call):
        return f"{node.function}({', '.join(_text(a) for a in node.args)})"
    return repr(node)


def _inner(node: Node) -> str:
    return f"({_text(node)})" if isinstance(node, (Binary, Negate)) else _text(node)
