"""Hand-built scenarios and compiled-model stand-ins for the sampling tests."""

from __future__ import annotations

from fractions import Fraction
from types import MappingProxyType

import numpy as np

from ensemble.model.compile import CompiledModel, ScheduleSlot
from ensemble.scenario.expressions import infer_shape, names_in, parse
from ensemble.scenario.schema import (Compute, Derived, Distribution, Expression, Fixed,
                                      Model, Newton, Output, Parameter, Rest, Scenario,
                                      Schedule, Solver, Source, StepCheck, Variant)


def expression(text: str, shapes: dict[str, str] | None = None, key: str = "test") -> Expression:
    tree = parse(text)
    names = names_in(tree)
    shape = infer_shape(tree, {**{n: "scalar" for n in names}, **(shapes or {})})
    return Expression(text=text, tree=tree, key=key, shape=shape, names=names)


def dist(family: str, per_group: bool = False, truncation=(None, None), values=(),
         weights=(), **arguments: float) -> Distribution:
    return Distribution(family=family, arguments=MappingProxyType(arguments),
                        truncation=truncation, values=tuple(values), weights=tuple(weights),
                        per_group=per_group)


def parameter(name: str, form, shape: str | None = None) -> Parameter:
    if shape is None:
        if isinstance(form, Distribution):
            shape = "vector" if form.per_group else "scalar"
        elif isinstance(form, Fixed):
            shape = "vector" if isinstance(form.value, tuple) else "scalar"
        elif isinstance(form, Derived):
            shape = form.expression.shape
        else:
            shape = "scalar"
    return Parameter(name=name, form=form, shape=shape)


def scenario(parameters: dict[str, object], *, sampling: str = "random", members: int = 1000,
             seed: int = 4711, compartments=("S", "I", "R"), groups=None,
             population=(1000.0,), initial=None, variants=None,
             matrices=None) -> Scenario:
    """A scenario around ``parameters`` (name -> form, or a Parameter)."""
    params = {name: (form if isinstance(form, Parameter) else parameter(name, form))
              for name, form in parameters.items()}
    if initial is None:
        initial = {"S": Rest(), "I": 10.0, "R": 0.0}
    model = Model(compartments=tuple(compartments), groups=groups,
                  population=tuple(population), initial=MappingProxyType(dict(initial)),
                  exclude_from_N=(), flows=(), matrices=MappingProxyType(matrices or {}))
    variant_list = tuple(variants) if variants else (
        Variant(name="baseline", title=None, parameters=MappingProxyType({}),
                matrices=MappingProxyType({})),)
    return Scenario(
        name="test", title=None, description=None, start=None, days=Fraction(10),
        members=members, seed=seed, model=model, parameters=MappingProxyType(params),
        sampling=sampling, variants=variant_list,
        solver=Solver(method="rk4", step=Fraction(1, 4), report_every=Fraction(1),
                      check=StepCheck(), newton=Newton(tol=1e-5)),
        output=Output(path="results/test.nc", quantiles=(0.5,)), compute=Compute(),
        source=Source(path="test.toml", text=""))


def variant(name: str, parameters: dict[str, object], matrices=None) -> Variant:
    params = {n: (f if isinstance(f, Parameter) else parameter(n, f))
              for n, f in parameters.items()}
    return Variant(name=name, title=None, parameters=MappingProxyType(params),
                   matrices=MappingProxyType(matrices or {}))


def model_stub(scenario: Scenario, parameter_slots=(), schedule_slots=()) -> CompiledModel:
    """A CompiledModel with no rates: enough for make_design, which reads the slot names,
    the states and the population."""
    groups = scenario.model.groups
    n_groups = scenario.model.n_groups
    labels = tuple(c if groups is None else f"{c}[{g}]"
                   for c in scenario.model.compartments for g in (groups or (None,)))
    return CompiledModel(
        compartments=scenario.model.compartments, groups=groups, n_groups=n_groups,
        flows=(), state_labels=labels, rates=(), rate_derivatives=(),
        stoichiometry=np.zeros((len(labels), 0)), parameter_slots=tuple(parameter_slots),
        schedule_slots=tuple(schedule_slots),
        population=np.asarray(scenario.model.population, dtype=float), closed=True)


def schedule_slot(parameter: str, days, element: int = 0, between: str = "step") -> ScheduleSlot:
    return ScheduleSlot(name=parameter, parameter=parameter, element=element,
                        days=np.asarray(days, dtype=float), between=between)


__all__ = ["expression", "dist", "parameter", "scenario", "variant", "model_stub",
           "schedule_slot", "Fixed", "Derived", "Schedule", "Rest", "Fraction"]
