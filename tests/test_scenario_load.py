"""The scenario loader: defaults, exact times, overrides, shapes, and its error messages."""

from __future__ import annotations

import math
from fractions import Fraction
from pathlib import Path

import pytest
from typer.testing import CliRunner

from ensemble.cli import app
from ensemble.scenario import ScenarioError, ScenarioErrors, load_scenario, scenario_warnings
from ensemble.scenario.expressions import RESERVED
from ensemble.scenario.schema import Derived, Distribution, Expression, Fixed, Rest, Schedule
from support import load_text

SCENARIOS = Path(__file__).parent.parent / "scenarios"

MINIMAL = """
[scenario]
name = "tiny"
days = 10

[model]
compartments = ["S", "I", "R"]
population = 1000
initial = { S = "rest", I = 5 }

[[model.flows]]
from = "S"
to = "I"
rate = "beta * S * I / N"

[[model.flows]]
from = "I"
to = "R"
rate = "gamma * I"

[parameters]
beta = 0.3
gamma = 0.1
"""

GROUPED = """
[scenario]
name = "grouped"
days = 10

[model]
compartments = ["S", "I", "R"]
groups = ["young", "old"]
population = [600, 400]
initial = { S = "rest", I = [3, 2] }
matrices = { contacts = [[3.0, 1.0], [1.0, 2.0]] }

[[model.flows]]
from = "S"
to = "I"
rate = "beta * susceptibility * S * (contacts @ (I / N))"

[[model.flows]]
from = "I"
to = "R"
rate = "gamma * I"

[parameters]
beta = 0.05
gamma = 0.1
susceptibility = [0.8, 1.2]
"""


def edit(text: str, *pairs: str) -> str:
    """``text`` with each (old, new) pair replaced; every old part must occur once."""
    for old, new in zip(pairs[::2], pairs[1::2]):
        assert text.count(old) == 1, old
        text = text.replace(old, new)
    return text


@pytest.fixture
def load(tmp_path: Path):
    return lambda text, **overrides: load_text(tmp_path, text, **overrides)


def error_of(load, text: str) -> ScenarioError:
    with pytest.raises(ScenarioError) as caught:
        load(text)
    return caught.value


# ------------------------------------------------------------------------------ defaults


def test_defaults(load) -> None:
    scenario = load(MINIMAL)
    assert (scenario.member_count, scenario.seed, scenario.sampling) == (1, 0, "random")
    assert [v.name for v in scenario.variants] == ["baseline"]
    assert scenario.variants[0].title is None and not scenario.variants[0].parameters
    assert scenario.output.path == "results/tiny.nc"
    assert scenario.output.quantiles == (0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975)
    assert (scenario.output.keep_members, scenario.output.compression) == (True, 4)
    assert scenario.output.compare_to is None
    solver = scenario.solver
    assert (solver.method, solver.step, solver.report_every) == ("rk4", Fraction(1, 4), 1)
    check = solver.check
    assert (check.refine, check.levels, check.rtol, check.atol, check.enabled) == (
        2, 2, 1e-3, 0.01, True)
    # max(1e-3 * atol, 1e-12 * population) = max(1e-5, 1e-9)
    assert solver.newton.tol == pytest.approx(1e-5) and solver.newton.max_iter == 20
    assert scenario.model.initial == {"S": Rest(), "I": 5.0, "R": 0.0}
    assert [f.name for f in scenario.model.flows] == ["S_to_I", "I_to_R"]
    assert scenario.start is None and scenario.model.groups is None
    assert scenario.source.text.startswith("\n[scenario]")


def test_newton_tolerance_follows_a_large_population(load) -> None:
    text = edit(MINIMAL, "population = 1000", "population = 2e9")
    assert load(text).solver.newton.tol == pytest.approx(2e-3)
    text = MINIMAL + "\n[solver]\nnewton = { tol = 0.5 }\n"
    assert load(text).solver.newton.tol == 0.5


def test_default_flow_names_for_inflow_and_outflow(load) -> None:
    text = MINIMAL + '\n[[model.flows]]\nto = "S"\nrate = "10"\n\n[[model.flows]]\nfrom = "R"\nrate = "0.01 * R"\n'
    flows = load(text).model.flows
    assert [(f.name, f.source, f.target) for f in flows[2:]] == [
        ("in_to_S", None, "S"), ("R_out", "R", None)]


# --------------------------------------------------------------------------- exact times


def test_times_are_exact_decimals(load) -> None:
    """0.7 days at a step of 0.1 is exactly 7 steps.  In binary floating point it is not
    (0.7 / 0.1 == 6.999999999999999; Goldberg 1991, "What every computer scientist should
    know about floating-point arithmetic", ACM Computing Surveys 23(1)), which is why the
    loader reads times as decimals."""
    assert 0.7 / 0.1 != 7
    text = edit(MINIMAL, "days = 10", "days = 0.7",
                "gamma = 0.1", "gamma = 0.1\nscale = { schedule = [[0, 1.0], [0.3, 0.5]] }")
    text += "\n[solver]\nstep = 0.1\nreport_every = 0.1\n"
    scenario = load(text)
    assert scenario.days == Fraction(7, 10)
    assert scenario.n_reports == 8
    assert scenario.report_times()[-1] == Fraction(7, 10)
    assert scenario.parameters["scale"].form.days == (0, Fraction(3, 10))


def test_days_off_the_report_grid(load) -> None:
    text = edit(MINIMAL, "days = 10", "days = 0.75") + "\n[solver]\nstep = 0.05\nreport_every = 0.1\n"
    error = error_of(load, text)
    assert error.key == "scenario.days" and "report_every" in error.message


# ----------------------------------------------------------------------------- overrides


def test_command_line_overrides(load) -> None:
    scenario = load(edit(MINIMAL, "days = 10", "days = 10\nmembers = 7\nseed = 3"),
                    member_count=50, seed=11)
    assert (scenario.member_count, scenario.seed) == (50, 11)


@pytest.mark.parametrize("overrides, key", [({"member_count": 0}, "scenario.members"),
                                            ({"seed": -1}, "scenario.seed")])
def test_invalid_overrides(load, overrides, key) -> None:
    with pytest.raises(ScenarioError) as caught:
        load(MINIMAL, **overrides)
    assert caught.value.key == key


# ------------------------------------------------------------------- parameters, shapes


def test_parameter_forms_and_annotations(load) -> None:
    text = edit(MINIMAL, "gamma = 0.1", """gamma = { value = 0.2, units = "1/day", description = "recovery" }
R0 = { dist = "normal", mean = 2, sd = 0.5, low = 1 }
pick = { dist = "choice", values = [1, 2, 4], weights = [1, 1, 2] }
decay = "exp(-t / 30)"
""")
    parameters = load(text).parameters
    gamma = parameters["gamma"]
    assert isinstance(gamma.form, Fixed) and gamma.form.value == 0.2
    assert (gamma.units, gamma.description) == ("1/day", "recovery")
    assert parameters["R0"].form.truncation == (1.0, None)
    assert parameters["pick"].form.arguments == {"values": (1.0, 2.0, 4.0),
                                                 "weights": (1.0, 1.0, 2.0)}
    assert isinstance(parameters["decay"].form, Derived)
    assert parameters["decay"].form.expression.names == {"t"}
    assert list(parameters) == ["beta", "gamma", "R0", "pick", "decay"]


def test_fixed_family_is_refused_with_the_number_as_hint(load) -> None:
    """A constant is a number; a table with dist = "fixed" is refused, and the hint shows
    how to write it (the number, or a table with value and units)."""
    text = edit(MINIMAL, "gamma = 0.1", 'gamma = { dist = "fixed", value = 0.2 }')
    with pytest.raises(ScenarioError) as caught:
        load(text)
    assert (caught.value.key, caught.value.value) == ("parameters.gamma.dist", "fixed")
    assert "gamma = 0.2" in caught.value.hint and "value = 0.2" in caught.value.hint


def test_annotated_constants(load) -> None:
    """A table with value and no dist is a constant with units and a description, a
    number or one number per group."""
    text = edit(GROUPED, 'susceptibility = [0.8, 1.2]',
                'susceptibility = { value = [0.8, 1.2], units = "1", description = "relative" }')
    susceptibility = load(text).parameters["susceptibility"]
    assert isinstance(susceptibility.form, Fixed) and susceptibility.shape == "vector"
    assert susceptibility.form.value == (0.8, 1.2)
    assert (susceptibility.units, susceptibility.description) == ("1", "relative")


def test_grouped_shapes(load) -> None:
    text = edit(GROUPED, 'susceptibility = [0.8, 1.2]',
                'susceptibility = [0.8, 1.2]\nforce = "contacts @ susceptibility"\n'
                'total = "sum(susceptibility)"\n'
                'draw = { dist = "uniform", low = 0, high = 1, per_group = true }')
    scenario = load(text)
    shapes = {name: p.shape for name, p in scenario.parameters.items()}
    assert shapes == {"beta": "scalar", "gamma": "scalar", "susceptibility": "vector",
                      "force": "vector", "total": "scalar", "draw": "vector"}
    assert scenario.model.initial["I"] == (3.0, 2.0)
    assert scenario.model.population == (600.0, 400.0)
    assert scenario.model.flows[0].rate.shape == "vector"
    assert scenario.model.matrices["contacts"] == ((3.0, 1.0), (1.0, 2.0))


def test_initial_expression_and_exclusion_from_N(load) -> None:
    text = edit(MINIMAL, 'compartments = ["S", "I", "R"]', 'compartments = ["S", "I", "R", "D"]',
                'initial = { S = "rest", I = 5 }',
                'initial = { S = "rest", I = "seed" }\nexclude_from_N = ["D"]',
                "gamma = 0.1", 'gamma = 0.1\nseed = { dist = "uniform", low = 1, high = 9 }')
    model = load(text).model
    assert isinstance(model.initial["I"], Expression) and model.initial["D"] == 0.0
    assert model.exclude_from_N == ("D",)


@pytest.mark.parametrize("name", ["t", "N", "pi", "rest", "exp", "sum", "lambda", "None",
                                  "import", "match"])
def test_reserved_names_are_refused_as_compartments(load, name) -> None:
    assert name in RESERVED
    error = error_of(load, edit(MINIMAL, '["S", "I", "R"]', f'["S", "I", "R", "{name}"]'))
    assert error.key == "model.compartments[3]" and "reserved" in error.message


def test_a_parameter_and_a_matrix_share_the_namespace(load) -> None:
    error = error_of(load, edit(GROUPED, "gamma = 0.1", "gamma = 0.1\ncontacts = 2"))
    assert error.key == "parameters.contacts" and "matrix" in error.message


def test_time_varying_parameter_in_initial_values(load) -> None:
    text = edit(MINIMAL, 'I = 5', 'I = "seed"', "gamma = 0.1",
                'gamma = 0.1\nseed = { schedule = [[0, 5.0], [2, 6.0]] }')
    error = error_of(load, text)
    assert error.key == "model.initial.I" and "constant in time" in error.message


def test_variant_that_makes_an_initial_value_vary_in_time(load) -> None:
    text = edit(MINIMAL, 'I = 5', 'I = "seed"', "gamma = 0.1", "gamma = 0.1\nseed = 5")
    text += '\n[[variants]]\nname = "v"\nparameters = { seed = { schedule = [[0, 5.0], [2, 6.0]] } }\n'
    error = error_of(load, text)
    assert error.key == "variants[0].parameters.seed" and "model.initial.I" in error.message


def test_variant_overrides(load) -> None:
    text = GROUPED + """
[[variants]]
name = "calm"
title = "Fewer contacts"
parameters = { beta = { dist = "uniform", low = 0.01, high = 0.02 }, susceptibility = "0.5 + 0 * contacts @ susceptibility_base" }
matrices = { contacts = [[1.0, 0.5], [0.5, 1.0]] }
"""
    error = error_of(load, text)
    assert error.key == "variants[0].parameters.susceptibility"
    assert "susceptibility_base" in error.message
    text = edit(text, "0.5 + 0 * contacts @ susceptibility_base", "0.5 * contacts @ [1, 1]")
    assert error_of(load, text).key == "variants[0].parameters.susceptibility"
    text = edit(text, '"0.5 * contacts @ [1, 1]"', "[0.4, 0.6]")
    variant = load(text).variants[0]
    assert (variant.name, variant.title) == ("calm", "Fewer contacts")
    assert set(variant.parameters) == {"beta", "susceptibility"}
    assert variant.parameters["susceptibility"].form == Fixed((0.4, 0.6))
    assert variant.matrices["contacts"] == ((1.0, 0.5), (0.5, 1.0))


def test_schedule_with_expression_values(load) -> None:
    text = edit(MINIMAL, "beta = 0.3",
                'beta = { schedule = [[0, "base"], [5, "base * relief"]], between = "linear" }'
                '\nbase = 0.3\nrelief = { dist = "uniform", low = 0.5, high = 0.9 }')
    form = load(text).parameters["beta"].form
    assert isinstance(form, Schedule) and form.between == "linear"
    assert [v.text for v in form.values] == ["base", "base * relief"]
    text = edit(text, '"base * relief"', '"base * t"')
    assert "cannot be used in a schedule value" in error_of(load, text).message


# ------------------------------------------------------------------------ distributions


@pytest.mark.parametrize("mean", [0.1, 0.5, 0.93])
def test_beta_sd_bound(load, mean: float) -> None:
    """A distribution on [0, 1] with mean m has variance at most m (1 - m) (Bhatia & Davis
    2000, "A better bound on the variance", Amer. Math. Monthly 107(4):353-357); the
    beta's method-of-moments shapes a = m nu, b = (1 - m) nu with
    nu = m (1 - m) / sd^2 - 1 are positive exactly below that bound."""
    bound = math.sqrt(mean * (1 - mean))

    def beta(sd: float) -> str:
        return edit(MINIMAL, "gamma = 0.1",
                    f'gamma = {{ dist = "beta", mean = {mean!r}, sd = {sd!r} }}')
    assert load(beta(bound * 0.999)).parameters["gamma"].form.arguments["sd"] == bound * 0.999
    assert error_of(load, beta(bound * 1.001)).key == "parameters.gamma.sd"


@pytest.mark.parametrize("form, key", [
    ('{ dist = "gamma", mean = 0, sd = 1 }', "parameters.gamma.mean"),
    ('{ dist = "lognormal", mean = 2, sd = -1 }', "parameters.gamma.sd"),
    ('{ dist = "lognormal", mean = 2, sd = 1, high = -1 }', "parameters.gamma.high"),
    ('{ dist = "beta", mean = 1.2, sd = 0.1 }', "parameters.gamma.mean"),
    ('{ dist = "triangular", low = 1, mode = 1, high = 1 }', "parameters.gamma.high"),
    ('{ dist = "choice", values = [1, 2], weights = [0, 0] }', "parameters.gamma.weights"),
    ('{ dist = "choice", values = [1, 2], weights = [1, -1] }', "parameters.gamma.weights[1]"),
    ('{ dist = "uniform", low = 1, high = 2, mean = 3 }', "parameters.gamma.mean"),
    ('{ low = 1, high = 2 }', "parameters.gamma"),
])
def test_impossible_distribution_arguments(load, form: str, key: str) -> None:
    assert error_of(load, edit(MINIMAL, "gamma = 0.1", f"gamma = {form}")).key == key


# -------------------------------------------------------------------------------- errors


def test_error_names_file_key_value_and_hint(load, tmp_path: Path) -> None:
    error = error_of(load, edit(MINIMAL, '"gamma * I"', '"gama * I"'))
    assert (error.file, error.key, error.value) == (str(tmp_path / "scenario.toml"),
                                                    "model.flows[1].rate", "gama * I")
    assert error.hint == "did you mean 'gamma'?"
    assert str(error) == (f"{tmp_path / 'scenario.toml'}: model.flows[1].rate: unknown "
                          "name 'gama' (value: 'gama * I'); did you mean 'gamma'?")


def test_independent_errors_are_reported_together(load) -> None:
    text = edit(MINIMAL, "days = 10", "days = 10\nmembers = 0",
                "gamma = 0.1", 'gamma = { dist = "normal", mean = 1, sd = 0 }')
    text += '\n[solver]\nmethod = "rk-4"\n\n[output]\ncompression = 11\n'
    with pytest.raises(ScenarioErrors) as caught:
        load(text)
    keys = [e.key for e in caught.value.errors]
    assert keys == ["scenario.members", "solver.method", "parameters.gamma.sd",
                    "output.compression"]
    assert str(caught.value).count("\n") == 3


def test_rates_are_checked_beside_a_broken_parameter(load) -> None:
    """A rate using the broken parameter is not checked again; the others are."""
    text = edit(MINIMAL, "gamma = 0.1", 'gamma = { dist = "normal", mean = 1, sd = 0 }',
                '"beta * S * I / N"', '"bta * S * I / N"')
    with pytest.raises(ScenarioErrors) as caught:
        load(text)
    errors = caught.value.errors
    assert [e.key for e in errors] == ["parameters.gamma.sd", "model.flows[0].rate"]
    assert errors[1].hint == "did you mean 'beta'?"


def test_toml_syntax_error_gives_line_and_column(load) -> None:
    error = error_of(load, MINIMAL.replace("days = 10", "days = = 10"))
    assert error.key == "" and "line 4, column" in error.message


# --------------------------------------------------------------------- warnings, check


def test_warnings(load) -> None:
    text = edit(MINIMAL, "days = 10", "days = 10\nmembers = 1000",
                "gamma = 0.1", 'gamma = { dist = "uniform", low = 0.05, high = 0.2 }')
    assert scenario_warnings(load(text)) == []
    sobol = text + '\n[sampling]\nmethod = "sobol"\n'
    warnings = scenario_warnings(load(sobol))
    assert len(warnings) == 1 and "power of two" in warnings[0] and "1024" in warnings[0]
    assert scenario_warnings(load(sobol, member_count=1024)) == []
    few = scenario_warnings(load(text, member_count=20))
    assert len(few) == 1 and "20 member" in few[0]


def test_warnings_on_initial_values_and_late_schedule_days(load) -> None:
    text = edit(MINIMAL, "days = 10", "days = 10\nmembers = 128",
                'S = "rest", I = 5', 'S = "susceptible", I = 5',
                "gamma = 0.1", 'gamma = { dist = "uniform", low = 0.05, high = 0.2 }\n'
                'susceptible = { dist = "uniform", low = 990, high = 996 }\n'
                'beta_scale = { schedule = [[0, 1.0], [8, 0.5], [12, 0.2], [20, 0.1]] }')
    warnings = scenario_warnings(load(text))
    assert len(warnings) == 2
    assert "no \"rest\"" in warnings[0]
    assert warnings[1].startswith("parameters.beta_scale: schedule day(s) 12, 20 fall after")


@pytest.mark.parametrize("name", ["seir-demo", "age-seir", "seirs-seasonal"])
def test_demo_scenarios_pass_check(name: str) -> None:
    path = SCENARIOS / f"{name}.toml"
    assert path.read_text(encoding="utf-8").startswith("# Illustrative")
    result = CliRunner().invoke(app, ["check", str(path)])
    assert result.exit_code == 0, result.output
    scenario = load_scenario(path)
    for label in [*scenario.model.compartments, *(f.name for f in scenario.model.flows),
                  *scenario.parameters, *(v.name for v in scenario.variants),
                  scenario.solver.method, scenario.output.path]:
        assert label in result.stdout
    assert "warnings" not in result.stdout


def test_check_prints_warnings(tmp_path: Path) -> None:
    path = tmp_path / "few.toml"
    path.write_text(MINIMAL, encoding="utf-8")
    result = CliRunner().invoke(app, ["check", str(path)])
    assert result.exit_code == 0
    assert "warnings\n  - only 1 member(s)" in result.stdout
