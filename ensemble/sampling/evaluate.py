"""Numpy evaluation of vector-level expressions for many members at once.

Values carry the member axis last, of length M or 1 (the same for every member):

- a scalar is (M,) or (1,);
- a vector over groups is (G, M) or (G, 1);
- a G x G matrix is (G, G, M) or (G, G, 1).

So the kind of a value is its number of dimensions, and numpy broadcasting gives the
language's rules (a scalar broadcasts over groups and matrices).  Reductions (``sum``
and matrix @ vector) add over groups one group at a time in a fixed order, so member i's
result never depends on which members share the array.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np

from ensemble.scenario.expressions import Binary, Call, Name, Negate, Node, Number

_BINARY: dict[str, Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    "+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide, "**": np.power,
}

_ELEMENTWISE: dict[str, Callable[..., np.ndarray]] = {
    "exp": np.exp, "log": np.log, "sqrt": np.sqrt, "abs": np.abs, "sin": np.sin,
    "cos": np.cos, "min": np.minimum, "max": np.maximum,
}


def evaluate(node: Node, values: Mapping[str, np.ndarray]) -> np.ndarray:
    """Evaluate ``node`` with the named ``values`` (laid out as the module describes).

    ``pi`` is built in.  Arithmetic follows IEEE rules: call under
    ``np.errstate(all="ignore")`` to let an impossible member give inf or NaN quietly.

    Raises
    ------
    KeyError
        For a name that ``values`` lacks (a validated scenario never has one).
    """
    if isinstance(node, Number):
        return np.array([node.value])
    if isinstance(node, Name):
        if node.id == "pi":
            return np.array([np.pi])
        return values[node.id]
    if isinstance(node, Negate):
        return np.negative(evaluate(node.operand, values))
    if isinstance(node, Binary):
        left = evaluate(node.left, values)
        right = evaluate(node.right, values)
        if node.op == "@":
            return matrix_times_vector(left, right)
        return _BINARY[node.op](left, right)
    if isinstance(node, Call):
        args = [evaluate(arg, values) for arg in node.args]
        if node.function == "sum":
            return ordered_sum(args[0])
        return _ELEMENTWISE[node.function](*args)
    raise TypeError(f"not an expression node: {node!r}")


def ordered_sum(stack: np.ndarray) -> np.ndarray:
    """Sum over the first axis, row 0 + row 1 + ... in that order: (G, m) -> (m,)."""
    total = stack[0].copy()
    for row in stack[1:]:
        total += row
    return total


def matrix_times_vector(matrix: np.ndarray, vector: np.ndarray) -> np.ndarray:
    """(G, G, m1) @ (G, m2) -> (G, max(m1, m2)): row g is sum over h of M[g, h] v[h],
    added in order of h."""
    total = matrix[:, 0] * vector[0]
    for h in range(1, matrix.shape[1]):
        total = total + matrix[:, h] * vector[h]
    return total
