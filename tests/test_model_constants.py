"""Values constant in time (derived parameters, initial counts) mean what the same
expression means in a rate: both are lowered to the one IR and evaluated by the same
numpy evaluator.

The expected numbers are sums written out by hand from the scenario below (invented
numbers); the IEEE 754 values they differ from are noted beside them.
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemble.model import RateFunctions
from support import load_text, model_and_design

STRUCTURAL_ZERO = """
[scenario]
name = "structural-zero"
days = 1
members = 8

[model]
compartments = ["S", "I"]
groups = ["a", "b"]
population = [100, 100]
initial = {{ S = "rest", I = {initial} }}

[model.matrices]
contacts = [[0.0, 0.99], [0.5, 0.5]]

[[model.flows]]
from = "S"
to = "I"
rate = "{rate}"

[parameters]
q = [1.0, 2.0]
pressure = "contacts @ (1 / (q - 1))"
wobble = {{ dist = "uniform", low = 0.5, high = 1.5 }}
mixed = "{mixed}"
"""


def scenario_with(tmp_path, rate: str = "S * (contacts @ (1 / (q - 1)))",
                  mixed: str = "wobble", initial: str = "[1, 1]"):
    return load_text(tmp_path, STRUCTURAL_ZERO.format(rate=rate, mixed=mixed,
                                                      initial=initial), "structural-zero")


def design_and_rates(scenario):
    model, design = model_and_design(scenario)
    s = np.empty((0, scenario.member_count))
    rates = RateFunctions(model).rates(0.0, design.initial, design.parameters, s)
    return model, design, rates


def test_zero_contact_times_infinity_is_the_same_in_a_rate_and_a_derived_parameter(tmp_path):
    """``contacts @ (1 / (q - 1))`` with contacts[a][a] = 0 and q[a] = 1: by hand, row a is
    0.99 * 1 / (2 - 1) = 0.99 with the structural zero left out (IEEE arithmetic would
    give 0 * inf + 0.99 = NaN), row b is 0.5 * inf + 0.5 = inf.  The derived parameter
    and the rate agree."""
    model, design, rates = design_and_rates(scenario_with(tmp_path))
    pressure = design.reported["pressure"]
    assert pressure.shape == (2, 8)
    assert np.all(pressure[0] == 0.99)
    assert np.all(np.isposinf(pressure[1]))
    susceptible = design.initial[model.state_labels.index("S[a]")]
    assert np.all(susceptible == 99.0)
    assert np.array_equal(rates[0], susceptible * pressure[0])
    assert np.array_equal(rates[0], np.full(8, 99.0 * 0.99))


def test_initial_counts_use_the_same_meaning(tmp_path):
    """An initial count written with the same expression: I[a] = 0.99 (by hand, as
    above), so S[a] = 100 - 0.99; I[b] is infinite, an impossible start."""
    _, design, _ = design_and_rates(scenario_with(
        tmp_path, initial='"contacts @ (1 / (q - 1))"'))
    assert np.all(design.invalid_start)
    assert np.all(np.isnan(design.initial))
    _, design, _ = design_and_rates(scenario_with(
        tmp_path, initial='"min(contacts @ (1 / (q - 1)), 5)"'))
    assert not design.invalid_start.any()
    np.testing.assert_array_equal(design.initial[:, 0], [100 - 0.99, 95.0, 0.99, 5.0])


@pytest.mark.parametrize("expression", [
    "sum(contacts @ (wobble / q))",
    "exp(-wobble) + log(wobble) * sqrt(wobble) - abs(wobble - 1) ** 1.5",
    "sin(pi * wobble) / cos(wobble) + max(wobble, 1) - min(wobble, 1)",
    "sum((2 * contacts - contacts / wobble) @ (q * wobble))",
    "1 / (wobble - wobble)",
])
def test_a_derived_parameter_equals_the_same_rate_bit_for_bit(tmp_path, expression):
    """The rate ``expression`` and the derived parameter ``mixed = expression`` give the
    same bits for every member: one meaning of every operation."""
    rate = f"{expression} * (S * 0 + 1)"
    _, design, rates = design_and_rates(scenario_with(
        tmp_path, rate=rate, mixed=expression))
    mixed = design.reported["mixed"]
    assert mixed.shape == (8,)
    assert np.array_equal(rates[0], mixed, equal_nan=True)
    assert np.array_equal(rates[1], mixed, equal_nan=True)
