"""Parts of expressions made of numbers alone are folded as the integrators fold them, and
a value that is not a finite number is refused before anything runs (exit status 2 from
``ensemble check`` and ``ensemble run``, naming the key).

The values expected are IEEE 754 double arithmetic as numpy computes it (10 ** 10 ** 10
overflows to inf, 0 / 0 is NaN, log(0) is -inf; IEEE 754-2019, sec. 7).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from ensemble import api
from ensemble.errors import ScenarioError
from ensemble.model.constant_parts import refuse_non_finite_constants
from support import REPO, load_text, run_cli

BASE = """
[scenario]
name = "numbers-town"
days = 10

[model]
compartments = ["S", "I", "R"]
population = 1000
initial = {{ S = "rest", I = {initial} }}

[[model.flows]]
from = "S"
to = "I"
rate = "beta * S * I / N"

[[model.flows]]
from = "I"
to = "R"
rate = "{recovery}"

[parameters]
beta = 0.3
gamma = 0.1
scale = "{scale}"
"""


def scenario_text(recovery: str = "gamma * I", scale: str = "2 * gamma",
                  initial: str = "5") -> str:
    """An illustrative SIR town (invented numbers) with the given parts."""
    return BASE.format(recovery=recovery, scale=scale, initial=initial)


@pytest.mark.parametrize("where, text, key, shown", [
    ("recovery", "gamma * I * 10 ** 10 ** 10", "model.flows[1].rate", "10 ** (10 ** 10)"),
    ("recovery", "gamma * I * exp(1000)", "model.flows[1].rate", "exp(1000)"),
    ("scale", "gamma * (0 / 0)", "parameters.scale", "0 / 0"),
    ("initial", "\"5 + log(0)\"", "model.initial.I", "log(0)"),
], ids=["power-overflows", "exp-overflows", "nan", "minus-infinity"])
def test_a_non_finite_number_part_is_refused(tmp_path: Path, where: str, text: str,
                                             key: str, shown: str) -> None:
    scenario = load_text(tmp_path, scenario_text(**{where: text}))
    with pytest.raises(ScenarioError) as refused:
        refuse_non_finite_constants(scenario)
    assert refused.value.key == key
    assert shown in refused.value.message


def test_finite_number_parts_and_the_demo_scenarios_pass(tmp_path: Path) -> None:
    """Parts that fold to finite numbers (and names that only a member's values make
    large) are left alone."""
    scenario = load_text(tmp_path, scenario_text(recovery="gamma * I * 10 ** 2 ** 3",
                                                 scale="gamma * 1e300 * 1e300"))
    refuse_non_finite_constants(scenario)
    for path in sorted((REPO / "scenarios").glob("*.toml")):
        refuse_non_finite_constants(api.load_scenario(path))


def test_run_refuses_before_writing(tmp_path: Path) -> None:
    """``ensemble run`` exits 2 naming the key, and writes nothing."""
    path = tmp_path / "numbers.toml"
    path.write_text(scenario_text(recovery="gamma * I * 10 ** 10 ** 10"))
    done = run_cli("run", path, "--workers", "0", "-o", "result.nc", cwd=tmp_path)
    assert done.returncode == 2, done.stderr
    assert "model.flows[1].rate" in done.stderr and "Traceback" not in done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["numbers.toml"]
