"""Scenario file (TOML) -> validated :class:`~ensemble.scenario.schema.Scenario`.

Every check and every default of the scenario format (SPEC section 1) lives here.  The
file is read with :mod:`tomllib` using ``parse_float=decimal.Decimal``, so that times
(``days``, ``step``, ``report_every``, schedule days) become exact
:class:`fractions.Fraction` values (0.7 is 7/10, seven steps of 0.1) while every other
number becomes a float.

Errors are :class:`~ensemble.errors.ScenarioError` naming the file, the key path
(``model.flows[2].rate``) and the value.  Independent sections and entries are checked
one by one, and all their problems are reported together as
:class:`~ensemble.errors.ScenarioErrors`; a part that depends on a broken part
(flows on the compartments, say) is not checked until that part is fixed.
"""

from __future__ import annotations

import dataclasses
import math
import re
import tomllib
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from datetime import date, datetime
from decimal import Decimal
from fractions import Fraction
from graphlib import CycleError, TopologicalSorter
from pathlib import Path
from types import MappingProxyType
from typing import Any, TypeVar

from ensemble.distributions import FAMILIES, Problem
from ensemble.methods import METHODS
from ensemble.scenario import expressions
from ensemble.errors import ScenarioError, ScenarioErrors, did_you_mean
from ensemble.scenario.expressions import ExpressionError, Node
from ensemble.scenario.schema import (
    INITIAL_SUM_RTOL, Compute, Derived, Distribution, Expression, Fixed, Flow, InitialValue,
    Matrix, Model, Newton, Output, Parameter, ParameterForm, Rest, Scenario, Schedule, Shape, Solver,
    Source, StepCheck, Variant,
)

SAMPLING_METHODS = ("random", "latin-hypercube", "sobol")

DEFAULT_QUANTILES = (0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975)

_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_LABEL = re.compile(r"[A-Za-z0-9_-]+")

_TOP_LEVEL = ("scenario", "model", "parameters", "sampling", "variants", "solver", "output",
              "compute")
_MISSING = object()

T = TypeVar("T")


# ----------------------------------------------------------------------------- entry points


def load_scenario(path: str | Path, *, members: int | None = None,
                  seed: int | None = None) -> Scenario:
    """Read, check and complete the scenario file at ``path``.

    Parameters
    ----------
    path : the scenario file (TOML).
    members, seed : command-line overrides of ``[scenario] members`` and ``seed``.

    Returns
    -------
    Scenario
        With every default resolved: one ``baseline`` variant when the file has none,
        ``output.path`` ``results/<name>.nc``, the Newton tolerance
        max(1e-3 * atol, 1e-12 * total population).

    Raises
    ------
    ScenarioError
        (or :class:`ScenarioErrors` for several problems) naming file, key path and value.
    """
    file = str(path)
    text = _read_text(file)
    try:
        data = tomllib.loads(text, parse_float=Decimal)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(file, "", None, f"TOML syntax error: {exc}") from None
    scenario = validate(data, file, text)
    overrides: dict[str, int] = {}
    if members is not None:
        overrides["members"] = _override(file, "members", members, minimum=1)
    if seed is not None:
        overrides["seed"] = _override(file, "seed", seed, minimum=0)
    return dataclasses.replace(scenario, **overrides) if overrides else scenario


def validate(data: dict[str, Any], file: str, text: str = "") -> Scenario:
    """Check and complete a scenario already read from TOML into ``data``.

    ``data`` is what :func:`tomllib.loads` gives with ``parse_float=decimal.Decimal``
    (plain floats are accepted, but times are then only as exact as the float).
    ``file`` names the source in errors; ``text`` is kept as the scenario's full text.
    """
    return _Loader(file).scenario(data, text)


def scenario_warnings(scenario: Scenario) -> list[str]:
    """What a modeller should know about a valid scenario before running it."""
    warnings = []
    members = scenario.members
    if scenario.sampling == "sobol" and members & (members - 1):
        warnings.append(f"sobol sampling with {members} members, which is not a power of "
                        f"two: the points lose their balance (use {_next_power_of_two(members)})")
    if members < 100:
        warnings.append(f"only {members} member(s): the outer quantiles "
                        f"{scenario.output.quantiles[0]:g} and {scenario.output.quantiles[-1]:g} "
                        "rest on very few members")
    if not scenario.solver.check.enabled:
        warnings.append("the step check is off: no member's integration error is estimated")
    if scenario.output.compare_to is not None and len(scenario.variants) == 1:
        warnings.append(f"output.compare_to names the only variant "
                        f"{scenario.output.compare_to!r}: every difference is zero")
    initial = scenario.model.initial.values()
    if not any(isinstance(v, Rest) for v in initial) and any(
            isinstance(v, Expression) for v in initial):
        warnings.append("model.initial has no \"rest\" and uses drawn values: a member "
                        "whose starts do not add up to the population is flagged and holds "
                        "NaN")
    for where, parameters in _parameter_sets(scenario):
        for parameter in parameters.values():
            form = parameter.form
            if isinstance(form, Schedule) and form.days[-1] > scenario.days:
                late = [time_text(d) for d in form.days if d > scenario.days]
                warnings.append(f"{where}{parameter.name}: schedule day(s) {', '.join(late)} "
                                f"fall after the horizon of {time_text(scenario.days)} days "
                                "and have no effect")
    uncertain = [p for p in scenario.parameters.values() if isinstance(p.form, Distribution)]
    if not uncertain and members > 1 and not any(v.parameters for v in scenario.variants):
        warnings.append(f"no parameter is drawn from a distribution: all {members} members "
                        "of a variant are identical")
    return warnings


def _parameter_sets(scenario: Scenario) -> list[tuple[str, Mapping[str, Parameter]]]:
    """The base parameters and each variant's overrides, with their key-path prefixes."""
    return [("parameters.", scenario.parameters)] + [
        (f"variant {v.name!r}: parameters.", v.parameters) for v in scenario.variants]


def _next_power_of_two(n: int) -> int:
    return 1 << (n - 1).bit_length()


def _override(file: str, key: str, value: object, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise ScenarioError(file, f"scenario.{key}", value,
                            f"--{key} must be a whole number >= {minimum}")
    return value


def _read_text(file: str) -> str:
    path = Path(file)
    if not path.exists():
        raise ScenarioError(file, "", None, "no such file")
    if path.is_dir():
        raise ScenarioError(file, "", None, "is a directory, not a scenario file")
    try:
        return path.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise ScenarioError(file, "", None, f"not UTF-8 text (byte {exc.start})") from None
    except OSError as exc:
        raise ScenarioError(file, "", None, f"cannot be read: {exc.strerror}") from None


# ------------------------------------------------------------------------- small readers


def _shown(value: object) -> object:
    """``value`` as the modeller wrote it, for error messages (decimals as floats)."""
    if isinstance(value, Decimal):
        return float(value) if value.is_finite() else str(value)
    if isinstance(value, Fraction):
        return int(value) if value.denominator == 1 else float(value)
    if isinstance(value, date):
        return value.isoformat()
    if isinstance(value, list):
        return [_shown(v) for v in value]
    if isinstance(value, dict):
        return {k: _shown(v) for k, v in value.items()}
    return value


def _is_number(value: object) -> bool:
    return isinstance(value, (int, float, Decimal)) and not isinstance(value, bool)


def _is_finite(value: int | float | Decimal) -> bool:
    return value.is_finite() if isinstance(value, Decimal) else math.isfinite(value)


def _key(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


@dataclass(frozen=True)
class _Text:
    """An expression parsed but not yet checked against the names in scope."""

    text: str
    tree: Node
    path: str

    @property
    def names(self) -> frozenset[str]:
        return expressions.names_in(self.tree)


@dataclass(frozen=True)
class _Draft:
    """A parameter read from the file whose expressions still await name and shape checks.

    ``form`` is complete for numbers and distributions; for a derived parameter
    ``texts`` holds its one expression, for a schedule ``knots`` holds (day, value) pairs
    whose values are numbers, per-group tuples or :class:`_Text`.
    """

    name: str
    path: str
    form: ParameterForm | None
    shape: Shape | None
    texts: tuple[_Text, ...] = ()
    knots: tuple[tuple[Fraction, float | tuple[float, ...] | _Text], ...] = ()
    between: str = "step"
    units: str | None = None
    description: str | None = None

    @property
    def dependencies(self) -> frozenset[str]:
        return frozenset().union(*(t.names for t in self.texts))


class _Abandoned(Exception):
    """A part of the file is given up; its errors are already recorded."""


class _Loader:
    """Reads one scenario file's tables; collects independent errors in ``errors``."""

    def __init__(self, file: str):
        self.file = file
        self.errors: list[ScenarioError] = []
        self.unusable: frozenset[str] = frozenset()
        """Parameters whose definitions failed: expressions using them are not checked."""

    # -- errors ---------------------------------------------------------------------------

    def error(self, key: str, value: object, message: str, hint: str | None = None
              ) -> ScenarioError:
        return ScenarioError(self.file, key, _shown(value), message, hint)

    def attempt(self, read: Callable[..., T], *args: Any) -> T | None:
        """Run ``read``; record its error and return None if it fails."""
        try:
            return read(*args)
        except ScenarioErrors as exc:
            self.errors.extend(exc.errors)
        except ScenarioError as exc:
            self.errors.append(exc)
        except _Abandoned:
            pass
        return None

    def abandon_if_failed(self, mark: int) -> None:
        """Give up the current part if errors were recorded since ``mark``."""
        if len(self.errors) > mark:
            raise _Abandoned

    def raise_collected(self) -> None:
        """Raise the recorded errors, if any."""
        if len(self.errors) == 1:
            raise self.errors[0]
        if self.errors:
            raise ScenarioErrors(self.errors)

    # -- typed access to tables -----------------------------------------------------------

    def table(self, value: object, path: str, allowed: Iterable[str],
              what: str = "key") -> dict[str, Any]:
        """``value`` as a table whose keys are all in ``allowed`` (``what`` they are)."""
        if not isinstance(value, dict):
            raise self.error(path, value, "must be a table")
        allowed = tuple(allowed)
        for key in value:
            if key not in allowed:
                raise self.error(_key(path, key), value[key], f"unknown {what} {key!r}",
                                 did_you_mean(key, allowed)
                                 or "expected one of: " + ", ".join(allowed))
        return value

    def get(self, table: Mapping[str, Any], path: str, key: str,
            read: Callable[[object, str], T], default: object = _MISSING) -> T:
        if key not in table:
            if default is _MISSING:
                raise self.error(_key(path, key), None, f"missing required key {key!r}")
            return default  # type: ignore[return-value]
        return read(table[key], _key(path, key))

    def string(self, value: object, path: str) -> str:
        if not isinstance(value, str):
            raise self.error(path, value, "must be a string")
        return value

    def label(self, value: object, path: str) -> str:
        text = self.string(value, path)
        if not _LABEL.fullmatch(text):
            raise self.error(path, value, "must be a label of letters, digits, '-' and '_'")
        return text

    def identifier(self, value: object, path: str) -> str:
        text = self.string(value, path)
        if not _IDENTIFIER.fullmatch(text):
            raise self.error(path, value, "must be an identifier: a letter or '_' followed "
                                          "by letters, digits and '_'")
        if text.startswith("__"):
            raise self.error(path, value, "names starting with '__' are not allowed")
        if text in expressions.RESERVED:
            raise self.error(path, value, f"{text!r} is a reserved name (built-in names "
                                          "t, N, pi, 'rest', the function names and Python "
                                          "keywords cannot be used)")
        return text

    def boolean(self, value: object, path: str) -> bool:
        if not isinstance(value, bool):
            raise self.error(path, value, "must be true or false")
        return value

    def integer(self, value: object, path: str, minimum: int | None = None,
                maximum: int | None = None) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(path, value, "must be a whole number (without a decimal point)")
        if minimum is not None and value < minimum:
            raise self.error(path, value, f"must be >= {minimum}")
        if maximum is not None and value > maximum:
            raise self.error(path, value, f"must be <= {maximum}")
        return value

    def number(self, value: object, path: str) -> float:
        if not _is_number(value):
            raise self.error(path, value, "must be a number")
        if not _is_finite(value) or not math.isfinite(float(value)):  # type: ignore[arg-type]
            raise self.error(path, value, "must be a finite number")
        return float(value)  # type: ignore[arg-type]

    def positive(self, value: object, path: str) -> float:
        result = self.number(value, path)
        if result <= 0:
            raise self.error(path, value, "must be positive")
        return result

    def time(self, value: object, path: str) -> Fraction:
        """A time in days, exactly as written."""
        if not _is_number(value) or not _is_finite(value):  # type: ignore[arg-type]
            raise self.error(path, value, "must be a finite number of days")
        return Fraction(value)  # type: ignore[arg-type]

    def positive_time(self, value: object, path: str) -> Fraction:
        result = self.time(value, path)
        if result <= 0:
            raise self.error(path, value, "must be positive")
        return result

    def numbers(self, value: object, path: str, length: int | None = None) -> tuple[float, ...]:
        if not isinstance(value, list):
            raise self.error(path, value, "must be a list of numbers")
        if length is not None and len(value) != length:
            raise self.error(path, value, f"must have one entry per group ({length}), "
                                          f"not {len(value)}")
        return tuple(self.number(v, f"{path}[{i}]") for i, v in enumerate(value))

    def unique(self, items: list[str], path: str, what: str) -> None:
        seen = set()
        for i, item in enumerate(items):
            if item in seen:
                raise self.error(f"{path}[{i}]", item, f"duplicate {what} {item!r}")
            seen.add(item)

    def known(self, name: object, choices: Iterable[str], path: str, what: str) -> str:
        choices = tuple(choices)
        text = self.string(name, path)
        if text not in choices:
            raise self.error(path, name, f"unknown {what} {text!r}", did_you_mean(text, choices)
                             or f"the {what}s are: " + ", ".join(choices))
        return text

    # -- expressions ----------------------------------------------------------------------

    def parse(self, value: object, path: str) -> _Text:
        text = self.string(value, path)
        try:
            tree = expressions.parse(text)
        except ExpressionError as exc:
            raise self.error(path, text, f"invalid expression: {exc}") from None
        return _Text(text, tree, path)

    def check(self, text: _Text, shapes: Mapping[str, str],
              forbidden: Mapping[str, str] | None = None) -> Expression:
        """Check ``text``'s names against ``shapes`` (its scope) and infer its shape.

        ``forbidden`` maps names that exist but may not be used here to the reason.
        """
        forbidden = forbidden or {}
        if text.names & self.unusable:
            raise _Abandoned
        for name in sorted(text.names):
            if name in shapes:
                continue
            if name in forbidden:
                raise self.error(text.path, text.text, f"{name!r} {forbidden[name]}")
            if name in expressions.FUNCTIONS:
                raise self.error(text.path, text.text, f"{name!r} is a function; call it "
                                 f"with {expressions.FUNCTIONS[name]} argument(s)")
            raise self.error(text.path, text.text, f"unknown name {name!r}",
                             did_you_mean(name, [*shapes, *self.unusable]))
        try:
            shape = expressions.infer_shape(text.tree, shapes)
        except ExpressionError as exc:
            raise self.error(text.path, text.text, str(exc)) from None
        return Expression(text.text, text.tree, text.path, shape, text.names)  # type: ignore[arg-type]

    # -- the file -------------------------------------------------------------------------

    def scenario(self, data: dict[str, Any], text: str) -> Scenario:
        data = self.table(data, "", _TOP_LEVEL)
        head = self.attempt(self.head, data.get("scenario", _MISSING))
        solver_table = self.attempt(self.table, data.get("solver", {}), "solver",
                                    ("method", "step", "report_every", "check", "newton"))
        solver = self.attempt(self.solver, solver_table) if solver_table is not None else None
        if head is not None and solver is not None:
            self.attempt(self.whole_days, head["days"], solver["report_every"])
        model_table = structure = None
        if "model" not in data:
            self.errors.append(self.error("model", None, "missing required table [model]"))
        else:
            model_table = self.attempt(self.table, data["model"], "model",
                                       ("compartments", "groups", "population", "initial",
                                        "exclude_from_N", "flows", "matrices"))
        if model_table is not None:
            structure = self.attempt(self.structure, model_table)
        sampling = self.attempt(self.sampling, data.get("sampling", {}))
        parameters = None
        scope = None
        if structure is not None:
            scope = _Scope(structure["compartments"], structure["groups"],
                           structure["matrices"], solver["step"] if solver else None)
            parameters = self.attempt(self.parameters, data.get("parameters", {}), scope)
        initial = flows = variants = None
        if parameters is not None:
            drafts, resolved = parameters
            initial = self.attempt(self.initial, model_table.get("initial", {}), scope,
                                   structure["population"], resolved)
            flows = self.attempt(self.flows, model_table.get("flows", []), scope, resolved)
            if not self.unusable:
                variants = self.attempt(self.variants, data.get("variants", []), scope,
                                        drafts, resolved, initial)
        output = self.attempt(self.output, data.get("output", {}),
                              head["name"] if head else "scenario",
                              [v.name for v in variants] if variants else None)
        compute = self.attempt(self.compute, data.get("compute", {}))
        self.raise_collected()
        assert head and solver and structure and parameters and initial is not None
        assert flows is not None and variants and output and compute and sampling
        population = structure["population"]
        check = solver["check"]
        newton_tol = solver["newton_tol"]
        if newton_tol is None:
            newton_tol = max(1e-3 * check.atol, 1e-12 * sum(population))
        model = Model(
            compartments=tuple(structure["compartments"]), groups=structure["groups"],
            population=population, initial=MappingProxyType(initial),
            exclude_from_N=structure["exclude_from_N"], flows=flows,
            matrices=MappingProxyType(structure["matrices"]))
        return Scenario(
            name=head["name"], title=head["title"], description=head["description"],
            start=head["start"], days=head["days"], members=head["members"],
            seed=head["seed"], model=model,
            parameters=MappingProxyType(parameters[1].parameters), sampling=sampling,
            variants=variants,
            solver=Solver(method=solver["method"], step=solver["step"],
                          report_every=solver["report_every"], check=check,
                          newton=Newton(newton_tol, solver["newton_max_iter"])),
            output=output, compute=compute, source=Source(self.file, text))

    # -- [scenario] -----------------------------------------------------------------------

    def head(self, value: object) -> dict[str, Any]:
        if value is _MISSING:
            raise self.error("scenario", None, "missing required table [scenario]")
        table = self.table(value, "scenario", ("name", "title", "description", "start",
                                               "days", "members", "seed"))
        path = "scenario"
        return {
            "name": self.get(table, path, "name", self.label),
            "title": self.get(table, path, "title", self.string, None),
            "description": self.get(table, path, "description", self.string, None),
            "start": self.get(table, path, "start", self.date, None),
            "days": self.get(table, path, "days", self.positive_time),
            "members": self.get(table, path, "members",
                                lambda v, p: self.integer(v, p, minimum=1), 1),
            "seed": self.get(table, path, "seed", lambda v, p: self.integer(v, p, minimum=0), 0),
        }

    def date(self, value: object, path: str) -> date:
        if isinstance(value, datetime) or not isinstance(value, date):
            raise self.error(path, value, "must be a date without a time, such as 2027-01-04")
        return value

    def whole_days(self, days: Fraction, report_every: Fraction) -> None:
        if (days / report_every).denominator != 1:
            raise self.error("scenario.days", days, f"must be a whole multiple of "
                             f"solver.report_every ({time_text(report_every)})")

    # -- [solver] -------------------------------------------------------------------------

    def solver(self, table: dict[str, Any]) -> dict[str, Any]:
        path = "solver"
        method = self.get(table, path, "method", lambda v, p: self.known(
            v, METHODS, p, "solver method"), "rk4")
        step = self.get(table, path, "step", self.positive_time, Fraction(1, 4))
        report_every = self.get(table, path, "report_every", self.positive_time, Fraction(1))
        if (report_every / step).denominator != 1:
            raise self.error("solver.report_every", report_every,
                             f"must be a whole multiple of solver.step ({time_text(step)})")
        check_table = self.table(table.get("check", {}), "solver.check",
                                 ("refine", "levels", "rtol", "atol", "enabled"))
        cpath = "solver.check"
        check = StepCheck(
            refine=self.get(check_table, cpath, "refine",
                            lambda v, p: self.integer(v, p, minimum=2), 2),
            levels=self.get(check_table, cpath, "levels", self.levels, 2),
            rtol=self.get(check_table, cpath, "rtol", self.positive, 1e-3),
            atol=self.get(check_table, cpath, "atol", self.positive, 0.01),
            enabled=self.get(check_table, cpath, "enabled", self.boolean, True))
        newton_table = self.table(table.get("newton", {}), "solver.newton", ("tol", "max_iter"))
        npath = "solver.newton"
        return {
            "method": method, "step": step, "report_every": report_every, "check": check,
            "newton_tol": self.get(newton_table, npath, "tol", self.positive, None),
            "newton_max_iter": self.get(newton_table, npath, "max_iter",
                                        lambda v, p: self.integer(v, p, minimum=1), 20),
        }

    def levels(self, value: object, path: str) -> int:
        result = self.integer(value, path)
        if result not in (2, 3):
            raise self.error(path, value, "must be 2 or 3")
        return result

    # -- [model]: everything but initial values and flows -------------------------------

    def structure(self, table: dict[str, Any]) -> dict[str, Any]:
        path = "model"
        compartments = self.get(table, path, "compartments", self.compartment_list)
        groups = self.get(table, path, "groups", self.groups, None)
        n_groups = len(groups) if groups else 1
        matrices = self.get(table, path, "matrices",
                            lambda v, p: self.matrices(v, p, groups, compartments), {})
        population = self.get(table, path, "population",
                              lambda v, p: self.population(v, p, groups))
        exclude = self.get(table, path, "exclude_from_N",
                           lambda v, p: self.exclude(v, p, compartments), ())
        assert len(population) == n_groups
        return {"compartments": compartments, "groups": groups, "matrices": matrices,
                "population": population, "exclude_from_N": exclude}

    def compartment_list(self, value: object, path: str) -> list[str]:
        if not isinstance(value, list) or not value:
            raise self.error(path, value, "must be a non-empty list of compartment names")
        names = [self.identifier(v, f"{path}[{i}]") for i, v in enumerate(value)]
        self.unique(names, path, "compartment")
        return names

    def groups(self, value: object, path: str) -> tuple[str, ...]:
        if not isinstance(value, list) or not value:
            raise self.error(path, value, "must be a non-empty list of group labels")
        labels = [self.label(v, f"{path}[{i}]") for i, v in enumerate(value)]
        self.unique(labels, path, "group")
        return tuple(labels)

    def population(self, value: object, path: str, groups: tuple[str, ...] | None
                   ) -> tuple[float, ...]:
        if groups is None:
            if isinstance(value, list):
                raise self.error(path, value, "a list per group needs model.groups")
            return (self.positive(value, path),)
        if not isinstance(value, list):
            raise self.error(path, value, f"with groups the population must be a list with "
                                          f"one number per group ({len(groups)})")
        sizes = self.numbers(value, path, len(groups))
        for i, size in enumerate(sizes):
            if size <= 0:
                raise self.error(f"{path}[{i}]", size, "must be positive")
        return sizes

    def exclude(self, value: object, path: str, compartments: list[str]) -> tuple[str, ...]:
        if not isinstance(value, list):
            raise self.error(path, value, "must be a list of compartment names")
        names = [self.known(v, compartments, f"{path}[{i}]", "compartment")
                 for i, v in enumerate(value)]
        self.unique(names, path, "compartment")
        if set(names) == set(compartments):
            raise self.error(path, value, "leaves no compartment in N")
        return tuple(names)

    def matrices(self, value: object, path: str, groups: tuple[str, ...] | None,
                 compartments: list[str]) -> dict[str, Matrix]:
        if not isinstance(value, dict):
            raise self.error(path, value, "must be a table of name = [[...], ...]")
        if value and groups is None:
            raise self.error(path, value, "matrices need model.groups")
        result = {}
        for name, rows in value.items():
            key = _key(path, name)
            self.identifier(name, key)
            if name in compartments:
                raise self.error(key, name, f"{name!r} is already a compartment")
            result[name] = self.matrix(rows, key, len(groups))  # type: ignore[arg-type]
        return result

    def matrix(self, value: object, path: str, size: int) -> Matrix:
        shape_message = f"must be a {size} x {size} list of lists of numbers (one row and " \
                        f"one column per group)"
        if not isinstance(value, list) or len(value) != size:
            raise self.error(path, value, shape_message)
        rows = []
        for i, row in enumerate(value):
            if not isinstance(row, list) or len(row) != size:
                raise self.error(f"{path}[{i}]", row, shape_message)
            rows.append(tuple(self.number(v, f"{path}[{i}][{j}]") for j, v in enumerate(row)))
        return tuple(rows)

    # -- [sampling] -----------------------------------------------------------------------

    def sampling(self, value: object) -> str:
        table = self.table(value, "sampling", ("method",))
        return self.get(table, "sampling", "method",
                        lambda v, p: self.known(v, SAMPLING_METHODS, p, "sampling method"),
                        "random")

    # -- [parameters] ---------------------------------------------------------------------

    def parameters(self, value: object, scope: "_Scope") -> tuple[dict[str, _Draft],
                                                                   "_Resolved"]:
        if not isinstance(value, dict):
            raise self.error("parameters", value, "must be a table")
        mark = len(self.errors)
        drafts: dict[str, _Draft] = {}
        failed = []
        for name, form in value.items():
            path = _key("parameters", name)
            draft = self.attempt(self.draft, name, form, path, scope)
            if draft is None:
                failed.append(name)
            else:
                drafts[name] = draft
        resolved = self.resolve(drafts, scope, failed)
        self.unusable = frozenset(failed) | resolved.broken
        if len(self.errors) > mark and not self.unusable:
            raise _Abandoned
        return drafts, resolved

    def draft(self, name: str, value: object, path: str, scope: "_Scope") -> _Draft:
        """Read one parameter form; its expressions are checked later by :meth:`resolve`."""
        self.identifier(name, path)
        if name in scope.compartments:
            raise self.error(path, name, f"{name!r} is already a compartment")
        if name in scope.matrices:
            raise self.error(path, name, f"{name!r} is already a matrix")
        if _is_number(value) or isinstance(value, list):
            return self.constant(name, value, path, scope)
        if isinstance(value, str):
            text = self.parse(value, path)
            return _Draft(name, path, None, None, texts=(text,))
        if not isinstance(value, dict):
            raise self.error(path, value, "must be a number, a list per group, an expression, "
                                          "a distribution table or a schedule table")
        if "schedule" in value:
            return self.schedule(name, value, path, scope)
        if "dist" in value:
            return self.distribution(name, value, path, scope)
        if "value" in value:
            self.table(value, path, ("value", "units", "description"))
            return self.constant(name, value["value"], _key(path, "value"), scope,
                                 **self.annotations(value, path))
        raise self.error(path, value, "a parameter table needs 'dist' (a distribution), "
                                      "'schedule' or 'value' (a constant)",
                         _hint_for_keys(value, ("dist", "schedule", "value")))

    def constant(self, name: str, value: object, path: str, scope: "_Scope",
                 units: str | None = None, description: str | None = None) -> _Draft:
        """A number, or a list with one number per group."""
        if isinstance(value, list):
            return _Draft(name, path, Fixed(scope.vector(self, value, path)), "vector",
                          units=units, description=description)
        return _Draft(name, path, Fixed(self.number(value, path)), "scalar", units=units,
                      description=description)

    def annotations(self, table: dict[str, Any], path: str) -> dict[str, str | None]:
        return {"units": self.get(table, path, "units", self.string, None),
                "description": self.get(table, path, "description", self.string, None)}

    def distribution(self, name: str, table: dict[str, Any], path: str,
                     scope: "_Scope") -> _Draft:
        if table["dist"] == "fixed":
            example = _shown(table.get("value", 0.2))
            raise self.error(_key(path, "dist"), "fixed", "a constant is not a distribution: "
                             "write the number itself", f"{name} = {example!r}, or "
                             f"{name} = {{ value = {example!r}, units = \"...\" }} to give it "
                             "units or a description")
        family = FAMILIES[self.known(table["dist"], FAMILIES, _key(path, "dist"),
                                     "distribution")]
        bounds = ("low", "high") if family.truncatable else ()
        self.table(table, path, ("dist", *family.required, *family.optional, *bounds,
                                 "per_group", "units", "description"))
        per_group = self.get(table, path, "per_group", self.boolean, False)
        if per_group and scope.groups is None:
            raise self.error(_key(path, "per_group"), True, "per_group needs model.groups")
        arguments = {key: self.get(table, path, key,
                                   self.numbers if key in family.lists else self.number)
                     for key in (*family.required, *family.optional)
                     if key in family.required or key in table}
        self.refuse(family.problem(arguments), path)
        truncation = (None, None)
        if family.truncatable:
            truncation = (self.get(table, path, "low", self.number, None),
                          self.get(table, path, "high", self.number, None))
            self.refuse(family.truncation_problem(*truncation), path)
        form = Distribution(family.name, MappingProxyType(arguments), truncation, per_group)
        return _Draft(name, path, form, "vector" if per_group else "scalar",
                      **self.annotations(table, path))

    def refuse(self, problem: Problem | None, path: str) -> None:
        """Raise ``problem`` of the table at ``path``, if there is one."""
        if problem is not None:
            raise self.error(_key(path, problem.key), problem.value, problem.message)

    def schedule(self, name: str, table: dict[str, Any], path: str, scope: "_Scope") -> _Draft:
        self.table(table, path, ("schedule", "between", "units", "description"))
        between = self.get(table, path, "between",
                           lambda v, p: self.known(v, ("step", "linear"), p, "interpolation"),
                           "step")
        spath = _key(path, "schedule")
        entries = table["schedule"]
        if not isinstance(entries, list) or not entries:
            raise self.error(spath, entries, "must be a non-empty list of [day, value] pairs")
        knots = []
        for i, entry in enumerate(entries):
            kpath = f"{spath}[{i}]"
            if not isinstance(entry, list) or len(entry) != 2:
                raise self.error(kpath, entry, "must be a [day, value] pair")
            day = self.time(entry[0], kpath)
            if knots and day <= knots[-1][0]:
                raise self.error(kpath, entry, "days must strictly increase "
                                 f"(previous day {time_text(knots[-1][0])})")
            if scope.step is not None and (day / scope.step).denominator != 1:
                raise self.error(kpath, entry, f"day {time_text(day)} is not on the step "
                                 f"grid (a whole multiple of solver.step = "
                                 f"{time_text(scope.step)})")
            raw = entry[1]
            value: float | tuple[float, ...] | _Text
            if isinstance(raw, str):
                value = self.parse(raw, kpath)
            elif isinstance(raw, list):
                value = scope.vector(self, raw, kpath)
            else:
                value = self.number(raw, kpath)
            knots.append((day, value))
        texts = tuple(v for _, v in knots if isinstance(v, _Text))
        return _Draft(name, path, None, None, texts=texts, knots=tuple(knots), between=between,
                      **self.annotations(table, path))

    def resolve(self, drafts: Mapping[str, _Draft], scope: "_Scope",
                failed: Iterable[str] = ()) -> "_Resolved":
        """Check every expression of ``drafts`` in dependency order; complete their forms.

        Derived-parameter cycles are errors naming the cycle.  A parameter that depends
        on a failed one is skipped (its own error would only repeat the first).
        """
        graph = {name: {d for d in draft.dependencies if d in drafts}
                 for name, draft in drafts.items()}
        try:
            order = list(TopologicalSorter(graph).static_order())
        except CycleError as exc:
            cycle = exc.args[1]
            raise self.error(drafts[cycle[0]].path, None, "parameters depend on each other in "
                             "a cycle: " + " -> ".join(cycle)) from None
        broken = set(failed)
        done: dict[str, Parameter] = {}
        time_varying: set[str] = set()
        for name in order:
            draft = drafts[name]
            if draft.dependencies & broken:
                broken.add(name)
                continue
            parameter = self.attempt(self.complete, draft, scope, done, time_varying)
            if parameter is None:
                broken.add(name)
            else:
                done[name] = parameter
        in_file_order = {name: done[name] for name in drafts if name in done}
        return _Resolved(in_file_order, frozenset(time_varying), frozenset(broken))

    def complete(self, draft: _Draft, scope: "_Scope", done: Mapping[str, Parameter],
                 time_varying: set[str]) -> Parameter:
        if draft.form is not None:
            return Parameter(draft.name, draft.form, draft.shape, draft.units,  # type: ignore[arg-type]
                             draft.description)
        shapes = scope.parameter_shapes(done)
        forbidden = scope.parameter_forbidden()
        if not draft.knots:
            expression = self.check(draft.texts[0], shapes, forbidden)
            if expression.shape == "matrix":
                raise self.error(draft.path, expression.text, "a parameter must be a number or "
                                 "a vector over groups, not a matrix: write the matrix "
                                 "arithmetic into the rate instead")
            if expression.names & (time_varying | {"t"}):
                time_varying.add(draft.name)
            return Parameter(draft.name, Derived(expression), expression.shape,
                             draft.units, draft.description)
        time_varying.add(draft.name)
        knot_forbidden = {**forbidden, "t": "cannot be used in a schedule value (the "
                                            "schedule already sets the time)"}
        values: list[float | tuple[float, ...] | Expression] = []
        knot_shapes = []
        for _, value in draft.knots:
            if isinstance(value, _Text):
                scope_shapes = {k: v for k, v in shapes.items() if k != "t"}
                expression = self.check(value, scope_shapes, knot_forbidden)
                moving = sorted(expression.names & time_varying)
                if moving:
                    raise self.error(value.path, value.text, f"schedule values may use only "
                                     f"parameters that are constant in time, not {moving[0]!r}")
                if expression.shape == "matrix":
                    raise self.error(value.path, value.text, "a schedule value must be a "
                                     "number or a vector over groups, not a matrix")
                values.append(expression)
                knot_shapes.append(expression.shape)
            else:
                values.append(value)
                knot_shapes.append("vector" if isinstance(value, tuple) else "scalar")
        for (i, kind) in enumerate(knot_shapes):
            if kind != knot_shapes[0]:
                raise self.error(f"{draft.path}.schedule[{i}]", None,
                                 f"is a {kind} while the first value is a {knot_shapes[0]}: "
                                 "every value of a schedule must have the same shape")
        form = Schedule(tuple(day for day, _ in draft.knots), tuple(values),
                        draft.between)  # type: ignore[arg-type]
        return Parameter(draft.name, form, knot_shapes[0], draft.units,  # type: ignore[arg-type]
                         draft.description)

    # -- [model] initial values and flows --------------------------------------------------

    def initial(self, value: object, scope: "_Scope", population: tuple[float, ...],
                resolved: "_Resolved") -> dict[str, InitialValue]:
        path = "model.initial"
        if not isinstance(value, dict):
            raise self.error(path, value, "must be a table of compartment = value")
        given: dict[str, InitialValue] = {}
        for name, raw in value.items():
            key = _key(path, name)
            self.known(name, scope.compartments, key, "compartment")
            given[name] = self.initial_value(raw, key, scope, resolved)
        rests = [name for name, v in given.items() if isinstance(v, Rest)]
        if len(rests) > 1:
            raise self.error(_key(path, rests[1]), "rest", "only one compartment may be "
                             f"\"rest\" ({rests[0]!r} already is)")
        fixed = [v for v in given.values() if isinstance(v, (float, tuple))]
        all_fixed = len(fixed) == len(given) - len(rests)
        for g, size in enumerate(population):
            total = math.fsum(v[g] if isinstance(v, tuple) else v for v in fixed)
            where = f" in group {scope.groups[g]!r}" if scope.groups else ""
            if total > size * (1 + INITIAL_SUM_RTOL):
                raise self.error(path, _shown(value), f"the fixed initial values add up to "
                                 f"{total:g}{where}, above the population {size:g}")
            if not rests and all_fixed and abs(total - size) > INITIAL_SUM_RTOL * size:
                raise self.error(path, _shown(value), f"the initial values add up to "
                                 f"{total:g}{where} but the population is {size:g}",
                                 "make one compartment \"rest\"")
        return {c: given.get(c, 0.0) for c in scope.compartments}

    def initial_value(self, raw: object, path: str, scope: "_Scope",
                      resolved: "_Resolved") -> InitialValue:
        if raw == "rest":
            return Rest()
        if isinstance(raw, str):
            expression = self.check(self.parse(raw, path), scope.parameter_shapes(
                resolved.parameters), scope.parameter_forbidden())
            self.constant_in_time(expression, resolved, "initial values")
            if scope.groups is not None and expression.shape != "vector":
                raise self.error(path, raw, "with groups an initial value must be a vector "
                                 "over groups, not a " + expression.shape)
            if scope.groups is None and expression.shape != "scalar":
                raise self.error(path, raw, f"must be a number, not a {expression.shape}")
            return expression
        if isinstance(raw, list):
            values = scope.vector(self, raw, path)
        else:
            values = self.number(raw, path)
            if scope.groups is not None and values != 0:
                raise self.error(path, raw, "with groups an initial value must be a list with "
                                 f"one number per group ({len(scope.groups)}), not a number")
        for i, v in enumerate(values if isinstance(values, tuple) else (values,)):
            if v < 0:
                key = f"{path}[{i}]" if isinstance(values, tuple) else path
                raise self.error(key, v, "an initial count cannot be negative")
        return values

    def constant_in_time(self, expression: Expression, resolved: "_Resolved",
                         what: str) -> None:
        moving = sorted(expression.names & resolved.time_varying)
        if moving:
            raise self.error(expression.key, expression.text, f"{what} may use only "
                             f"parameters that are constant in time, not {moving[0]!r}")

    def flows(self, value: object, scope: "_Scope", resolved: "_Resolved") -> tuple[Flow, ...]:
        if not isinstance(value, list) or not value:
            raise self.error("model.flows", value, "must list at least one flow "
                             "([[model.flows]] tables)")
        mark = len(self.errors)
        shapes = scope.rate_shapes(resolved.parameters)
        flows = []
        for i, table in enumerate(value):
            flow = self.attempt(self.flow, table, f"model.flows[{i}]", scope, shapes)
            if flow is not None:
                flows.append(flow)
        self.abandon_if_failed(mark)
        seen: dict[str, int] = {}
        for i, flow in enumerate(flows):
            if flow.name in seen:
                raise self.error(f"model.flows[{i}].name", flow.name,
                                 f"duplicate flow name {flow.name!r} (also model.flows"
                                 f"[{seen[flow.name]}]; unnamed flows are called "
                                 "<from>_to_<to>, in_to_<to> or <from>_out)")
            seen[flow.name] = i
        return tuple(flows)

    def flow(self, value: object, path: str, scope: "_Scope",
             shapes: Mapping[str, str]) -> Flow:
        table = self.table(value, path, ("name", "from", "to", "rate"))
        compartment = lambda v, p: self.known(v, scope.compartments, p, "compartment")  # noqa: E731
        source = self.get(table, path, "from", compartment, None)
        target = self.get(table, path, "to", compartment, None)
        if source is None and target is None:
            raise self.error(path, None, "a flow needs 'from', 'to' or both")
        if source == target:
            raise self.error(_key(path, "to"), target, "a flow cannot go from a compartment "
                             "to itself")
        default = (f"{source}_to_{target}" if source and target
                   else f"in_to_{target}" if target else f"{source}_out")
        name = self.get(table, path, "name", self.label, default)
        raw = self.get(table, path, "rate", lambda v, p: v)
        rate_path = _key(path, "rate")
        if _is_number(raw):
            raw = repr(self.number(raw, rate_path))
        rate = self.check(self.parse(raw, rate_path), shapes)
        wanted = "vector" if scope.groups is not None else "scalar"
        if rate.shape != wanted:
            reason = ("with groups every rate must be a vector over groups"
                      if scope.groups is not None else "without groups a rate must be a number")
            raise self.error(rate_path, rate.text, f"{reason}, but this is a {rate.shape}")
        return Flow(name, source, target, rate)

    # -- [[variants]] ---------------------------------------------------------------------

    def variants(self, value: object, scope: "_Scope", drafts: dict[str, _Draft],
                 base: "_Resolved", initial: Mapping[str, InitialValue] | None
                 ) -> tuple[Variant, ...]:
        if not isinstance(value, list):
            raise self.error("variants", value, "must be [[variants]] tables")
        if not value:
            return (Variant("baseline", None, MappingProxyType({}), MappingProxyType({})),)
        mark = len(self.errors)
        variants = []
        for i, table in enumerate(value):
            variant = self.attempt(self.variant, table, f"variants[{i}]", scope, drafts, base,
                                   initial)
            if variant is not None:
                variants.append(variant)
        self.abandon_if_failed(mark)
        names = [v.name for v in variants]
        for i, name in enumerate(names):
            if name in names[:i]:
                raise self.error(f"variants[{i}].name", name, f"duplicate variant name {name!r}")
        return tuple(variants)

    def variant(self, value: object, path: str, scope: "_Scope", drafts: dict[str, _Draft],
                base: "_Resolved", initial: Mapping[str, InitialValue] | None) -> Variant:
        table = self.table(value, path, ("name", "title", "parameters", "matrices"))
        name = self.get(table, path, "name", self.label)
        title = self.get(table, path, "title", self.string, None)
        ppath = _key(path, "parameters")
        overrides = self.table(table.get("parameters", {}), ppath, drafts, "parameter")
        merged = dict(drafts)
        for pname, form in overrides.items():
            merged[pname] = self.draft(pname, form, _key(ppath, pname), scope)
        mark = len(self.errors)
        resolved = self.resolve(merged, scope)
        self.abandon_if_failed(mark)
        for pname in overrides:
            old, new = base.parameters[pname], resolved.parameters[pname]
            if new.shape != old.shape:
                raise self.error(_key(ppath, pname), overrides[pname], f"is a {new.shape} but "
                                 f"parameters.{pname} is a {old.shape}: an override keeps the "
                                 "original's shape")
        for cname, start in (initial or {}).items():
            moving = sorted(start.names & resolved.time_varying
                            if isinstance(start, Expression) else ())
            if moving:
                raise self.error(_key(ppath, moving[0]), None, f"makes {moving[0]!r} vary in "
                                 f"time, but model.initial.{cname} uses it")
        mpath = _key(path, "matrices")
        matrix_overrides = self.table(table.get("matrices", {}), mpath, scope.matrices,
                                      "matrix")
        matrices = {mname: self.matrix(rows, _key(mpath, mname), scope.n_groups)
                    for mname, rows in matrix_overrides.items()}
        parameters = {p: resolved.parameters[p] for p in overrides}
        return Variant(name, title, MappingProxyType(parameters), MappingProxyType(matrices))

    # -- [output], [compute] --------------------------------------------------------------

    def output(self, value: object, name: str, variant_names: list[str] | None) -> Output:
        path = "output"
        table = self.table(value, path, ("path", "quantiles", "members", "compare_to",
                                         "compression"))
        compare_to = None
        if "compare_to" in table and variant_names is not None:
            compare_to = self.known(table["compare_to"], variant_names,
                                    _key(path, "compare_to"), "variant")
        return Output(
            path=self.get(table, path, "path", self.path, f"results/{name}.nc"),
            quantiles=self.get(table, path, "quantiles", self.quantiles, DEFAULT_QUANTILES),
            members=self.get(table, path, "members", self.boolean, True),
            compare_to=compare_to,
            compression=self.get(table, path, "compression",
                                 lambda v, p: self.integer(v, p, minimum=0, maximum=9), 4))

    def path(self, value: object, path: str) -> str:
        text = self.string(value, path)
        if not text.strip():
            raise self.error(path, value, "must not be empty")
        return text

    def quantiles(self, value: object, path: str) -> tuple[float, ...]:
        levels = self.numbers(value, path)
        if not levels:
            raise self.error(path, value, "must list at least one quantile")
        for i, q in enumerate(levels):
            if not 0 <= q <= 1:
                raise self.error(f"{path}[{i}]", q, "must lie within [0, 1]")
            if i and q <= levels[i - 1]:
                raise self.error(f"{path}[{i}]", q, "quantiles must be sorted and unique")
        return levels

    def compute(self, value: object) -> Compute:
        path = "compute"
        table = self.table(value, path, ("chunk", "workers", "cluster", "address"))
        positive = lambda v, p: self.integer(v, p, minimum=1)  # noqa: E731
        compute = Compute(
            chunk=self.get(table, path, "chunk", positive, None),
            workers=self.get(table, path, "workers", positive, None),
            cluster=self.get(table, path, "cluster", self.path, None),
            address=self.get(table, path, "address", self.path, None))
        if compute.cluster is not None and compute.address is not None:
            raise self.error("compute.address", compute.address, "an address already names "
                             "the cluster: give compute.cluster or compute.address, not both")
        return compute


# -------------------------------------------------------------------------- name scopes


@dataclass(frozen=True)
class _Resolved:
    """A checked parameter set: the parameters in file order, those varying in time, and
    those that failed their checks (or depend on one that did)."""

    parameters: dict[str, Parameter]
    time_varying: frozenset[str]
    broken: frozenset[str]


@dataclass(frozen=True)
class _Scope:
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

    def vector(self, loader: _Loader, value: list, path: str) -> tuple[float, ...]:
        """A list with one number per group."""
        if self.groups is None:
            raise loader.error(path, value, "a list per group needs model.groups")
        return loader.numbers(value, path, len(self.groups))

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


def _hint_for_keys(table: Mapping[str, Any], choices: Iterable[str]) -> str | None:
    """A hint for the first key of ``table`` that is close to one of ``choices``."""
    for key in table:
        hint = did_you_mean(key, choices)
        if hint:
            return f"{key!r}: {hint}"
    return None


def time_text(value: Fraction) -> str:
    """A time for messages: ``0.25``, ``7``, or ``1/3`` when no short decimal exists."""
    if value.denominator == 1:
        return str(value.numerator)
    as_float = float(value)
    return repr(as_float) if Fraction(repr(as_float)) == value else str(value)
