"""The five fixed-step methods on problems with known exact answers.

Sources: Hairer, Norsett & Wanner 1993, *Solving Ordinary Differential Equations I*
(HNW I), sec. II.3 (a method of order p has global error O(h^p)); Hairer & Wanner 1996,
*Solving Ordinary Differential Equations II* (HW II), sec. IV.2-IV.3 (stability functions
R(z) of the methods on y' = lambda y, A- and L-stability); Dahlquist 1963, BIT 3:27-43
(A-stability of the trapezoidal rule).  Section numbers are cited from memory.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from ensemble.methods import METHODS
from ensemble.records import (BELOW_NEGATIVE_ATOL, NEWTON_NOT_CONVERGED,
                                       NON_FINITE, STEP_CHECK_FAILED)
from support import IMPLICIT, load_case, one_compartment

def decay(days: float, k: float, step: float) -> str:
    """x' = -k x from 1000 (illustrative)."""
    return one_compartment(name="decay", rate="k * X", k=k, days=days, step=step,
                           report_every=1)

ORDERS = {"forward-euler": 1, "heun": 2, "rk4": 4, "backward-euler": 1, "trapezoid": 2}
"""Classical orders (HNW I sec. II.1 for the explicit tableaux; HW II sec. IV.3 for the
theta methods): a method added to the registry gets its published order here."""


@pytest.mark.parametrize("method", list(METHODS))
def test_method_order_on_linear_decay(tmp_path, method):
    """y' = -y, y(0) = 1000, exact y(2) = 1000 exp(-2): the error at h and h/2 falls by
    2^p (HNW I, sec. II.3), p the method's published order."""
    assert method in ORDERS, f"{method}: add its published order to ORDERS"
    case = load_case(tmp_path, decay(days=2, k=1.0, step=0.1))
    assert METHODS[method].order == ORDERS[method]
    exact = 1000.0 * math.exp(-2.0)
    errors = [abs(case.run(method, step=h, steps_per_report=n).state[0, 0, -1] - exact)
              for h, n in ((0.1, 10), (0.05, 20))]
    assert math.log2(errors[0] / errors[1]) == pytest.approx(ORDERS[method], abs=0.1)


@pytest.mark.parametrize("method, growth", [
    ("forward-euler", 1.0 - 3.0),              # R(z) = 1 + z
    ("backward-euler", 1.0 / (1.0 + 3.0)),     # R(z) = 1 / (1 - z)
    ("trapezoid", (1.0 - 1.5) / (1.0 + 1.5)),  # R(z) = (1 + z/2) / (1 - z/2)
])
def test_stability_at_h_lambda_minus_3(tmp_path, method, growth):
    """With h lambda = -3 each step multiplies y by the stability function R(-3) (HW II,
    sec. IV.2-IV.3): forward Euler grows (|R| = 2) and is flagged; backward Euler and the
    trapezoid (A-stable, Dahlquist 1963) stay bounded."""
    case = load_case(tmp_path, decay(days=10, k=3.0, step=1))
    result = case.chunk(method)
    x = result.state[0, 0]
    np.testing.assert_allclose(x, 1000.0 * growth ** np.arange(11), rtol=1e-12)
    if method == "forward-euler":
        assert abs(x[-1]) > 1e6
        assert result.status[0] & STEP_CHECK_FAILED
        assert result.status[0] & BELOW_NEGATIVE_ATOL
    else:
        assert np.abs(x).max() <= 1000.0
        assert not result.status[0] & (NEWTON_NOT_CONVERGED | NON_FINITE)


OPEN_SEIR = """
[scenario]
name = "open-seir"
days = 40
members = 3
seed = 5

[model]
compartments = ["S", "E", "I", "R", "D"]
exclude_from_N = ["D"]
population = 5000
initial = { S = "rest", I = 20 }

[[model.flows]]
from = "S"
to = "E"
rate = "beta * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent"

[[model.flows]]
from = "I"
to = "R"
rate = "I / infectious"

[[model.flows]]
from = "I"
to = "D"
rate = "0.01 * I"

[[model.flows]]
to = "S"
rate = "mu * N"

[[model.flows]]
from = "R"
rate = "mu * R"

[parameters]
beta = { dist = "uniform", low = 0.3, high = 0.8 }
latent = 3.0
infectious = 5.0
mu = 0.002

[solver]
step = 0.5
report_every = 2
"""


@pytest.mark.parametrize("method", list(METHODS))
def test_flow_counts_add_up_to_state_change(tmp_path, method):
    """Over every report interval, each compartment's change equals its inflows minus
    its outflows to round-off: the flow counts are the increments that moved the state
    (conservation by construction, :mod:`ensemble.integrate.reference`)."""
    case = load_case(tmp_path, OPEN_SEIR)
    trajectory = case.run(method)
    change = np.diff(trajectory.state, axis=2)
    moved = np.einsum("sf,mft->mst", case.model.stoichiometry, trajectory.flow_count[:, :, 1:])
    assert np.isnan(trajectory.flow_count[:, :, 0]).all()
    np.testing.assert_allclose(change, moved, rtol=0, atol=1e-9 * 5000)
    assert (trajectory.flow_count[:, :, 1:] > 0).all()


STIFF = """
[scenario]
name = "stiff"
days = 30
members = 2
seed = 3

[model]
compartments = ["S", "E", "I", "R"]
population = 10000
initial = {{ S = "rest", I = 10 }}

[[model.flows]]
from = "S"
to = "E"
rate = "beta * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "100 * E"

[[model.flows]]
from = "I"
to = "R"
rate = "0.2 * I"

[parameters]
beta = {{ dist = "uniform", low = 0.4, high = 0.6 }}

[solver]
step = 0.25
report_every = 1
newton = {{ max_iter = {max_iter} }}
"""


@pytest.mark.parametrize("method", ["forward-euler", *IMPLICIT])
def test_stiff_compartment_emptied_at_100_per_day(tmp_path, method):
    """E emptied at 100 per day with h = 0.25 (h lambda = -25): forward Euler is far
    outside its stability region |1 + z| <= 1 and is flagged; the implicit methods'
    Newton iterations converge, stay finite, non-negative and conserve the population,
    and the step check gives a finite verdict (HW II, sec. IV.2-IV.3: both are A-stable,
    so the stiff mode cannot make them grow)."""
    case = load_case(tmp_path, STIFF.format(max_iter=20))
    result = case.chunk(method)
    if method == "forward-euler":
        assert (result.status & STEP_CHECK_FAILED).all()
        assert (result.status & BELOW_NEGATIVE_ATOL).all()
        return
    assert not (result.status & (NEWTON_NOT_CONVERGED | NON_FINITE)).any()
    assert np.isfinite(result.state).all()
    assert not (result.status & BELOW_NEGATIVE_ATOL).any()
    np.testing.assert_allclose(result.state.sum(axis=1), 10000.0, rtol=1e-12)
    assert np.isfinite(result.step_error).all()


def test_newton_not_converged_is_flagged_and_run_goes_on(tmp_path):
    """One Newton iteration from the explicit Euler predictor cannot meet the tolerance
    on the nonlinear infection term: the member is flagged, its last iterate kept."""
    case = load_case(tmp_path, STIFF.format(max_iter=1))
    trajectory = case.run("backward-euler")
    assert (trajectory.status & NEWTON_NOT_CONVERGED).all()
    assert np.isfinite(trajectory.state).all()
