"""The numpy reference evaluator of a compiled model over a chunk of members.

:class:`RateFunctions` turns the scalar IR of a :class:`~ensemble.model.lower.LoweredModel`
into two Python functions over rows of member arrays (states x members): the flow rates
and their non-zero partial derivatives with respect to the state.  The functions are
generated as source text from the validated IR, using only our own identifiers and
``repr`` of floats, and compiled once; no scenario text is ever evaluated.  Each distinct
subtree is computed once (common subexpressions are shared through a dict keyed by node)
into a row of one work array whose rows are reused as soon as a value is dead, so a call
allocates one array however large the model.

All members share the stage time ``t`` (a float); ``y`` is (n_states, M), ``p``
(n_parameter_slots, M), ``s`` (n_schedule_slots, M).  Arithmetic runs under
``numpy.errstate(all="ignore")``: a member whose values become invalid gets NaN or inf
silently, and the integrator flags it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import scipy.sparse

from ensemble.model.lower import LoweredModel
from ensemble.model.ir import (NUMPY_FUNCTIONS, Apply, Const, ParamRef, ScalarNode, ScheduleRef,
                               StateRef, TimeRef, select_le, walk)

_NUMPY_NAMES = {op: f"np.{function.__name__}" for op, function in NUMPY_FUNCTIONS.items()}
"""numpy spelling of each operation but ``select_le`` (:func:`ensemble.model.ir.select_le`)."""


_ASSEMBLY_BLOCK_BYTES = 8 * 2**20
"""Size of the temporary that :meth:`RateFunctions.state_jacobian` assembles at a time."""


class RateFunctions:
    """Flow rates and their state derivatives for a chunk of members, in numpy.

    Parameters
    ----------
    model : the compiled model.

    Attributes
    ----------
    model : the compiled model.
    jacobian_flow, jacobian_state : (nnz,) intp, the flow element and state row of each
        non-zero partial derivative, in the order :meth:`rate_jacobian` writes them
        (flow elements in order, each one's states ascending).
    source : the generated Python source, for reading and debugging.
    """

    def __init__(self, model: LoweredModel):
        self.model = model
        pattern = [(k, j, tree) for k, partials in enumerate(model.rate_derivatives)
                   for j, tree in partials]
        self.jacobian_flow = np.array([k for k, _, _ in pattern], dtype=np.intp)
        self.jacobian_state = np.array([j for _, j, _ in pattern], dtype=np.intp)
        rates = _Program("rates", model.rates)
        jacobian = _Program("rate_jacobian", [tree for _, _, tree in pattern])
        self._work_rows = {"rates": rates.n_buffers, "rate_jacobian": jacobian.n_buffers}
        self.source = rates.source + "\n\n" + jacobian.source
        namespace: dict[str, object] = {"np": np, "select_le": select_le}
        exec(compile(self.source, "<generated rates>", "exec"), namespace)
        self._generated = {name: namespace[name] for name in self._work_rows}
        self._assembly = self._assembly_matrix()

    def __reduce__(self):
        return RateFunctions, (self.model,)

    @property
    def nnz(self) -> int:
        """Number of non-zero partial derivatives of the rates."""
        return len(self.jacobian_flow)

    def rates(self, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
              out: np.ndarray | None = None) -> np.ndarray:
        """Flow rates (n_flow_elements, M), persons per day, written into ``out``."""
        if out is None:
            out = np.empty((self.model.n_flow_elements, y.shape[1]))
        return self._call("rates", t, y, p, s, out)

    def rate_jacobian(self, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
                      out: np.ndarray | None = None) -> np.ndarray:
        """The non-zero partials d rate / d state (nnz, M), ordered as ``jacobian_flow``
        and ``jacobian_state``."""
        if out is None:
            out = np.empty((self.nnz, y.shape[1]))
        return self._call("rate_jacobian", t, y, p, s, out)

    def right_hand_side(self, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
                        out: np.ndarray | None = None,
                        rates: np.ndarray | None = None) -> np.ndarray:
        """dy/dt = stoichiometry @ rates, (n_states, M); ``rates`` receives the rates."""
        rates = self.rates(t, y, p, s, rates)
        if out is None:
            out = np.empty(y.shape)
        return np.matmul(self.model.stoichiometry, rates, out=out)

    def state_jacobian(self, partials: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Dense Jacobian of the right-hand side, (M, n_states, n_states), from the
        partials of :meth:`rate_jacobian`: ``stoichiometry @ d rates / d y`` per member,
        laid out for a batched ``numpy.linalg.solve``."""
        n, members = self.model.n_states, partials.shape[1]
        if out is None:
            out = np.empty((members, n, n))
        block = max(1, _ASSEMBLY_BLOCK_BYTES // (8 * n * n))
        for start in range(0, members, block):
            stop = min(start + block, members)
            dense = self._assembly @ partials[:, start:stop]
            out[start:stop] = dense.T.reshape(stop - start, n, n)
        return out

    def _call(self, name: str, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
              out: np.ndarray) -> np.ndarray:
        work = np.empty((self._work_rows[name], y.shape[1]))
        with np.errstate(all="ignore"):
            self._generated[name](float(t), y, p, s, out, work)
        return out

    def _assembly_matrix(self) -> scipy.sparse.csr_array:
        """Sparse (n_states**2, nnz) map from the partials to the flattened Jacobian:
        entry (i * n + j, e) is stoichiometry[i, flow e] for j the state of partial e."""
        n = self.model.n_states
        stoichiometry = self.model.stoichiometry
        rows, columns, values = [], [], []
        for e, (k, j) in enumerate(zip(self.jacobian_flow, self.jacobian_state)):
            for i in np.flatnonzero(stoichiometry[:, k]):
                rows.append(i * n + j)
                columns.append(e)
                values.append(stoichiometry[i, k])
        return scipy.sparse.csr_array((values, (rows, columns)), shape=(n * n, self.nnz))


_ROW_ARRAY = {StateRef: "y", ParamRef: "p", ScheduleRef: "s"}
"""The argument of the generated functions that holds each kind of input row."""


class _Program:
    """Source of one generated function ``name(t, y, p, s, out, w)`` that writes the value
    of ``roots[k]`` into ``out[k]`` using rows of the work array ``w`` for intermediates.

    Attributes
    ----------
    source : the function's text.
    n_buffers : rows of ``w`` it needs.
    """

    def __init__(self, name: str, roots: Sequence[ScalarNode]):
        self._expression: dict[ScalarNode, str] = {}
        self._array: dict[ScalarNode, bool] = {}
        self._buffer_of: dict[ScalarNode, int] = {}
        self._free: list[int] = []
        self.n_buffers = 0
        order = list(walk(*roots))
        self._remaining: dict[ScalarNode, int] = {}
        for node in order:
            if isinstance(node, Apply):
                for arg in node.args:
                    self._remaining[arg] = self._remaining.get(arg, 0) + 1
        destination: dict[ScalarNode, str] = {}
        for k, root in enumerate(roots):
            if isinstance(root, Apply) and root not in destination:
                destination[root] = f"out[{k}]"
        body: list[str] = []
        for node in order:
            if isinstance(node, Apply):
                body.append(self._instruction(node, destination.get(node), f"v{len(body)}"))
            else:
                self._leaf(node)
        for k, root in enumerate(roots):
            if self._expression[root] != f"out[{k}]":
                body.append(f"out[{k}] = {self._expression[root]}")
        lines = [f"def {name}(t, y, p, s, out, w):"]
        if self.n_buffers:
            lines.append("    " + ", ".join(f"w{i}" for i in range(self.n_buffers)) + ", = w")
        lines.extend(f"    {_ROW_ARRAY[type(node)]}{node.index} = "
                     f"{_ROW_ARRAY[type(node)]}[{node.index}]"
                     for node in order if type(node) in _ROW_ARRAY)
        lines.extend("    " + line for line in body)
        lines.append("    return out")
        self.source = "\n".join(lines) + "\n"

    def _instruction(self, node: Apply, destination: str | None, scalar_name: str) -> str:
        """The line computing ``node``: into ``destination`` (a row of ``out``) or a work
        row when it varies by member, else into the local ``scalar_name``."""
        args = [self._expression[a] for a in node.args]
        for arg in node.args:
            self._remaining[arg] -= 1
            if self._remaining[arg] == 0 and arg in self._buffer_of:
                self._free.append(self._buffer_of.pop(arg))
        self._array[node] = any(self._array[a] for a in node.args)
        if not self._array[node]:
            self._expression[node] = scalar_name
            return f"{scalar_name} = {_call(node.op, args)}"
        if destination is None:
            self._buffer_of[node] = self._take_buffer()
            destination = f"w{self._buffer_of[node]}"
        self._expression[node] = destination
        if node.op == "select_le":
            return f"{destination}[...] = {_call(node.op, args)}"
        return _call(node.op, args + [f"out={destination}"])

    def _leaf(self, node: ScalarNode) -> None:
        if isinstance(node, Const):
            self._expression[node], self._array[node] = _literal(node.value), False
        elif isinstance(node, TimeRef):
            self._expression[node], self._array[node] = "t", False
        else:
            self._expression[node] = f"{_ROW_ARRAY[type(node)]}{node.index}"
            self._array[node] = True

    def _take_buffer(self) -> int:
        """The lowest free work row, or a new one."""
        if self._free:
            self._free.sort()
            return self._free.pop(0)
        self.n_buffers += 1
        return self.n_buffers - 1


def _call(op: str, args: list[str]) -> str:
    function = "select_le" if op == "select_le" else _NUMPY_NAMES[op]
    return f"{function}({', '.join(args)})"


def _literal(value: float) -> str:
    """Source text of a float64 constant (``np.inf`` and ``np.nan`` where needed)."""
    if math.isnan(value):
        return "np.nan"
    if math.isinf(value):
        return "np.inf" if value > 0 else "(-np.inf)"
    text = repr(float(value))
    return f"({text})" if text.startswith("-") else text
