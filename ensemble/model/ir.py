"""Scalar intermediate form of a lowered model's rates and values constant in time.

:mod:`ensemble.model.lowering` lowers every vector-valued expression of the scenario to
one scalar tree per group element, with parameters, matrices and ``N`` resolved.  Nodes are
frozen (hence hashable) dataclasses, so equal subtrees compare equal and code generators
can share common subexpressions through a dict.

A tree reads, for one member at one stage:

- :class:`Const` a number;
- :class:`StateRef` row ``index`` of the state array (compartment-major, group-minor:
  ``index = compartment * n_groups + group``);
- :class:`ParamRef` row ``index`` of the per-member constant parameter array
  (``LoweredModel.parameter_slots``; in the trees of the values constant in time, the
  input array of :class:`~ensemble.model.constants.ConstantTrees`);
- :class:`ScheduleRef` row ``index`` of the per-member schedule values in force at this
  stage (``LoweredModel.schedule_slots``);
- :class:`TimeRef` the stage time t (days since start);
- :class:`Apply` an operation of :data:`OPERATIONS` on its arguments.

Every backend (the numpy reference evaluator, generated kernels) must give each operation
exactly the float64 meaning listed in :data:`OPERATION_MEANINGS`, which is IEEE 754
arithmetic as numpy computes it: no operation raises, invalid results are NaN or inf.

Build trees with :func:`apply` rather than :class:`Apply` directly: it folds constants
(numpy float64, warnings silenced, so ``9 ** 9 ** 9`` is ``inf`` rather than an
``OverflowError`` or a hang) and applies only identities that are exact for every float
(``x + 0``, ``x * 1``, ``x / 1``, ``x ** 1``, ``--x``).  It never rewrites ``x * 0`` to
``0``, which would be wrong for infinite or NaN ``x``.
"""

from __future__ import annotations

import struct
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Union

import numpy as np

OPERATIONS: dict[str, int] = {
    "add": 2, "sub": 2, "mul": 2, "div": 2, "pow": 2, "neg": 1,
    "exp": 1, "log": 1, "sqrt": 1, "abs": 1, "sin": 1, "cos": 1,
    "min": 2, "max": 2, "sign": 1, "select_le": 4,
}
"""Scalar operations and their number of arguments."""

OPERATION_MEANINGS: dict[str, str] = {
    "add": "a + b",
    "sub": "a - b",
    "mul": "a * b",
    "div": "a / b (x / 0 is +-inf, 0 / 0 is NaN)",
    "pow": "a ** b as numpy.power on float64 (negative a with non-integer b is NaN, "
           "0 ** negative is inf)",
    "neg": "-a",
    "exp": "e ** a",
    "log": "natural logarithm (log 0 is -inf, log of a negative number is NaN)",
    "sqrt": "square root (NaN for a negative number)",
    "abs": "|a|",
    "sin": "sine of a (radians)",
    "cos": "cosine of a (radians)",
    "min": "numpy.minimum: the smaller of a and b, NaN if either is NaN",
    "max": "numpy.maximum: the larger of a and b, NaN if either is NaN",
    "sign": "numpy.sign: -1 for a < 0, +0.0 for a == 0 (either sign), +1 for a > 0, NaN "
            "for NaN; used as the derivative of abs (so d|a|/da is taken as 0 at a == 0)",
    "select_le": "select_le(a, b, x, y) is x where a <= b, else y (also y when a or b is "
                 "NaN); used for the derivatives of min and max, which follow the first "
                 "argument on a tie",
}
"""The exact numeric meaning of each operation, for implementers of a backend."""

NUMPY_FUNCTIONS: dict[str, Callable[..., np.ndarray]] = {
    "add": np.add, "sub": np.subtract, "mul": np.multiply, "div": np.divide,
    "pow": np.power, "neg": np.negative, "exp": np.exp, "log": np.log, "sqrt": np.sqrt,
    "abs": np.absolute, "sin": np.sin, "cos": np.cos, "min": np.minimum,
    "max": np.maximum, "sign": np.sign,
}
"""numpy ufunc of every operation but ``select_le`` (see :func:`select_le`)."""


def select_le(a, b, x, y):
    """The numpy meaning of ``select_le``: ``x`` where ``a <= b``, else ``y``."""
    return np.where(np.less_equal(a, b), x, y)


@dataclass(frozen=True)
class Const:
    """A float64 number.

    Constants are equal when their bits are: 0.0 and -0.0 stay apart (1 / -0.0 is -inf),
    and a NaN equals itself, so sharing equal subtrees never changes a result.
    """

    value: float

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Const):
            return NotImplemented
        return _bits(self.value) == _bits(other.value)

    def __hash__(self) -> int:
        return hash(_bits(self.value))


def _bits(value: float) -> bytes:
    return struct.pack("<d", value)


@dataclass(frozen=True)
class StateRef:
    """Row ``index`` of the state array."""

    index: int


@dataclass(frozen=True)
class ParamRef:
    """Row ``index`` of the per-member constant parameter array."""

    index: int


@dataclass(frozen=True)
class ScheduleRef:
    """Row ``index`` of the per-member schedule values in force at the stage time."""

    index: int


@dataclass(frozen=True)
class TimeRef:
    """The stage time t, days since start."""


@dataclass(frozen=True)
class Apply:
    """Operation ``op`` of :data:`OPERATIONS` on ``args``.

    The hash is computed once and kept (trees are hashed often and can be deep); it is
    left out of the pickled state because string hashes differ between processes.
    """

    op: str
    args: tuple["ScalarNode", ...]

    def __hash__(self) -> int:
        cached = self.__dict__.get("_hash")
        if cached is None:
            cached = hash((self.op, self.args))
            object.__setattr__(self, "_hash", cached)
        return cached

    def __eq__(self, other: object) -> bool:
        if self is other:
            return True
        if not isinstance(other, Apply):
            return NotImplemented
        return hash(self) == hash(other) and self.op == other.op and self.args == other.args

    def __getstate__(self) -> dict[str, object]:
        return {"op": self.op, "args": self.args}


ScalarNode = Union[Const, StateRef, ParamRef, ScheduleRef, TimeRef, Apply]

ZERO = Const(0.0)
ONE = Const(1.0)


def evaluate_constant(op: str, values: tuple[float, ...]) -> float:
    """``op`` applied to float64 ``values`` exactly as every backend computes it."""
    with np.errstate(all="ignore"):
        arguments = tuple(np.float64(v) for v in values)
        if op == "select_le":
            return float(select_le(*arguments))
        return float(NUMPY_FUNCTIONS[op](*arguments))


def apply(op: str, *args: ScalarNode) -> ScalarNode:
    """The tree of ``op(*args)``, constant-folded and simplified by exact identities only.

    Raises
    ------
    ValueError
        For an unknown operation or a wrong number of arguments (a bug, not bad input).
    """
    if OPERATIONS.get(op) != len(args):
        raise ValueError(f"operation {op!r} with {len(args)} argument(s)")
    if all(isinstance(a, Const) for a in args):
        return Const(evaluate_constant(op, tuple(a.value for a in args)))
    if op == "add":
        if args[1] == ZERO:
            return args[0]
        if args[0] == ZERO:
            return args[1]
    elif op == "sub":
        if args[1] == ZERO:
            return args[0]
    elif op == "mul":
        if args[1] == ONE:
            return args[0]
        if args[0] == ONE:
            return args[1]
        if args[0] == Const(-1.0):
            return apply("neg", args[1])
    elif op in ("div", "pow"):
        if args[1] == ONE:
            return args[0]
    elif op == "neg":
        if isinstance(args[0], Apply) and args[0].op == "neg":
            return args[0].args[0]
    return Apply(op, args)


def walk(*roots: ScalarNode) -> Iterator[ScalarNode]:
    """Every distinct node of the trees of ``roots``, each once, children before parents,
    roots in the order given."""
    seen: set[ScalarNode] = set()
    for root in roots:
        stack: list[tuple[ScalarNode, bool]] = [(root, False)]
        while stack:
            current, expanded = stack.pop()
            if current in seen:
                continue
            if expanded or not isinstance(current, Apply):
                seen.add(current)
                yield current
                continue
            stack.append((current, True))
            stack.extend((arg, False) for arg in reversed(current.args))
