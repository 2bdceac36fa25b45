"""Property checks: for random rate expressions, the compiled rates equal a direct numpy
evaluation of the expression, bit for bit.

The reference below evaluates the parsed expression tree with numpy, operation by
operation in the written order; the compiler's constant folding (in float64) and its
identities (x * 1, x + 0, x / 1, x ** 1, --x) are exact, so no difference is allowed,
NaN and inf included (IEEE 754-2019, sections 5.4 and 6.2).
"""

from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from ensemble.model import RateFunctions
from ensemble.scenario.expressions import Binary, Call, Name, Negate, Node, Number, parse
from support import compiled

BODY = """
[model]
compartments = ["S", "I", "R"]
population = 1000
initial = {{ S = "rest", I = 5 }}

[[model.flows]]
from = "S"
to = "I"
rate = "{rate}"

[parameters]
a = 0.7
b = 2.5
"""

LEAVES = st.sampled_from(["S", "I", "R", "a", "b", "t", "pi", "N", "0", "1", "2", "0.5", "3.25"])


def _combine(children: st.SearchStrategy[str]) -> st.SearchStrategy[str]:
    unary = st.tuples(st.sampled_from(["-", "exp", "log", "sqrt", "abs", "sin", "cos"]), children)
    binary = st.tuples(st.sampled_from(["+", "-", "*", "/", "**", "min", "max"]), children,
                       children)
    return st.one_of(
        unary.map(lambda u: f"-({u[1]})" if u[0] == "-" else f"{u[0]}({u[1]})"),
        binary.map(lambda b: f"{b[0]}({b[1]}, {b[2]})" if b[0] in ("min", "max")
                   else f"({b[1]}) {b[0]} ({b[2]})"))


EXPRESSIONS = st.recursive(LEAVES, _combine, max_leaves=12)

_NUMPY = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide, "**": np.power,
          "exp": np.exp, "log": np.log, "sqrt": np.sqrt, "abs": np.absolute, "sin": np.sin,
          "cos": np.cos, "min": np.minimum, "max": np.maximum}


def reference(node: Node, values: dict[str, np.ndarray | float]) -> np.ndarray | float:
    """numpy evaluation of an ungrouped expression tree."""
    if isinstance(node, Number):
        return np.float64(node.value)
    if isinstance(node, Name):
        return values[node.id]
    if isinstance(node, Negate):
        return np.negative(reference(node.operand, values))
    if isinstance(node, Call):
        return _NUMPY[node.function](*(reference(a, values) for a in node.args))
    assert isinstance(node, Binary)
    return _NUMPY[node.op](reference(node.left, values), reference(node.right, values))


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=EXPRESSIONS)
@example(text="(0) * (S)")  # NaN for S = inf: must not become 0
@example(text="(S) / ((0) * (-(1)))")  # division by -0.0
@example(text="(S) ** (0) + (R) ** (1) - (I) * (1) / (1)")  # NaN ** 0 is 1; exact identities
@example(text="min(S, R) + max(I, (9) ** ((9) ** (9)))")  # NaN in min/max, folded overflow
def test_compiled_rate_equals_direct_evaluation(tmp_path, text):
    model = compiled(tmp_path, BODY.format(rate=text))
    functions = RateFunctions(model)
    rng = np.random.default_rng(5)
    y = rng.uniform(-50.0, 400.0, size=(3, 16))
    y[:, :2] = [[0.0, np.inf], [-0.0, 1.0], [np.nan, 0.0]]
    p = rng.uniform(0.0, 3.0, size=(len(model.parameter_slots), 16))
    values = {"S": y[0], "I": y[1], "R": y[2], "t": 12.5, "pi": np.float64(np.pi),
              "N": y[0] + y[1] + y[2]}
    values.update({name: p[k] for k, name in enumerate(model.parameter_slots)})
    with np.errstate(all="ignore"):
        expected = np.broadcast_to(reference(parse(text), values), (16,))
    actual = functions.rates(12.5, y, p, np.empty((0, 16)))[0]
    np.testing.assert_array_equal(actual, expected)
