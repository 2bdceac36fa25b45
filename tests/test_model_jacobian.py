"""The symbolic state Jacobian of the lowered rates against central finite differences.

Central differences (y + h e_j and y - h e_j) have truncation error O(h^2) and round-off
error O(eps / h) (Nocedal & Wright 2006, Numerical Optimization, 2nd ed., sec. 8.1); with
h = 1e-5 relative to the state the two balance near 1e-10 relative, so agreement to 1e-6
relative is a loose tolerance (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemble.model import RateFunctions
from support import AGE_SEIR, NONLINEAR, SEIR, VITAL, compiled, random_inputs

MEMBERS = 7


def finite_difference_rate_jacobian(functions: RateFunctions, t, y, p, s) -> np.ndarray:
    """d rates / d y by central differences, (M, n_flow_elements, n_states)."""
    n_flows, (n_states, members) = functions.model.n_flow_elements, y.shape
    result = np.empty((members, n_flows, n_states))
    for j in range(n_states):
        h = 1e-5 * np.maximum(np.abs(y[j]), 1.0)
        up, down = y.copy(), y.copy()
        up[j] += h
        down[j] -= h
        difference = functions.rates(t, up, p, s) - functions.rates(t, down, p, s)
        result[:, :, j] = (difference / (2 * h)).T
    return result


def symbolic_rate_jacobian(functions: RateFunctions, t, y, p, s) -> np.ndarray:
    """d rates / d y from the generated partials scattered into (M, n_flows, n_states)."""
    partials = functions.rate_jacobian(t, y, p, s)
    dense = np.zeros((y.shape[1], functions.model.n_flow_elements, functions.model.n_states))
    dense[:, functions.jacobian_flow, functions.jacobian_state] = partials.T
    return dense


@pytest.mark.parametrize("body", [SEIR, AGE_SEIR, NONLINEAR, VITAL],
                         ids=["seir", "age-seir", "nonlinear", "births-deaths"])
def test_rate_jacobian_matches_central_differences(tmp_path, body):
    model = compiled(tmp_path, body)
    functions = RateFunctions(model)
    y, p, s = random_inputs(model, MEMBERS)
    for t in (0.0, 40.0, 91.25):
        expected = finite_difference_rate_jacobian(functions, t, y, p, s)
        actual = symbolic_rate_jacobian(functions, t, y, p, s)
        scale = np.abs(expected).max(axis=2, keepdims=True) + 1e-12
        np.testing.assert_allclose(actual / scale, expected / scale, rtol=0, atol=1e-6)


@pytest.mark.parametrize("body", [SEIR, AGE_SEIR, NONLINEAR, VITAL],
                         ids=["seir", "age-seir", "nonlinear", "births-deaths"])
def test_sparsity_pattern_holds_every_dependence(tmp_path, body):
    """Outside the pattern a finite difference is exactly zero: the rate does not read
    that state at all, so both evaluations are bit-identical."""
    model = compiled(tmp_path, body)
    functions = RateFunctions(model)
    y, p, s = random_inputs(model, MEMBERS, seed=2)
    expected = finite_difference_rate_jacobian(functions, 3.0, y, p, s)
    outside = np.ones(expected.shape[1:], dtype=bool)
    outside[functions.jacobian_flow, functions.jacobian_state] = False
    assert np.all(expected[:, outside] == 0.0)


@pytest.mark.parametrize("body", [SEIR, AGE_SEIR, VITAL], ids=["seir", "age-seir", "births-deaths"])
def test_state_jacobian_is_stoichiometry_times_rate_jacobian(tmp_path, body):
    """The assembled dense Jacobian of dy/dt against central differences of the
    right-hand side itself (Nocedal & Wright 2006, sec. 8.1)."""
    model = compiled(tmp_path, body)
    functions = RateFunctions(model)
    y, p, s = random_inputs(model, MEMBERS, seed=3)
    jacobian = functions.state_jacobian(functions.rate_jacobian(10.0, y, p, s))
    assert jacobian.shape == (MEMBERS, model.n_states, model.n_states)
    for j in range(model.n_states):
        h = 1e-5 * np.maximum(np.abs(y[j]), 1.0)
        up, down = y.copy(), y.copy()
        up[j] += h
        down[j] -= h
        column = (functions.right_hand_side(10.0, up, p, s)
                  - functions.right_hand_side(10.0, down, p, s)) / (2 * h)
        scale = np.abs(column).max() + 1e-12
        np.testing.assert_allclose(jacobian[:, :, j] / scale, column.T / scale, atol=1e-6)


def test_kinks_take_the_documented_one_sided_derivatives(tmp_path):
    """At abs(0) the derivative is taken as 0 (sign(0) = 0, a subgradient); at a tie of
    min or max the derivative follows the first argument (documented in ensemble.model.ir)."""
    body = NONLINEAR.replace(
        'rate = "min(I, capacity) * gamma + max(I - capacity, R / 10) * 0.01 + I ** (R / N) + 1.5 ** (I / 200)"',
        'rate = "abs(I - R) + min(I, R) + 2 * max(R, I)"')
    model = compiled(tmp_path, body)
    functions = RateFunctions(model)
    y = np.array([[500.0], [100.0], [100.0]])
    p = np.array([[0.4], [1.1], [0.2], [200.0], [0.01]])[: len(model.parameter_slots)]
    dense = symbolic_rate_jacobian(functions, 0.0, y, p, np.empty((0, 1)))
    recovery = model.flows.index("recovery")
    # d/dI: sign(0) * 1 + (min picks I) 1 + 2 * (max picks R) 0 = 1
    # d/dR: sign(0) * -1 + (min picks I) 0 + 2 * (max picks R) 1 = 2
    assert dense[0, recovery, 1] == 1.0
    assert dense[0, recovery, 2] == 2.0
