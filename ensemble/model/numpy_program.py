"""The numpy evaluator of scalar IR trees over a chunk of members.

:class:`NumpyProgram` turns trees of :mod:`ensemble.model.ir` into one Python function
over rows of member arrays (one column per member): the flow rates and their partial
derivatives (:mod:`ensemble.model.numpy_rates`) and the values constant in time
(:mod:`ensemble.model.constants`) are all evaluated by it, each operation as
:data:`ensemble.model.ir.NUMPY_FUNCTIONS` gives it.  The function is generated as source
text from the validated IR, using only our own identifiers and ``repr`` of floats, and
compiled once; no scenario text is ever evaluated.  Each distinct subtree is computed once
(common subexpressions are shared through a dict keyed by node) into a row of one work
array whose rows are reused as soon as a value is dead, so a call allocates one array
however large the trees.

Arithmetic runs under ``numpy.errstate(all="ignore")``: a member whose values become
invalid gets NaN or inf silently, and the caller flags it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from ensemble.model.ir import (NUMPY_FUNCTIONS, Apply, Const, ParamRef, ScalarNode, ScheduleRef,
                               StateRef, TimeRef, select_le, walk)

_NUMPY_NAMES = {op: f"np.{function.__name__}" for op, function in NUMPY_FUNCTIONS.items()}
"""numpy spelling of each operation but ``select_le`` (:func:`ensemble.model.ir.select_le`)."""

_ROW_ARRAY = {StateRef: "y", ParamRef: "p", ScheduleRef: "s"}
"""The argument of the generated functions that holds each kind of input row."""


class NumpyProgram:
    """The values of ``roots`` for a chunk of members: a generated function
    ``name(t, y, p, s, out, w)`` that writes the value of ``roots[k]`` into ``out[k]``,
    using rows of the work array ``w`` for intermediates.

    Parameters
    ----------
    name : the generated function's name (for reading its source).
    roots : the trees to evaluate.

    Attributes
    ----------
    source : the function's text.
    n_buffers : rows of ``w`` it needs.
    """

    def __init__(self, name: str, roots: Sequence[ScalarNode]):
        self.name = name
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
        namespace: dict[str, object] = {"np": np, "select_le": select_le}
        exec(compile(self.source, f"<generated {name}>", "exec"), namespace)
        self._function = namespace[name]

    def __call__(self, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
                 out: np.ndarray) -> np.ndarray:
        """Write the values of the roots at time ``t`` into ``out`` (n_roots, M) for
        states ``y`` (n_states, M), per-member rows ``p`` and schedule values ``s``."""
        work = np.empty((self.n_buffers, out.shape[1]))
        with np.errstate(all="ignore"):
            self._function(float(t), y, p, s, out, work)
        return out

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
