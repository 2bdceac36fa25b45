"""Python source of one numba kernel that integrates a chunk of members with one method.

The kernel is written for the machine, not for the reader: :mod:`ensemble.integrate.reference`
is the readable reference it must agree with.  Its shape is the usual way of vectorising an
ensemble of small independent ODE systems on a CPU, members as the SIMD lanes (common
practice, no source):

- members are cut into blocks of a fixed size ``BLOCK`` (the caller pads the last one), and
  blocks are spread over threads with ``numba.prange``;
- inside a block the steps loop is outside and the members loop inside, with the whole step
  of one member written out as straight-line scalar code from the rate trees, so LLVM
  vectorises the members loop (one member per SIMD lane);
- every member goes through the same code path whatever its position in the chunk (a fixed
  block size, padding instead of a remainder, no fast-math), so a member gets the same bits
  in any chunk.

The rates are emitted from :mod:`ensemble.model.ir` trees, each distinct subtree once per
stage (a dict keyed by node); subtrees of parameters alone are hoisted out of the stages,
subtrees of time alone out of the members loop.  Only our own identifiers and ``repr`` of
floats appear in the text; the trees were validated before compilation.

The implicit theta methods solve ``y1 = y0 + h S [(1 - theta) R(t, y0) + theta R(t + h, y1)]``
by Newton iterations per member (Hairer & Wanner 1996, *Solving Ordinary Differential
Equations II*, sec. IV.8, cited from memory), from the explicit Euler predictor, the first
:data:`~ensemble.integrate.reference.SHARED_MATRIX_ITERATIONS` sharing the matrix ``I - h theta
S dR/dy`` of the predictor (simplified Newton).  A matrix is factored by Gaussian elimination
with partial pivoting (Golub & Van Loan 2013, *Matrix Computations*, 4th ed., sec. 3.4;
section cited from memory), touching only the static pattern of its non-zeros and their
fill-in while no member needs a row interchange, vectorised across the members of a block.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Iterable

from ensemble.methods import Method
from ensemble.records import BELOW_NEGATIVE_ATOL, NEWTON_NOT_CONVERGED, NON_FINITE
from ensemble.integrate.reference import SHARED_MATRIX_ITERATIONS
from ensemble.model.lower import LoweredModel
from ensemble.model.ir import (Apply, Const, ParamRef, ScalarNode, ScheduleRef, StateRef,
                               TimeRef, walk)

GENERATOR_VERSION = 4
"""Bumped whenever the shape of the generated text changes meaning (part of the cache key
through the text itself)."""

MATRIX_PART_ENTRIES = 128
"""Newton matrix entries computed per generated function: numba and LLVM compile many
small functions much faster than one long one."""

BLOCK_BYTES = 1_100_000
"""Largest size of a block's Newton matrices and right-hand sides (members x n x (n + 1)
float64): about the L2 cache of one core of the machines measured (1 MB).  On the 16-group
model (n = 64) that is 32 members; 8 members gave twice the cost per step (measured with
scripts/benchmark.py)."""


def block_size(model: LoweredModel, method: Method) -> int:
    """Members per block: 512 for explicit methods; for implicit ones as many as keep the
    block's Newton matrices near :data:`BLOCK_BYTES` (a power of two, 8 to 512).

    Depends on the model and method only, never on the chunk, so that every member of a
    chunk of any size runs through the same code path.
    """
    if not method.implicit:
        return 512
    per_member = 8 * model.n_states * (model.n_states + 1)
    size = 512
    while size > 8 and size * per_member > BLOCK_BYTES:
        size //= 2
    return size


# ------------------------------------------------------------------ operations


def _min(a, b):
    """numpy.minimum: NaN if either argument is NaN."""
    if a != a:
        return a
    if b != b:
        return b
    return a if a <= b else b


def _max(a, b):
    """numpy.maximum: NaN if either argument is NaN."""
    if a != a:
        return a
    if b != b:
        return b
    return a if a >= b else b


def _sign(a):
    """numpy.sign: -1, 0 or +1, NaN for NaN."""
    if a > 0.0:
        return 1.0
    if a < 0.0:
        return -1.0
    return a if a != a else 0.0


_HELPERS = {"min": _min, "max": _max, "sign": _sign}
"""Operations emitted as calls of a small inlined function (its source goes into the text)."""

_INFIX = {"add": "+", "sub": "-", "mul": "*", "div": "/", "pow": "**"}
_MATH = {"exp": "math.exp", "log": "math.log", "sqrt": "math.sqrt", "sin": "math.sin",
         "cos": "math.cos", "abs": "abs"}


def _literal(value: float) -> str:
    """A float literal for the generated text (inf and NaN spelled through math)."""
    if math.isnan(value):
        return "math.nan"
    if math.isinf(value):
        return "math.inf" if value > 0 else "(-math.inf)"
    return repr(float(value))


# ------------------------------------------------------------ schedule support


def step_value_index(knot_steps, k):
    """Index of the knot in force during step ``k`` under ``between = "step"``: the last
    knot whose step index (``rint(day / h)``) is <= k, the first before the first knot."""
    index = 0
    for j in range(1, knot_steps.shape[0]):
        if knot_steps[j] <= k:
            index = j
    return index


def interpolation_segment(days, t):
    """``searchsorted(days, t, side="right") - 1``: the knot interval holding ``t`` (-1
    before the first knot, the last index from the last knot on)."""
    j = -1
    while j + 1 < days.shape[0] and days[j + 1] <= t:
        j += 1
    return j


# ------------------------------------------------------------------ linear solve


def factor_pivoting(matrix, first, pivots, pivot_size, factor, trouble, columns):
    """Columns ``first`` .. n-1 of the LU factorisation with partial pivoting (Golub & Van
    Loan 2013, sec. 3.4) of ``matrix[:, :, b]`` for every member b of a block, in place,
    the members loop innermost so that it vectorises.

    The general path of :func:`factor_block`, taken from the first column where some
    member needs a row interchange.  Row k's interchange is recorded in ``pivots[k, b]``
    and applied to columns k .. n-1 (the multipliers stay where they were computed, as
    :func:`solve_factored` replays them); the multipliers replace the entries below the
    diagonal.  Updates whose multiplier, or whose pivot-row entry, is zero for every
    member of the block are skipped: they would leave every finite entry unchanged.  Sets
    ``trouble[b]`` to 1 where a pivot is exactly zero (singular: LAPACK ``gesv``'s test)
    unless it is already set.  ``pivot_size`` and ``factor`` are (B,) work arrays,
    ``columns`` an (n,) int64 one.
    """
    n = matrix.shape[0]
    width = matrix.shape[2]
    for k in range(first, n):
        for b in range(width):
            pivots[k, b] = k
            pivot_size[b] = abs(matrix[k, k, b])
        for i in range(k + 1, n):
            for b in range(width):
                size = abs(matrix[i, k, b])
                if size > pivot_size[b]:
                    pivot_size[b] = size
                    pivots[k, b] = i
        swaps = 0
        for b in range(width):
            if pivot_size[b] == 0.0 and trouble[b] == 0:
                trouble[b] = 1
            swaps += pivots[k, b] != k
        if swaps:
            for j in range(k, n):
                for b in range(width):
                    other = pivots[k, b]
                    held = matrix[k, j, b]
                    matrix[k, j, b] = matrix[other, j, b]
                    matrix[other, j, b] = held
        used = 0
        for j in range(k + 1, n):
            nonzero = 0
            for b in range(width):
                nonzero += matrix[k, j, b] != 0.0
            if nonzero:
                columns[used] = j
                used += 1
        for i in range(k + 1, n):
            nonzero = 0
            for b in range(width):
                factor[b] = matrix[i, k, b] / matrix[k, k, b]
                matrix[i, k, b] = factor[b]
                nonzero += factor[b] != 0.0
            if nonzero == 0:
                continue
            for c in range(used):
                j = columns[c]
                for b in range(width):
                    matrix[i, j, b] -= factor[b] * matrix[k, j, b]


def factor_block(matrix, lower_start, lower, upper_start, upper, pivots, pivot_size, factor,
                 trouble, columns):
    """LU factorisation with partial pivoting of ``matrix[:, :, b]`` for every member b of
    a block, in place; returns the first column where some member needed a row
    interchange (n if none), which :func:`solve_factored` takes.

    Gaussian elimination with partial pivoting (Golub & Van Loan 2013, sec. 3.4) on a
    matrix whose entries outside a static pattern are zero: ``lower[lower_start[k]:
    lower_start[k + 1]]`` are the rows below k, ``upper[upper_start[k]:upper_start[k +
    1]]`` the columns right of k, of the pattern's non-zeros once the fill of elimination
    without interchanges is added (:func:`factor_pattern`), both increasing.  While no
    member needs an interchange (no entry below the diagonal larger in magnitude than the
    pivot: the test of partial pivoting), only the pattern is touched; from the first
    column where one does, :func:`factor_pivoting` takes over (entries outside the pattern
    may then be non-zero: the caller clears the matrix before its next use).  Both paths
    do the same operations in the same order on a member that needs no interchange, so
    its factors do not depend on the other members of its block.  The multipliers replace
    the entries below the diagonal.

    ``trouble[b]`` is 2 where the matrix holds a non-finite entry, 1 where a pivot is
    exactly zero (singular: LAPACK ``gesv``'s test), else 0.  ``pivots`` is an (n, B)
    int64 array, ``pivot_size`` and ``factor`` (B,) work arrays, ``columns`` an (n,) int64
    one.
    """
    n = matrix.shape[0]
    width = matrix.shape[2]
    for b in range(width):
        trouble[b] = 0
        pivot_size[b] = 0.0
    for k in range(n):
        for b in range(width):
            pivot_size[b] += matrix[k, k, b] - matrix[k, k, b]
        for e in range(lower_start[k], lower_start[k + 1]):
            i = lower[e]
            for b in range(width):
                pivot_size[b] += matrix[i, k, b] - matrix[i, k, b]
        for e in range(upper_start[k], upper_start[k + 1]):
            j = upper[e]
            for b in range(width):
                pivot_size[b] += matrix[k, j, b] - matrix[k, j, b]
    for b in range(width):
        if pivot_size[b] != 0.0:
            trouble[b] = 2
    for k in range(n):
        swaps = 0
        for e in range(lower_start[k], lower_start[k + 1]):
            i = lower[e]
            for b in range(width):
                swaps += abs(matrix[i, k, b]) > abs(matrix[k, k, b])
        if swaps:
            factor_pivoting(matrix, k, pivots, pivot_size, factor, trouble, columns)
            return k
        for b in range(width):
            if matrix[k, k, b] == 0.0 and trouble[b] == 0:
                trouble[b] = 1
        for e in range(lower_start[k], lower_start[k + 1]):
            i = lower[e]
            for b in range(width):
                factor[b] = matrix[i, k, b] / matrix[k, k, b]
                matrix[i, k, b] = factor[b]
            for c in range(upper_start[k], upper_start[k + 1]):
                j = upper[c]
                for b in range(width):
                    matrix[i, j, b] -= factor[b] * matrix[k, j, b]
    return n


def solve_factored(matrix, rhs, lower_start, lower, upper_start, upper, first, pivots):
    """Solve ``A x = rhs[:, b]`` for every member b of a block, in place, with the factors
    of A left in ``matrix`` by :func:`factor_block` (which returned ``first``).

    Forward substitution replays the elimination on the right-hand side (the pattern's
    rows up to column ``first``, then every row with the recorded interchanges), and back
    substitution runs over the pattern's columns, or over every column once rows were
    interchanged (Golub & Van Loan 2013, sec. 3.1 and 3.4).  The operations on ``rhs``
    are those elimination would do on it alongside the matrix, in the same order.
    """
    n = matrix.shape[0]
    width = matrix.shape[2]
    for k in range(first):
        for e in range(lower_start[k], lower_start[k + 1]):
            i = lower[e]
            for b in range(width):
                rhs[i, b] -= matrix[i, k, b] * rhs[k, b]
    for k in range(first, n):
        for b in range(width):
            other = pivots[k, b]
            held = rhs[k, b]
            rhs[k, b] = rhs[other, b]
            rhs[other, b] = held
        for i in range(k + 1, n):
            for b in range(width):
                rhs[i, b] -= matrix[i, k, b] * rhs[k, b]
    for i in range(n - 1, -1, -1):
        if first == n:
            for c in range(upper_start[i], upper_start[i + 1]):
                j = upper[c]
                for b in range(width):
                    rhs[i, b] -= matrix[i, j, b] * rhs[j, b]
        else:
            for j in range(i + 1, n):
                nonzero = 0
                for b in range(width):
                    nonzero += matrix[i, j, b] != 0.0
                if nonzero:
                    for b in range(width):
                        rhs[i, b] -= matrix[i, j, b] * rhs[j, b]
        for b in range(width):
            rhs[i, b] /= matrix[i, i, b]


def elimination_order(pattern: list[set[int]]) -> list[int]:

    """An order of the unknowns that limits fill-in: greedy minimum Markowitz count
    ``(r - 1)(c - 1)`` over the remaining diagonal pivots, with the fill each elimination
    creates (Markowitz 1957, "The elimination form of the inverse and its application to
    linear programming"; Duff, Erisman & Reid 2017, *Direct Methods for Sparse Matrices*,
    2nd ed.).  ``pattern[i]`` holds the columns of row i's structural non-zeros."""
    rows = [set(row) | {i} for i, row in enumerate(pattern)]
    remaining = set(range(len(rows)))
    order = []
    while remaining:
        def count(p: int) -> tuple[int, int]:
            row = len(rows[p] & remaining) - 1
            column = sum(1 for i in remaining if p in rows[i]) - 1
            return row * column, p
        pivot = min(remaining, key=count)
        remaining.discard(pivot)
        for i in remaining:
            if pivot in rows[i]:
                rows[i] |= rows[pivot] & remaining
        order.append(pivot)
    return order


def factor_pattern(pattern: list[set[int]]) -> tuple[list[int], list[int], list[int],
                                                     list[int]]:
    """The non-zeros of the LU factors of a matrix with non-zeros ``pattern`` (row i's
    columns, the diagonal implied) eliminated in its own order without interchanges:
    symbolic factorisation (Duff, Erisman & Reid 2017, ch. 9, cited from memory).

    Returns ``lower_start, lower, upper_start, upper`` in the compressed form
    :func:`factor_block` reads: the rows below k holding a non-zero in column k, and the
    columns right of k holding one in row k, each increasing.
    """
    rows = [set(row) | {i} for i, row in enumerate(pattern)]
    lower_start, lower, upper_start, upper = [0], [], [0], []
    for k in range(len(rows)):
        right = sorted(j for j in rows[k] if j > k)
        below = [i for i in range(k + 1, len(rows)) if k in rows[i]]
        for i in below:
            rows[i].update(right)
        lower += below
        upper += right
        lower_start.append(len(lower))
        upper_start.append(len(upper))
    return lower_start, lower, upper_start, upper


# ------------------------------------------------------------------ emitter


class _Emitter:
    """Straight-line code for the rate trees, each distinct subtree computed once."""

    def __init__(self) -> None:
        self._depends: dict[ScalarNode, frozenset[str]] = {}

    def depends(self, node: ScalarNode) -> frozenset[str]:
        """What ``node`` reads: a subset of {"state", "param", "schedule", "time"}."""
        known = self._depends.get(node)
        if known is not None:
            return known
        for current in walk(node):
            if current in self._depends:
                continue
            if isinstance(current, StateRef):
                kinds = frozenset({"state"})
            elif isinstance(current, ParamRef):
                kinds = frozenset({"param"})
            elif isinstance(current, ScheduleRef):
                kinds = frozenset({"schedule"})
            elif isinstance(current, TimeRef):
                kinds = frozenset({"time"})
            elif isinstance(current, Const):
                kinds = frozenset()
            else:
                kinds = frozenset().union(*(self._depends[a] for a in current.args))
            self._depends[current] = kinds
        return self._depends[node]

    def emit(self, roots: Iterable[ScalarNode], names: dict[ScalarNode, str], prefix: str,
             lines: list[str], leaf) -> list[str]:
        """Append assignments computing ``roots`` to ``lines``; return their expressions.

        ``names`` maps nodes already computed to variable names (it is extended);
        ``leaf(node)`` spells a non-Apply, non-Const node.
        """
        roots = tuple(roots)
        for node in walk(*roots):
            if node in names:
                continue
            if isinstance(node, Const):
                names[node] = _literal(node.value)
            elif not isinstance(node, Apply):
                names[node] = leaf(node)
            else:
                args = [names[a] for a in node.args]
                if node.op in _INFIX:
                    text = f"{args[0]} {_INFIX[node.op]} {args[1]}"
                elif node.op == "neg":
                    text = f"-{args[0]}"
                elif node.op == "select_le":
                    text = f"{args[2]} if {args[0]} <= {args[1]} else {args[3]}"
                elif node.op in _HELPERS:
                    text = f"_{node.op}({', '.join(args)})"
                else:
                    text = f"{_MATH[node.op]}({args[0]})"
                variable = f"{prefix}{len(names)}"
                lines.append(f"{variable} = {text}")
                names[node] = variable
        return [names[root] for root in roots]


def _signed_sum(terms: list[tuple[float, str]]) -> str:
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


def _weighted_sum(weights: list[float], names: list[str]) -> str | None:
    """``w0 * a + w1 * b`` skipping zero weights; None when all are zero."""
    terms = []
    for weight, name in zip(weights, names):
        if weight == 0.0:
            continue
        terms.append(name if weight == 1.0 else f"{_literal(weight)} * {name}")
    return " + ".join(terms) if terms else None


class KernelSource:
    """Generate the kernel text for ``model`` and ``method``.

    Attributes
    ----------
    text : the Python source of a module defining ``integrate``.
    block : members per block (:func:`block_size`).
    """

    def __init__(self, model: LoweredModel, method: Method):
        self.model = model
        self.method = method
        self.block = block_size(model, method)
        self._emitter = _Emitter()
        stoich = model.stoichiometry
        self._into_state = [
            [(float(stoich[s, f]), f) for f in range(model.n_flow_elements) if stoich[s, f] != 0]
            for s in range(model.n_states)]
        if method.implicit:
            self._plan_matrix()
        self.text = self._module()

    # -- pieces

    def _schedule_arguments(self) -> list[str]:
        names = []
        for i in range(len(self.model.schedule_slots)):
            names += [f"days_{i}", f"values_{i}"]
        return names

    def _step_schedule_prelude(self, indent: str) -> list[str]:
        """Per step, outside the members loop: the knot in force for every "step" slot."""
        lines = []
        for i, slot in enumerate(self.model.schedule_slots):
            if slot.between == "step":
                lines.append(f"{indent}knot_{i} = step_value_index(days_{i}, step)")
        return lines

    def _stage_time_prelude(self, stage: str, time: str, indent: str) -> list[str]:
        """Per stage, outside the members loop: where each "linear" slot's stage time falls
        (``seg``: the knot interval; ``held``: before the first or from the last knot)."""
        lines = []
        for i, slot in enumerate(self.model.schedule_slots):
            if slot.between == "linear":
                last = len(slot.days) - 1
                lines += [
                    f"{indent}seg{stage}_{i} = interpolation_segment(days_{i}, {time})",
                    f"{indent}held{stage}_{i} = seg{stage}_{i} < 0 or seg{stage}_{i} >= {last}",
                    f"{indent}if held{stage}_{i}:",
                    f"{indent}    seg{stage}_{i} = 0 if seg{stage}_{i} < 0 else {last}",
                    f"{indent}    off{stage}_{i} = 0.0",
                    f"{indent}    gap{stage}_{i} = 1.0",
                    f"{indent}else:",
                    f"{indent}    off{stage}_{i} = {time} - days_{i}[seg{stage}_{i}]",
                    f"{indent}    gap{stage}_{i} = days_{i}[seg{stage}_{i} + 1] - "
                    f"days_{i}[seg{stage}_{i}]",
                    f"{indent}nxt{stage}_{i} = seg{stage}_{i} if held{stage}_{i} else "
                    f"seg{stage}_{i} + 1",
                ]
        return lines

    def _schedule_values(self, stage: str, used: set[int]) -> list[str]:
        """Per member and stage: the value of every used schedule slot."""
        lines = []
        for i in sorted(used):
            slot = self.model.schedule_slots[i]
            if slot.between == "step":
                lines.append(f"s{stage}_{i} = values_{i}[knot_{i}, m]")
            else:
                lines.append(f"lo = values_{i}[seg{stage}_{i}, m]")
                lines.append(f"hi = values_{i}[nxt{stage}_{i}, m]")
                lines.append(f"s{stage}_{i} = lo if held{stage}_{i} else "
                             f"(hi - lo) / gap{stage}_{i} * off{stage}_{i} + lo")
        return lines

    def _used_schedules(self) -> set[int]:
        return {n.index for n in walk(*self.model.rates, *self._derivative_trees())
                if isinstance(n, ScheduleRef)}

    def _used_parameters(self) -> set[int]:
        return {n.index for n in walk(*self.model.rates, *self._derivative_trees())
                if isinstance(n, ParamRef)}

    def _derivative_trees(self) -> list[ScalarNode]:
        if not self.method.implicit:
            return []
        return [tree for entries in self.model.rate_derivatives for _, tree in entries]

    def _split(self, roots: list[ScalarNode]) -> tuple[list[ScalarNode], list[ScalarNode]]:
        """Subtrees of the roots that read time only, and that read parameters only."""
        time_only, param_only = [], []
        for node in walk(*roots):
            if not isinstance(node, Apply):
                continue
            kinds = self._emitter.depends(node)
            if kinds == {"time"}:
                time_only.append(node)
            elif kinds == {"param"}:
                param_only.append(node)
        return time_only, param_only

    def _stage(self, stage: str, roots: list[ScalarNode], state: list[str],
               member_names: dict[ScalarNode, str], time_names: dict[ScalarNode, str],
               lines: list[str]) -> list[str]:
        """Code evaluating ``roots`` at one stage; returns their expressions."""
        names = dict(member_names)
        names.update(time_names)

        def leaf(node):
            if isinstance(node, StateRef):
                return state[node.index]
            if isinstance(node, ParamRef):
                return f"p_{node.index}"
            if isinstance(node, ScheduleRef):
                return f"s{stage}_{node.index}"
            if isinstance(node, TimeRef):
                return f"time{stage}"
            raise AssertionError(node)
        return self._emitter.emit(roots, names, f"v{stage}_", lines, leaf)

    # -- the module

    def _module(self) -> str:
        model, method = self.model, self.method
        time_only, param_only = self._split(list(model.rates))
        used_params = sorted(self._used_parameters())
        used_schedules = self._used_schedules()
        stages = self._stage_names()

        body: list[str] = []
        emit = body.append
        emit("    y = np.empty((N_STATES, BLOCK))")
        emit("    fc = np.zeros((N_FLOWS, BLOCK))")
        emit("    bad = np.zeros(BLOCK, np.uint8)")
        if method.implicit:
            emit("    r0 = np.empty((N_FLOWS, BLOCK))")
            emit("    y1 = np.empty((N_STATES, BLOCK))")
            emit("    jac = np.zeros((N_STATES, N_STATES, BLOCK))")
            emit("    upd = np.empty((N_STATES, BLOCK))")
            emit("    active = np.empty(BLOCK, np.bool_)")
            emit("    pivots = np.empty((N_STATES, BLOCK), np.int64)")
            emit("    first = N_STATES")
            emit("    pivot_size = np.empty(BLOCK)")
            emit("    factor = np.empty(BLOCK)")
            emit("    trouble = np.empty(BLOCK, np.int8)")
            emit("    columns = np.empty(N_STATES, np.int64)")
        emit("    for b in range(BLOCK):")
        emit("        for s in range(N_STATES):")
        emit("            y[s, b] = y0[s, m0 + b]")
        emit("    if compare:")
        emit("        for b in range(min(BLOCK, reference.shape[2] - m0)):")
        emit("            error_out[m0 + b] = -math.inf")
        body += self._compare(" " * 8, "0")
        emit("    else:")
        emit("        for b in range(BLOCK):")
        emit("            for s in range(N_STATES):")
        emit("                state_out[0, s, m0 + b] = y0[s, m0 + b]")
        emit("            for f in range(N_FLOWS):")
        emit("                flow_out[0, f, m0 + b] = math.nan")
        emit("    for b in range(BLOCK):")
        emit("        low = False")
        emit("        for s in range(N_STATES):")
        emit("            low = low or y0[s, m0 + b] < -atol")
        emit("        status[m0 + b] = BELOW_NEGATIVE_ATOL if low else 0")
        emit("    for k in range(1, n_reports):")
        emit("        for b in range(BLOCK):")
        emit("            for f in range(N_FLOWS):")
        emit("                fc[f, b] = 0.0")
        emit("        for j in range(steps_per_report):")
        emit("            step = (k - 1) * steps_per_report + j")
        indent = " " * 12
        context, time_names = self._context(indent, stages, time_only)
        body += context
        if method.implicit:
            body += self._implicit_step(indent, used_params, used_schedules, param_only,
                                        time_names)
        else:
            body += self._explicit_step(indent, used_params, used_schedules, param_only,
                                        time_names)
        body += self._report(" " * 8)

        header = [
            f"# Generated by ensemble.integrate.codegen (version {GENERATOR_VERSION}); "
            "do not edit.",
            f"# Model: {', '.join(model.state_labels)}; method: {method.name}.",
            "import math",
            "import numpy as np",
            "from numba import njit, prange",
            "",
            f"BLOCK = {self.block}",
            f"N_STATES = {model.n_states}",
            f"N_FLOWS = {model.n_flow_elements}",
            f"NON_FINITE = {NON_FINITE}",
            f"BELOW_NEGATIVE_ATOL = {BELOW_NEGATIVE_ATOL}",
            f"NEWTON_NOT_CONVERGED = {NEWTON_NOT_CONVERGED}",
            "",
        ]
        if method.implicit:
            for name, values in zip(("LOWER_START", "LOWER", "UPPER_START", "UPPER"),
                                    self._factor_pattern):
                header.append(f"{name} = np.array({values!r}, dtype=np.int64)")
        support = [_min, _max, _sign, step_value_index, interpolation_segment]
        if method.implicit:
            support += [factor_pivoting, factor_block, solve_factored]
        for function in support:
            header.append("")
            header.append("@njit(inline='always', error_model='numpy')" if function in
                          _HELPERS.values() else "@njit(error_model='numpy', boundscheck=False)")
            header.append(inspect.getsource(function).rstrip())
            header.append("")
        if method.implicit:
            for number in range(len(self._matrix_parts)):
                header += self._matrix_part(number)
            header.append("")
        arguments = ", ".join(["y0", "p", *self._schedule_arguments(), "h", "steps_per_report",
                               "n_reports", "atol", "newton_tol", "newton_max_iter",
                               "state_out", "flow_out", "status", "compare", "reference",
                               "rtol", "gain", "error_out"])
        # the block's work is its own function, so numba's parallel pass (slow to compile)
        # sees only the small driver loop
        header += [
            "",
            "@njit(cache=True, error_model='numpy', boundscheck=False)",
            f"def integrate_block(m0, {arguments}):",
            '    """Integrate members m0 .. m0 + BLOCK - 1."""',
        ]
        # two drivers of the same blocks (the same bits): blocks spread over numba's
        # threads, or one after another in the calling thread, without the GIL and
        # without numba's threading layer, for callers that are threads of their own
        driver = [
            "",
            "",
            "@njit(parallel=True, cache=True, error_model='numpy', boundscheck=False)",
            f"def integrate({arguments}):",
            '    """Integrate a padded chunk, blocks in parallel: see '
            'ensemble.integrate.compiled."""',
            "    for blk in prange(y0.shape[1] // BLOCK):",
            f"        integrate_block(blk * BLOCK, {arguments})",
            "",
            "",
            "@njit(nogil=True, cache=True, error_model='numpy', boundscheck=False)",
            f"def integrate_serial({arguments}):",
            '    """Integrate a padded chunk, block after block, in the calling thread."""',
            "    for blk in range(y0.shape[1] // BLOCK):",
            f"        integrate_block(blk * BLOCK, {arguments})",
        ]
        return "\n".join(header + ["    " + line[4:] for line in body] + driver) + "\n"

    def _plan_matrix(self) -> None:
        """The structural non-zeros of the Newton matrix, the order of the unknowns in the
        solve, the pattern of its LU factors in that order, and the parts the matrix is
        computed in."""
        model = self.model
        n = model.n_states
        partial = {(f, state): tree for f, entries in enumerate(model.rate_derivatives)
                   for state, tree in entries}
        self._partial = partial
        self._entries: dict[tuple[int, int], list[tuple[float, tuple[int, int]]]] = {}
        for s in range(n):
            for col in range(n):
                terms = [(sign, (f, col)) for sign, f in self._into_state[s]
                         if (f, col) in partial]
                if terms:
                    self._entries[(s, col)] = terms
        order = elimination_order([{col for (row, col) in self._entries if row == s}
                                   for s in range(n)])
        self._place = {state: index for index, state in enumerate(order)}
        placed: list[set[int]] = [set() for _ in range(n)]
        for s, col in self._entries:
            placed[self._place[s]].add(self._place[col])
        self._factor_pattern = factor_pattern(placed)
        # every position of the factors' pattern is written with each new matrix (a
        # diagonal without partials is 1, a fill-in 0), so the factorisation finds nothing
        # stale there
        lower_start, lower, upper_start, upper = self._factor_pattern
        for k in range(n):
            positions = [(k, k)] + [(lower[e], k) for e in range(lower_start[k],
                                                                 lower_start[k + 1])]
            positions += [(k, upper[e]) for e in range(upper_start[k], upper_start[k + 1])]
            for row, col in positions:
                self._entries.setdefault((order[row], order[col]), [])
        self._matrix_parts: list[list[tuple[int, int]]] = [[]]
        for key in self._entries:
            if len(self._matrix_parts[-1]) >= MATRIX_PART_ENTRIES:
                self._matrix_parts.append([])
            self._matrix_parts[-1].append(key)

    def _matrix_part(self, number: int) -> list[str]:
        """A function computing the Newton matrix entries of part ``number`` for a block,
        at the iterates ``y1`` (its own members loop, so it vectorises)."""
        keys = self._matrix_parts[number]
        needed = sorted({pair for key in keys for _, pair in self._entries[key]})
        roots = [self._partial[pair] for pair in needed]
        time_only, param_only = self._split(roots)
        arguments = "".join(a + ", " for a in self._schedule_arguments())
        lines = ["", "", "@njit(cache=True, error_model='numpy', boundscheck=False)",
                 f"def newton_matrix_{number}(m0, step, h, p, {arguments}y1, jac):",
                 '    """Some entries of I - h theta S dR/dy at the iterates y1."""']
        context, time_names = self._context("    ", [("1", "1.0")], time_only)
        lines += context
        lines.append(f"    ht = h * {_literal(float(self.method.theta))}")
        lines.append("    for b in range(BLOCK):")
        inner = " " * 8
        prelude, member_names = self._member_prelude(
            inner, sorted(self._used_parameters()), param_only, state=False)
        lines += prelude
        lines += [f"{inner}w_{s} = y1[{s}, b]" for s in range(self.model.n_states)]
        body, values = self._rates_at("1", [f"w_{s}" for s in range(self.model.n_states)],
                                      self._used_schedules(), member_names, time_names,
                                      inner, roots)
        lines += body
        name = dict(zip(needed, values))
        for s, col in keys:
            diagonal = "1.0" if s == col else "0.0"
            value = diagonal
            if self._entries[(s, col)]:
                terms = _signed_sum([(sign, name[pair])
                                     for sign, pair in self._entries[(s, col)]])
                value = f"{diagonal} - ht * ({terms})"
            lines.append(f"{inner}jac[{self._place[s]}, {self._place[col]}, b] = {value}")
        return lines

    def _context(self, indent: str, stages: list[tuple[str, str]],
                 time_only: list[ScalarNode]) -> tuple[list[str], dict]:
        """Scalar code of step ``step`` outside the members loop: the step's time ``t``,
        the knots in force, each stage's time and "linear" segments, and the subtrees of
        time alone; returns the lines and, per stage, the names of those subtrees."""
        lines = [f"{indent}t = step * h"]
        lines += self._step_schedule_prelude(indent)
        for stage, offset in stages:
            time = "t" if offset == "0" else f"t + {offset} * h"
            if self.method.implicit and stage == "1":
                time = "(step + 1) * h"
            lines.append(f"{indent}time{stage} = {time}")
            lines += self._stage_time_prelude(stage, f"time{stage}", indent)
        time_names: dict[str, dict[ScalarNode, str]] = {}
        for stage, _ in stages:
            names: dict[ScalarNode, str] = {}
            body: list[str] = []
            self._emitter.emit(time_only, names, f"u{stage}_", body,
                               lambda node, s=stage: f"time{s}")
            lines += [indent + line for line in body]
            time_names[stage] = {n: v for n, v in names.items() if n in set(time_only)}
        return lines, time_names

    def _stage_names(self) -> list[tuple[str, str]]:
        """(stage name, node offset c as text) of every rate evaluation time in a step."""
        if self.method.implicit:
            return [("0", "0"), ("1", "1.0")]
        return [(str(i), "0" if c == 0.0 else _literal(float(c)))
                for i, c in enumerate(self.method.c)]

    def _member_prelude(self, indent: str, used_params: list[int],
                        param_only: list[ScalarNode],
                        state: bool = True) -> tuple[list[str], dict]:
        """Load the member's state (unless ``state`` is False) and parameters; compute its
        parameter-only subtrees."""
        lines = [f"{indent}m = m0 + b"]
        if state:
            lines += [f"{indent}y_{s} = y[{s}, b]" for s in range(self.model.n_states)]
        lines += [f"{indent}p_{i} = p[{i}, m]" for i in used_params]
        names: dict[ScalarNode, str] = {}
        body: list[str] = []
        self._emitter.emit(param_only, names, "q_", body,
                           lambda node: f"p_{node.index}")
        lines += [indent + line for line in body]
        return lines, names

    def _rates_at(self, stage: str, state: list[str], used_schedules: set[int],
                  member_names: dict, time_names: dict, indent: str,
                  roots: list[ScalarNode]) -> tuple[list[str], list[str]]:
        lines = [indent + line for line in self._schedule_values(stage, used_schedules)]
        body: list[str] = []
        values = self._stage(stage, roots, state, member_names, time_names[stage], body)
        lines += [indent + line for line in body]
        return lines, values

    def _update_lines(self, indent: str, old: list[str], increments: list[str],
                      new: str) -> list[str]:
        """``new_s = old_s + sum of signed increments`` for every state."""
        lines = []
        for s, terms in enumerate(self._into_state):
            change = _signed_sum([(sign, increments[f]) for sign, f in terms])
            lines.append(f"{indent}{new}{s} = {old[s]}" +
                         ("" if change == "0.0" else f" + ({change})"))
        return lines

    def _finish_member(self, indent: str, new: str, increments: list[str]) -> list[str]:
        """Store the new state and flow counts; a non-finite member holds NaN."""
        n = self.model.n_states
        lines = [f"{indent}check = " + " + ".join(f"({new}{s} - {new}{s})" for s in range(n))]
        lines.append(f"{indent}if check != 0.0:")
        lines.append(f"{indent}    bad[b] = 1")
        lines.append(f"{indent}if bad[b]:")
        for s in range(n):
            lines.append(f"{indent}    {new}{s} = math.nan")
        for s in range(n):
            lines.append(f"{indent}y[{s}, b] = {new}{s}")
        for f, inc in enumerate(increments):
            lines.append(f"{indent}fc[{f}, b] = math.nan if bad[b] else fc[{f}, b] + {inc}")
        return lines

    def _explicit_step(self, indent, used_params, used_schedules, param_only, time_names):
        model, method = self.model, self.method
        n_flows = model.n_flow_elements
        lines = [f"{indent}for b in range(BLOCK):"]
        inner = indent + "    "
        prelude, member_names = self._member_prelude(inner, used_params, param_only)
        lines += prelude
        state = [f"y_{s}" for s in range(model.n_states)]
        rates: list[list[str]] = []
        for i in range(len(method.b)):
            stage = str(i)
            stage_state = state
            if i > 0:
                combos = []
                for f in range(n_flows):
                    combo = _weighted_sum([float(a) for a in method.a[i, :i]],
                                          [rates[j][f] for j in range(i)])
                    combos.append(f"h * ({combo})" if combo is not None else "0.0")
                for f, combo in enumerate(combos):
                    lines.append(f"{inner}k{stage}_{f} = {combo}")
                lines += self._update_lines(inner, state, [f"k{stage}_{f}" for f in
                                                           range(n_flows)], f"Y{stage}_")
                stage_state = [f"Y{stage}_{s}" for s in range(model.n_states)]
            body, values = self._rates_at(stage, stage_state, used_schedules, member_names,
                                          time_names, inner, list(model.rates))
            lines += body
            rates.append(values)
        for f in range(n_flows):
            total = _weighted_sum([float(w) for w in method.b], [r[f] for r in rates])
            lines.append(f"{inner}inc_{f} = h * ({total})")
        increments = [f"inc_{f}" for f in range(n_flows)]
        lines += self._update_lines(inner, state, increments, "z_")
        lines += self._finish_member(inner, "z_", increments)
        return lines

    def _implicit_step(self, indent, used_params, used_schedules, param_only, time_names):
        model, method = self.model, self.method
        n, n_flows = model.n_states, model.n_flow_elements
        theta = float(method.theta)
        state = [f"y_{s}" for s in range(n)]
        iterate = [f"w_{s}" for s in range(n)]
        inner = indent + "    "
        lines: list[str] = []

        # start of step: R(t, y0) and the explicit Euler predictor
        lines.append(f"{indent}for b in range(BLOCK):")
        prelude, member_names = self._member_prelude(inner, used_params, param_only)
        lines += prelude
        body, r0 = self._rates_at("0", state, used_schedules, member_names, time_names, inner,
                                  list(model.rates))
        lines += body
        for f in range(n_flows):
            lines.append(f"{inner}r0[{f}, b] = {r0[f]}")
        lines += self._update_lines(inner, state, [f"h * {r0[f]}" for f in range(n_flows)],
                                    "pred_")
        for s in range(n):
            lines.append(f"{inner}y1[{s}, b] = pred_{s}")
        lines.append(f"{inner}active[b] = not bad[b]")

        # Newton iterations
        lines.append(f"{indent}for iteration in range(newton_max_iter):")
        lines.append(f"{indent}    for b in range(BLOCK):")
        deep = indent + "        "
        prelude, member_names = self._member_prelude(deep, used_params, param_only)
        lines += prelude
        lines += [f"{deep}w_{s} = y1[{s}, b]" for s in range(n)]
        body, r1 = self._rates_at("1", iterate, used_schedules, member_names, time_names,
                                  deep, list(model.rates))
        lines += body
        # residual F = w - y0 - h S [(1 - theta) r0 + theta r1]
        increments = []
        for f in range(n_flows):
            lines.append(f"{deep}g_{f} = h * ({_literal(1.0 - theta)} * r0[{f}, b] + "
                         f"{_literal(theta)} * {r1[f]})")
            increments.append(f"g_{f}")
        lines += self._update_lines(deep, state, increments, "target_")
        place = self._place
        for s in range(n):
            lines.append(f"{deep}upd[{place[s]}, b] = w_{s} - target_{s}")
        # the matrix I - h theta S dR/dy of the first iterate serves the first iterations
        # (simplified Newton), later ones take their own; outside the factors' pattern it
        # must be zero, so it is cleared after a factorisation that interchanged rows
        lines.append(f"{indent}    if iteration == 0 or iteration >= "
                     f"{SHARED_MATRIX_ITERATIONS}:")
        lines.append(f"{indent}        if first < N_STATES:")
        lines.append(f"{indent}            jac[:, :, :] = 0.0")
        # in parts (small functions compile much faster)
        for part in range(len(self._matrix_parts)):
            lines.append(f"{indent}        newton_matrix_{part}(m0, step, h, p, "
                         f"{''.join(a + ', ' for a in self._schedule_arguments())}y1, jac)")
        lines.append(f"{indent}        first = factor_block(jac, LOWER_START, LOWER, "
                     "UPPER_START, UPPER, pivots, pivot_size, factor, trouble, columns)")
        lines.append(f"{indent}    solve_factored(jac, upd, LOWER_START, LOWER, UPPER_START, "
                     "UPPER, first, pivots)")
        # a singular member is not converged; a non-finite one leaves (it will be flagged
        # non-finite); the others move by the update and stop once it is <= tol
        lines.append(f"{indent}    remaining = 0")
        lines.append(f"{indent}    for b in range(BLOCK):")
        lines.append(f"{deep}size = 0.0")
        for s in range(n):
            lines.append(f"{deep}size = _max(size, abs(upd[{place[s]}, b]))")
        lines.append(f"{deep}if active[b]:")
        lines.append(f"{deep}    if trouble[b] == 1:")
        lines.append(f"{deep}        status[m0 + b] |= NEWTON_NOT_CONVERGED")
        lines.append(f"{deep}        active[b] = False")
        lines.append(f"{deep}    elif trouble[b] == 2 or size - size != 0.0:")
        lines.append(f"{deep}        active[b] = False")
        lines.append(f"{deep}    else:")
        for s in range(n):
            lines.append(f"{deep}        y1[{s}, b] -= upd[{place[s]}, b]")
        lines.append(f"{deep}        if size <= newton_tol:")
        lines.append(f"{deep}            active[b] = False")
        lines.append(f"{deep}remaining += active[b]")
        lines.append(f"{indent}    if remaining == 0:")
        lines.append(f"{indent}        break")

        # end of step: increments from the converged iterate
        lines.append(f"{indent}for b in range(BLOCK):")
        prelude, member_names = self._member_prelude(inner, used_params, param_only)
        lines += prelude
        lines.append(f"{inner}if active[b]:")
        lines.append(f"{inner}    status[m] |= NEWTON_NOT_CONVERGED")
        lines += [f"{inner}w_{s} = y1[{s}, b]" for s in range(n)]
        body, r1 = self._rates_at("1", iterate, used_schedules, member_names, time_names,
                                  inner, list(model.rates))
        lines += body
        increments = []
        for f in range(n_flows):
            lines.append(f"{inner}inc_{f} = h * ({_literal(1.0 - theta)} * r0[{f}, b] + "
                         f"{_literal(theta)} * {r1[f]})")
            increments.append(f"inc_{f}")
        lines += self._update_lines(inner, state, increments, "z_")
        lines += self._finish_member(inner, "z_", increments)
        return lines

    def _report(self, indent: str) -> list[str]:
        """At each reported time: store state and flow counts (or, comparing, fold the
        scaled differences from ``reference`` into ``error_out``), set the status bits.
        Each loop over members is straight-line code, so the compiler vectorises it."""
        n = self.model.n_states
        lines = [f"{indent}if compare:"]
        lines += self._compare(indent + "    ", "k")
        lines += [f"{indent}else:",
                  f"{indent}    for b in range(BLOCK):",
                  f"{indent}        m = m0 + b"]
        for s in range(n):
            lines.append(f"{indent}        state_out[k, {s}, m] = y[{s}, b]")
        lines.append(f"{indent}        for f in range(N_FLOWS):")
        lines.append(f"{indent}            flow_out[k, f, m] = fc[f, b]")
        lines += [f"{indent}for b in range(BLOCK):",
                  f"{indent}    m = m0 + b",
                  f"{indent}    low = False"]
        for s in range(n):
            lines.append(f"{indent}    low = low or y[{s}, b] < -atol")
        lines.append(f"{indent}    if low:")
        lines.append(f"{indent}        status[m] |= BELOW_NEGATIVE_ATOL")
        lines.append(f"{indent}    if bad[b]:")
        lines.append(f"{indent}        status[m] |= NON_FINITE")
        return lines

    @staticmethod
    def _compare(indent: str, report: str) -> list[str]:
        """Fold each member's scaled difference from ``reference`` at report ``report``
        into ``error_out`` (members past the reference's are padding): the operations of
        :func:`ensemble.integrate.refine.step_error` in its order, so the same bits, and
        NaN once any value is NaN, as its maximum gives.  States outside, members inside:
        short code the compiler vectorises, whatever the number of states."""
        return [f"{indent}for s in range(N_STATES):",
                f"{indent}    for b in range(min(BLOCK, reference.shape[2] - m0)):",
                f"{indent}        scale = atol + rtol * abs(y[s, b])",
                f"{indent}        error_out[m0 + b] = _max(error_out[m0 + b], "
                f"abs(reference[{report}, s, m0 + b] - y[s, b]) / (gain * scale))"]
