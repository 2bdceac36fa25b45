"""``[model] initial`` of a scenario file: each compartment's initial count, as a number,
one number per group, an expression of parameters constant in time, or ``"rest"`` (what
is left of the population).  Counts given as numbers are checked against the population
here; counts that depend on drawn values are checked member by member by the design."""

from __future__ import annotations

import math

from ensemble.scenario.parameters import Resolved
from ensemble.scenario.reader import Reader, key_path, shown
from ensemble.scenario.schema import INITIAL_SUM_RTOL, Expression, InitialValue, Rest
from ensemble.scenario.structure import Scope


def read_initial(reader: Reader, value: object, scope: Scope, population: tuple[float, ...],
                 resolved: Resolved) -> dict[str, InitialValue]:
    """Every compartment's initial value, in compartment order (0 where not given)."""
    path = "model.initial"
    if not isinstance(value, dict):
        raise reader.error(path, value, "must be a table of compartment = value")
    given: dict[str, InitialValue] = {}
    for name, raw in value.items():
        key = key_path(path, name)
        reader.known(name, scope.compartments, key, "compartment")
        given[name] = _initial_value(reader, raw, key, scope, resolved)
    rests = [name for name, v in given.items() if isinstance(v, Rest)]
    if len(rests) > 1:
        raise reader.error(key_path(path, rests[1]), "rest", "only one compartment may be "
                           f"\"rest\" ({rests[0]!r} already is)")
    numbers = [v for v in given.values() if isinstance(v, (float, tuple))]
    only_numbers = len(numbers) == len(given) - len(rests)
    for g, size in enumerate(population):
        total = math.fsum(v[g] if isinstance(v, tuple) else v for v in numbers)
        where = f" in group {scope.groups[g]!r}" if scope.groups else ""
        if total > size * (1 + INITIAL_SUM_RTOL):
            raise reader.error(path, shown(value), f"the fixed initial values add up to "
                               f"{total:g}{where}, above the population {size:g}")
        if not rests and only_numbers and abs(total - size) > INITIAL_SUM_RTOL * size:
            raise reader.error(path, shown(value), f"the initial values add up to "
                               f"{total:g}{where} but the population is {size:g}",
                               "make one compartment \"rest\"")
    return {c: given.get(c, 0.0) for c in scope.compartments}


def _initial_value(reader: Reader, raw: object, path: str, scope: Scope,
                   resolved: Resolved) -> InitialValue:
    if raw == "rest":
        return Rest()
    if isinstance(raw, str):
        return _initial_expression(reader, raw, path, scope, resolved)
    if isinstance(raw, list):
        values: float | tuple[float, ...] = scope.vector(reader, raw, path)
    else:
        values = reader.number(raw, path)
        if scope.groups is not None and values != 0:
            raise reader.error(path, raw, "with groups an initial value must be a list with "
                               f"one number per group ({len(scope.groups)}), not a number")
    for i, v in enumerate(values if isinstance(values, tuple) else (values,)):
        if v < 0:
            key = f"{path}[{i}]" if isinstance(values, tuple) else path
            raise reader.error(key, v, "an initial count cannot be negative")
    return values


def _initial_expression(reader: Reader, raw: str, path: str, scope: Scope,
                        resolved: Resolved) -> Expression:
    expression = reader.check(reader.parse(raw, path),
                              scope.parameter_shapes(resolved.parameters),
                              scope.parameter_forbidden())
    if "t" in expression.names:
        raise reader.error(expression.key, expression.text, "an initial value is the state "
                           "at day 0 and may not use the time 't'")
    moving = sorted(expression.names & resolved.time_varying)
    if moving:
        raise reader.error(expression.key, expression.text, "initial values may use only "
                           f"parameters that are constant in time, not {moving[0]!r}")
    if scope.groups is not None and expression.shape != "vector":
        raise reader.error(path, raw, "with groups an initial value must be a vector "
                           "over groups, not a " + expression.shape)
    if scope.groups is None and expression.shape != "scalar":
        raise reader.error(path, raw, f"must be a number, not a {expression.shape}")
    return expression
