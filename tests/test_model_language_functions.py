"""The matrix functions of the expression language: ``diag``, matrix @ matrix and
``spectral_radius``, computed once per member from the parameters.

Every setting here is invented and illustrative.  Expected values come from numpy's own
linear algebra (``numpy.linalg.eigvals``, LAPACK ``geev``; ``numpy.diag`` and ``@``),
computed in the test independently of the package's lowering.
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemble.errors import ScenarioError
from ensemble.model import lower_model
from ensemble.model.spectra import spectral_radii
from ensemble.sampling import make_design
from support import load_text, model_and_design

CONTACTS = [[3.0, 1.0, 0.0], [1.0, 2.0, 0.5], [0.2, 0.5, 1.5]]
SUSCEPTIBILITY = [0.5, 1.0, 1.2]


def scenario_text(parameters: str, rate: str = "beta * S * (contacts @ (I / N))",
                  variants: str = "") -> str:
    return f"""
    [scenario]
    name = "functions"
    days = 4
    members = 7
    seed = 11

    [model]
    compartments = ["S", "I", "R"]
    groups = ["a", "b", "c"]
    population = [600, 400, 300]
    initial = {{ S = "rest", I = [1, 0, 0] }}

    [model.matrices]
    contacts = {CONTACTS}

    [[model.flows]]
    from = "S"
    to = "I"
    rate = "{rate}"

    [[model.flows]]
    from = "I"
    to = "R"
    rate = "I / infectious_days"

    [parameters]
    R0 = {{ dist = "uniform", low = 1.5, high = 2.5 }}
    infectious_days = {{ dist = "gamma", mean = 4.0, sd = 1.0 }}
    susceptibility = {SUSCEPTIBILITY}
    {parameters}
    {variants}
    """


def designed(tmp_path, text: str, variant: int = 0):
    return model_and_design(load_text(tmp_path, text), variant)[1]


def numpy_radius(matrix: np.ndarray) -> float:
    """Largest modulus of the eigenvalues, by numpy.linalg.eigvals (LAPACK geev)."""
    return float(np.abs(np.linalg.eigvals(matrix)).max())


def test_spectral_radius_of_a_drawn_matrix_matches_numpy_eigvals(tmp_path) -> None:
    """Source: numpy.linalg.eigvals on the matrix written out with numpy.diag and @."""
    design = designed(tmp_path, scenario_text(
        'radius = "spectral_radius(R0 * diag(susceptibility) @ contacts)"\n'
        '    beta = "R0 / (infectious_days * spectral_radius(diag(susceptibility) @ contacts))"'))
    r0, days = design.reported["R0"], design.reported["infectious_days"]
    base = np.diag(SUSCEPTIBILITY) @ np.array(CONTACTS)
    for m in range(len(r0)):
        assert design.reported["radius"][m] == pytest.approx(
            numpy_radius(r0[m] * base), rel=1e-13)
        assert design.reported["beta"][m] == pytest.approx(
            r0[m] / (days[m] * numpy_radius(base)), rel=1e-13)


def test_the_next_generation_of_the_normalised_matrix_has_the_drawn_r0(tmp_path) -> None:
    """With beta = R0 / (D rho(diag(s) C)), the matrix beta D diag(s) C of an
    age-structured SIR's next generation (Diekmann, Heesterbeek & Metz 1990, J. Math.
    Biol. 28:365-382) has spectral radius R0: numpy.linalg.eigvals."""
    design = designed(tmp_path, scenario_text(
        'beta = "R0 / (infectious_days * spectral_radius(diag(susceptibility) @ contacts))"'))
    base = np.diag(SUSCEPTIBILITY) @ np.array(CONTACTS)
    for m, r0 in enumerate(design.reported["R0"]):
        generation = design.reported["beta"][m] * design.reported["infectious_days"][m] * base
        assert numpy_radius(generation) == pytest.approx(r0, rel=1e-12)


def test_an_overridden_matrix_changes_the_normalisation(tmp_path) -> None:
    """A variant's matrix enters the spectral radius of its own members: numpy.linalg."""
    other = [[1.0, 2.0, 0.0], [2.0, 1.0, 0.0], [0.0, 0.0, 4.0]]
    text = scenario_text(
        'beta = "R0 / (infectious_days * spectral_radius(diag(susceptibility) @ contacts))"',
        variants=f"""
    [[variants]]
    name = "usual"

    [[variants]]
    name = "other"
    matrices = {{ contacts = {other} }}
    """)
    usual, changed = designed(tmp_path, text, 0), designed(tmp_path, text, 1)
    assert np.array_equal(usual.reported["R0"], changed.reported["R0"])  # common draws
    ratio = usual.reported["beta"] / changed.reported["beta"]
    expected = (numpy_radius(np.diag(SUSCEPTIBILITY) @ np.array(other))
                / numpy_radius(np.diag(SUSCEPTIBILITY) @ np.array(CONTACTS)))
    np.testing.assert_allclose(ratio, expected, rtol=1e-13)


def test_diag_and_matrix_product_in_a_rate_match_numpy(tmp_path) -> None:
    """A rate that is a vector through diag(v) @ M @ w equals numpy's
    numpy.diag(v) @ M @ w (the flow's rate at the start, by the lowered model's numpy
    evaluator)."""
    from ensemble.model import RateFunctions

    text = scenario_text('beta = 0.01', rate="beta * (diag(S) @ contacts @ contacts) @ I")
    scenario = load_text(tmp_path, text)
    model = lower_model(scenario, scenario.variants[0])
    design = make_design(scenario, scenario.variants[0], model, np.arange(3))
    rates = RateFunctions(model).rates(0.0, design.initial, design.parameters,
                                       np.empty((0, 3)))
    s = design.initial[0:3, 0]
    i = design.initial[3:6, 0]
    contacts = np.array(CONTACTS)
    expected = 0.01 * (np.diag(s) @ contacts @ contacts) @ i
    np.testing.assert_allclose(rates[0:3, 0], expected, rtol=1e-14)


def test_spectral_radius_of_matrices_with_complex_eigenvalues() -> None:
    """A rotation-like matrix has complex eigenvalues; the radius is their modulus:
    numpy.linalg.eigvals, and the closed form |a + ib| for [[a, -b], [b, a]]."""
    generator = np.random.default_rng(5)
    stack = generator.normal(size=(20, 4, 4))
    radii = spectral_radii(stack)
    for matrix, radius in zip(stack, radii):
        assert radius == pytest.approx(numpy_radius(matrix), rel=1e-14)
    a, b = 0.6, 0.8
    assert spectral_radii(np.array([[[a, -b], [b, a]]]))[0] == pytest.approx(1.0, rel=1e-14)


def test_a_non_finite_matrix_has_a_nan_radius_alone() -> None:
    """One member's infinite entry leaves the others' radii as numpy.linalg.eigvals
    gives them."""
    stack = np.array([[[1.0, 2.0], [3.0, 4.0]], [[np.inf, 0.0], [0.0, 1.0]]])
    radii = spectral_radii(stack)
    assert np.isnan(radii[1])
    assert radii[0] == pytest.approx(numpy_radius(stack[0]), rel=1e-14)


def test_spectral_radius_is_refused_in_a_rate(tmp_path) -> None:
    with pytest.raises(ScenarioError) as error:
        load_text(tmp_path, scenario_text(
            "beta = 0.1", rate="beta / spectral_radius(contacts) * S * (contacts @ I) / N"))
    assert error.value.key == "model.flows[0].rate"
    assert "once per member" in str(error.value)


def test_spectral_radius_is_refused_in_a_parameter_that_varies_in_time(tmp_path) -> None:
    with pytest.raises(ScenarioError) as error:
        load_text(tmp_path, scenario_text(
            'beta = "(1 + 0.1 * sin(t)) / spectral_radius(contacts)"'))
    assert error.value.key == "parameters.beta"


@pytest.mark.parametrize("expression, message", [
    ("spectral_radius(susceptibility)", "takes a matrix"),
    ("diag(contacts)", "takes a vector"),
    ("sum(diag(susceptibility))", "takes a vector"),
    ("susceptibility @ contacts", "'@' takes a matrix"),
])
def test_shapes_of_the_matrix_functions_are_checked(tmp_path, expression, message) -> None:
    with pytest.raises(ScenarioError) as error:
        load_text(tmp_path, scenario_text(f'beta = 0.1\n    other = "{expression}"'))
    assert message in str(error.value)
    assert error.value.key == "parameters.other"


def test_a_derived_parameter_may_carry_units_and_a_description(tmp_path) -> None:
    """``{ value = "expression", units, description }``: derived like a plain string."""
    from ensemble.scenario.schema import Derived

    scenario = load_text(tmp_path, scenario_text(
        'beta = { value = "R0 / (infectious_days * spectral_radius(contacts))", '
        'units = "1/day", description = "transmission rate" }'))
    beta = scenario.parameters["beta"]
    assert isinstance(beta.form, Derived)
    assert (beta.units, beta.description) == ("1/day", "transmission rate")
    design = designed(tmp_path, scenario_text(
        'beta = { value = "R0 / (infectious_days * spectral_radius(contacts))" }'))
    np.testing.assert_allclose(
        design.reported["beta"], design.reported["R0"] / (
            design.reported["infectious_days"] * numpy_radius(np.array(CONTACTS))),
        rtol=1e-13)
