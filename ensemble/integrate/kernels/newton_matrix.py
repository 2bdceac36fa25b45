"""The Newton matrix ``I - h theta S dR/dy`` of the theta methods: its terms and pattern,
planned once per kernel, and the code that fills it for a block of members.

``S dR/dy`` is written from the rates' derivatives in the structure the rates have
(:class:`~.form.KernelForm`).  For a family of flow elements (:mod:`ensemble.model.grouped`)
the derivative of its tree ``T`` (read at group g) with respect to the state at group h
is, by the chain rule,

- ``dT/dY`` at h = g, for each state ``Y`` the tree reads at its own group (a *local*
  term, on the diagonal of a block of the matrix);
- ``dT/dX (g) * M[g, h] * dV/dY (h)`` for each matrix product ``X = M @ V`` it reads,
  over the structural non-zeros of M (a *coupled* term), and ``dT/dX (g) * dV/dY (h)``
  for every h for each sum over groups ``X = sum(V)``;

each a tree in the group index (:class:`ensemble.model.grouped.LeafDerivative`), so the
code that fills a block of the matrix is a loop whatever the number of groups.  A single
element contributes the partial derivatives of its own tree
(``LoweredModel.rate_derivatives``).  The matrix is block-sparse by compartment and dense
only where the model couples groups; its unknowns are ordered to limit the fill-in of the
factors (:mod:`.sparsity`), and the order and the factors' pattern are data the kernel
reads (they depend on a variant's matrices), as is every position the fill writes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ensemble.integrate.kernels.expressions import literal
from ensemble.integrate.kernels.form import structured_nodes
from ensemble.integrate.kernels.rates import RateCode, Reading
from ensemble.integrate.kernels.scalars import COMPILED
from ensemble.integrate.kernels.sparsity import elimination_order, factor_pattern
from ensemble.model.grouped import Contract, GroupState, LeafDerivative
from ensemble.model.ir import Const, ScalarNode, walk


@dataclass(frozen=True)
class LocalTerm:
    """``d rate / d state`` of family ``family`` for the state ``column + g`` at group g."""

    family: int
    column: int
    tree: ScalarNode


@dataclass(frozen=True)
class CoupledTerm:
    """Family ``family``'s rate through sum over groups ``node``: ``factor`` (read at g)
    times the matrix entry (g, h), if any, times ``slope`` (the operand's derivative with
    respect to state ``column + h``, read at h)."""

    family: int
    node: int
    factor: ScalarNode
    column: int
    slope: ScalarNode


def _nonzero(tree: ScalarNode | None) -> bool:
    return tree is not None and tree != Const(0.0)


class NewtonMatrixPlan:
    """The terms of ``rates.form``'s Newton matrix and the pattern of its factors.

    Attributes
    ----------
    local, coupled : the families' terms.
    single : ``(element, state, tree)`` of each partial derivative of a single element.
    factors, slopes : the trees of the coupled terms, each distinct one once (their
        values are kept per group in ``factor_<i>`` and ``slope_<i>``).
    place : the position of each state in the order of elimination.
    arrays : the kernel's data: ``place`` and the factors' pattern ``lower_start, lower,
        upper_start, upper`` (:func:`.sparsity.factor_pattern`), int64.
    """

    def __init__(self, rates: RateCode):
        self.rates = rates
        form = rates.form
        self.local: list[LocalTerm] = []
        self.coupled: list[CoupledTerm] = []
        for f, family in enumerate(form.families):
            self._family_terms(f, family.template)
        self.single = [(e, state, tree) for e in form.singles
                       for state, tree in form.model.rate_derivatives[e]]
        self.factors = list(dict.fromkeys((t.family, t.node, t.factor) for t in self.coupled))
        self.slopes = list(dict.fromkeys((t.node, t.column, t.slope) for t in self.coupled))
        order = elimination_order(self._pattern())
        self.place = np.empty(len(order), np.int64)
        self.place[order] = np.arange(len(order))
        placed: list[set[int]] = [set() for _ in order]
        for row, columns in enumerate(self._pattern()):
            placed[self.place[row]].update(int(self.place[c]) for c in columns)
        pattern = factor_pattern(placed)
        self.arrays = [self.place, *(np.array(part, np.int64) for part in pattern)]

    def _family_terms(self, f: int, template: ScalarNode) -> None:
        for leaf in dict.fromkeys(n for n in walk(template) if isinstance(n, GroupState)):
            tree = LeafDerivative(leaf)(template)
            if _nonzero(tree):
                self.local.append(LocalTerm(f, leaf.first, tree))
        for node in dict.fromkeys(structured_nodes(template)):
            factor = LeafDerivative(node)(template)
            if not _nonzero(factor):
                continue
            x = self.rates.form.index_of(node)
            for leaf in dict.fromkeys(n for n in walk(node.operand)
                                      if isinstance(n, GroupState)):
                slope = LeafDerivative(leaf)(node.operand)
                if _nonzero(slope):
                    self.coupled.append(CoupledTerm(f, x, factor, leaf.first, slope))

    def _rows(self, f: int, g: int) -> list[int]:
        family = self.rates.form.families[f]
        return [row + g for row in (family.source, family.target) if row is not None]

    def _pattern(self) -> list[set[int]]:
        """Per state row, the columns of its structural non-zeros (diagonal aside)."""
        form = self.rates.form
        n_groups = form.n_groups
        rows: list[set[int]] = [set() for _ in range(form.n_states)]
        for term in self.local:
            for g in range(n_groups):
                for row in self._rows(term.family, g):
                    rows[row].add(term.column + g)
        for term in self.coupled:
            node = form.structured[term.node]
            for g in range(n_groups):
                if isinstance(node, Contract):
                    plan = form.plans[node]
                    columns = plan.column[plan.row_start[g]:plan.row_start[g + 1]]
                else:
                    columns = range(n_groups)
                for row in self._rows(term.family, g):
                    rows[row].update(term.column + int(h) for h in columns)
        for element, state, _ in self.single:
            for row in form.moves[element]:
                if row is not None:
                    rows[row].add(state)
        for i, row in enumerate(rows):
            row.discard(i)
        return rows

    def buffers(self) -> list[str]:
        """Per block: the coupled terms' factors and slopes at every group."""
        return ([f"    factor_{i} = np.empty((n_groups, BLOCK))"
                 for i in range(len(self.factors))]
                + [f"    slope_{i} = np.empty((n_groups, BLOCK))"
                   for i in range(len(self.slopes))])

    def arguments(self) -> list[str]:
        """The arguments of the generated ``newton_matrix``."""
        return (["y1", "time", "h", "jac", "place", "lower_start", "lower", "upper_start",
                 "upper"] + self.rates.arguments()
                + [f"factor_{i}" for i in range(len(self.factors))]
                + [f"slope_{i}" for i in range(len(self.slopes))])

    def call(self, indent: str) -> str:
        """A call of ``newton_matrix`` at the iterates ``y1`` of the stage at ``time``."""
        return f"{indent}newton_matrix({', '.join(self.arguments())})"

    def function(self) -> list[str]:
        """The generated ``newton_matrix``: the matrix at the iterates ``y1`` into
        ``jac`` (in the order of elimination), after ``rates_at`` computed the rates' sums
        over groups at them: every position of the factors' pattern cleared (the diagonal
        1), then each term added."""
        roots = self._roots()
        time_lines, time_names = self.rates.time_subtrees("time", "u_", "    ", roots)
        reading = Reading("time", "1", time_names, Reading.array("y1"))
        lines = ["", "", COMPILED,
                 f"def newton_matrix({', '.join(self.arguments())}):",
                 '    """I - h theta S dR/dy at the iterates y1."""',
                 "    n_states, n_groups = sizes[0], sizes[2]", *time_lines,
                 f"    ht = h * {literal(float(self.rates.form.method.theta))}",
                 "    for k in range(n_states):",
                 "        for b in range(width):",
                 "            jac[k, k, b] = 1.0",
                 "        for i in range(lower_start[k], lower_start[k + 1]):",
                 "            row = lower[i]",
                 "            for b in range(width):",
                 "                jac[row, k, b] = 0.0",
                 "        for i in range(upper_start[k], upper_start[k + 1]):",
                 "            column = upper[i]",
                 "            for b in range(width):",
                 "                jac[k, column, b] = 0.0"]
        lines += self._group_pass("    ", reading)
        for term in self.coupled:
            lines += self._coupled("    ", term, reading)
        lines += self._singles("    ", reading)
        return lines + ["    return"]

    def _roots(self) -> list[ScalarNode]:
        return ([t.tree for t in self.local] + [tree for _, _, tree in self.factors]
                + [tree for _, _, tree in self.slopes] + [tree for _, _, tree in self.single])

    def _group_pass(self, indent: str, reading: Reading) -> list[str]:
        """Per group and member: the local terms added, the factors and slopes kept."""
        if not (self.local or self.coupled):
            return []
        roots = ([t.tree for t in self.local] + [tree for _, _, tree in self.factors]
                 + [tree for _, _, tree in self.slopes])
        inner = indent + "        "
        prelude, base = self.rates.member_prelude(inner, roots)
        body, values = self.rates.evaluate(roots, reading, base, inner, "d")
        lines = [f"{indent}for g in range(n_groups):"]
        updates = []
        for t, term in enumerate(self.local):
            family = self.rates.form.families[term.family]
            lines.append(f"{indent}    col_{t} = place[{term.column} + g]")
            for end, sign, row in (("from", "+", family.source), ("to", "-", family.target)):
                if row is not None:
                    lines.append(f"{indent}    {end}_{t} = place[{row} + g]")
                    updates.append(f"{inner}jac[{end}_{t}, col_{t}, b] {sign}= "
                                   f"ht * {values[t]}")
        lines += [f"{indent}    for b in range(width):", *prelude, *body, *updates]
        offset = len(self.local)
        lines += [f"{inner}factor_{i}[g, b] = {values[offset + i]}"
                  for i in range(len(self.factors))]
        offset += len(self.factors)
        lines += [f"{inner}slope_{i}[g, b] = {values[offset + i]}"
                  for i in range(len(self.slopes))]
        return lines

    def _coupled(self, indent: str, term: CoupledTerm, reading: Reading) -> list[str]:
        """A coupled term over its matrix's entries (or every pair of groups)."""
        form = self.rates.form
        family = form.families[term.family]
        factor = self.factors.index((term.family, term.node, term.factor))
        slope = self.slopes.index((term.node, term.column, term.slope))
        x = term.node
        lines = [f"{indent}for g in range(n_groups):"]
        rows = [(sign, row) for sign, row in (("+", family.source), ("-", family.target))
                if row is not None]
        lines += [f"{indent}    row{k} = place[{row} + g]" for k, (_, row) in enumerate(rows)]
        deep = indent + "        "
        if isinstance(form.structured[x], Contract):
            outer, inner, entry = self.rates.entry(x, reading, deep)
            lines += [f"{indent}    for e in range(row_start_{x}[g], row_start_{x}[g + 1]):",
                      f"{deep}col = place[{term.column} + column_{x}[e]]",
                      f"{deep}other = column_{x}[e]", *outer]
            value = f"ht * (factor_{factor}[g, b] * {entry} * slope_{slope}[other, b])"
        else:
            inner = []
            lines += [f"{indent}    for other in range(n_groups):",
                      f"{deep}col = place[{term.column} + other]"]
            value = f"ht * (factor_{factor}[g, b] * slope_{slope}[other, b])"
        lines += [f"{deep}for b in range(width):", *inner,
                  f"{deep}    value = {value}"]
        lines += [f"{deep}    jac[row{k}, col, b] {sign}= value"
                  for k, (sign, _) in enumerate(rows)]
        return lines

    def _singles(self, indent: str, reading: Reading) -> list[str]:
        """The partial derivatives of the single elements, member by member."""
        if not self.single:
            return []
        roots = [tree for _, _, tree in self.single]
        inner = indent + "    "
        prelude, base = self.rates.member_prelude(inner, roots)
        body, values = self.rates.evaluate(roots, reading, base, inner, "j")
        lines = [f"{indent}for b in range(width):", *prelude, *body]
        for (element, state, _), value in zip(self.single, values):
            source, target = self.rates.form.moves[element]
            for sign, row in (("+", source), ("-", target)):
                if row is not None:
                    lines.append(f"{inner}jac[place[{row}], place[{state}], b] {sign}= "
                                 f"ht * {value}")
        return lines
