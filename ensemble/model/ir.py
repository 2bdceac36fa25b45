"""Scalar intermediate form of a compiled model's rates.

:mod:`ensemble.model.compile` lowers every vector-valued expression of the scenario to one
scalar tree per group element, with parameters, matrices and ``N`` resolved.  Nodes are
frozen (hence hashable) dataclasses, so equal subtrees compare equal and code generators
can share common subexpressions through a dict.

A tree reads, for one member at one stage:

- :class:`Const` a number;
- :class:`StateRef` row ``index`` of the state array (compartment-major, group-minor:
  ``index = compartment * n_groups + group``);
- :class:`ParamRef` row ``index`` of the per-member constant parameter array
  (``CompiledModel.parameter_slots``);
- :class:`ScheduleRef` row ``index`` of the per-member schedule values in force at this
  stage (``CompiledModel.schedule_slots``);
- :class:`TimeRef` the stage time t (days since start);
- :class:`Apply` an operation of :data:`OPERATIONS` on its arguments.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Union

OPERATIONS: dict[str, int] = {
    "add": 2, "sub": 2, "mul": 2, "div": 2, "pow": 2, "neg": 1,
    "exp": 1, "log": 1, "sqrt": 1, "abs": 1, "sin": 1, "cos": 1,
    "min": 2, "max": 2,
}
"""Scalar operations and their number of arguments."""


@dataclass(frozen=True)
class Const:
    value: float


@dataclass(frozen=True)
class StateRef:
    index: int


@dataclass(frozen=True)
class ParamRef:
    index: int


@dataclass(frozen=True)
class ScheduleRef:
    index: int


@dataclass(frozen=True)
class TimeRef:
    pass


@dataclass(frozen=True)
class Apply:
    op: str
    args: tuple["ScalarNode", ...]


ScalarNode = Union[Const, StateRef, ParamRef, ScheduleRef, TimeRef, Apply]
