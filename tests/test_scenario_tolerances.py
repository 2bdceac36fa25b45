"""Tolerances made for persons, used on proportions, are warned of; an observed order far
below the method's fails the step check (the project's reference: ``[solver.check]`` and
the status bits).

The models are invented, illustrative SEIR settings given as proportions of a population
of 1.  The trapezoid rule has order 2 (Hairer, Norsett & Wanner 1993, *Solving Ordinary
Differential Equations I*, sec. II.7, cited from memory); in a stiff initial layer (a
latent period of minutes against a step of six hours) it does not reach that order, which
Richardson's estimate assumes.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from ensemble import api
from ensemble.integrate.chunk import integrate_chunk
from ensemble.records import STEP_CHECK_FAILED
from ensemble.run.layout import lowered_models
from ensemble.sampling import make_design
from support import load_text, run_cli, write_scenario

PROPORTIONS = """
[scenario]
name = "proportions"
days = 20
members = 4

[model]
compartments = ["S", "E", "I", "R"]
population = 1
initial = {{ S = "rest", E = 0.005, I = 0.001 }}

[[model.flows]]
from = "S"
to = "E"
rate = "beta * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I / 5"

[parameters]
beta = 0.4
latent_days = {latent}

[solver]
method = "trapezoid"
step = 0.25
{check}
"""


def proportions(tmp_path: Path, latent: str = "3.0", check: str = "") -> str:
    return PROPORTIONS.format(latent=latent, check=check)


def test_tolerances_for_persons_on_proportions_are_warned_of(tmp_path: Path) -> None:
    """With a population of 1 the default atol (0.01 persons) is 1 % of everyone and 10
    times the smallest initial state, and the default Newton tolerance 1e-5: check warns
    and suggests 1e-6 (a millionth of the population, a thousandth of the smallest
    initial state) and 1e-9."""
    path = tmp_path / "proportions.toml"
    path.write_text(proportions(tmp_path))
    warnings = api.scenario_warnings(api.load_scenario(path))
    atol = [w for w in warnings if w.startswith("solver.check.atol = 0.01")]
    newton = [w for w in warnings if "Newton tolerance 1e-05" in w]
    assert len(atol) == 1 and "use about 1e-06" in atol[0]
    assert len(newton) == 1 and "solver.newton.tol to about 1e-09" in newton[0]
    shown = run_cli("check", path, cwd=tmp_path)
    assert shown.returncode == 0, shown.stderr
    assert "solver.check.atol = 0.01 is not small" in shown.stdout


def test_suggested_tolerances_are_not_warned_of(tmp_path: Path) -> None:
    """The suggestions silence the warnings, and a town of persons with the defaults has
    none."""
    fixed = proportions(tmp_path, check="check = { atol = 1e-6 }\nnewton = { tol = 1e-9 }")
    scenario = load_text(tmp_path, fixed, name="fixed")
    assert not [w for w in api.scenario_warnings(scenario) if "tolerance" in w
                or "atol" in w]
    town = api.load_scenario(write_scenario(tmp_path, method="trapezoid"))
    assert not [w for w in api.scenario_warnings(town) if "tolerance" in w or "atol" in w]


def chunk_of(tmp_path: Path, latent: str, name: str, newton: str = ""):
    """Every member of the proportions model with three check levels (and the
    ``newton`` table given), integrated by the numpy reference."""
    solver = "check = { levels = 3 }\n" + (f"newton = {newton}" if newton else "")
    scenario = load_text(tmp_path, proportions(tmp_path, latent, solver), name=name)
    model = lowered_models(scenario)[0]
    design = make_design(scenario, scenario.variants[0], model, np.arange(4))
    return integrate_chunk(model, design, scenario.solver, scenario.n_reports, "numpy")


def test_an_order_far_below_the_methods_fails_the_step_check(tmp_path: Path) -> None:
    """In a stiff initial layer the trapezoid rule's observed order is far below 2 while
    the scaled error passes (the default atol is loose here): the member fails the step
    check.  Without the layer, and with a Newton tolerance small enough that the runs'
    differences are not Newton noise, the same step observes order 2 and passes."""
    stiff = chunk_of(tmp_path, '{ dist = "uniform", low = 0.002, high = 0.004 }', "stiff")
    assert (stiff.step_error <= 1).all(), "the error estimate alone would pass"
    assert (stiff.observed_order < 1).all()
    assert (stiff.status & STEP_CHECK_FAILED).all()
    smooth = chunk_of(tmp_path, "3.0", "smooth", newton="{ tol = 1e-12 }")
    assert smooth.observed_order == pytest.approx(2.0, abs=0.1)
    assert (smooth.status == 0).all()
