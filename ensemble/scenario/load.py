"""Scenario file (TOML) -> validated :class:`~ensemble.scenario.schema.Scenario`.

The entry points; every check and default of the scenario format (the project's
reference, ``ensemble/scenario/reference.md``) lives in the modules that read each part:
:mod:`.settings` (``[scenario]``, ``[solver]``, ``[sampling]``, ``[output]``,
``[compute]``), :mod:`.structure` (``[model]`` and its flows), :mod:`.parameters`
(``[parameters]``, ``[[variants]]``) and :mod:`.initial` (``[model] initial``), all with
the toolkit of :mod:`.reader`.  The file is read with :mod:`tomllib` using
``parse_float=decimal.Decimal``, so that times (``days``, ``step``, ``report_every``,
schedule days) become exact :class:`fractions.Fraction` values while every other number
becomes a float.

Errors are :class:`~ensemble.errors.ScenarioError` naming the file, the key path
(``model.flows[2].rate``) and the value.  Independent sections and entries are checked
one by one, and all their problems are reported together as
:class:`~ensemble.errors.ScenarioErrors`; a part that depends on a broken part
(flows on the compartments, say) is not checked until that part is fixed.
"""

from __future__ import annotations

import dataclasses
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from types import MappingProxyType
from typing import Any

from ensemble.errors import ScenarioError
from ensemble.methods import METHODS
from ensemble.scenario.initial import read_initial
from ensemble.scenario.measures import read_measures
from ensemble.scenario.observations import read_observations
from ensemble.scenario.overrides import apply_overrides
from ensemble.scenario.parameters import ParameterReader, Resolved
from ensemble.scenario.reader import MISSING, Reader, time_text
from ensemble.scenario.schema import (Expression, Flow, InitialValue, Model, Parameter, Rest,
                                      Scenario, Schedule, Source, Variant, is_drawn)
from ensemble.scenario.settings import (check_whole_days, read_compute, read_head,
                                        read_member_count, read_output, read_sampling,
                                        read_seed, read_solver)
from ensemble.scenario.structure import (MODEL_KEYS, Scope, Structure, read_flows,
                                         read_structure)

_TOP_LEVEL = ("scenario", "model", "parameters", "sampling", "variants", "solver", "output",
              "compute", "measures", "observations")


def load_scenario(path: str | Path, *, member_count: int | None = None,
                  seed: int | None = None, settings: Sequence[str] = ()) -> Scenario:
    """Read, check and complete the scenario file at ``path``.

    Parameters
    ----------
    path : the scenario file (TOML).
    member_count, seed : command-line overrides of ``[scenario] members`` and ``seed``.
    settings : ``KEY=VALUE`` overrides of any key of the file (``--set``), applied in
        order before the file is checked (:mod:`ensemble.scenario.overrides`); kept in
        ``Scenario.source.overrides``.

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
    apply_overrides(data, settings, file)
    scenario = validate(data, file, text)
    if settings:
        scenario = dataclasses.replace(scenario, source=dataclasses.replace(
            scenario.source, overrides=tuple(settings)))
    overrides: dict[str, int] = {}
    if member_count is not None:
        overrides["member_count"] = read_member_count(Reader(file), member_count,
                                                      "scenario.members")
    if seed is not None:
        overrides["seed"] = read_seed(Reader(file), seed, "scenario.seed")
    return dataclasses.replace(scenario, **overrides) if overrides else scenario


def validate(data: dict[str, Any], file: str, text: str = "") -> Scenario:
    """Check and complete a scenario already read from TOML into ``data``.

    ``data`` is what :func:`tomllib.loads` gives with ``parse_float=decimal.Decimal``
    (plain floats are accepted, but times are then only as exact as the float).
    ``file`` names the source in errors; ``text`` is kept as the scenario's full text.
    """
    reader = Reader(file)
    data = reader.table(data, "", _TOP_LEVEL)
    head = reader.attempt(read_head, reader, data.get("scenario", MISSING))
    solver = reader.attempt(read_solver, reader, data.get("solver", {}))
    if head is not None and solver is not None:
        reader.attempt(check_whole_days, reader, head.days, solver.report_every)
    model_table = structure = None
    if "model" not in data:
        reader.errors.append(reader.error("model", None, "missing required table [model]"))
    else:
        model_table = reader.attempt(reader.table, data["model"], "model", MODEL_KEYS)
    if model_table is not None:
        structure = reader.attempt(read_structure, reader, model_table)
    sampling = reader.attempt(read_sampling, reader, data.get("sampling", {}))
    parts = None
    if structure is not None:
        scope = Scope(structure.compartments, structure.groups, structure.matrices,
                      solver.step if solver else None)
        parts = _ModelParts.read(reader, data, model_table, structure, scope)
    output = reader.attempt(read_output, reader, data.get("output", {}),
                            head.name if head else "scenario",
                            [v.name for v in parts.variants] if parts and parts.variants
                            else None)
    compute = reader.attempt(read_compute, reader, data.get("compute", {}))
    measures = None
    if parts is not None and parts.flows is not None and head and solver:
        measures = reader.attempt(read_measures, reader, data.get("measures", []),
                                  structure.compartments, structure.groups, parts.flows,
                                  solver.report_every, head.days)
    observations = None
    if measures is not None and parts.resolved is not None:
        observations = reader.attempt(read_observations, reader,
                                      data.get("observations", []), measures,
                                      structure.groups, parts.resolved.parameters,
                                      parts.variants or (), head.days,
                                      parts.resolved.time_varying)
    reader.raise_collected()
    assert head and solver and structure and parts and parts.complete
    assert output and compute and sampling
    return Scenario(
        name=head.name, title=head.title, description=head.description, start=head.start,
        days=head.days, member_count=head.member_count, seed=head.seed,
        model=parts.model(structure), parameters=MappingProxyType(parts.resolved.parameters),
        sampling=sampling, variants=parts.variants,  # type: ignore[arg-type]
        solver=solver.solver(structure.population), output=output, compute=compute,
        source=Source(file, text), measures=measures or (),
        observations=observations or ())


@dataclass(frozen=True)
class _ModelParts:
    """What the parameters are needed for: the parameters themselves, the initial values,
    the flows and the variants (None where they failed)."""

    resolved: Resolved | None
    initial: dict[str, InitialValue] | None
    flows: tuple[Flow, ...] | None
    variants: tuple[Variant, ...] | None

    @classmethod
    def read(cls, reader: Reader, data: dict[str, Any], model_table: dict[str, Any],
             structure: Structure, scope: Scope) -> "_ModelParts | None":
        parameters = ParameterReader(reader, scope)
        read = reader.attempt(parameters.read, data.get("parameters", {}))
        if read is None:
            return None
        drafts, resolved = read
        initial = reader.attempt(read_initial, reader, model_table.get("initial", {}), scope,
                                 structure.population, resolved)
        flows = reader.attempt(read_flows, reader, model_table.get("flows", []), scope,
                               resolved.parameters, structure.stages)
        variants = None
        if not reader.unusable:
            variants = reader.attempt(parameters.variants, data.get("variants", []), drafts,
                                      resolved, initial)
        return cls(resolved, initial, flows, variants)

    @property
    def complete(self) -> bool:
        return (self.resolved is not None and self.initial is not None
                and self.flows is not None and bool(self.variants))

    def model(self, structure: Structure) -> Model:
        return Model(
            compartments=tuple(structure.compartments), groups=structure.groups,
            population=structure.population,
            initial=MappingProxyType(self.initial),  # type: ignore[arg-type]
            exclude_from_N=structure.exclude_from_N, flows=self.flows,  # type: ignore[arg-type]
            matrices=MappingProxyType(structure.matrices),
            stages=MappingProxyType(structure.stages), infected=structure.infected)


def scenario_warnings(scenario: Scenario) -> list[str]:
    """What a modeller should know about a valid scenario before running it."""
    warnings = []
    n_members = scenario.member_count
    if scenario.sampling == "sobol" and n_members & (n_members - 1):
        warnings.append(f"sobol sampling with {n_members} members, which is not a power of "
                        "two: the points lose their balance "
                        f"(use {_next_power_of_two(n_members)})")
    if n_members < 100:
        warnings.append(f"only {n_members} member(s): the outer quantiles "
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
    for name, count in scenario.model.stages.items():
        if count > 1 and not any(flow.source == name and flow.target != name
                                 for flow in scenario.model.flows):
            warnings.append(f"model.stages.{name}: no flow leaves {name}, so its {count} "
                            "stages change nothing")
    uncertain = [p for p in scenario.parameters.values() if is_drawn(p.form)]
    if not uncertain and n_members > 1 and not any(v.parameters for v in scenario.variants):
        warnings.append(f"no parameter is drawn from a distribution: all {n_members} members "
                        "of a variant are identical")
    return warnings + _tolerance_warnings(scenario)


ATOL_PER_PERSON = 1e-6
"""The step check's absolute tolerance suggested per person of the smallest group: 0.01
for a town of 10,000 (the default atol), 1e-6 for a population given as proportions
(common practice, no source)."""

ATOL_PER_INITIAL = 1e-3
"""The tolerance suggested at most per person of the smallest initial count given as a
number, so that it is small against every state it judges (common practice, no source)."""

TOLERANCE_ROOM = 100.0
"""A tolerance more than this many times its suggestion is warned of."""


def suggested_atol(scenario: Scenario) -> float:
    """The step check's absolute tolerance suggested for the scale of the scenario's
    states: :data:`ATOL_PER_PERSON` of the smallest group's population, and at most
    :data:`ATOL_PER_INITIAL` of the smallest positive initial count given as a number."""
    suggestion = ATOL_PER_PERSON * min(scenario.model.population)
    counts = [count for value in scenario.model.initial.values()
              if isinstance(value, (float, tuple))
              for count in (value if isinstance(value, tuple) else (value,)) if count > 0]
    if counts:
        suggestion = min(suggestion, ATOL_PER_INITIAL * min(counts))
    return suggestion


def _tolerance_warnings(scenario: Scenario) -> list[str]:
    """Tolerances in persons that are not small against the scenario's states (a
    population of 1, in proportions, with the defaults made for persons)."""
    suggestion = suggested_atol(scenario)
    solver = scenario.solver
    warnings = []
    if solver.check.enabled and solver.check.atol > TOLERANCE_ROOM * suggestion:
        warnings.append(f"solver.check.atol = {solver.check.atol:g} is not small against "
                        f"the states (smallest group {min(scenario.model.population):g} "
                        "persons): the step check would pass large errors and "
                        f"state_below_minus_atol miss negative states; use about "
                        f"{suggestion:.1g}")
    newton = 1e-3 * suggestion
    if METHODS[solver.method].implicit and solver.newton.tol > TOLERANCE_ROOM * newton:
        warnings.append(f"the Newton tolerance {solver.newton.tol:g} is not small against "
                        "the states: each step of the implicit method may stop that far "
                        f"from its solution; set solver.newton.tol to about {newton:.1g}")
    return warnings


def _parameter_sets(scenario: Scenario) -> list[tuple[str, Mapping[str, Parameter]]]:
    """The base parameters and each variant's overrides, with their key-path prefixes."""
    return [("parameters.", scenario.parameters)] + [
        (f"variant {v.name!r}: parameters.", v.parameters) for v in scenario.variants]


def _next_power_of_two(n: int) -> int:
    return 1 << (n - 1).bit_length()


MAX_SCENARIO_BYTES = 4 * 2 ** 20
"""Largest scenario file read (4 MiB, hundreds of times a large model's): a device such as
/dev/zero, or a file given by mistake, is refused instead of filling the memory."""


def _read_text(file: str) -> str:
    """The scenario file's text (UTF-8, at most :data:`MAX_SCENARIO_BYTES`)."""
    path = Path(file)
    if not path.exists():
        raise ScenarioError(file, "", None, "no such file")
    if path.is_dir():
        raise ScenarioError(file, "", None, "is a directory, not a scenario file")
    try:
        with path.open("rb") as handle:
            data = handle.read(MAX_SCENARIO_BYTES + 1)
        if len(data) > MAX_SCENARIO_BYTES:
            raise ScenarioError(file, "", None, f"larger than {MAX_SCENARIO_BYTES // 2**20} "
                                "MiB: not a scenario file")
        # as text mode reads it: universal newlines
        return data.decode("utf-8").replace("\r\n", "\n").replace("\r", "\n")
    except UnicodeDecodeError as exc:
        raise ScenarioError(file, "", None, f"not UTF-8 text (byte {exc.start})") from None
    except OSError as exc:
        raise ScenarioError(file, "", None, f"cannot be read: {exc.strerror}") from None
