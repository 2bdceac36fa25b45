"""The structure of a scenario's ``[model]``: compartments, groups, population, the
compartments left out of N, matrices and flows, and the names in scope for the
expressions of the file (:class:`Scope`)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from fractions import Fraction
from typing import Any

from ensemble.scenario import expressions
from ensemble.scenario.reader import Reader, is_number, key_path
from ensemble.scenario.schema import Expression, Flow, Matrix, Parameter

MODEL_KEYS = ("compartments", "groups", "population", "initial", "exclude_from_N", "flows",
              "matrices", "stages", "infected")

MAX_STAGES = 64
"""Most stages a compartment may have (each is one more state per group)."""


@dataclass(frozen=True)
class Structure:
    """``[model]`` but its initial values and flows."""

    compartments: list[str]
    groups: tuple[str, ...] | None
    matrices: dict[str, Matrix]
    population: tuple[float, ...]
    exclude_from_N: tuple[str, ...]
    stages: dict[str, int]
    infected: tuple[str, ...] | None


@dataclass(frozen=True)
class Scope:
    """The names of the model that expressions may refer to, and their shapes."""

    compartments: list[str]
    groups: tuple[str, ...] | None
    matrices: dict[str, Matrix]
    step: Fraction | None

    @property
    def n_groups(self) -> int:
        return len(self.groups) if self.groups else 1

    @property
    def count_shape(self) -> str:
        """Shape of a compartment's count (and of N)."""
        return "vector" if self.groups is not None else "scalar"

    def vector(self, reader: Reader, value: list, path: str) -> tuple[float, ...]:
        """A list with one number per group."""
        if self.groups is None:
            raise reader.error(path, value, "a list per group needs model.groups")
        return reader.numbers(value, path, len(self.groups))

    def parameter_shapes(self, parameters: Mapping[str, Parameter]) -> dict[str, str]:
        """Names a parameter expression may use: parameters, matrices, t and pi."""
        shapes = {name: p.shape for name, p in parameters.items()}
        shapes.update({name: "matrix" for name in self.matrices})
        shapes.update(t="scalar", pi="scalar")
        return shapes

    def parameter_forbidden(self) -> dict[str, str]:
        reason = ("is a compartment count, which a parameter expression cannot use "
                  "(only parameters, matrices, t and pi)")
        forbidden = {name: reason for name in self.compartments}
        forbidden["N"] = reason.replace("is a compartment count", "is the current population")
        return forbidden

    def rate_shapes(self, parameters: Mapping[str, Parameter]) -> dict[str, str]:
        """Names a rate may use: all of :meth:`parameter_shapes`, compartments and N."""
        shapes = self.parameter_shapes(parameters)
        shapes.update({name: self.count_shape for name in self.compartments})
        shapes["N"] = self.count_shape
        return shapes


def read_structure(reader: Reader, table: dict[str, Any]) -> Structure:
    path = "model"
    compartments = reader.get(table, path, "compartments",
                              lambda v, p: _compartments(reader, v, p))
    groups = reader.get(table, path, "groups", lambda v, p: _groups(reader, v, p), None)
    matrices = reader.get(table, path, "matrices",
                          lambda v, p: _matrices(reader, v, p, groups, compartments), {})
    population = reader.get(table, path, "population",
                            lambda v, p: _population(reader, v, p, groups))
    exclude = reader.get(table, path, "exclude_from_N",
                         lambda v, p: _exclude(reader, v, p, compartments), ())
    stages = reader.get(table, path, "stages",
                        lambda v, p: _stages(reader, v, p, compartments), {})
    infected = reader.get(table, path, "infected",
                          lambda v, p: _infected(reader, v, p, compartments), None)
    return Structure(compartments, groups, matrices, population, exclude, stages, infected)


def _stages(reader: Reader, value: object, path: str, compartments: list[str]
            ) -> dict[str, int]:
    """``stages = { E = 3 }``: compartments and their numbers of stages (>= 1)."""
    table = reader.table(value, path, compartments, "compartment")
    return {name: reader.integer(count, key_path(path, name), minimum=1, maximum=MAX_STAGES)
            for name, count in table.items()}


def _infected(reader: Reader, value: object, path: str, compartments: list[str]
              ) -> tuple[str, ...]:
    if not isinstance(value, list) or not value:
        raise reader.error(path, value, "must be a non-empty list of compartment names")
    names = [reader.known(v, compartments, f"{path}[{i}]", "compartment")
             for i, v in enumerate(value)]
    reader.unique(names, path, "compartment")
    return tuple(names)


def _compartments(reader: Reader, value: object, path: str) -> list[str]:
    if not isinstance(value, list) or not value:
        raise reader.error(path, value, "must be a non-empty list of compartment names")
    names = [reader.identifier(v, f"{path}[{i}]") for i, v in enumerate(value)]
    reader.unique(names, path, "compartment")
    return names


def _groups(reader: Reader, value: object, path: str) -> tuple[str, ...]:
    if not isinstance(value, list) or not value:
        raise reader.error(path, value, "must be a non-empty list of group labels")
    labels = [reader.label(v, f"{path}[{i}]") for i, v in enumerate(value)]
    reader.unique(labels, path, "group")
    return tuple(labels)


def _population(reader: Reader, value: object, path: str, groups: tuple[str, ...] | None
                ) -> tuple[float, ...]:
    if groups is None:
        if isinstance(value, list):
            raise reader.error(path, value, "a list per group needs model.groups")
        return (reader.positive(value, path),)
    if not isinstance(value, list):
        raise reader.error(path, value, f"with groups the population must be a list with "
                                        f"one number per group ({len(groups)})")
    sizes = reader.numbers(value, path, len(groups))
    for i, size in enumerate(sizes):
        if size <= 0:
            raise reader.error(f"{path}[{i}]", size, "must be positive")
    return sizes


def _exclude(reader: Reader, value: object, path: str, compartments: list[str]
             ) -> tuple[str, ...]:
    if not isinstance(value, list):
        raise reader.error(path, value, "must be a list of compartment names")
    names = [reader.known(v, compartments, f"{path}[{i}]", "compartment")
             for i, v in enumerate(value)]
    reader.unique(names, path, "compartment")
    if set(names) == set(compartments):
        raise reader.error(path, value, "leaves no compartment in N")
    return tuple(names)


def _matrices(reader: Reader, value: object, path: str, groups: tuple[str, ...] | None,
              compartments: list[str]) -> dict[str, Matrix]:
    if not isinstance(value, dict):
        raise reader.error(path, value, "must be a table of name = [[...], ...]")
    if value and groups is None:
        raise reader.error(path, value, "matrices need model.groups")
    result = {}
    for name, rows in value.items():
        key = key_path(path, name)
        reader.identifier(name, key)
        if name in compartments:
            raise reader.error(key, name, f"{name!r} is already a compartment")
        result[name] = read_matrix(reader, rows, key, len(groups))  # type: ignore[arg-type]
    return result


def read_matrix(reader: Reader, value: object, path: str, size: int) -> Matrix:
    """A size x size list of lists of numbers."""
    shape_message = (f"must be a {size} x {size} list of lists of numbers (one row and "
                     "one column per group)")
    if not isinstance(value, list) or len(value) != size:
        raise reader.error(path, value, shape_message)
    rows = []
    for i, row in enumerate(value):
        if not isinstance(row, list) or len(row) != size:
            raise reader.error(f"{path}[{i}]", row, shape_message)
        rows.append(tuple(reader.number(v, f"{path}[{i}][{j}]") for j, v in enumerate(row)))
    return tuple(rows)


def read_flows(reader: Reader, value: object, scope: Scope,
               parameters: Mapping[str, Parameter],
               stages: Mapping[str, int] | None = None) -> tuple[Flow, ...]:
    """``[[model.flows]]``, their rates checked against the compartments, N and the
    (checked) ``parameters``; a flow that leaves a compartment with ``stages`` must have
    a rate proportional to that compartment's count."""
    if not isinstance(value, list) or not value:
        raise reader.error("model.flows", value, "must list at least one flow "
                           "([[model.flows]] tables)")
    mark = len(reader.errors)
    shapes = scope.rate_shapes(parameters)
    flows = []
    for i, table in enumerate(value):
        flow = reader.attempt(_flow, reader, table, f"model.flows[{i}]", scope, shapes,
                              stages or {})
        if flow is not None:
            flows.append(flow)
    reader.abandon_if_failed(mark)
    seen: dict[str, int] = {}
    for i, flow in enumerate(flows):
        if flow.name in seen:
            raise reader.error(f"model.flows[{i}].name", flow.name,
                               f"duplicate flow name {flow.name!r} (also model.flows"
                               f"[{seen[flow.name]}]; unnamed flows are called "
                               "<from>_to_<to>, in_to_<to> or <from>_out)")
        seen[flow.name] = i
    return tuple(flows)


def _flow(reader: Reader, value: object, path: str, scope: Scope,
          shapes: Mapping[str, str], stages: Mapping[str, int]) -> Flow:
    table = reader.table(value, path, ("name", "from", "to", "rate", "group"))
    compartment = lambda v, p: reader.known(v, scope.compartments, p, "compartment")  # noqa: E731
    source = reader.get(table, path, "from", compartment, None)
    target = reader.get(table, path, "to", compartment, None)
    if source is None and target is None:
        raise reader.error(path, None, "a flow needs 'from', 'to' or both")
    group = reader.get(table, path, "group", lambda v, p: _flow_group(reader, v, p, scope),
                       None)
    default = (f"{source}_to_{target}" if source and target
               else f"in_to_{target}" if target else f"{source}_out")
    name = reader.get(table, path, "name", reader.label, default)
    raw = reader.get(table, path, "rate", lambda v, p: v)
    rate_path = key_path(path, "rate")
    if is_number(raw):
        raw = repr(reader.number(raw, rate_path))
    rate = reader.check(reader.parse(raw, rate_path), shapes)
    reader.refuse_per_step(rate, "a rate")
    _check_rate_shape(reader, rate, scope, group, source, target, rate_path)
    if source == target and rate.shape != "matrix":
        raise reader.error(key_path(path, "to"), target, "a flow cannot go from a "
                           "compartment to itself (but between groups, with a matrix rate)")
    if source in stages and not expressions.proportional_to(rate.tree, source):
        raise reader.error(rate_path, rate.text, f"{source!r} has stages, so a flow out of "
                           f"it needs a rate proportional to {source}: {source} times or "
                           f"divided by terms without {source}",
                           f"write the rate as {source} * (per-capita rate), such as "
                           f"\"{source} / mean_days\"")
    return Flow(name, source, target, rate, group)


def _flow_group(reader: Reader, value: object, path: str, scope: Scope) -> str:
    if scope.groups is None:
        raise reader.error(path, value, "a flow's group needs model.groups")
    return reader.known(value, scope.groups, path, "group")


def _check_rate_shape(reader: Reader, rate: Expression, scope: Scope, group: str | None,
                      source: str | None, target: str | None, path: str) -> None:
    """A number without groups; with groups a vector (within each group), a matrix
    (between groups, with both ends), or a number for a flow in one ``group``."""
    if scope.groups is None:
        if rate.shape != "scalar":
            raise reader.error(path, rate.text, "without groups a rate must be a number, "
                                                f"but this is a {rate.shape}")
        return
    if group is not None:
        if rate.shape != "scalar":
            raise reader.error(path, rate.text, f"a flow in group {group!r} alone has a "
                                                f"number for its rate, not a {rate.shape}")
        return
    if rate.shape == "scalar":
        raise reader.error(path, rate.text, "with groups a rate must be a vector over groups "
                           "(or a matrix between groups), but this is a number",
                           "give the flow a 'group' to make it act in one group alone")
    if rate.shape == "matrix" and (source is None or target is None):
        raise reader.error(path, rate.text, "a rate between groups (a matrix) needs both "
                                            "'from' and 'to'")
