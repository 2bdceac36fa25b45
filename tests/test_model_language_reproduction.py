"""The basic reproduction number R0 by the next-generation matrix, against closed forms.

Every setting here is invented and illustrative.  Each expected value is computed in this
file from the published closed form named beside its check; the next-generation
construction follows van den Driessche & Watmough 2002 (Math. Biosci. 180:29-48).
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from ensemble import api
from ensemble.model.reproduction import NextGeneration, infected_compartments
from support import load_text, model_and_design

MEMBERS = 6


def members_r0(scenario, variant: int = 0):
    _, design = model_and_design(scenario, variant)
    return design.basic_reproduction_number, design.reported


def seir_text(extra_flows: str = "", parameters: str = "", model: str = "",
              infection: str = "beta * S * I / N") -> str:
    return f"""
    [scenario]
    name = "reproduction"
    days = 10
    members = {MEMBERS}
    seed = 8

    [model]
    compartments = ["S", "E", "I", "R"]
    population = 10000
    initial = {{ S = "rest", E = 5, I = 10, R = 300 }}
    {model}

    [[model.flows]]
    name = "infection"
    from = "S"
    to = "E"
    rate = "{infection}"

    [[model.flows]]
    from = "E"
    to = "I"
    rate = "sigma * E"

    [[model.flows]]
    from = "I"
    to = "R"
    rate = "gamma * I"
    {extra_flows}

    [parameters]
    beta = {{ dist = "uniform", low = 0.2, high = 0.6 }}
    sigma = {{ dist = "uniform", low = 0.2, high = 0.5 }}
    gamma = {{ dist = "uniform", low = 0.1, high = 0.3 }}
    {parameters}
    """


def test_sir_and_seir_r0_is_beta_over_gamma(tmp_path) -> None:
    """R0 = beta / gamma for the SIR and SEIR models without vital dynamics (Hethcote
    2000, SIAM Review 42:599-653, sec. 2), at the disease-free start where S = N (the
    compartment that takes the rest takes the infected back; R is kept)."""
    scenario = load_text(tmp_path, seir_text())
    r0, drawn = members_r0(scenario)
    susceptible_share = (10000 - 300) / 10000
    np.testing.assert_allclose(r0, drawn["beta"] / drawn["gamma"] * susceptible_share,
                               rtol=1e-13)
    sir = load_text(tmp_path, seir_text().replace("E = 5, ", "").replace(
        'to = "E"', 'to = "I"').replace('from = "E"\n    to = "I"\n    rate = "sigma * E"',
                                        'from = "E"\n    to = "R"\n    rate = "sigma * E"'))
    r0, drawn = members_r0(sir)
    np.testing.assert_allclose(r0, drawn["beta"] / drawn["gamma"] * susceptible_share,
                               rtol=1e-13)


def test_seir_with_births_and_deaths(tmp_path) -> None:
    """SEIR with births mu N into S and deaths mu from every compartment: R0 =
    beta sigma / ((sigma + mu)(gamma + mu)) (Hethcote 2000, SIAM Review 42:599-653,
    sec. 5, the SEIR model with vital dynamics)."""
    vital = """
    [[model.flows]]
    name = "births"
    to = "S"
    rate = "mu * N"

    [[model.flows]]
    from = "S"
    rate = "mu * S"

    [[model.flows]]
    from = "E"
    rate = "mu * E"

    [[model.flows]]
    from = "I"
    rate = "mu * I"

    [[model.flows]]
    from = "R"
    rate = "mu * R"
    """
    scenario = load_text(tmp_path, seir_text(vital, "mu = 0.02").replace(
        "R = 300", "R = 0"))
    r0, drawn = members_r0(scenario)
    beta, sigma, gamma, mu = drawn["beta"], drawn["sigma"], drawn["gamma"], 0.02
    np.testing.assert_allclose(r0, beta * sigma / ((sigma + mu) * (gamma + mu)),
                               rtol=1e-13)


def test_two_groups_with_proportionate_mixing(tmp_path) -> None:
    """Proportionate mixing of groups with activities a_g: the next-generation matrix
    beta / gamma a_g N_g a_h / sum(a N) has rank one, so R0 is its trace, the weighted
    sum beta / gamma * sum_g a_g^2 N_g / sum_g a_g N_g (Nold 1980, Math. Biosci.
    52:227-240; Hethcote 2000, sec. 7, cited from memory)."""
    text = """
    [scenario]
    name = "proportionate"
    days = 5
    members = 5
    seed = 2

    [model]
    compartments = ["S", "I", "R"]
    groups = ["quiet", "busy"]
    population = [7000, 3000]
    initial = { S = "rest", I = [3, 1] }

    [[model.flows]]
    name = "infection"
    from = "S"
    to = "I"
    rate = "beta * activity * S * sum(activity * I) / sum(activity * N)"

    [[model.flows]]
    from = "I"
    to = "R"
    rate = "gamma * I"

    [parameters]
    beta = { dist = "uniform", low = 0.1, high = 0.3 }
    gamma = 0.2
    activity = [{ dist = "uniform", low = 0.5, high = 1.5 }, { dist = "uniform", low = 2, high = 6 }]
    """
    scenario = load_text(tmp_path, text)
    r0, drawn = members_r0(scenario)
    a = drawn["activity"]
    sizes = np.array([[7000.0], [3000.0]])
    expected = drawn["beta"] / 0.2 * (a ** 2 * sizes).sum(axis=0) / (a * sizes).sum(axis=0)
    np.testing.assert_allclose(r0, expected, rtol=1e-12)


def test_a_matrix_normalised_by_its_spectral_radius_gives_the_drawn_r0(tmp_path) -> None:
    """beta = R0 / (D rho(diag(s) C)) in an age-structured SEIR: the next-generation
    matrix beta D diag(s) diag(N) C diag(1/N) is similar to beta D diag(s) C, so its
    spectral radius is the drawn R0 (Diekmann, Heesterbeek & Metz 1990, J. Math. Biol.
    28:365-382; similarity keeps eigenvalues)."""
    text = """
    [scenario]
    name = "normalised"
    days = 5
    members = 8
    seed = 3

    [model]
    compartments = ["S", "E", "I", "R"]
    groups = ["young", "adult", "old"]
    population = [3000, 5000, 2000]
    initial = { S = "rest", I = [1, 2, 1] }
    stages = { E = 2, I = 3 }

    [model.matrices]
    contacts = [[6.0, 2.0, 0.5], [2.0, 4.0, 1.0], [0.5, 1.0, 2.0]]

    [[model.flows]]
    name = "infection"
    from = "S"
    to = "E"
    rate = "beta * susceptibility * S * (contacts @ (I / N))"

    [[model.flows]]
    from = "E"
    to = "I"
    rate = "E / 3"

    [[model.flows]]
    from = "I"
    to = "R"
    rate = "I / infectious_days"

    [parameters]
    R0 = { dist = "uniform", low = 1.2, high = 3.0 }
    infectious_days = { dist = "gamma", mean = 5, sd = 1 }
    susceptibility = [0.6, 1.0, 1.2]
    beta = "R0 / (infectious_days * spectral_radius(diag(susceptibility) @ contacts))"
    """
    scenario = load_text(tmp_path, text)
    r0, drawn = members_r0(scenario)
    np.testing.assert_allclose(r0, drawn["R0"], rtol=1e-12)


def test_infected_compartments_are_inferred_or_declared(tmp_path) -> None:
    scenario = load_text(tmp_path, seir_text())
    assert infected_compartments(scenario.model).compartments == ("E", "I")
    declared = load_text(tmp_path, seir_text(model='infected = ["I"]'))
    assert infected_compartments(declared.model).compartments == ("I",)
    assert infected_compartments(declared.model).note == "declared in model.infected"


def test_ambiguous_flows_leave_r0_undefined_and_check_says_so(tmp_path) -> None:
    """A second infection flow, from R back to S with a rate using E, makes S both a
    susceptible compartment and the target of an infection: nothing is inferred."""
    text = seir_text("""
    [[model.flows]]
    name = "relapse"
    from = "R"
    to = "S"
    rate = "0.01 * R * E / N"
    """)
    scenario = load_text(tmp_path, text)
    infected = infected_compartments(scenario.model)
    assert infected.compartments is None
    assert "declare model.infected" in infected.note
    assert np.isnan(members_r0(scenario)[0]).all()
    assert "not computed" in api.check_report(scenario)


def test_check_reports_r0_at_the_medians(tmp_path) -> None:
    """At the parameters' medians (uniform: the midpoint) R0 = 0.4 / 0.2 * 0.97 = 1.94
    (beta / gamma times the susceptible share, Hethcote 2000)."""
    report = api.check_report(load_text(tmp_path, seir_text()))
    assert "infected compartments E I" in report
    assert "1.94 at the parameters' medians" in report


def test_the_result_holds_each_members_r0_and_its_quantiles(tmp_path) -> None:
    """basic_reproduction_number is beta / gamma times the susceptible share (Hethcote
    2000) member by member, and its quantiles are numpy.quantile's (linear, Hyndman &
    Fan 1996 definition 7) over the members; ensemble summary prints them."""
    scenario = load_text(tmp_path, seir_text())
    dataset = api.simulate(scenario, backend="numpy")
    values = dataset["basic_reproduction_number"].isel(variant=0).values
    beta = dataset["param_beta"].isel(variant=0).values
    gamma = dataset["param_gamma"].isel(variant=0).values
    np.testing.assert_allclose(values, beta / gamma * 0.97, rtol=1e-13)
    expected = np.quantile(values, dataset["quantile"].values)
    np.testing.assert_allclose(
        dataset["basic_reproduction_number_quantile"].isel(variant=0).values, expected,
        rtol=1e-14)
    from ensemble.present.summary import summary_text

    row = next(line for line in summary_text(dataset).splitlines() if "R0" in line)
    assert f"{np.quantile(values, 0.5):.3g}" in row


def test_the_machinery_is_built_once_per_model_and_told_apart_by_its_rates(tmp_path) -> None:
    """A copy of a model (as a chunk's task gets one) finds the machinery already built;
    a model whose rates differ (here gamma * I against 2 * gamma * I) gets its own, and
    its R0 follows its own closed form R0 = beta / gamma' (Hethcote 2000, SIAM Review
    42:599-653, sec. 2), computed after the first model's."""
    first = load_text(tmp_path, seir_text())
    model, _ = model_and_design(first)
    infected = infected_compartments(first.model).compartments
    built = NextGeneration.for_model(model, infected)
    assert NextGeneration.for_model(pickle.loads(pickle.dumps(model)), infected) is built
    faster = load_text(tmp_path, seir_text().replace('rate = "gamma * I"',
                                                     'rate = "2 * gamma * I"'))
    other, _ = model_and_design(faster)
    assert NextGeneration.for_model(other, infected) is not built
    r0, drawn = members_r0(faster)
    susceptible_share = (10000 - 300) / 10000
    np.testing.assert_allclose(r0, drawn["beta"] / (2 * drawn["gamma"]) * susceptible_share,
                               rtol=1e-13)
