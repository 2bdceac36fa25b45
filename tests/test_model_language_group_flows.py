"""Flows between groups (a matrix rate: ageing, movement between places) and flows in one
named group (births into a group): the balance of counts and the chain they define.

Every setting here is invented and illustrative.  The stationary distribution is computed
in this file with scipy.linalg.null_space from the generator of the continuous-time
Markov chain the movement rates define (Norris 1997, *Markov Chains*, theorem 3.5.5,
cited from memory: pi Q = 0 for the unique invariant distribution of an irreducible
chain, and every start converges to it).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from ensemble.errors import ScenarioError
from ensemble.model import lower_model
from support import integrate_members, load_text

MOVES = [[0.0, 0.03, 0.01], [0.02, 0.0, 0.04], [0.05, 0.01, 0.0]]
"""Per-capita rates of moving from the row's place to the column's place (per day)."""


def movement_text(days: int = 400, extra: str = "") -> str:
    return f"""
    [scenario]
    name = "movement"
    days = {days}
    members = 1

    [model]
    compartments = ["S", "I", "R"]
    groups = ["north", "harbour", "hills"]
    population = [5000, 3000, 2000]
    initial = {{ S = "rest", I = [20, 0, 0] }}

    [model.matrices]
    moves = {MOVES}

    [[model.flows]]
    name = "infection"
    from = "S"
    to = "I"
    rate = "0.3 * S * I / N"

    [[model.flows]]
    from = "I"
    to = "R"
    rate = "I / 5"

    [[model.flows]]
    name = "moving_S"
    from = "S"
    to = "S"
    rate = "diag(S) @ moves"

    [[model.flows]]
    name = "moving_I"
    from = "I"
    to = "I"
    rate = "diag(I) @ moves"

    [[model.flows]]
    name = "moving_R"
    from = "R"
    to = "R"
    rate = "diag(R) @ moves"
    {extra}

    [solver]
    step = 0.25
    report_every = 1
    check = {{ enabled = false }}
    """


def stationary(rates: np.ndarray) -> np.ndarray:
    """The invariant distribution of the chain with these jump rates: the left null
    vector of the generator Q (off-diagonal the rates, rows summing to zero)."""
    generator = rates - np.diag(rates.sum(axis=1))
    vector = scipy.linalg.null_space(generator.T)[:, 0]
    return vector / vector.sum()


def test_moving_between_places_conserves_everyone_and_reaches_the_stationary_chain(
        tmp_path) -> None:
    """The total of every compartment and place stays 10,000 (each flow element takes
    from one state what it gives another); each place's share of the population tends to
    the chain's invariant distribution (scipy.linalg.null_space of the generator)."""
    model, result = integrate_members(load_text(tmp_path, movement_text()))
    assert model.closed
    by_place = result.state[0].reshape(3, 3, -1).sum(axis=0)    # (place, time)
    np.testing.assert_allclose(by_place.sum(axis=0), 10000.0, rtol=1e-12)
    np.testing.assert_allclose(by_place[:, -1] / 10000.0, stationary(np.array(MOVES)),
                               rtol=1e-9)


def test_a_flow_between_groups_moves_each_count_to_its_column(tmp_path) -> None:
    """Stoichiometry written out by hand: entry (g, h) of diag(S) @ moves takes
    S[g] moves[g][h] persons per day from S in group g and gives them to S in group h;
    the diagonal (moving to the same place) is left out."""
    model = lower_model(*(lambda s: (s, s.variants[0]))(load_text(tmp_path, movement_text())))
    first = 2 * 3   # the elements of the flows infection and I_to_R come first
    moves = [(g, h) for g in range(3) for h in range(3) if MOVES[g][h] != 0]
    for k, (g, h) in enumerate(moves):
        column = model.stoichiometry[:, first + k]
        expected = np.zeros(9)
        expected[g], expected[h] = -1.0, 1.0
        np.testing.assert_array_equal(column, expected)
    assert model.flows.index("moving_S") == 2


def test_the_flow_count_of_a_group_is_what_left_it(tmp_path) -> None:
    """Movement alone (nobody infectious): S solves dS/dt = Q^T S, so the persons who left
    place g over [0, T] are (sum_h moves[g][h]) times the integral of S_g, which is the
    top-right block of expm([[Q^T, I], [0, 0]] T) times S(0) (Van Loan 1978, IEEE Trans.
    Autom. Control 23:395-404; scipy.linalg.expm), to the accuracy of RK4 at h = 0.25."""
    model, result = integrate_members(load_text(tmp_path, movement_text(days=20).replace(
        "I = [20, 0, 0]", "I = [0, 0, 0]")))
    rates = np.array(MOVES)
    generator = (rates - np.diag(rates.sum(axis=1))).T
    block = np.zeros((6, 6))
    block[:3, :3], block[:3, 3:] = generator, np.eye(3)
    start = np.array([5000.0, 3000.0, 2000.0])
    row = model.flows.index("moving_S") * 3
    for days in (1, 7, 20):
        integral = scipy.linalg.expm(block * days)[:3, 3:] @ start
        left = rates.sum(axis=1) * integral
        counted = result.flow_count[0, row:row + 3, 1:days + 1].sum(axis=1)
        np.testing.assert_allclose(counted, left, rtol=1e-9)


def test_ageing_into_another_compartment(tmp_path) -> None:
    """A flow between groups of two compartments: a constant 2 per day from R in the
    north to S in the hills (a matrix with one non-zero entry), written by hand: R_north
    loses 2 t, S_hills gains 2 t when nothing else moves (no infection, no moves)."""
    text = movement_text(days=10, extra="""
    [[model.flows]]
    name = "waning_on_move"
    from = "R"
    to = "S"
    rate = "2 * constant_pair"
    """).replace('initial = { S = "rest", I = [20, 0, 0] }',
                 'initial = { S = "rest", R = [100, 0, 0] }').replace(
        "moves = ", "constant_pair = [[0.0, 0.0, 1.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.0]]\n"
        "    moves = ").replace('rate = "diag(S) @ moves"', 'rate = "0 * diag(S) @ moves"'
                                ).replace('rate = "diag(R) @ moves"',
                                          'rate = "0 * diag(R) @ moves"')
    model, result = integrate_members(load_text(tmp_path, text))
    times = np.arange(11.0)
    r_north = model.compartments.index("R") * 3
    s_hills = model.compartments.index("S") * 3 + 2
    np.testing.assert_allclose(result.state[0, r_north], 100 - 2 * times, rtol=1e-12)
    np.testing.assert_allclose(result.state[0, s_hills], 2000 + 2 * times, rtol=1e-12)


def test_births_into_a_named_group(tmp_path) -> None:
    """A flow from outside into S of the harbour alone at 5 persons a day: S_harbour
    gains 5 t and the other places nothing (closed form: the integral of a constant); its
    count is 5 per day in the harbour and 0 elsewhere."""
    text = movement_text(days=10, extra="""
    [[model.flows]]
    name = "births"
    to = "S"
    group = "harbour"
    rate = "5"
    """).replace('I = [20, 0, 0]', 'I = [0, 0, 0]').replace(
        'rate = "diag(S) @ moves"', 'rate = "0 * diag(S) @ moves"')
    model, result = integrate_members(load_text(tmp_path, text))
    assert not model.closed
    times = np.arange(11.0)
    np.testing.assert_allclose(result.state[0, 0:3], [[5000] * 11, 3000 + 5 * times,
                                                      [2000] * 11], rtol=1e-13)
    row = model.flows.index("births") * 3
    np.testing.assert_allclose(result.flow_count[0, row:row + 3, 1:],
                               [[0.0] * 10, [5.0] * 10, [0.0] * 10], rtol=1e-12)
    assert np.isnan(result.flow_count[0, row:row + 3, 0]).all()


@pytest.mark.parametrize("flow, key, message", [
    ('from = "S"\n    to = "I"\n    rate = "0.1"', "model.flows[5].rate", "a vector"),
    ('to = "S"\n    rate = "diag(S) @ moves"', "model.flows[5].rate", "needs both"),
    ('from = "S"\n    to = "S"\n    rate = "S * 0.1"', "model.flows[5].to", "itself"),
    ('to = "S"\n    group = "coast"\n    rate = "1"', "model.flows[5].group", "unknown group"),
    ('to = "S"\n    group = "north"\n    rate = "S"', "model.flows[5].rate", "number"),
])
def test_bad_flows_between_groups_name_the_key(tmp_path, flow, key, message) -> None:
    text = movement_text(extra=f"\n    [[model.flows]]\n    name = \"bad\"\n    {flow}\n")
    with pytest.raises(ScenarioError) as error:
        load_text(tmp_path, text)
    assert error.value.key == key
    assert message in str(error.value)
