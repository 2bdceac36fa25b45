"""Symbolic partial derivatives of scalar IR trees with respect to state rows.

The rules are the ordinary ones of calculus (sum, product, quotient and chain rules).
Where a function is not differentiable the derivative takes a documented one-sided value:

- ``abs``: d|a| = sign(a) da, so 0 at a == 0 (a subgradient);
- ``min(a, b)`` / ``max(a, b)``: the derivative of the argument the function returns,
  the first one on a tie (``select_le``);
- ``pow(a, b)``: b a^(b-1) da when b does not depend on the state, a^b log(a) db when a
  does not, and a^b (db log a + b da / a) otherwise.

A structural zero is returned as None, so that no ``x * 0`` (NaN for infinite x) is ever
built and the Jacobian's sparsity pattern is exact.
"""

from __future__ import annotations

from ensemble.model.ir import ONE, Apply, Const, ScalarNode, StateRef, apply, walk

Derivative = ScalarNode | None


def _add(a: Derivative, b: Derivative) -> Derivative:
    if a is None:
        return b
    if b is None:
        return a
    return apply("add", a, b)


def _sub(a: Derivative, b: Derivative) -> Derivative:
    if b is None:
        return a
    if a is None:
        return apply("neg", b)
    return apply("sub", a, b)


def _scale(factor: ScalarNode, d: Derivative) -> Derivative:
    return None if d is None else apply("mul", factor, d)


class Differentiator:
    """Partial derivatives with respect to one state row, memoised per subtree.

    ``reads`` maps (at least) every Apply node of the trees to be differentiated to the
    state rows it reads (see :func:`states_read`); subtrees that do not read the state
    are not visited.
    """

    def __init__(self, state_index: int, reads: dict[ScalarNode, frozenset[int]]):
        self._index = state_index
        self._target = StateRef(state_index)
        self._reads = reads
        self._memo: dict[ScalarNode, Derivative] = {}

    def __call__(self, node: ScalarNode) -> Derivative:
        if node == self._target:
            return ONE
        if not isinstance(node, Apply) or self._index not in self._reads[node]:
            return None
        if node not in self._memo:
            self._memo[node] = self._rule(node)
        return self._memo[node]

    def _rule(self, node: Apply) -> Derivative:
        args = node.args
        ds = [self(a) for a in args]
        if all(d is None for d in ds):
            return None
        op = node.op
        if op == "add":
            return _add(ds[0], ds[1])
        if op == "sub":
            return _sub(ds[0], ds[1])
        if op == "neg":
            return apply("neg", ds[0])
        if op == "mul":
            return _add(_scale(args[1], ds[0]), _scale(args[0], ds[1]))
        if op == "div":
            # d(a/b) = (da - (a/b) db) / b, reusing the quotient itself.
            numerator = _sub(ds[0], _scale(node, ds[1]))
            return apply("div", numerator, args[1])
        if op == "pow":
            return self._power(node, ds[0], ds[1])
        if op == "exp":
            return apply("mul", node, ds[0])
        if op == "log":
            return apply("div", ds[0], args[0])
        if op == "sqrt":
            return apply("div", ds[0], apply("mul", Const(2.0), node))
        if op == "abs":
            return apply("mul", apply("sign", args[0]), ds[0])
        if op == "sin":
            return apply("mul", apply("cos", args[0]), ds[0])
        if op == "cos":
            return apply("neg", apply("mul", apply("sin", args[0]), ds[0]))
        if op in ("min", "max"):
            first, second = (ds[0] or Const(0.0)), (ds[1] or Const(0.0))
            a, b = args if op == "min" else (args[1], args[0])
            return apply("select_le", a, b, first, second)
        if op in ("sign", "select_le"):
            raise ValueError(f"no derivative of {op!r} is needed for a rate")
        raise ValueError(f"unknown operation {op!r}")

    @staticmethod
    def _power(node: Apply, da: Derivative, db: Derivative) -> Derivative:
        base, exponent = node.args
        if db is None:
            lowered = apply("pow", base, apply("sub", exponent, ONE))
            return apply("mul", apply("mul", exponent, lowered), da)
        via_exponent = apply("mul", db, apply("log", base))
        if da is None:
            return apply("mul", node, via_exponent)
        via_base = apply("div", apply("mul", exponent, da), base)
        return apply("mul", node, apply("add", via_exponent, via_base))


def states_read(node: ScalarNode) -> dict[ScalarNode, frozenset[int]]:
    """The state rows each Apply node of ``node``'s tree reads."""
    reads: dict[ScalarNode, frozenset[int]] = {}
    for current in walk(node):
        if isinstance(current, Apply):
            rows: set[int] = set()
            for arg in current.args:
                if isinstance(arg, StateRef):
                    rows.add(arg.index)
                elif isinstance(arg, Apply):
                    rows.update(reads[arg])
            reads[current] = frozenset(rows)
    return reads


def partial_derivatives(node: ScalarNode) -> tuple[tuple[int, ScalarNode], ...]:
    """``(state, d node / d state)`` for each state row ``node`` reads, ascending, leaving
    out structural zeros and derivatives that fold to the constant 0."""
    reads = states_read(node)
    states = sorted(reads[node]) if isinstance(node, Apply) else (
        [node.index] if isinstance(node, StateRef) else [])
    result = []
    for index in states:
        derivative = Differentiator(index, reads)(node)
        if derivative is not None and derivative != Const(0.0):
            result.append((index, derivative))
    return tuple(result)
