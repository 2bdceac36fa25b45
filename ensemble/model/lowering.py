"""Expressions of the scenario language -> scalar IR trees: the one meaning of every
operation of the language.

Everything the language computes goes through :class:`ExpressionLowering`: the flow rates
(:mod:`ensemble.model.lower`) and the values that are constant in time, that is derived
parameters, schedule values at their knots and initial counts
(:mod:`ensemble.model.constants`).  The two differ only in what a name stands for (a
state row, a per-member parameter row, an input row); an operation means the same
wherever it is written.

A value during lowering is a scalar tree, a :class:`Vector` (one tree per group) or a
:class:`Matrix` (one tree per entry, so a matrix whose entries depend on drawn values is
held per member).  Scalars broadcast over groups and over matrix entries; ``@`` is matrix
times vector or matrix, ``sum`` adds a vector's elements, ``diag`` puts a vector on the
diagonal of a matrix whose other entries are structural zeros; sums are folded left to
right in group order, so a member's value never depends on the other members computed
with it.  ``spectral_radius`` is no scalar operation: the lowering of the values constant
in time (:mod:`ensemble.model.constants`) turns each into a value computed once per member
from the entries of its matrix; a rate cannot use it.

Structural zeros.  A zero entry of a matrix written as numbers in the scenario file is
structural: ``M @ v`` has no term for it and ``scalar * M`` keeps it zero, whatever the
other factor is.  IEEE 754 arithmetic would give ``0 * inf = NaN``: with ``q = [1, 2]``,
``[[0, 0.99], ...] @ (1 / (q - 1))`` is NaN in row 0 under IEEE rules and 0.99 here.
Skipping is the meaning chosen, in every context alike: a zero contact is no contact, so
the pressure on a group must not become undefined through a group it never meets; for
every finite factor the two agree except, at most, in the sign of a zero result; and the
generated kernels pay only for a sparse matrix's non-zero entries.  What matters most is
that it is the same in rates and in derived parameters, which this module guarantees by
being the only place either is given a meaning.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Union

from ensemble.model.ir import Const, ScalarNode, apply
from ensemble.scenario.expressions import Binary, Call, Name, Negate, Node, Number

_BINARY_OPERATIONS = {"+": "add", "-": "sub", "*": "mul", "/": "div", "**": "pow"}


@dataclass(frozen=True)
class Vector:
    """A value over groups: one scalar tree per group."""

    items: tuple[ScalarNode, ...]


@dataclass(frozen=True)
class Matrix:
    """A G x G value, one tree per entry; None marks a structural zero."""

    rows: tuple[tuple[ScalarNode | None, ...], ...]


Value = Union[ScalarNode, Vector, Matrix]
"""A lowered value: a scalar tree, a vector over groups or a matrix."""


@dataclass(frozen=True)
class Reduction:
    """A sum over groups as it was lowered: ``sum(operand)`` (``matrix`` None, one
    result) or ``matrix @ operand`` (one result per row).  The lowering keeps a record of
    each, so that code generators can find them in the trees and loop over the groups
    instead of over the terms written out (:mod:`ensemble.model.grouped`)."""

    matrix: Matrix | None
    operand: tuple[ScalarNode, ...]
    results: tuple[ScalarNode, ...]


def constant_matrix(rows: Sequence[Sequence[float]]) -> Matrix:
    """A matrix of numbers from the scenario file; its zero entries are structural."""
    return Matrix(tuple(tuple(Const(float(v)) if v != 0 else None for v in row)
                        for row in rows))


def fold_sum(terms: Sequence[ScalarNode]) -> ScalarNode:
    """Left-to-right sum of ``terms`` (0 for none)."""
    if not terms:
        return Const(0.0)
    total = terms[0]
    for term in terms[1:]:
        total = apply("add", total, term)
    return total


class ExpressionLowering:
    """Turns expression trees of the scenario language into scalar IR values.

    Subclasses say what a name means (:meth:`name`); every operation is lowered here.

    Parameters
    ----------
    n_groups : the number of groups (1 without groups): the length of every vector.

    Attributes
    ----------
    reductions : every ``sum`` and matrix-times-vector lowered so far, in order.
    """

    def __init__(self, n_groups: int):
        self.n_groups = n_groups
        self.reductions: list[Reduction] = []

    def name(self, name: str) -> Value:
        """The value a name of the expression stands for."""
        raise NotImplementedError

    def lower(self, node: Node) -> Value:
        """The scalar IR of expression ``node``."""
        if isinstance(node, Number):
            return Const(float(node.value))
        if isinstance(node, Name):
            return self.name(node.id)
        if isinstance(node, Negate):
            return self._map("neg", self.lower(node.operand))
        if isinstance(node, Call):
            args = [self.lower(a) for a in node.args]
            if node.function == "sum":
                total = fold_sum(_vector_items(args[0]))
                self.reductions.append(Reduction(None, _vector_items(args[0]), (total,)))
                return total
            if node.function == "diag":
                return _diagonal(_vector_items(args[0]))
            if node.function == "spectral_radius":
                if not isinstance(args[0], Matrix):
                    raise ValueError("spectral_radius() takes a matrix")
                return self.spectral_radius(args[0])
            return self._elementwise(node.function, args)
        if not isinstance(node, Binary):
            raise TypeError(f"not an expression node: {node!r}")
        left, right = self.lower(node.left), self.lower(node.right)
        if node.op == "@":
            if isinstance(right, Matrix):
                return _matrix_times_matrix(left, right)
            product = _matrix_times_vector(left, right)
            self.reductions.append(Reduction(left, right.items, product.items))
            return product
        op = _BINARY_OPERATIONS[node.op]
        if isinstance(left, Matrix) or isinstance(right, Matrix):
            return _matrix_arithmetic(op, left, right)
        return self._elementwise(op, [left, right])

    def spectral_radius(self, matrix: Matrix) -> ScalarNode:
        """The tree standing for the spectral radius of ``matrix``: only the values
        constant in time compute one (once per member, before integration)."""
        raise ValueError("spectral_radius() is computed once per member, not in a rate")

    def _map(self, op: str, value: Value) -> Value:
        if isinstance(value, Matrix):
            return Matrix(tuple(tuple(None if v is None else apply(op, v) for v in row)
                                for row in value.rows))
        return self._elementwise(op, [value])

    def _elementwise(self, op: str, args: list[Value]) -> Value:
        """``op`` on scalars and vectors, scalars broadcast over groups."""
        if not any(isinstance(a, Vector) for a in args):
            return apply(op, *args)  # type: ignore[arg-type]
        columns = [a.items if isinstance(a, Vector) else (a,) * self.n_groups for a in args]
        return Vector(tuple(apply(op, *items) for items in zip(*columns)))


def _matrix_arithmetic(op: str, left: Value, right: Value) -> Matrix:
    """matrix +- matrix, scalar * matrix, matrix * scalar, matrix / scalar."""
    if isinstance(left, Matrix) and isinstance(right, Matrix):
        return Matrix(tuple(tuple(_entry_sum(op, a, b) for a, b in zip(ra, rb))
                            for ra, rb in zip(left.rows, right.rows)))
    matrix, scalar = (left, right) if isinstance(left, Matrix) else (right, left)
    if isinstance(scalar, (Vector, Matrix)) or not isinstance(matrix, Matrix):
        raise ValueError("a matrix combines only with a scalar or a matrix")

    def entry(v: ScalarNode | None) -> ScalarNode | None:
        if v is None:
            return None
        return apply(op, v, scalar) if matrix is left else apply(op, scalar, v)

    return Matrix(tuple(tuple(entry(v) for v in row) for row in matrix.rows))


def _matrix_times_vector(matrix: Value, vector: Value) -> Vector:
    """Row g is the sum over h of M[g, h] v[h], in order of h, structural zeros left out."""
    if not isinstance(matrix, Matrix) or not isinstance(vector, Vector):
        raise ValueError("'@' takes a matrix and a vector")
    return Vector(tuple(
        fold_sum([apply("mul", m, v) for m, v in zip(row, vector.items) if m is not None])
        for row in matrix.rows))


def _matrix_times_matrix(left: Value, right: Value) -> Matrix:
    """Entry (g, h) is the sum over k of A[g, k] B[k, h], in order of k, leaving out the
    terms with a structural zero; an entry without terms is a structural zero."""
    if not isinstance(left, Matrix) or not isinstance(right, Matrix):
        raise ValueError("'@' takes a matrix and a vector or a matrix")
    size = len(right.rows)
    rows = []
    for row in left.rows:
        entries: list[ScalarNode | None] = []
        for h in range(size):
            terms = [apply("mul", a, right.rows[k][h]) for k, a in enumerate(row)
                     if a is not None and right.rows[k][h] is not None]
            entries.append(fold_sum(terms) if terms else None)
        rows.append(tuple(entries))
    return Matrix(tuple(rows))


def _diagonal(items: tuple[ScalarNode, ...]) -> Matrix:
    """The matrix with ``items`` on its diagonal; the other entries are structural zeros."""
    return Matrix(tuple(tuple(item if g == h else None for h in range(len(items)))
                        for g, item in enumerate(items)))


def _vector_items(value: Value) -> tuple[ScalarNode, ...]:
    if not isinstance(value, Vector):
        raise ValueError("sum() takes a vector over groups")
    return value.items


def _entry_sum(op: str, a: ScalarNode | None, b: ScalarNode | None) -> ScalarNode | None:
    """Entry of matrix +- matrix, a None entry being zero."""
    if b is None:
        return a
    if a is None:
        return b if op == "add" else apply("neg", b)
    return apply(op, a, b)
