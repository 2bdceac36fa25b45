"""The states and flow elements of a lowered model, and how they add up to the
compartments and flows a result reports.

States.  Each compartment is one state per group, or, with ``stages = { X = k }``, k
states per group: the stages ``X:1 .. X:k`` of a chain (the linear chain trick; Hurtado &
Kirosingh 2019, "Generalizations of the 'Linear Chain Trick': incorporating more flexible
dwell time distributions into mean field ODE models", J. Math. Biol. 79:1831-1883).  State
rows are stage-major and group-minor: ``slot * n_groups + g``, the slots being the
compartments in order with each compartment's stages in order, so a model without stages
has the rows ``c * n_groups + g`` it always had.

Flow elements.  A flow element moves persons from one state (or from outside) to one
state (or outside) at a scalar rate.  A flow of the scenario becomes

- with a vector rate, one element per group (group g to group g);
- with a matrix rate, one element per non-zero entry (g, h), from group g to group h (an
  entry from a group to itself of the same compartment moves nobody and is left out);
- with ``group``, one element in that group;

and a flow out of a compartment with k > 1 stages leaves from its last stage, with the
compartment's name in its rate standing for k times that stage's count.  For a rate
``X * h`` (the loader requires rates proportional to X there) the stage then empties at
the per-capita rate k h, and the chain's transfers ``X:i -> X:i+1`` run at k times the
stage's count times the sum of the per-capita rates of every flow out of X in that
group: the time spent in X is Erlang(k) with mean 1 / h, and persons leave by each flow
in proportion to its rate, as in the model without stages.  A flow into X enters its
first stage; a flow between groups of X itself moves each stage to the same stage of the
other group (the time already spent is kept), at the rate with X standing for the
stage's count.

Reported rows.  A result reports each compartment as the sum of its stages, and each flow
per group as the sum of its elements from that group (into that group for a flow from
outside); with ``[output] show_stages`` it also reports every stage as a compartment of
its own (``X:1``, ...) and every transfer of a chain as a flow (``X:1_to_X:2``, ...),
after the model's own.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from ensemble.model.ir import Const, ScalarNode, StateRef, apply
from ensemble.model.lowering import Matrix, Value, Vector, fold_sum
from ensemble.scenario.schema import Flow, Model


@dataclass(frozen=True)
class StateLayout:
    """Where each stage of each compartment is in every group.

    Attributes
    ----------
    compartments, groups : the model's labels (``groups`` None without strata).
    stages : each compartment's number of stages (1 without stages).
    n_groups : 1 without strata.
    """

    compartments: tuple[str, ...]
    groups: tuple[str, ...] | None
    stages: tuple[int, ...]
    n_groups: int

    @classmethod
    def of(cls, model: Model) -> StateLayout:
        return cls(tuple(model.compartments), tuple(model.groups) if model.groups else None,
                   tuple(model.stages.get(c, 1) for c in model.compartments),
                   model.n_groups)

    def stage_count(self, compartment: str) -> int:
        return self.stages[self.compartments.index(compartment)]

    def state(self, compartment: str, stage: int, group: int) -> int:
        """Row of stage ``stage`` (from 0) of ``compartment`` in group ``group``."""
        c = self.compartments.index(compartment)
        return (sum(self.stages[:c]) + stage) * self.n_groups + group

    def states_of(self, compartment: str, group: int) -> tuple[int, ...]:
        """The rows of every stage of ``compartment`` in ``group``, in stage order."""
        return tuple(self.state(compartment, i, group)
                     for i in range(self.stage_count(compartment)))

    @property
    def n_states(self) -> int:
        return sum(self.stages) * self.n_groups

    def slot_labels(self) -> list[str]:
        """``X`` for a compartment without stages, ``X:1 .. X:k`` for one with."""
        return [c if k == 1 else f"{c}:{i + 1}" for c, k in zip(self.compartments, self.stages)
                for i in range(k)]

    def state_labels(self) -> tuple[str, ...]:
        """One label per state row: the slot, with ``[group]`` when there are groups."""
        return tuple(grouped_labels(self.slot_labels(), self.groups))

    def state_compartments(self) -> tuple[str, ...]:
        """The compartment of each state row."""
        return tuple(c for c, k in zip(self.compartments, self.stages)
                     for _ in range(k * self.n_groups))

    def staged(self) -> list[str]:
        """The compartments with more than one stage, in order."""
        return [c for c, k in zip(self.compartments, self.stages) if k > 1]

    def stage_value(self, compartment: str, stage: int, factor: int) -> Value:
        """``factor`` times the count of one stage of ``compartment``: a vector over
        groups, or a tree without groups."""
        items = tuple(_times(factor, StateRef(self.state(compartment, stage, g)))
                      for g in range(self.n_groups))
        return Vector(items) if self.groups else items[0]

    def total_value(self, compartment: str) -> Value:
        """The count of ``compartment``, its stages added in order."""
        items = tuple(fold_sum([StateRef(s) for s in self.states_of(compartment, g)])
                      for g in range(self.n_groups))
        return Vector(items) if self.groups else items[0]


def grouped_labels(names: list[str], groups: tuple[str, ...] | None) -> list[str]:
    """``name`` or ``name[group]`` for each element, name-major."""
    if not groups:
        return list(names)
    return [f"{name}[{group}]" for name in names for group in groups]


def _times(factor: int, node: ScalarNode) -> ScalarNode:
    return node if factor == 1 else apply("mul", Const(float(factor)), node)


@dataclass(frozen=True)
class FlowElement:
    """Persons per day moved from state ``source`` to state ``target`` (None: outside)
    at rate ``rate``; ``row`` is the reported flow row it adds to (None: not reported)."""

    source: int | None
    target: int | None
    rate: ScalarNode
    row: int | None


RateOf = Callable[[Flow, "Value | None"], Value]
"""The lowered rate of a flow, with the flow's source compartment standing for the given
value (None: for its own count)."""


@dataclass(frozen=True)
class ModelElements:
    """The flow elements of a model and the rows a result reports.

    Attributes
    ----------
    elements : every flow element: the flows of the scenario in order (each flow's
        elements by group), then the transfers of the chains of stages.
    compartments, flows : the reported labels.
    state_rows : per reported state row (``c * n_groups + g``), the state rows it adds.
    flow_rows : per reported flow row (``f * n_groups + g``), the elements it adds.
    """

    elements: tuple[FlowElement, ...]
    compartments: tuple[str, ...]
    flows: tuple[str, ...]
    state_rows: tuple[tuple[int, ...], ...]
    flow_rows: tuple[tuple[int, ...], ...]


def model_elements(model: Model, layout: StateLayout, rate_of: RateOf,
                   show_stages: bool) -> ModelElements:
    """The flow elements of ``model`` (rates lowered by ``rate_of``) and the rows of its
    result, with every stage and transfer reported too when ``show_stages``."""
    n_groups = layout.n_groups
    elements: list[FlowElement] = []
    for f, flow in enumerate(model.flows):
        elements.extend(_flow_elements(flow, f * n_groups, layout, rate_of))
    flow_labels = [flow.name for flow in model.flows]
    for name in layout.staged():
        exits = [flow for flow in model.flows
                 if flow.source == name and flow.target != name]
        for stage in range(layout.stage_count(name) - 1):
            row = len(flow_labels) * n_groups if show_stages else None
            if show_stages:
                flow_labels.append(f"{name}:{stage + 1}_to_{name}:{stage + 2}")
            elements.extend(_transfers(name, stage, exits, row, layout, rate_of))
    compartment_labels = list(layout.compartments)
    state_rows = [layout.states_of(c, g) for c in layout.compartments for g in range(n_groups)]
    if show_stages:
        for name in layout.staged():
            for stage in range(layout.stage_count(name)):
                compartment_labels.append(f"{name}:{stage + 1}")
                state_rows.extend((layout.state(name, stage, g),) for g in range(n_groups))
    flow_rows: list[list[int]] = [[] for _ in range(len(flow_labels) * n_groups)]
    for index, element in enumerate(elements):
        if element.row is not None:
            flow_rows[element.row].append(index)
    return ModelElements(tuple(elements), tuple(compartment_labels), tuple(flow_labels),
                         tuple(state_rows), tuple(tuple(rows) for rows in flow_rows))


def _flow_elements(flow: Flow, first_row: int, layout: StateLayout, rate_of: RateOf
                   ) -> list[FlowElement]:
    """The elements of one flow of the scenario, whose reported rows start at
    ``first_row``: from the last stage of a staged source (the source standing for k
    times that stage), or from every stage to the same stage for a move between groups
    of one compartment (the source standing for the stage)."""
    source, target = flow.source, flow.target
    stages = layout.stage_count(source) if source else 1
    moves_within = target == source
    elements = []
    for stage in (range(stages) if moves_within else [stages - 1]):
        bound = None if stages == 1 else layout.stage_value(
            source, stage, 1 if moves_within else stages)  # type: ignore[arg-type]
        for g, h, tree in _entries(rate_of(flow, bound), flow, layout):
            elements.append(FlowElement(
                None if source is None else layout.state(source, stage, g),
                None if target is None else layout.state(target, stage if moves_within
                                                          else 0, h),
                tree, first_row + (h if source is None else g)))
    return elements


def _transfers(name: str, stage: int, exits: list[Flow], row: int | None,
               layout: StateLayout, rate_of: RateOf) -> list[FlowElement]:
    """The moves from stage ``stage`` of ``name`` to the next, per group: the rates of
    the flows out of ``name`` with ``name`` standing for k times that stage's count."""
    stages = layout.stage_count(name)
    hazards: list[list[ScalarNode]] = [[] for _ in range(layout.n_groups)]
    for flow in exits:
        for g, _, tree in _entries(rate_of(flow, layout.stage_value(name, stage, stages)),
                                   flow, layout):
            hazards[g].append(tree)
    return [FlowElement(layout.state(name, stage, g), layout.state(name, stage + 1, g),
                        fold_sum(terms), None if row is None else row + g)
            for g, terms in enumerate(hazards)]


def _entries(value: Value, flow: Flow, layout: StateLayout
             ) -> list[tuple[int, int, ScalarNode]]:
    """(from group, to group, tree) of each element of a flow's lowered rate."""
    if isinstance(value, Matrix):
        return [(g, h, tree) for g, row in enumerate(value.rows)
                for h, tree in enumerate(row)
                if tree is not None and not (g == h and flow.source == flow.target)]
    if isinstance(value, Vector):
        return [(g, g, tree) for g, tree in enumerate(value.items)]
    group = layout.groups.index(flow.group) if flow.group and layout.groups else 0
    return [(group, group, value)]
