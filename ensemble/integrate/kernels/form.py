"""The model as a kernel sees it: families of flow elements looped over groups, single
elements written out, matrix products looped over their entries, and the data the loops
read.

A kernel's text depends on the model's structure only: the trees of its families (in the
group index, :mod:`ensemble.model.grouped`), the shapes of its matrices' entries, the
numbers of states, groups and flow elements.  Everything else (the matrices' numbers and
pattern of structural zeros, which elements touch which state, the Newton matrix's
pattern) is data, computed here and passed to the kernel, so that one kernel serves every
variant of a model whose values alone differ.

A matrix's entries are trees of numbers, parameters, schedules and time
(:mod:`ensemble.model.lowering`); each is cut into a *skeleton* (the tree with its
numbers, parameter rows and schedule rows taken out, :class:`EntryConst`,
:class:`EntryParam`, :class:`EntrySchedule`) and the per-entry values taken out.  Entries
of one skeleton are computed by one piece of code reading those values from a table.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ensemble.methods import Method
from ensemble.model.grouped import (GROUP_LEAVES, STRUCTURED, Contract, ElementFamily,
                                    GroupedRates, GroupState, grouped_rates)
from ensemble.model.ir import Apply, Const, ParamRef, ScalarNode, ScheduleRef, StateRef, walk
from ensemble.model.lower import LoweredModel


@dataclass(frozen=True)
class EntryConst:
    """The ``number``-th number of a matrix entry, read from the matrix's table."""

    number: int


@dataclass(frozen=True)
class EntryParam:
    """The parameter row held in the ``number``-th parameter place of a matrix entry."""

    number: int


@dataclass(frozen=True)
class EntrySchedule:
    """The schedule row held in the ``number``-th schedule place of a matrix entry."""

    number: int



def skeleton(tree: ScalarNode) -> tuple[ScalarNode, list[float], list[int], list[int]]:
    """``tree`` with its numbers, parameter rows and schedule rows taken out (numbered in
    the order met, depth first), and the values taken out, kind by kind."""
    numbers: list[float] = []
    params: list[int] = []
    schedules: list[int] = []

    def cut(node: ScalarNode) -> ScalarNode:
        if isinstance(node, Const):
            numbers.append(node.value)
            return EntryConst(len(numbers) - 1)
        if isinstance(node, ParamRef):
            params.append(node.index)
            return EntryParam(len(params) - 1)
        if isinstance(node, ScheduleRef):
            schedules.append(node.index)
            return EntrySchedule(len(schedules) - 1)
        if isinstance(node, Apply):
            return Apply(node.op, tuple(cut(arg) for arg in node.args))
        return node

    return cut(tree), numbers, params, schedules


@dataclass(frozen=True)
class MatrixPlan:
    """A matrix of a matrix product, as a kernel loops over it.

    Attributes
    ----------
    skeletons : the entries' skeletons (:func:`skeleton`), one per class of entries.
    row_start, column : the structural non-zeros, row by row, columns ascending: row g
        holds entries ``row_start[g] .. row_start[g + 1] - 1`` (int64).
    entry_class : the skeleton of each entry (int64).
    numbers, params, schedules : per entry, the values its skeleton's places hold
        (float64, int64, int64; as many columns as the widest skeleton needs).
    """

    skeletons: tuple[ScalarNode, ...]
    row_start: np.ndarray
    column: np.ndarray
    entry_class: np.ndarray
    numbers: np.ndarray
    params: np.ndarray
    schedules: np.ndarray

    @classmethod
    def of(cls, node: Contract) -> MatrixPlan:
        """The plan of ``node``'s matrix; the skeletons are in a fixed order (of their
        text), so matrices with the same kinds of entries have the same plan but for its
        data, whichever entry comes first."""
        row_start, column, shapes, cuts = [0], [], [], []
        for row in node.matrix.rows:
            for h, entry in enumerate(row):
                if entry is None:
                    continue
                shape, numbers, params, schedules = skeleton(entry)
                shapes.append(shape)
                column.append(h)
                cuts.append((numbers, params, schedules))
            row_start.append(len(column))
        skeletons = sorted(set(shapes), key=repr)
        number = {shape: k for k, shape in enumerate(skeletons)}
        tables = [_table([cut[kind] for cut in cuts], dtype)
                  for kind, dtype in enumerate((np.float64, np.int64, np.int64))]
        return cls(tuple(skeletons), np.array(row_start, np.int64), np.array(column, np.int64),
                   np.array([number[shape] for shape in shapes], np.int64), *tables)

    @property
    def arrays(self) -> tuple[np.ndarray, ...]:
        """The data a kernel reads, in the order of its arguments."""
        return (self.row_start, self.column, self.entry_class, self.numbers, self.params,
                self.schedules)


def _table(rows: list[list], dtype) -> np.ndarray:
    width = max((len(row) for row in rows), default=0)
    table = np.zeros((len(rows), width), dtype)
    for i, row in enumerate(rows):
        table[i, :len(row)] = row
    return table


def structured_nodes(tree: ScalarNode) -> list[ScalarNode]:
    """The :class:`Contract` and :class:`GroupTotal` nodes of ``tree`` outside any other,
    in the order met."""
    return [node for node in walk(tree) if isinstance(node, STRUCTURED)]


def _loopable(family: ElementFamily) -> bool:
    """Whether a kernel can loop over ``family``: its sums over groups are not nested,
    and its matrices' entries read neither the state nor the group."""
    for node in structured_nodes(family.template):
        if structured_nodes(node.operand):
            return False
        if isinstance(node, Contract):
            for row in node.matrix.rows:
                for entry in row:
                    if entry is not None and any(
                            isinstance(leaf, (StateRef, *GROUP_LEAVES, *STRUCTURED))
                            for leaf in walk(entry)):
                        return False
    return True


class KernelForm:
    """The structure of ``model`` that a kernel for ``method`` is written from.

    Attributes
    ----------
    model, method : as given.
    n_groups : the model's groups.
    families : the families of flow elements the kernel loops over groups for.
    singles : the flow elements it writes out one by one (ascending).
    moves : per flow element, its (source, target) state rows (None: outside).
    structured : the sums over groups the families read, in a fixed order.
    plans : per matrix product of ``structured``, its :class:`MatrixPlan`.
    shape : how a step is laid out: ``"fused"``, one pass over (group, member) takes a
        whole step in registers (an explicit method, no single elements, no sums over
        groups, every family and state it reads in whole blocks of one row per group);
        ``"banded"``, the same with a pass per stage and the stage's sums over groups
        computed between passes; ``"staged"``, every stage through arrays (single
        elements, or an implicit method).
    touch_start, touch_element, touch_sign : the flow elements into and out of each state
        row, elements ascending, as compressed rows: state s is touched by elements
        ``touch_element[touch_start[s]:touch_start[s + 1]]`` with signs +1.0 (into) or
        -1.0 (out of).
    """

    def __init__(self, model: LoweredModel, method: Method):
        self.model = model
        self.method = method
        self.n_groups = model.n_groups
        grouped: GroupedRates = grouped_rates(model)
        self.moves = grouped.moves
        self.families = tuple(f for f in grouped.families if _loopable(f))
        singles = set(grouped.singles)
        for family in grouped.families:
            if family not in self.families:
                singles.update(range(family.first, family.first + self.n_groups))
        self.singles = tuple(sorted(singles))
        found: dict[ScalarNode, None] = {}
        for family in self.families:
            for node in structured_nodes(family.template):
                found.setdefault(node)
        self.structured = tuple(found)
        self.plans = {node: MatrixPlan.of(node) for node in self.structured
                      if isinstance(node, Contract)}
        if method.implicit or self.singles or not self._in_blocks():
            self.shape = "staged"
        else:
            self.shape = "banded" if self.structured else "fused"
        self.touch_start, self.touch_element, self.touch_sign = self._touches()

    @property
    def n_states(self) -> int:
        return self.model.n_states

    @property
    def n_elements(self) -> int:
        return self.model.n_flow_elements

    @property
    def n_blocks(self) -> int:
        """State rows per group (the blocks of one row per group)."""
        return self.n_states // self.n_groups

    def _in_blocks(self) -> bool:
        """Whether every family moves, and reads, whole blocks of one state per group."""
        g = self.n_groups
        if self.n_states % g:
            return False
        for family in self.families:
            rows = [family.source, family.target]
            rows += [leaf.first for leaf in walk(family.template) if isinstance(leaf, GroupState)]
            if any(row is not None and row % g for row in rows):
                return False
        return True

    def _touches(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        into: list[list[tuple[int, float]]] = [[] for _ in range(self.n_states)]
        for element, (source, target) in enumerate(self.moves):
            if source is not None:
                into[source].append((element, -1.0))
            if target is not None:
                into[target].append((element, 1.0))
        start = np.cumsum([0] + [len(row) for row in into]).astype(np.int64)
        element = np.array([e for row in into for e, _ in row], np.int64)
        sign = np.array([s for row in into for _, s in row], np.float64)
        return start, element, sign

    def family_terms(self, block: int) -> list[tuple[float, ElementFamily]]:
        """(sign, family) of the families moving persons into or out of state block
        ``block`` (rows ``block * n_groups + g``), in element order."""
        first = block * self.n_groups
        terms = []
        for family in self.families:
            if family.source == first:
                terms.append((-1.0, family))
            if family.target == first:
                terms.append((1.0, family))
        return terms

    def index_of(self, node: ScalarNode) -> int:
        """The number of a sum over groups in :attr:`structured`."""
        return self.structured.index(node)
