"""Lowering of scenario models to the scalar IR, checked against numpy and by hand."""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from ensemble.model import RateFunctions, lower_model
from ensemble.model.ir import Apply, Const, ParamRef, StateRef, apply
from support import AGE_SEIR, SEIR, VITAL, compiled, load, random_inputs

CONTACTS = np.array([[8.0, 3.0, 1.0, 0.0],
                     [3.0, 6.0, 2.0, 0.5],
                     [1.0, 2.0, 3.0, 1.0],
                     [0.0, 0.5, 1.0, 2.0]])
"""The contact matrix of ``AGE_SEIR``."""


def test_seir_stoichiometry_written_out_by_hand(tmp_path):
    """S -> E -> I -> R: each flow takes one person from its source and gives one to its
    target (the column of a flow is e_target - e_source)."""
    model = compiled(tmp_path, SEIR)
    expected = np.array([[-1, 0, 0],
                         [+1, -1, 0],
                         [0, +1, -1],
                         [0, 0, +1]], dtype=float)
    np.testing.assert_array_equal(model.stoichiometry, expected)
    assert model.closed
    assert model.flows == ("infection", "E_to_I", "I_to_R")
    assert model.state_labels == ("S", "E", "I", "R")


def test_closed_model_conserves_the_population(tmp_path):
    """In a closed model every column of the stoichiometry sums to zero, so the
    right-hand side sums to zero for any state: the total is conserved by construction
    (1^T S r = 0 for every rate vector r)."""
    model = compiled(tmp_path, AGE_SEIR)
    assert model.closed
    np.testing.assert_array_equal(model.stoichiometry.sum(axis=0), 0.0)
    functions = RateFunctions(model)
    y, p, s = random_inputs(model, 50)
    rhs = functions.right_hand_side(2.0, y, p, s)
    outflow = (functions.rates(2.0, y, p, s)).sum(axis=0)
    assert np.all(np.abs(rhs.sum(axis=0)) <= 1e-13 * outflow)


def test_open_model_has_inflows_and_outflows(tmp_path):
    model = compiled(tmp_path, VITAL)
    assert not model.closed
    births, deaths_s = model.flows.index("births"), model.flows.index("deaths_S")
    np.testing.assert_array_equal(model.stoichiometry[:, births], [1, 0, 0, 0])
    np.testing.assert_array_equal(model.stoichiometry[:, deaths_s], [-1, 0, 0, 0])


def test_contact_matrix_product_matches_numpy(tmp_path):
    """``beta * susceptibility * S * (contacts @ (I / N))`` against numpy's matmul on the
    same random inputs; N leaves out the excluded deaths compartment D."""
    model = compiled(tmp_path, AGE_SEIR)
    functions = RateFunctions(model)
    y, p, s = random_inputs(model, 20)
    G = 4
    compartments = y.reshape(5, G, -1)
    S, I = compartments[0], compartments[2]
    N = compartments[:4].sum(axis=0)
    beta = p[model.parameter_slots.index("beta")]
    susceptibility = np.array([0.6, 1.0, 1.0, 0.9])[:, None]
    rows = [model.parameter_slots.index(f"susceptibility[{g}]") for g in model.groups]
    p[rows] = susceptibility
    expected = beta * susceptibility * S * (CONTACTS @ (I / N))
    rates = functions.rates(0.0, y, p, s)
    np.testing.assert_allclose(rates[:G], expected, rtol=1e-13)


def test_zero_matrix_entries_are_dropped(tmp_path):
    """contacts[child][elder] = 0: the child infection rate does not read the elder states."""
    model = compiled(tmp_path, AGE_SEIR)
    elder_rows = {model.state_labels.index(f"{c}[elder]") for c in "SEIR"}
    child_reads = {j for j, _ in model.rate_derivatives[0]}
    assert child_reads.isdisjoint(elder_rows)
    adult_reads = {j for j, _ in model.rate_derivatives[1]}
    assert elder_rows <= adult_reads


def test_parameter_slots_in_file_order_one_per_group_element(tmp_path):
    """Only parameters the rates use get a slot; vectors give one slot per group, named
    ``name[group]``; a derived parameter constant in time is a slot of its own."""
    model = compiled(tmp_path, AGE_SEIR)
    groups = ("child", "adult", "senior", "elder")
    assert model.parameter_slots == (
        ("beta",) + tuple(f"susceptibility[{g}]" for g in groups)
        + tuple(f"fatality[{g}]" for g in groups) + ("latent_days", "infectious_days"))
    seir = compiled(tmp_path, SEIR)
    assert seir.parameter_slots == ("latent_days", "infectious_days", "beta")
    assert seir.schedule_slots == ()


SCHEDULED = SEIR.replace('beta = "R0 / infectious_days"', """beta = "R0 / infectious_days"
unused = 7.0
closure = { schedule = [[0, 1.0], [10, 0.6], [30.5, 0.8]], between = "step" }
contact_scale = "closure * (1 + 0 * t)"

[[variants]]
name = "baseline"

[[variants]]
name = "ramp"
parameters = { latent_days = { schedule = [[0, 2.0], [5, 4.0]], between = "linear" } }
""").replace('rate = "beta * S * I / N"', 'rate = "beta * contact_scale * S * I / N"')


def test_schedule_slots_and_variant_overrides(tmp_path):
    """Schedules become schedule slots with float knots; a derived parameter of a
    schedule is substituted; a variant that turns a constant into a schedule moves it
    from the parameter slots to the schedule slots."""
    scenario = load(tmp_path, SCHEDULED)
    baseline = lower_model(scenario, scenario.variants[0])
    assert baseline.parameter_slots == ("latent_days", "infectious_days", "beta")
    [closure] = baseline.schedule_slots
    assert (closure.name, closure.parameter, closure.element, closure.between) == (
        "closure", "closure", 0, "step")
    np.testing.assert_array_equal(closure.days, [0.0, 10.0, 30.5])
    assert closure.days.dtype == np.float64
    ramp = lower_model(scenario, scenario.variants[1])
    assert ramp.parameter_slots == ("infectious_days", "beta")
    assert [(slot.name, slot.between) for slot in ramp.schedule_slots] == [
        ("latent_days", "linear"), ("closure", "step")]


def test_vector_schedule_has_one_slot_per_group(tmp_path):
    body = AGE_SEIR.replace('susceptibility = [0.6, 1.0, 1.0, 0.9]', """
susceptibility = [0.6, 1.0, 1.0, 0.9]
term = { schedule = [[0, [1.0, 1.0, 1.0, 1.0]], [4, [0.5, 1.0, 1.0, 1.0]]] }
""").replace("beta * susceptibility * S", "beta * term * susceptibility * S")
    model = compiled(tmp_path, body)
    assert [(slot.name, slot.element) for slot in model.schedule_slots] == [
        ("term[child]", 0), ("term[adult]", 1), ("term[senior]", 2), ("term[elder]", 3)]


def test_time_varying_derived_parameter_is_inlined(tmp_path):
    """``seasonal = 1 + amplitude * cos(2 pi t / 365)`` is not a slot; the infection
    rate follows the formula at every t."""
    model = compiled(tmp_path, VITAL)
    assert "seasonal" not in model.parameter_slots
    assert "amplitude" in model.parameter_slots
    functions = RateFunctions(model)
    y, p, s = random_inputs(model, 5)
    amplitude = p[model.parameter_slots.index("amplitude")]
    beta = p[model.parameter_slots.index("beta")]
    S, I, N = y[0], y[2], y.sum(axis=0)
    infection = model.flows.index("infection")
    for t in (0.0, 91.25, 182.5):
        expected = beta * (1 + amplitude * np.cos(2 * np.pi * t / 365)) * S * I / N
        np.testing.assert_allclose(functions.rates(t, y, p, s)[infection], expected, rtol=1e-14)


def test_exact_identities_only(tmp_path):
    """``1 * I / 1 + 0`` is just I; ``0 * E`` is kept, since it is NaN for infinite E."""
    body = SEIR.replace('rate = "I / infectious_days"', 'rate = "1 * I / 1 + 0 + 0 * E"')
    model = compiled(tmp_path, body)
    assert model.rates[2] == Apply("add", (StateRef(2), Apply("mul", (Const(0.0), StateRef(1)))))
    functions = RateFunctions(model)
    y = np.array([[1.0], [np.inf], [3.0], [4.0]])
    p = np.ones((len(model.parameter_slots), 1))
    assert np.isnan(functions.rates(0.0, y, p, np.empty((0, 1)))[2, 0])


def test_constant_folding_in_float64_without_overflow(tmp_path):
    """``9 ** 9 ** 9`` folds to inf in IEEE float64 (no OverflowError, no hang), and the
    rate evaluates silently to 0 (I / inf)."""
    body = SEIR.replace('rate = "I / infectious_days"',
                        'rate = "I / 9 ** 9 ** 9 + I * (2 - 1) / infectious_days"')
    model = compiled(tmp_path, body)
    assert model.rates[2].args[0] == Apply("div", (StateRef(2), Const(np.inf)))
    assert np.isnan(apply("pow", Const(-8.0), Const(1 / 3)).value)
    assert apply("div", Const(1.0), Const(0.0)) == Const(np.inf)


def test_matrix_arithmetic_matches_numpy(tmp_path):
    """Matrix sums, scalar multiples and negation before ``@``, against numpy."""
    body = AGE_SEIR.replace(
        "[model.matrices]",
        "[model.matrices]\nhousehold = [[1, 1, 0, 0], [1, 1, 1, 0], [0, 1, 1, 1], [0, 0, 1, 1]]"
    ).replace("beta * susceptibility * S * (contacts @ (I / N))",
              "S * ((beta * contacts + household / 2 - -household * 0.25) @ I) / sum(N)")
    model = compiled(tmp_path, body)
    household = np.array([[1, 1, 0, 0], [1, 1, 1, 0], [0, 1, 1, 1], [0, 0, 1, 1]], float)
    functions = RateFunctions(model)
    y, p, s = random_inputs(model, 6)
    compartments = y.reshape(5, 4, -1)
    beta = p[model.parameter_slots.index("beta")]
    N = compartments[:4].sum(axis=(0, 1))
    expected = np.stack([
        compartments[0][:, m] * ((beta[m] * CONTACTS + household / 2 + household * 0.25)
                                 @ compartments[2][:, m]) / N[m]
        for m in range(y.shape[1])], axis=1)
    np.testing.assert_allclose(functions.rates(0.0, y, p, s)[:4], expected, rtol=1e-13)


def test_rate_functions_survive_pickling(tmp_path):
    """Dask ships the functions to workers by pickle; the copy computes the same bits."""
    model = compiled(tmp_path, AGE_SEIR)
    functions = RateFunctions(model)
    copy = pickle.loads(pickle.dumps(functions))
    y, p, s = random_inputs(model, 4)
    np.testing.assert_array_equal(copy.rates(1.0, y, p, s), functions.rates(1.0, y, p, s))
    assert copy.source == functions.source
    rate = model.rates[0]
    hash(rate)
    # a string's hash differs between processes: a cached hash must not travel
    assert "_hash" not in pickle.loads(pickle.dumps(rate)).__dict__
    assert pickle.loads(pickle.dumps(rate)) == rate


def test_parameters_are_rows_of_the_slot_array(tmp_path):
    model = compiled(tmp_path, SEIR)
    assert model.rates[1] == Apply("div", (StateRef(1), ParamRef(0)))
    with pytest.raises(ValueError):
        apply("add", StateRef(0))


def test_constant_time_only_leaf_and_repeated_rates(tmp_path):
    """Rates that need no work array (a constant, a function of t alone, a bare state,
    the same tree twice) still fill every member's row."""
    body = VITAL.replace('rate = "birth_rate * N"', 'rate = "25"').replace(
        'rate = "death_rate * S"', 'rate = "1 + sin(t)"').replace(
        'rate = "death_rate * E"', 'rate = "E"').replace(
        'rate = "death_rate * R"', 'rate = "(death_rate + disease_death) * I"')
    model = compiled(tmp_path, body)
    functions = RateFunctions(model)
    for members in (0, 1, 3):
        y, p, s = random_inputs(model, members)
        rates = functions.rates(2.0, y, p, s)
        flows = {name: rates[k] for k, name in enumerate(model.flows)}
        np.testing.assert_array_equal(flows["births"], np.full(members, 25.0))
        np.testing.assert_array_equal(flows["deaths_S"], np.full(members, 1 + np.sin(2.0)))
        np.testing.assert_array_equal(flows["deaths_E"], y[1])
        np.testing.assert_array_equal(flows["deaths_R"], flows["deaths_I"])
        partials = functions.rate_jacobian(2.0, y, p, s)
        assert partials.shape == (functions.nnz, members)
    assert model.rate_derivatives[model.flows.index("births")] == ()
    assert model.rate_derivatives[model.flows.index("deaths_E")] == ((1, Const(1.0)),)


def test_signed_zeros_are_not_shared(tmp_path):
    """IEEE 754: 1 / +0 = +inf and 1 / -0 = -inf, so the constants 0.0 and -0.0 (here
    from folding ``0 * -1``) must stay distinct when equal subtrees are shared."""
    body = SEIR.replace('rate = "I / infectious_days"', 'rate = "I / (0 * -1) - E / 0"')
    model = compiled(tmp_path, body)
    functions = RateFunctions(model)
    y = np.array([[1.0], [2.0], [3.0], [4.0]])
    p = np.ones((len(model.parameter_slots), 1))
    assert functions.rates(0.0, y, p, np.empty((0, 1)))[2, 0] == -np.inf
    assert Const(0.0) != Const(-0.0) and Const(np.nan) == Const(np.nan)


def test_every_operation_is_documented_and_evaluable():
    """A backend implements the ops of OPERATIONS as OPERATION_MEANINGS says; the numpy
    evaluator has a function for each."""
    from ensemble.model.ir import NUMPY_FUNCTIONS, OPERATION_MEANINGS, OPERATIONS
    assert set(OPERATION_MEANINGS) == set(OPERATIONS)
    assert set(NUMPY_FUNCTIONS) | {"select_le"} == set(OPERATIONS)
    assert apply("select_le", Const(1.0), Const(np.nan), Const(2.0), Const(3.0)) == Const(3.0)
    assert apply("sign", Const(-0.0)) == Const(0.0) and apply("sign", Const(-4.0)) == Const(-1.0)
