"""The integrator against published results of compartment models and scipy's solve_ivp.

Every expected value below is computed in this file from the published formula named
beside it, or by scipy.integrate.solve_ivp (DOP853, Hairer, Norsett & Wanner 1993) on a
right-hand side written here from the model equations, independently of the package.
Section numbers within the cited works are given from memory.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from ensemble.examples import sir_text
from support import load_case

ALL_METHODS = ["forward-euler", "heun", "rk4", "backward-euler", "trapezoid"]
ORDERS = {"forward-euler": 1, "heun": 2, "rk4": 4, "backward-euler": 1, "trapezoid": 2}

R0_VALUES = np.array([1.5, 2.0, 3.0])


def sir_case(tmp_path, days, step, report_every):
    """Three members of a closed SIR of 10,000 with 10 infectious at the start, gamma =
    0.25 per day and beta = 0.25 R0 (so R0 = 1.5, 2, 3)."""
    case = load_case(tmp_path, sir_text(members=3, days=days, population=10000,
                                        infectious=10, gamma=0.25, step=step,
                                        report_every=report_every, name="sir"))
    return case.with_parameter("beta", R0_VALUES * 0.25)


def test_sir_final_size_kermack_mckendrick(tmp_path):
    """Final size relation ln(S0 / S_inf) = R0 (N - S_inf) / N for R(0) = 0 (Kermack &
    McKendrick 1927, Proc. R. Soc. A 115:700-721), to 1e-6 relative with RK4."""
    case = sir_case(tmp_path, days=300, step=0.25, report_every=10)
    trajectory = case.run("rk4")
    n, s0 = 10000.0, 9990.0
    for m, r0 in enumerate(R0_VALUES):
        s_inf = brentq(lambda s: math.log(s0 / s) - r0 * (n - s) / n, 1e-9, n / r0,
                       xtol=1e-13, rtol=1e-15)
        assert trajectory.state[m, case.row("S"), -1] == pytest.approx(s_inf, rel=1e-6)
        assert trajectory.status[m] == 0


def test_sir_peak_prevalence_from_conserved_quantity(tmp_path):
    """S + I - (N / R0) ln S is constant along SIR solutions, so the peak (at S = N / R0)
    is I_max = S0 + I0 - N/R0 + (N/R0) ln(N / (R0 S0)) (Hethcote 2000, SIAM Review
    42:599-653, the classic epidemic model).  RK4 keeps the invariant to 1e-9 relative; the largest
    reported I lies below I_max by at most the curvature bound |I''| (dt/2)^2 / 2 with
    I'' = -beta^2 S I^2 / N^2 at the peak (Taylor's theorem)."""
    case = sir_case(tmp_path, days=150, step=0.025, report_every=0.05)
    trajectory = case.run("rk4")
    n, s0, i0 = 10000.0, 9990.0, 10.0
    for m, r0 in enumerate(R0_VALUES):
        s, i = trajectory.state[m, case.row("S")], trajectory.state[m, case.row("I")]
        invariant = s + i - n / r0 * np.log(s)
        np.testing.assert_allclose(invariant, invariant[0], rtol=1e-9)
        i_max = s0 + i0 - n / r0 + n / r0 * math.log(n / (r0 * s0))
        beta = r0 * 0.25
        curvature = beta ** 2 * (n / r0) * i_max ** 2 / n ** 2
        bound = curvature * (0.05 / 2) ** 2 / 2
        assert -1e-6 * i_max <= i_max - i.max() <= bound + 1e-6 * i_max


SEIR_GROWTH = """
[scenario]
name = "seir-growth"
days = 40
members = 3

[model]
compartments = ["S", "E", "I", "R"]
population = 1e12
initial = { S = "rest", E = 10 }

[[model.flows]]
from = "S"
to = "E"
rate = "R0 * gamma * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "sigma * E"

[[model.flows]]
from = "I"
to = "R"
rate = "gamma * I"

[parameters]
R0 = 2.0
sigma = 0.3
gamma = 0.2

[solver]
step = 0.25
report_every = 1
"""


def test_seir_early_growth_rate_wallinga_lipsitch(tmp_path):
    """For exponentially distributed latent and infectious periods the early growth rate
    r solves R0 = (1 + r / sigma)(1 + r / gamma) (Wallinga & Lipsitch 2007, Proc. R. Soc.
    B 274:599-604).  In a population of 1e12 depletion is negligible over 40
    days and the second mode has died out by day 25, so ln I grows at r."""
    case = load_case(tmp_path, SEIR_GROWTH)
    r0 = np.array([1.4, 2.0, 3.5])
    sigma = np.array([0.5, 0.3, 0.2])
    gamma = np.array([0.25, 0.2, 1 / 3])
    for name, values in (("R0", r0), ("sigma", sigma), ("gamma", gamma)):
        case = case.with_parameter(name, values)
    trajectory = case.run("rk4")
    infectious = trajectory.state[:, case.row("I")]
    measured = np.log(infectious[:, 40] / infectious[:, 25]) / 15.0
    a, b, c = 1 / (sigma * gamma), 1 / sigma + 1 / gamma, 1 - r0
    expected = (-b + np.sqrt(b * b - 4 * a * c)) / (2 * a)
    np.testing.assert_allclose(measured, expected, rtol=1e-6)


SIS = """
[scenario]
name = "sis"
days = 300
members = 2

[model]
compartments = ["S", "I"]
population = 5000
initial = { S = "rest", I = 5 }

[[model.flows]]
from = "S"
to = "I"
rate = "beta * S * I / N"

[[model.flows]]
from = "I"
to = "S"
rate = "gamma * I"

[parameters]
beta = 0.4
gamma = 0.2

[solver]
step = 0.5
report_every = 10
"""


@pytest.mark.parametrize("method", ALL_METHODS)
def test_sis_endemic_equilibrium(tmp_path, method):
    """SIS: I* = N (1 - 1 / R0), R0 = beta / gamma (Hethcote 2000, the SIS model).  The
    equilibrium is a fixed point of every Runge-Kutta and theta step, so all five methods
    reach it to round-off once the transient (rate gamma (R0 - 1)) has died out."""
    case = load_case(tmp_path, SIS).with_parameter("beta", [0.4, 0.8])
    trajectory = case.run(method)
    r0 = np.array([2.0, 4.0])
    np.testing.assert_allclose(trajectory.state[:, case.row("I"), -1],
                               5000 * (1 - 1 / r0), rtol=1e-9)


SIR_VITAL = """
[scenario]
name = "sir-vital"
days = 1500
members = 1

[model]
compartments = ["S", "I", "R"]
population = 100000
initial = { S = "rest", I = 100 }

[[model.flows]]
name = "birth"
to = "S"
rate = "mu * N"

[[model.flows]]
from = "S"
to = "I"
rate = "beta * S * I / N"

[[model.flows]]
from = "I"
to = "R"
rate = "gamma * I"

[[model.flows]]
from = "S"
rate = "mu * S"

[[model.flows]]
from = "I"
rate = "mu * I"

[[model.flows]]
from = "R"
rate = "mu * R"

[parameters]
beta = 0.36
gamma = 0.1
mu = 0.02

[solver]
step = 1
report_every = 10
"""


@pytest.mark.parametrize("method", ALL_METHODS)
def test_sir_with_births_and_deaths_endemic_equilibrium(tmp_path, method):
    """SIR with births and deaths at rate mu: R0 = beta / (gamma + mu), S* = N / R0,
    I* = mu N (R0 - 1) / beta (Hethcote 2000, the classic endemic model); reached through
    damped oscillations (illustrative rates, damping ~ mu R0 / 2 per day)."""
    case = load_case(tmp_path, SIR_VITAL)
    trajectory = case.run(method)
    n, beta, gamma, mu = 100000.0, 0.36, 0.1, 0.02
    r0 = beta / (gamma + mu)
    s_star, i_star = n / r0, mu * n * (r0 - 1) / beta
    final = trajectory.state[0, :, -1]
    np.testing.assert_allclose(final, [s_star, i_star, n - s_star - i_star], rtol=1e-8)


AGE_SEIR = """
[scenario]
name = "age-seir"
days = 80
members = 2
seed = 8

[model]
compartments = ["S", "E", "I", "R"]
groups = ["young", "adult", "old"]
population = [3000, 5000, 2000]
initial = { S = "rest", E = [0, 4, 0], I = [1, 0, 2] }
matrices = { contacts = [[6.0, 3.0, 0.5], [3.0, 5.0, 1.0], [0.5, 1.0, 2.0]] }

[[model.flows]]
from = "S"
to = "E"
rate = "q * susceptibility * S * (contacts @ (I / N))"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent"

[[model.flows]]
from = "I"
to = "R"
rate = "I / infectious"

[parameters]
q = { dist = "uniform", low = 0.03, high = 0.06 }
susceptibility = [0.6, 1.0, 1.3]
latent = { dist = "gamma", mean = 3.0, sd = 0.5 }
infectious = 4.0

[solver]
method = "rk4"
step = 0.125
report_every = 1
check = { levels = 3, rtol = 1e-4, atol = 0.001 }
"""

CONTACTS = np.array([[6.0, 3.0, 0.5], [3.0, 5.0, 1.0], [0.5, 1.0, 2.0]])
SUSCEPTIBILITY = np.array([0.6, 1.0, 1.3])


def reference_age_seir(case, member: int) -> np.ndarray:
    """(n_states, n_reports) by solve_ivp (DOP853, rtol 1e-12) from the equations
    S' = -q s_g S_g sum_h C_gh I_h / N_h, E' = -S' - E / latent, I' = E / latent - I / D,
    R' = I / D, written here from the model, not from the package."""
    q = case.design.parameters[case.row("q", "parameter")][member]
    latent = case.design.parameters[case.row("latent", "parameter")][member]

    def rhs(_t, y):
        s, e, i, r = y.reshape(4, 3)
        infection = q * SUSCEPTIBILITY * s * (CONTACTS @ (i / (s + e + i + r)))
        return np.concatenate([-infection, infection - e / latent, e / latent - i / 4.0,
                               i / 4.0])

    times = case.times()
    solution = solve_ivp(rhs, (0, times[-1]), case.design.initial[:, member], method="DOP853",
                         t_eval=times, rtol=1e-12, atol=1e-10)
    assert solution.success
    return solution.y


def test_age_structured_seir_against_solve_ivp(tmp_path):
    """An age-structured SEIR with a contact matrix, RK4 at h = 1/8 against solve_ivp
    (DOP853, rtol 1e-12), to 1e-6 relative (1e-6 persons where a compartment is near 0)."""
    case = load_case(tmp_path, AGE_SEIR)
    trajectory = case.run("rk4")
    for m in range(2):
        reference = reference_age_seir(case, m)
        np.testing.assert_allclose(trajectory.state[m], reference, rtol=1e-6, atol=1e-6)


STEPS = {"forward-euler": 0.0625, "heun": 0.25, "rk4": 0.5, "backward-euler": 0.0625,
         "trapezoid": 0.25}
"""Steps that put each method's error well above the reference's and Newton's accuracy
and in its asymptotic regime (common practice, no source)."""


@pytest.mark.parametrize("method", ALL_METHODS)
def test_step_check_tracks_the_true_error(tmp_path, method):
    """On a smooth problem the Richardson estimate behind step_error (Richardson 1911;
    Hairer, Norsett & Wanner 1993, sec. II.4) is within a factor 3 of the true scaled
    error measured against solve_ivp, and observed_order is within 0.3 of the method's
    order (Hairer, Norsett & Wanner 1993, sec. II.3)."""
    case = load_case(tmp_path, AGE_SEIR.replace("step = 0.125", f"step = {STEPS[method]}"))
    result = case.chunk(method)
    check = case.scenario.solver.check
    for m in range(2):
        reference = reference_age_seir(case, m)
        true_error = (np.abs(result.state[m] - reference)
                      / (check.atol + check.rtol * np.abs(reference))).max()
        assert 1 / 3 <= result.step_error[m] / true_error <= 3
        assert result.observed_order[m] == pytest.approx(ORDERS[method], abs=0.3)
