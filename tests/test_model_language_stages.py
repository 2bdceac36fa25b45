"""Compartments with stages (the linear chain trick): Erlang dwell times, against
``scipy.stats.gamma`` and the growth-rate relation of Wearing, Rohani & Keeling 2005.

Every setting here is invented and illustrative.  Expected values are computed in this
file from the published formulas named beside each check, with scipy.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.optimize import brentq

from ensemble.errors import ScenarioError
from ensemble.integrate.reference import integrate_fixed
from support import integrate_members, load_text, model_and_design


def dwell_text(stages: int, initial: str, extra_flow: str = "", step: float = 0.01) -> str:
    return f"""
    [scenario]
    name = "dwell"
    days = 20
    members = 1

    [model]
    compartments = ["A", "X", "Y"]
    population = 1000
    initial = {initial}
    stages = {{ X = {stages} }}

    [[model.flows]]
    from = "X"
    to = "Y"
    rate = "X / mean_days"
    {extra_flow}

    [parameters]
    mean_days = 4.0

    [solver]
    method = "rk4"
    step = {step}
    report_every = 0.5
    check = {{ enabled = false }}
    """


@pytest.mark.parametrize("stages", [1, 2, 5])
def test_time_spent_by_those_present_at_the_start(tmp_path, stages) -> None:
    """Persons present at the start are shared equally between the k stages, so the
    share still in X at t is (1/k) sum_j P(Erlang(j, rate k / d) > t): scipy.stats.gamma
    with shape j and scale d / k (Hurtado & Kirosingh 2019, J. Math. Biol.
    79:1831-1883, the linear chain trick)."""
    scenario = load_text(tmp_path, dwell_text(stages, '{ X = 1000 }'))
    model, result = integrate_members(scenario)
    times = np.array([float(t) for t in scenario.report_times()])
    expected = np.mean([stats.gamma(j, scale=4.0 / stages).sf(times)
                        for j in range(1, stages + 1)], axis=0) * 1000
    np.testing.assert_allclose(result.state[0, model.compartments.index("X")], expected,
                               rtol=1e-8, atol=1e-8)


@pytest.mark.parametrize("stages", [1, 3, 6])
def test_flows_in_enter_the_first_stage_and_leave_after_an_erlang_time(tmp_path,
                                                                       stages) -> None:
    """A enters X at rate a A, so the time from the start until a person reaches Y is
    Exp(a) + Erlang(k, mean d): Y(t) / N = integral_0^t a e^(-a s) G(t - s) ds with G
    the CDF of scipy.stats.gamma(k, scale=d / k), integrated by scipy.integrate.quad."""
    scenario = load_text(tmp_path, dwell_text(stages, '{ A = 1000 }', """
    [[model.flows]]
    from = "A"
    to = "X"
    rate = "0.7 * A"
    """))
    model, result = integrate_members(scenario)
    erlang = stats.gamma(stages, scale=4.0 / stages)
    for k, t in enumerate(scenario.report_times()):
        t = float(t)
        reached, _ = integrate.quad(lambda s: 0.7 * np.exp(-0.7 * s) * erlang.cdf(t - s),
                                    0, t, epsabs=1e-13, epsrel=1e-12)
        assert result.state[0, model.compartments.index("Y"), k] == pytest.approx(
            1000 * reached, rel=1e-7, abs=1e-8)


def test_two_ways_out_share_those_who_leave(tmp_path) -> None:
    """Two flows out of a staged X at rates X/4 and 3X/4 (per-capita 1/4 and 3/4): the
    dwell time is Erlang(3) with mean 1 (the total rate 1), and a quarter of those who
    leave take the first way (competing exits; scipy.stats.gamma)."""
    text = dwell_text(3, '{ X = 1000 }', """
    [[model.flows]]
    name = "other"
    from = "X"
    to = "A"
    rate = "3 * X / mean_days"
    """)
    scenario = load_text(tmp_path, text)
    model, result = integrate_members(scenario)
    times = np.array([float(t) for t in scenario.report_times()])
    left = 1000 - 1000 * np.mean([stats.gamma(j, scale=1 / 3).sf(times) for j in (1, 2, 3)],
                                 axis=0)
    y, a = (result.state[0, model.compartments.index(c)] for c in ("Y", "A"))
    np.testing.assert_allclose(y, left / 4, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(a, 3 * left / 4, rtol=1e-8, atol=1e-8)


def wearing_r0(r: float, sigma: float, m: int, gamma: float, n: int) -> float:
    """R0 of an SEIR with m latent stages (mean 1/sigma) and n infectious stages (mean
    1/gamma) whose infections grow at rate r: R0 = r (1 + r / (m sigma))^m /
    (gamma (1 - (1 + r / (n gamma))^-n)) (Wearing, Rohani & Keeling 2005, PLoS Med.
    2:e174, eq. 3.3 as recalled from memory; m = n = 1 gives (1 + r/sigma)(1 + r/gamma),
    n -> infinity gives a fixed infectious period)."""
    return r * (1 + r / (m * sigma)) ** m / (gamma * (1 - (1 + r / (n * gamma)) ** -n))


@pytest.mark.parametrize("latent, infectious", [(1, 1), (2, 3), (4, 2)])
def test_staged_seir_grows_at_the_rate_of_wearing_rohani_keeling(tmp_path, latent,
                                                                infectious) -> None:
    """Early growth rate of a staged SEIR with R0 = beta / gamma = 2.5, latent mean 3
    days and infectious mean 5 days: the slope of log(E + I) while the susceptibles are
    untouched, against the r that solves the Wearing-Rohani-Keeling relation."""
    text = f"""
    [scenario]
    name = "growth"
    days = 60
    members = 1

    [model]
    compartments = ["S", "E", "I", "R"]
    population = 1e12
    initial = {{ S = "rest", I = 1 }}
    stages = {{ E = {latent}, I = {infectious} }}

    [[model.flows]]
    from = "S"
    to = "E"
    rate = "2.5 / 5 * S * I / N"

    [[model.flows]]
    from = "E"
    to = "I"
    rate = "E / 3"

    [[model.flows]]
    from = "I"
    to = "R"
    rate = "I / 5"

    [solver]
    step = 0.05
    check = {{ enabled = false }}
    """
    scenario = load_text(tmp_path, text)
    model, result = integrate_members(scenario)
    infected = sum(result.state[0, model.compartments.index(c)] for c in ("E", "I"))
    slope = (np.log(infected[60]) - np.log(infected[45])) / 15
    expected = brentq(lambda r: wearing_r0(r, 1 / 3, latent, 1 / 5, infectious) - 2.5,
                      1e-6, 5.0, xtol=1e-14)
    assert slope == pytest.approx(expected, rel=1e-6)


def test_show_stages_reports_each_stage_and_their_sum(tmp_path) -> None:
    """With show_stages the result lists X:1 .. X:3 after the compartments, and X is
    their sum (the definition of a staged compartment's count)."""
    text = dwell_text(3, '{ X = 1000 }') + "\n    [output]\n    show_stages = true\n"
    scenario = load_text(tmp_path, text)
    model, result = integrate_members(scenario)
    assert model.compartments == ("A", "X", "Y", "X:1", "X:2", "X:3")
    assert model.flows == ("X_to_Y", "X:1_to_X:2", "X:2_to_X:3")
    stages = result.state[0, 3:6]
    np.testing.assert_allclose(result.state[0, 1], stages.sum(axis=0), rtol=1e-14)
    assert np.allclose(stages[:, 0], 1000 / 3)


@pytest.mark.slow
def test_both_backends_agree_on_a_staged_model_with_flows_between_groups(tmp_path) -> None:
    """The compiled kernels and the numpy reference integrate the same states and flow
    elements (their semantics are the reference's, ``ensemble/integrate/reference.py``):
    to 1e-12 relative, with the trapezoid rule and with rk4."""
    from ensemble.integrate.kernels.launch import integrate_fixed_compiled
    from ensemble.methods import METHODS

    scenario = load_text(tmp_path, GROUPED_STAGED)
    model, design = model_and_design(scenario)
    for method in ("rk4", "trapezoid"):
        arguments = (model, design, METHODS[method], 0.25, 4, scenario.n_reports,
                     scenario.solver.newton, 0.01)
        reference, compiled = integrate_fixed(*arguments), integrate_fixed_compiled(*arguments)
        scale = np.maximum(np.abs(reference.state), 1.0)
        assert np.max(np.abs(compiled.state - reference.state) / scale) <= 1e-12
        counts = np.abs(compiled.flow_count[..., 1:] - reference.flow_count[..., 1:])
        assert np.max(counts / np.maximum(np.abs(reference.flow_count[..., 1:]), 1.0)) <= 1e-12
        assert np.array_equal(compiled.status, reference.status)


GROUPED_STAGED = """
[scenario]
name = "grouped-staged"
days = 30
members = 6
seed = 4

[model]
compartments = ["S", "E", "I", "R"]
groups = ["young", "old"]
population = [6000, 4000]
initial = { S = "rest", I = [10, 2] }
stages = { E = 3, I = 2 }

[model.matrices]
contacts = [[4.0, 1.5], [1.5, 2.0]]
ageing = [[0.0, 0.002], [0.0, 0.0]]

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * S * (contacts @ (I / N))"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I / 5"

[[model.flows]]
name = "ageing_S"
from = "S"
to = "S"
rate = "diag(S) @ ageing"

[[model.flows]]
name = "ageing_E"
from = "E"
to = "E"
rate = "diag(E) @ ageing"

[[model.flows]]
name = "births"
to = "S"
group = "young"
rate = "0.0001 * sum(N)"

[[model.flows]]
from = "R"
rate = "0.0001 * R"

[parameters]
beta = { dist = "uniform", low = 0.05, high = 0.1 }
latent_days = { dist = "gamma", mean = 3.0, sd = 0.5 }
"""


@pytest.mark.parametrize("flow, message", [
    ('rate = "min(X, 3.0)"', "proportional to X"),
    ('rate = "X * X / 1000"', "proportional to X"),
    ('rate = "X / (X + 1)"', "proportional to X"),
])
def test_a_rate_out_of_a_staged_compartment_must_be_proportional(tmp_path, flow,
                                                                 message) -> None:
    text = dwell_text(2, '{ X = 1000 }').replace('rate = "X / mean_days"', flow)
    with pytest.raises(ScenarioError) as error:
        load_text(tmp_path, text)
    assert error.value.key == "model.flows[0].rate"
    assert message in str(error.value)


@pytest.mark.parametrize("stages, key", [
    ("{ Q = 2 }", "model.stages.Q"), ("{ X = 0 }", "model.stages.X"),
    ("{ X = 2.5 }", "model.stages.X"), ("{ X = 65 }", "model.stages.X"),
])
def test_bad_stages_name_the_key(tmp_path, stages, key) -> None:
    text = dwell_text(2, '{ X = 1000 }').replace("stages = { X = 2 }", f"stages = {stages}")
    with pytest.raises(ScenarioError) as error:
        load_text(tmp_path, text)
    assert error.value.key == key


def test_stages_without_a_way_out_are_warned_of(tmp_path) -> None:
    from ensemble.scenario.load import scenario_warnings

    text = dwell_text(3, '{ X = 1000 }').replace("stages = { X = 3 }",
                                                 "stages = { X = 3, Y = 2 }")
    warnings = scenario_warnings(load_text(tmp_path, text))
    assert any(w.startswith("model.stages.Y: no flow leaves Y") for w in warnings)
    assert not any("model.stages.X" in w for w in warnings)
