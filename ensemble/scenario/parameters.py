"""``[parameters]`` and ``[[variants]]`` of a scenario file: constants, distributions
(:data:`ensemble.distributions.FAMILIES`), derived parameters and schedules, checked in
dependency order, and the variants' overrides.

A parameter is first read as a :class:`Draft` (its expressions parsed), then completed in
dependency order once the names it uses are known (:meth:`ParameterReader.resolve`).
Derived-parameter cycles are errors naming the cycle; a parameter that depends on a
failed one is skipped, since its own error would only repeat the first.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from fractions import Fraction
from graphlib import CycleError, TopologicalSorter
from types import MappingProxyType
from typing import Any

from ensemble.distributions import FAMILIES
from ensemble.scenario.reader import (Abandoned, Reader, Text, hint_for_keys, is_number,
                                      key_path, shown, time_text)
from ensemble.scenario.schema import (Derived, Distribution, Expression, Fixed, GroupDraws,
                                      InitialValue, Parameter, ParameterForm, Schedule, Shape,
                                      Variant)
from ensemble.scenario.structure import Scope, read_matrix

Knot = tuple[Fraction, float | tuple[float, ...] | Text]
"""A schedule's (day, value) as read: a number, one number per group or an expression."""


@dataclass(frozen=True)
class Draft:
    """A parameter read from the file whose expressions still await name and shape checks.

    ``form`` is complete for numbers and distributions; for a derived parameter
    ``texts`` holds its one expression, for a schedule ``knots`` holds its (day, value)
    pairs.
    """

    name: str
    path: str
    form: ParameterForm | None
    shape: Shape | None
    texts: tuple[Text, ...] = ()
    knots: tuple[Knot, ...] = ()
    between: str = "step"
    units: str | None = None
    description: str | None = None

    @property
    def dependencies(self) -> frozenset[str]:
        return frozenset().union(*(t.names for t in self.texts))


@dataclass(frozen=True)
class Resolved:
    """A checked parameter set: the parameters in file order, those varying in time, and
    those that failed their checks (or depend on one that did)."""

    parameters: dict[str, Parameter]
    time_varying: frozenset[str]
    broken: frozenset[str]


class ParameterReader:
    """Reads parameter tables with ``reader`` against the model's names in ``scope``."""

    def __init__(self, reader: Reader, scope: Scope):
        self.reader = reader
        self.scope = scope

    def read(self, value: object) -> tuple[dict[str, Draft], Resolved]:
        """``[parameters]``: the drafts and the checked parameters.  Names whose
        definitions failed become the reader's ``unusable`` names."""
        reader = self.reader
        if not isinstance(value, dict):
            raise reader.error("parameters", value, "must be a table")
        mark = len(reader.errors)
        drafts: dict[str, Draft] = {}
        failed = []
        for name, form in value.items():
            draft = reader.attempt(self.draft, name, form, key_path("parameters", name))
            if draft is None:
                failed.append(name)
            else:
                drafts[name] = draft
        resolved = self.resolve(drafts, failed)
        reader.unusable = frozenset(failed) | resolved.broken
        if len(reader.errors) > mark and not reader.unusable:
            raise Abandoned
        return drafts, resolved

    # -- one parameter as written ---------------------------------------------------------

    def draft(self, name: str, value: object, path: str) -> Draft:
        """Read one parameter form; its expressions are checked later by :meth:`resolve`."""
        reader, scope = self.reader, self.scope
        reader.identifier(name, path)
        if name in scope.compartments:
            raise reader.error(path, name, f"{name!r} is already a compartment")
        if name in scope.matrices:
            raise reader.error(path, name, f"{name!r} is already a matrix")
        if is_number(value) or isinstance(value, list):
            return self.constant(name, value, path)
        if isinstance(value, str):
            return Draft(name, path, None, None, texts=(reader.parse(value, path),))
        if not isinstance(value, dict):
            raise reader.error(path, value, "must be a number, a list per group, an "
                               "expression, a distribution table or a schedule table")
        if "schedule" in value:
            return self.schedule(name, value, path)
        if "dist" in value:
            return self.distribution(name, value, path)
        if "value" in value:
            reader.table(value, path, ("value", "units", "description"))
            if isinstance(value["value"], str):
                return Draft(name, path, None, None,
                             texts=(reader.parse(value["value"], key_path(path, "value")),),
                             **self.annotations(value, path))
            return self.constant(name, value["value"], key_path(path, "value"),
                                 **self.annotations(value, path))
        raise reader.error(path, value, "a parameter table needs 'dist' (a distribution), "
                                        "'schedule' or 'value' (a constant)",
                           hint_for_keys(value, ("dist", "schedule", "value")))

    def constant(self, name: str, value: object, path: str, units: str | None = None,
                 description: str | None = None) -> Draft:
        """A number, or a list with one number per group (or, with distribution tables
        among its entries, a value per group drawn group by group)."""
        if isinstance(value, list) and any(isinstance(v, dict) for v in value):
            return Draft(name, path, self.group_draws(name, value, path), "vector",
                         units=units, description=description)
        if isinstance(value, list):
            return Draft(name, path, Fixed(self.scope.vector(self.reader, value, path)),
                         "vector", units=units, description=description)
        return Draft(name, path, Fixed(self.reader.number(value, path)), "scalar",
                     units=units, description=description)

    def annotations(self, table: dict[str, Any], path: str) -> dict[str, str | None]:
        reader = self.reader
        return {"units": reader.get(table, path, "units", reader.string, None),
                "description": reader.get(table, path, "description", reader.string, None)}

    def group_draws(self, name: str, value: list, path: str) -> GroupDraws:
        """A list per group whose entries are distribution tables or numbers."""
        reader, groups = self.reader, self.scope.groups
        if groups is None:
            raise reader.error(path, value, "a list per group needs model.groups")
        if len(value) != len(groups):
            raise reader.error(path, value, f"must have one entry per group ({len(groups)}), "
                                            f"not {len(value)}")
        elements: list[Distribution | float] = []
        for g, entry in enumerate(value):
            where = f"{path}[{g}]"
            if not isinstance(entry, dict):
                elements.append(reader.number(entry, where))
                continue
            if "dist" not in entry:
                raise reader.error(where, entry, "an entry of a list per group is a number "
                                   "or a distribution table with 'dist'")
            elements.append(self.family_form(name, entry, where, element=True))
        return GroupDraws(tuple(elements))

    def distribution(self, name: str, table: dict[str, Any], path: str) -> Draft:
        form = self.family_form(name, table, path, element=False)
        return Draft(name, path, form, "vector" if form.per_group else "scalar",
                     **self.annotations(table, path))

    def family_form(self, name: str, table: dict[str, Any], path: str,
                    element: bool) -> Distribution:
        """A distribution table: a parameter's own (with ``per_group``, ``units`` and
        ``description``), or one group's ``element`` of a list per group (without)."""
        reader = self.reader
        if table["dist"] == "fixed":
            example = shown(table.get("value", 0.2))
            raise reader.error(key_path(path, "dist"), "fixed", "a constant is not a "
                               "distribution: write the number itself",
                               f"{name} = {example!r}, or {name} = {{ value = {example!r}, "
                               "units = \"...\" } to give it units or a description")
        family = FAMILIES[reader.known(table["dist"], FAMILIES, key_path(path, "dist"),
                                       "distribution")]
        bounds = ("low", "high") if family.truncatable else ()
        own = () if element else ("per_group", "units", "description")
        reader.table(table, path, ("dist", *family.required, *family.optional, *bounds,
                                   *own))
        per_group = reader.get(table, path, "per_group", reader.boolean, False)
        if per_group and self.scope.groups is None:
            raise reader.error(key_path(path, "per_group"), True,
                               "per_group needs model.groups")
        arguments = {key: reader.get(table, path, key,
                                     reader.numbers if key in family.lists else reader.number)
                     for key in (*family.required, *family.optional)
                     if key in family.required or key in table}
        reader.refuse(family.problem(arguments), table, path)
        truncation = (None, None)
        if family.truncatable:
            truncation = (reader.get(table, path, "low", reader.number, None),
                          reader.get(table, path, "high", reader.number, None))
            reader.refuse(family.truncation_problem(arguments, *truncation), table, path)
        return Distribution(family.name, MappingProxyType(arguments), truncation, per_group)

    def schedule(self, name: str, table: dict[str, Any], path: str) -> Draft:
        reader = self.reader
        reader.table(table, path, ("schedule", "between", "units", "description"))
        between = reader.get(table, path, "between", lambda v, p: reader.known(
            v, ("step", "linear"), p, "interpolation"), "step")
        schedule_path = key_path(path, "schedule")
        entries = table["schedule"]
        if not isinstance(entries, list) or not entries:
            raise reader.error(schedule_path, entries,
                               "must be a non-empty list of [day, value] pairs")
        knots: list[Knot] = []
        for i, entry in enumerate(entries):
            knots.append(self.knot(entry, f"{schedule_path}[{i}]",
                                   knots[-1][0] if knots else None))
        texts = tuple(v for _, v in knots if isinstance(v, Text))
        return Draft(name, path, None, None, texts=texts, knots=tuple(knots),
                     between=between, **self.annotations(table, path))

    def knot(self, entry: object, path: str, previous: Fraction | None) -> Knot:
        """One [day, value] pair of a schedule, after the knot on day ``previous``."""
        reader, step = self.reader, self.scope.step
        if not isinstance(entry, list) or len(entry) != 2:
            raise reader.error(path, entry, "must be a [day, value] pair")
        day = reader.time(entry[0], path)
        if previous is not None and day <= previous:
            raise reader.error(path, entry, "days must strictly increase "
                               f"(previous day {time_text(previous)})")
        if step is not None and (day / step).denominator != 1:
            raise reader.error(path, entry, f"day {time_text(day)} is not on the step grid "
                               f"(a whole multiple of solver.step = {time_text(step)})")
        raw = entry[1]
        if isinstance(raw, str):
            return day, reader.parse(raw, path)
        if isinstance(raw, list):
            return day, self.scope.vector(reader, raw, path)
        return day, reader.number(raw, path)

    # -- checking expressions in dependency order -----------------------------------------

    def resolve(self, drafts: Mapping[str, Draft], failed: Iterable[str] = ()) -> Resolved:
        """Check every expression of ``drafts`` in dependency order; complete their forms."""
        graph = {name: {d for d in draft.dependencies if d in drafts}
                 for name, draft in drafts.items()}
        try:
            order = list(TopologicalSorter(graph).static_order())
        except CycleError as exc:
            cycle = exc.args[1]
            raise self.reader.error(drafts[cycle[0]].path, None, "parameters depend on each "
                                    "other in a cycle: " + " -> ".join(cycle)) from None
        broken = set(failed)
        done: dict[str, Parameter] = {}
        time_varying: set[str] = set()
        for name in order:
            draft = drafts[name]
            if draft.dependencies & broken:
                broken.add(name)
                continue
            parameter = self.reader.attempt(self.complete, draft, done, time_varying)
            if parameter is None:
                broken.add(name)
            else:
                done[name] = parameter
        in_file_order = {name: done[name] for name in drafts if name in done}
        return Resolved(in_file_order, frozenset(time_varying), frozenset(broken))

    def complete(self, draft: Draft, done: Mapping[str, Parameter],
                 time_varying: set[str]) -> Parameter:
        """The parameter of ``draft``, its expressions checked against the parameters
        ``done`` so far; records it in ``time_varying`` if it varies in time."""
        if draft.form is not None:
            return Parameter(draft.name, draft.form, draft.shape,  # type: ignore[arg-type]
                             draft.units, draft.description)
        if draft.knots:
            time_varying.add(draft.name)
            return self.complete_schedule(draft, done, time_varying)
        expression = self.reader.check(draft.texts[0], self.scope.parameter_shapes(done),
                                       self.scope.parameter_forbidden())
        if expression.shape == "matrix":
            raise self.reader.error(draft.path, expression.text, "a parameter must be a "
                                    "number or a vector over groups, not a matrix: write the "
                                    "matrix arithmetic into the rate instead")
        if expression.names & (time_varying | {"t"}):
            time_varying.add(draft.name)
            self.reader.refuse_per_step(expression, "a parameter that varies in time")
        return Parameter(draft.name, Derived(expression), expression.shape,
                         draft.units, draft.description)

    def complete_schedule(self, draft: Draft, done: Mapping[str, Parameter],
                          time_varying: set[str]) -> Parameter:
        reader = self.reader
        shapes = {k: v for k, v in self.scope.parameter_shapes(done).items() if k != "t"}
        forbidden = {**self.scope.parameter_forbidden(),
                     "t": "cannot be used in a schedule value (the schedule already sets "
                          "the time)"}
        values: list[float | tuple[float, ...] | Expression] = []
        knot_shapes = []
        for _, value in draft.knots:
            if not isinstance(value, Text):
                values.append(value)
                knot_shapes.append("vector" if isinstance(value, tuple) else "scalar")
                continue
            expression = reader.check(value, shapes, forbidden)
            moving = sorted(expression.names & time_varying)
            if moving:
                raise reader.error(value.path, value.text, "schedule values may use only "
                                   f"parameters that are constant in time, not {moving[0]!r}")
            if expression.shape == "matrix":
                raise reader.error(value.path, value.text, "a schedule value must be a "
                                   "number or a vector over groups, not a matrix")
            values.append(expression)
            knot_shapes.append(expression.shape)
        for i, kind in enumerate(knot_shapes):
            if kind != knot_shapes[0]:
                raise reader.error(f"{draft.path}.schedule[{i}]", None,
                                   f"is a {kind} while the first value is a {knot_shapes[0]}: "
                                   "every value of a schedule must have the same shape")
        form = Schedule(tuple(day for day, _ in draft.knots),
                        tuple(values), draft.between)  # type: ignore[arg-type]
        return Parameter(draft.name, form, knot_shapes[0], draft.units,  # type: ignore[arg-type]
                         draft.description)

    # -- [[variants]] ---------------------------------------------------------------------

    def variants(self, value: object, drafts: dict[str, Draft], base: Resolved,
                 initial: Mapping[str, InitialValue] | None) -> tuple[Variant, ...]:
        """``[[variants]]`` (one ``baseline`` without overrides when there is none)."""
        reader = self.reader
        if not isinstance(value, list):
            raise reader.error("variants", value, "must be [[variants]] tables")
        if not value:
            return (Variant("baseline", None, MappingProxyType({}), MappingProxyType({})),)
        mark = len(reader.errors)
        variants = []
        for i, table in enumerate(value):
            variant = reader.attempt(self.variant, table, f"variants[{i}]", drafts, base,
                                     initial)
            if variant is not None:
                variants.append(variant)
        reader.abandon_if_failed(mark)
        names = [v.name for v in variants]
        for i, name in enumerate(names):
            if name in names[:i]:
                raise reader.error(f"variants[{i}].name", name,
                                   f"duplicate variant name {name!r}")
        return tuple(variants)

    def variant(self, value: object, path: str, drafts: dict[str, Draft], base: Resolved,
                initial: Mapping[str, InitialValue] | None) -> Variant:
        reader = self.reader
        table = reader.table(value, path, ("name", "title", "parameters", "matrices"))
        name = reader.get(table, path, "name", reader.label)
        title = reader.get(table, path, "title", reader.string, None)
        parameters_path = key_path(path, "parameters")
        overrides = reader.table(table.get("parameters", {}), parameters_path, drafts,
                                 "parameter")
        merged = dict(drafts)
        for parameter, form in overrides.items():
            merged[parameter] = self.draft(parameter, form, key_path(parameters_path,
                                                                     parameter))
        mark = len(reader.errors)
        resolved = self.resolve(merged)
        reader.abandon_if_failed(mark)
        self.check_overrides(overrides, parameters_path, base, resolved, initial or {})
        matrices_path = key_path(path, "matrices")
        matrix_overrides = reader.table(table.get("matrices", {}), matrices_path,
                                        self.scope.matrices, "matrix")
        matrices = {matrix: read_matrix(reader, rows, key_path(matrices_path, matrix),
                                        self.scope.n_groups)
                    for matrix, rows in matrix_overrides.items()}
        parameters = {p: resolved.parameters[p] for p in overrides}
        return Variant(name, title, MappingProxyType(parameters), MappingProxyType(matrices))

    def check_overrides(self, overrides: Mapping[str, object], path: str, base: Resolved,
                        resolved: Resolved, initial: Mapping[str, InitialValue]) -> None:
        """An override keeps the original's shape, and leaves constant in time what the
        initial values use."""
        reader = self.reader
        for name in overrides:
            old, new = base.parameters[name], resolved.parameters[name]
            if new.shape != old.shape:
                raise reader.error(key_path(path, name), overrides[name],
                                   f"is a {new.shape} but parameters.{name} is a "
                                   f"{old.shape}: an override keeps the original's shape")
        for compartment, start in initial.items():
            moving = sorted(start.names & resolved.time_varying
                            if isinstance(start, Expression) else ())
            if moving:
                raise reader.error(key_path(path, moving[0]), None, f"makes {moving[0]!r} "
                                   f"vary in time, but model.initial.{compartment} uses it")
