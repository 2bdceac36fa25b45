"""Rates in the group index: one tree for a whole family of flow elements.

The lowered model (:mod:`ensemble.model.lower`) holds one scalar tree per flow element
(:mod:`.ir`), in which a matrix product is written out as a sum of as many terms as its
row has entries; code generated from those trees grows with the square of the number of
groups.  Most elements come in families, one element per group with the same rate
except for the group's own rows, and a family's rate can be held as one tree that reads
the group at hand, ``g``, through a few more kinds of node:

- :class:`GroupState` state row ``first + g``;
- :class:`GroupParam` row ``first + g`` of the per-member parameter array;
- :class:`GroupSchedule` row ``first + g`` of the schedule values in force;
- :class:`Contract` row g of ``matrix @ operand``: the sum, over the structural non-zeros
  h of the row in increasing order, of ``matrix.rows[g][h] * operand`` read at group h,
  folded left to right (0 for an empty row), exactly as
  :mod:`ensemble.model.lowering` defines ``@``;
- :class:`GroupTotal` ``sum(operand)``: ``operand`` read at every group, added in group
  order.

Code generators can then loop over the groups (and over the entries of a matrix) instead
of writing out every element.

:func:`grouped_rates` finds the families: flow elements ``first .. first + G - 1`` whose
element ``first + g`` moves persons from state row ``source + g`` to ``target + g`` (or
from or to outside for all), and whose trees are one tree of the group index.  That tree
is found by anti-unification of the elements' trees (Plotkin 1970, "A note on inductive
generalization", Machine Intelligence 5), with the sums over groups recognised from the
lowering's own record of them (:class:`ensemble.model.lowering.Reduction`).  It is kept
only if expanding it (:func:`expand`) at every group gives back exactly that group's tree,
operation for operation, so both forms are the same arithmetic.  Elements without a
family (flows from one group to another, flows of a single group, rates whose trees
differ by more than their group) are *single* and keep their trees as lowered.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ensemble.model.derivatives import Derivative, Differentiator
from ensemble.model.ir import (ONE, Apply, ParamRef, ScalarNode, ScheduleRef, StateRef, apply,
                               walk)
from ensemble.model.lower import LoweredModel
from ensemble.model.lowering import Matrix, Reduction, fold_sum


@dataclass(frozen=True)
class GroupState:
    """State row ``first + g``, g the group at hand."""

    first: int


@dataclass(frozen=True)
class GroupParam:
    """Row ``first + g`` of the per-member parameter array, g the group at hand."""

    first: int


@dataclass(frozen=True)
class GroupSchedule:
    """Row ``first + g`` of the per-member schedule values, g the group at hand."""

    first: int


@dataclass(frozen=True)
class Contract:
    """Row g of ``matrix @ operand``, g the group at hand; ``operand`` is read at each
    column of the row's structural non-zeros.  The hash is computed once and kept, as
    :class:`ensemble.model.ir.Apply` keeps its own."""

    matrix: Matrix
    operand: ScalarNode

    def __hash__(self) -> int:
        cached = self.__dict__.get("_hash")
        if cached is None:
            cached = hash((self.matrix, self.operand))
            object.__setattr__(self, "_hash", cached)
        return cached

    def __getstate__(self) -> dict[str, object]:
        return {"matrix": self.matrix, "operand": self.operand}


@dataclass(frozen=True)
class GroupTotal:
    """``operand`` summed over the groups, in group order."""

    operand: ScalarNode


GROUP_LEAVES = (GroupState, GroupParam, GroupSchedule)
"""Leaves that read the group at hand."""

STRUCTURED = (Contract, GroupTotal)
"""Nodes that read their operand at other groups than the one at hand."""


@dataclass(frozen=True)
class ElementFamily:
    """Flow elements ``first .. first + n_groups - 1``: element ``first + g`` moves persons
    from state row ``source + g`` to ``target + g`` (None: outside) at ``template`` read
    at group g."""

    first: int
    source: int | None
    target: int | None
    template: ScalarNode


@dataclass(frozen=True)
class GroupedRates:
    """A lowered model's flow elements as families and single elements.

    Attributes
    ----------
    n_groups : the model's groups (1 without groups: every element is a family of one).
    families : the families, in element order.
    singles : the other elements, ascending; their rates are ``model.rates[e]``.
    moves : per flow element, its (source, target) state rows (None: outside).
    """

    n_groups: int
    families: tuple[ElementFamily, ...]
    singles: tuple[int, ...]
    moves: tuple[tuple[int | None, int | None], ...]


def element_moves(stoichiometry: np.ndarray) -> tuple[tuple[int | None, int | None], ...]:
    """(source, target) state rows of every flow element (column) of ``stoichiometry``."""
    moves = []
    for column in stoichiometry.T:
        sources, targets = np.flatnonzero(column < 0), np.flatnonzero(column > 0)
        moves.append((int(sources[0]) if sources.size else None,
                      int(targets[0]) if targets.size else None))
    return tuple(moves)


def grouped_rates(model: LoweredModel) -> GroupedRates:
    """The families of ``model``'s flow elements (see the module's docstring)."""
    n_groups = model.n_groups
    moves = element_moves(model.stoichiometry)
    unifier = _Unifier(model.reductions, n_groups)
    families: list[ElementFamily] = []
    singles: list[int] = []
    element = 0
    while element < model.n_flow_elements:
        family = _family(model, moves, unifier, element)
        if family is None:
            singles.append(element)
            element += 1
        else:
            families.append(family)
            element += n_groups
    return GroupedRates(n_groups, tuple(families), tuple(singles), moves)


def _family(model: LoweredModel, moves: Sequence[tuple[int | None, int | None]],
            unifier: _Unifier, first: int) -> ElementFamily | None:
    """The family of elements ``first ..`` (one per group), or None."""
    n_groups = model.n_groups
    if first + n_groups > model.n_flow_elements:
        return None
    source, target = moves[first]
    for g in range(n_groups):
        if moves[first + g] != (None if source is None else source + g,
                                None if target is None else target + g):
            return None
    trees = model.rates[first:first + n_groups]
    try:
        template = unifier.unify(tuple(range(n_groups)), trees, frozenset())
    except _NoTemplate:
        return None
    memo: dict[tuple[ScalarNode, int], ScalarNode] = {}
    if any(expand(template, g, n_groups, memo) != tree for g, tree in enumerate(trees)):
        return None
    return ElementFamily(first, source, target, template)


class _NoTemplate(Exception):
    """The trees are not one tree of the group index."""


class _Unifier:
    """Anti-unification of one tree per group into a tree of the group index."""

    def __init__(self, reductions: Sequence[Reduction], n_groups: int):
        self.n_groups = n_groups
        self.reductions = tuple(reductions)
        self._reads_state: dict[ScalarNode, bool] = {}

    def unify(self, groups: tuple[int, ...], trees: Sequence[ScalarNode],
              excluded: frozenset[int]) -> ScalarNode:
        """The tree of the group index that is ``trees[k]`` at group ``groups[k]``.

        Where the trees disagree in shape, the operation most of them share is followed
        and the others are left to the caller's expansion check: a sum that lost a term
        which was an empty row of a matrix product (``x + 0`` is ``x``) is the case this
        is for.  ``excluded`` are the reductions whose operand is being unified (a
        reduction is not its own operand).
        """
        found = self._reduction(groups, trees, excluded)
        if found is not None:
            return self._structured(found, excluded)
        first = trees[0]
        if all(tree == first for tree in trees) and not self._state_read(first):
            return first
        for kind, in_group in ((StateRef, GroupState), (ParamRef, GroupParam),
                               (ScheduleRef, GroupSchedule)):
            if isinstance(first, kind):
                base = first.index - groups[0]
                if base >= 0 and all(isinstance(tree, kind) and tree.index == base + g
                                     for g, tree in zip(groups, trees)):
                    return in_group(base)
                raise _NoTemplate
        reduced = [self._reduction((g,), (tree,), excluded) for g, tree in zip(groups, trees)]
        shapes = Counter((tree.op, len(tree.args)) for tree, number in zip(trees, reduced)
                         if isinstance(tree, Apply) and number is None)
        if not shapes:
            numbers = Counter(number for number in reduced if number is not None)
            if not numbers:
                raise _NoTemplate
            return self._structured(numbers.most_common(1)[0][0], excluded)
        (op, arity), _ = shapes.most_common(1)[0]
        chosen = [(g, tree) for g, tree, number in zip(groups, trees, reduced)
                  if number is None and isinstance(tree, Apply) and tree.op == op
                  and len(tree.args) == arity]
        subset = tuple(g for g, _ in chosen)
        return Apply(op, tuple(self.unify(subset, [tree.args[k] for _, tree in chosen],
                                          excluded)
                               for k in range(arity)))

    def _reduction(self, groups: tuple[int, ...], trees: Sequence[ScalarNode],
                   excluded: frozenset[int]) -> int | None:
        """The number of a reduction whose result at each of ``groups`` is the tree."""
        for number, reduction in enumerate(self.reductions):
            if number not in excluded and all(
                    tree == reduction.results[g if reduction.matrix is not None else 0]
                    for g, tree in zip(groups, trees)):
                return number
        return None

    def _structured(self, number: int, excluded: frozenset[int]) -> ScalarNode:
        """The node of reduction ``number``, its operand in the group index."""
        reduction = self.reductions[number]
        operand = self.unify(tuple(range(self.n_groups)), reduction.operand,
                             excluded | {number})
        if reduction.matrix is None:
            return GroupTotal(operand)
        return Contract(reduction.matrix, operand)

    def _state_read(self, node: ScalarNode) -> bool:
        known = self._reads_state.get(node)
        if known is None:
            known = self._reads_state[node] = any(isinstance(n, StateRef) for n in walk(node))
        return known


def expand(node: ScalarNode, group: int, n_groups: int,
           memo: dict[tuple[ScalarNode, int], ScalarNode] | None = None) -> ScalarNode:
    """The scalar tree of ``node`` at group ``group``, built by :func:`ensemble.model.ir.apply`
    (so folded and simplified as the lowering's own trees are)."""
    memo = {} if memo is None else memo
    key = (node, group)
    known = memo.get(key)
    if known is not None:
        return known
    if isinstance(node, GroupState):
        result: ScalarNode = StateRef(node.first + group)
    elif isinstance(node, GroupParam):
        result = ParamRef(node.first + group)
    elif isinstance(node, GroupSchedule):
        result = ScheduleRef(node.first + group)
    elif isinstance(node, Contract):
        result = fold_sum([apply("mul", expand(entry, group, n_groups, memo),
                                 expand(node.operand, column, n_groups, memo))
                           for column, entry in enumerate(node.matrix.rows[group])
                           if entry is not None])
    elif isinstance(node, GroupTotal):
        result = fold_sum([expand(node.operand, other, n_groups, memo)
                           for other in range(n_groups)])
    elif isinstance(node, Apply):
        result = apply(node.op, *(expand(arg, group, n_groups, memo) for arg in node.args))
    else:
        result = node
    memo[key] = result
    return result


class LeafDerivative(Differentiator):
    """Partial derivatives with respect to one leaf of the group index (a
    :class:`GroupState`, or a :class:`Contract` or :class:`GroupTotal` held whole), by the
    rules of :class:`ensemble.model.derivatives.Differentiator`; the operands of
    structured nodes other than the leaf count as constants."""

    def __init__(self, leaf: ScalarNode):
        self._leaf = leaf
        self._memo: dict[ScalarNode, Derivative] = {}
        self._holds: dict[ScalarNode, bool] = {}

    def __call__(self, node: ScalarNode) -> Derivative:
        if node == self._leaf:
            return ONE
        if not isinstance(node, Apply) or not self._holds_leaf(node):
            return None
        if node not in self._memo:
            self._memo[node] = self._rule(node)
        return self._memo[node]

    def _holds_leaf(self, node: Apply) -> bool:
        known = self._holds.get(node)
        if known is None:
            known = self._holds[node] = any(
                arg == self._leaf or (isinstance(arg, Apply) and self._holds_leaf(arg))
                for arg in node.args)
        return known
