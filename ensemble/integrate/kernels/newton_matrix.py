"""The Newton matrix ``I - h theta S dR/dy`` of the theta methods: its structure, planned
once per kernel, and the generated functions that fill it for a block of members.

The entries of ``J = S dR/dy`` are sums of +-partial derivatives of the rates
(:mod:`ensemble.model.derivatives`) in the pattern the model gives them; the unknowns are
reordered to limit the fill-in of the factors (:mod:`.sparsity`), and every position of
the factors' pattern is written with each new matrix, so the factorisation
(:mod:`.block_lu`) finds nothing stale there.  The entries are computed by several small
functions, which numba and LLVM compile much faster than one long one.
"""

from __future__ import annotations

from ensemble.integrate.kernels.expressions import literal, signed_sum
from ensemble.integrate.kernels.rates import RateCode, stage_times
from ensemble.integrate.kernels.sparsity import elimination_order, factor_pattern
from ensemble.model.ir import ScalarNode

MATRIX_PART_ENTRIES = 128
"""Newton matrix entries computed per generated function: numba and LLVM compile many
small functions much faster than one long one."""

Entry = tuple[int, int]
"""A (row, column) of the matrix, by state index."""

Partial = tuple[int, int]
"""A (flow element, state) whose partial derivative ``d rate_f / d y_state`` is not zero."""


class NewtonMatrixPlan:
    """The structure of the Newton matrix of ``rates``'s model.

    Attributes
    ----------
    partials : the tree of every non-zero partial derivative of the rates.
    entries : per matrix entry (insertion order is the order of computation), the signed
        partials summed into it; an empty list for a position of the factors' pattern
        that is structurally zero (0, or 1 on the diagonal).
    place : the position of each state in the order of elimination.
    factor_pattern : ``lower_start, lower, upper_start, upper`` of the factors
        (:func:`.sparsity.factor_pattern`).
    parts : the entries each generated function computes.
    """

    def __init__(self, rates: RateCode):
        self.rates = rates
        n = rates.model.n_states
        self.partials: dict[Partial, ScalarNode] = {
            (f, state): tree for f, entries in enumerate(rates.model.rate_derivatives)
            for state, tree in entries}
        self.entries: dict[Entry, list[tuple[float, Partial]]] = {}
        for s in range(n):
            for col in range(n):
                terms = [(sign, (f, col)) for sign, f in rates.into_state[s]
                         if (f, col) in self.partials]
                if terms:
                    self.entries[(s, col)] = terms
        order = elimination_order([{col for (row, col) in self.entries if row == s}
                                   for s in range(n)])
        self.place = {state: index for index, state in enumerate(order)}
        placed: list[set[int]] = [set() for _ in range(n)]
        for s, col in self.entries:
            placed[self.place[s]].add(self.place[col])
        self.factor_pattern = factor_pattern(placed)
        self._cover_factor_pattern(order)
        self.parts: list[list[Entry]] = [[]]
        for key in self.entries:
            if len(self.parts[-1]) >= MATRIX_PART_ENTRIES:
                self.parts.append([])
            self.parts[-1].append(key)

    def _cover_factor_pattern(self, order: list[int]) -> None:
        """Give every position of the factors' pattern an entry (a diagonal without
        partials is 1, a fill-in 0), so that each new matrix overwrites all of them."""
        lower_start, lower, upper_start, upper = self.factor_pattern
        for k in range(len(order)):
            positions = [(k, k)] + [(lower[e], k) for e in range(lower_start[k],
                                                                 lower_start[k + 1])]
            positions += [(k, upper[e]) for e in range(upper_start[k], upper_start[k + 1])]
            for row, col in positions:
                self.entries.setdefault((order[row], order[col]), [])

    def call(self, indent: str) -> list[str]:
        """Calls of every part's function, filling ``jac`` at the iterates ``y1``."""
        arguments = "".join(a + ", " for a in self.rates.schedules.arguments())
        return [f"{indent}newton_matrix_{part}(m0, step, h, p, {arguments}y1, jac)"
                for part in range(len(self.parts))]

    def functions(self) -> list[str]:
        """The generated functions of every part, each its own members loop (so that it
        vectorises)."""
        lines: list[str] = []
        for number in range(len(self.parts)):
            lines += self._part_function(number)
        return lines

    def _part_function(self, number: int) -> list[str]:
        """A function computing the Newton matrix entries of part ``number`` for a block,
        at the iterates ``y1``, in its elimination order's rows and columns."""
        rates = self.rates
        keys = self.parts[number]
        needed = sorted({pair for key in keys for _, pair in self.entries[key]})
        roots = [self.partials[pair] for pair in needed]
        time_only, param_only = rates.writer.split(roots)
        arguments = "".join(a + ", " for a in rates.schedules.arguments())
        lines = ["", "", "@njit(cache=True, error_model='numpy', boundscheck=False)",
                 f"def newton_matrix_{number}(m0, step, h, p, {arguments}y1, jac):",
                 '    """Some entries of I - h theta S dR/dy at the iterates y1."""']
        end_of_step = stage_times(rates.method)[1:]
        context, time_names = rates.step_context("    ", end_of_step, time_only)
        lines += context
        lines.append(f"    ht = h * {literal(float(rates.method.theta))}")
        lines.append("    for b in range(BLOCK):")
        inner = " " * 8
        prelude, member_names = rates.member_prelude(inner, param_only, state=False)
        lines += prelude
        n = rates.model.n_states
        lines += [f"{inner}w_{s} = y1[{s}, b]" for s in range(n)]
        body, values = rates.at_stage("1", [f"w_{s}" for s in range(n)], member_names,
                                      time_names["1"], inner, roots)
        lines += body
        name = dict(zip(needed, values))
        for s, col in keys:
            lines.append(f"{inner}jac[{self.place[s]}, {self.place[col]}, b] = "
                         + self._entry(s, col, name))
        return lines

    def _entry(self, s: int, col: int, name: dict[Partial, str]) -> str:
        """The expression of entry (s, col): ``delta - ht * (sum of signed partials)``."""
        diagonal = "1.0" if s == col else "0.0"
        if not self.entries[(s, col)]:
            return diagonal
        terms = signed_sum([(sign, name[pair]) for sign, pair in self.entries[(s, col)]])
        return f"{diagonal} - ht * ({terms})"
