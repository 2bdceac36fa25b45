"""Schedules inside the integrator: jumps on step boundaries and linear interpolation."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from support import load_case

SIR = """
[scenario]
name = "sir-schedule"
days = 6
members = 3
seed = 11

[model]
compartments = ["S", "I", "R"]
population = 1000
initial = {{ S = "rest", I = "seed" }}

[[model.flows]]
from = "S"
to = "I"
rate = "beta * S * I / N"

[[model.flows]]
from = "I"
to = "R"
rate = "0.3 * I"

[parameters]
seed = {{ dist = "uniform", low = 5, high = 50 }}
beta = {beta}

[solver]
step = 0.3
report_every = 0.3
"""


@pytest.mark.parametrize("method", ["rk4", "trapezoid"])
def test_step_schedule_gives_exactly_the_piecewise_solution(tmp_path, method):
    """beta jumps from 2.0 to 0.4 on day 0.9 (step 3 of h = 0.3; 3 * 0.3 is
    0.8999999999999999 in binary, so a jump located by comparing k * h with the day would
    come one step late).  The model is autonomous, so the run must equal, bit for bit,
    a run with beta = 2.0 up to day 0.9 followed by a fresh run with beta = 0.4 from
    that state (schedules in the project's reference, ``ensemble/scenario/reference.md``:
    no step straddles a jump)."""
    scheduled = load_case(tmp_path, SIR.format(
        beta='{ schedule = [[0, 2.0], [0.9, 0.4]], between = "step" }'), "scheduled")
    before = load_case(tmp_path, SIR.format(beta=2.0), "before")
    after = load_case(tmp_path, SIR.format(beta=0.4), "after")
    whole = scheduled.run(method)
    first = before.run(method, n_reports=4)
    after = dataclasses.replace(after, design=dataclasses.replace(
        after.design, initial=np.ascontiguousarray(first.state[:, :, -1].T)))
    second = after.run(method, n_reports=18)
    np.testing.assert_array_equal(whole.state[:, :, :4], first.state)
    np.testing.assert_array_equal(whole.state[:, :, 3:], second.state)
    np.testing.assert_array_equal(whole.flow_count[:, :, 4:], second.flow_count[:, :, 1:])


INFLOW = """
[scenario]
name = "inflow"
days = 6
members = 2

[model]
compartments = ["X", "P"]
population = 100
initial = { P = "rest" }

[[model.flows]]
to = "X"
rate = "v"

[parameters]
v = { schedule = [[1, 0.0], [2.5, 3.0], [4, "peak"]], between = "linear" }
peak = { dist = "uniform", low = 0.5, high = 2.0 }

[solver]
step = 0.25
report_every = 0.5
"""


@pytest.mark.parametrize("method", ["heun", "rk4", "trapezoid"])
def test_linear_schedule_integrated_exactly(tmp_path, method):
    """X' = v(t), v piecewise linear with knots on the step grid (0 before day 1, the
    last value after day 4): Heun and the trapezoid (the trapezoidal rule) and RK4
    (Simpson's rule) integrate a linear function exactly on each step (Suli & Mayers
    2003, *An Introduction to Numerical Analysis*, ch. 7), so X(t) is the exact area
    under v, computed here by the trapezoidal formula on the knots and reported times."""
    case = load_case(tmp_path, INFLOW)
    trajectory = case.run(method)
    times = case.times()
    for m, peak in enumerate(case.design.schedule_values[0][-1]):
        knots_t, knots_v = np.array([0.0, 1.0, 2.5, 4.0, 6.0]), np.array([0, 0, 3.0, peak, peak])
        grid = np.union1d(knots_t, times)
        values = np.interp(grid, knots_t, knots_v)
        area = np.concatenate([[0.0], np.cumsum(np.diff(grid) * (values[1:] + values[:-1]) / 2)])
        expected = area[np.searchsorted(grid, times)]
        np.testing.assert_allclose(trajectory.state[m, case.row("X")], expected,
                                   rtol=1e-13, atol=1e-13)
