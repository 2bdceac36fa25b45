"""integrate_chunk: member independence, status bits, and the step check's edge cases."""

from __future__ import annotations

import dataclasses
import sys
import types

import numpy as np
import pytest

from ensemble.integrate.chunk import COMPILED_MODULE, integrate_chunk
from ensemble.integrate.reference import integrate_fixed
from ensemble.integrate.refine import (ROUND_OFF_FACTOR, ROWS_PER_BLOCK, observed_order,
                                       step_error)
from ensemble.methods import METHODS
from ensemble.records import (BELOW_NEGATIVE_ATOL, INVALID_START,
                                       NEWTON_NOT_CONVERGED, NON_FINITE,
                                       STEP_CHECK_FAILED)
from support import load_case, subset

SEASONAL = """
[scenario]
name = "seasonal"
days = 20
members = 7
seed = 21

[model]
compartments = ["S", "I", "R"]
population = 20000
initial = { S = "rest", I = 30 }

[[model.flows]]
from = "S"
to = "I"
rate = "beta * S * I / N * (1 + 0.3 * sin(2 * pi * t / 7)) * exp(-t / 50)"

[[model.flows]]
from = "I"
to = "R"
rate = "gamma * I + 0.1 * sqrt(I)"

[[model.flows]]
from = "R"
to = "S"
rate = "min(0.02 * R, max(5, 0.001 * R))"

[parameters]
beta = { dist = "uniform", low = 0.3, high = 0.9 }
gamma = { dist = "gamma", mean = 0.25, sd = 0.05 }

[solver]
step = 0.5
report_every = 1
check = { levels = 3 }
"""


def _results_equal(a, b) -> None:
    for field in ("state", "flow_count", "step_error", "observed_order", "status"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field), err_msg=field)


@pytest.mark.parametrize("method", list(METHODS))
def test_member_bits_do_not_depend_on_the_chunk(tmp_path, method):
    """The same member gives the same bits alone, in a reversed chunk and in any split,
    even next to a member that blows up (determinism in the project's reference,
    ``ensemble/scenario/reference.md``: a fixed order of evaluation, no reduction across
    members)."""
    case = load_case(tmp_path, SEASONAL)
    beta = case.design.parameters[case.row("beta", "parameter")].copy()
    beta[3] = 1e6
    case = case.with_parameter("beta", beta)
    solver = dataclasses.replace(case.scenario.solver, method=method)

    def run(member_index):
        return integrate_chunk(case.model, subset(case.design, member_index), solver,
                               case.scenario.n_reports)

    whole = run(np.arange(7))
    order = np.array([6, 5, 4, 3, 2, 1, 0])
    reversed_chunk = run(order)
    _results_equal(dataclasses.replace(reversed_chunk, **{
        f: getattr(reversed_chunk, f)[np.argsort(order)]
        for f in ("members", "state", "flow_count", "step_error", "observed_order", "status")
    }), whole)
    for part in (np.array([0, 1, 2]), np.array([3]), np.array([4, 5, 6])):
        piece = run(part)
        _results_equal(piece, dataclasses.replace(whole, **{
            f: getattr(whole, f)[part]
            for f in ("members", "state", "flow_count", "step_error", "observed_order",
                      "status")}))


def test_blown_up_member_is_flagged_and_holds_nan(tmp_path):
    """A member whose state overflows gets NON_FINITE and is NaN from then on; the others
    are finite and unflagged (status bits in the project's reference,
    ``ensemble/scenario/reference.md``)."""
    case = load_case(tmp_path, SEASONAL)
    beta = case.design.parameters[case.row("beta", "parameter")].copy()
    beta[3] = 1e6
    case = case.with_parameter("beta", beta)
    trajectory = case.run("forward-euler")
    assert trajectory.status[3] & NON_FINITE
    gone = np.isnan(trajectory.state[3]).all(axis=0)
    first = int(np.argmax(gone))
    assert 0 < first and gone[first:].all() and np.isfinite(trajectory.state[3, :, :first]).all()
    assert np.isnan(trajectory.flow_count[3, :, first:]).all()
    others = np.delete(np.arange(7), 3)
    assert np.isfinite(trajectory.state[others]).all()
    assert not (trajectory.status[others] & NON_FINITE).any()


def test_invalid_start_is_nan_and_only_flagged_as_such(tmp_path):
    """A member whose drawn start is impossible is not integrated: NaN everywhere, only
    the INVALID_START bit (``[model] initial`` in the project's reference,
    ``ensemble/scenario/reference.md``)."""
    case = load_case(tmp_path, SEASONAL)
    initial = case.design.initial.copy()
    initial[:, 2] = np.nan
    invalid = np.zeros(7, bool)
    invalid[2] = True
    case = dataclasses.replace(case, design=dataclasses.replace(
        case.design, initial=initial, invalid_start=invalid))
    result = case.chunk("trapezoid")
    assert result.status[2] == INVALID_START
    assert np.isnan(result.state[2]).all() and np.isnan(result.flow_count[2]).all()
    assert np.isnan(result.step_error[2])
    assert not (result.status[np.arange(7) != 2] & (INVALID_START | NON_FINITE)).any()


def test_check_off_and_two_levels_leave_nan(tmp_path):
    """``enabled = false``: step_error NaN and never STEP_CHECK_FAILED; ``levels = 2``:
    observed_order NaN (the step check in the project's reference,
    ``ensemble/scenario/reference.md``)."""
    case = load_case(tmp_path, SEASONAL)
    off = case.chunk("forward-euler", enabled=False)
    assert np.isnan(off.step_error).all() and np.isnan(off.observed_order).all()
    assert not (off.status & STEP_CHECK_FAILED).any()
    two = case.chunk("rk4", levels=2)
    assert np.isfinite(two.step_error).all() and np.isnan(two.observed_order).all()


LINEAR_GROWTH = """
[scenario]
name = "constant-inflow"
days = 5
members = 2

[model]
compartments = ["X", "P"]
population = 100
initial = {{ P = "rest" }}

[[model.flows]]
to = "X"
rate = "3.5"

[solver]
method = "{method}"
step = 0.25
check = {{ levels = 3 }}
"""


@pytest.mark.parametrize("method", list(METHODS))
def test_observed_order_nan_when_differences_are_round_off(tmp_path, method):
    """X' = 3.5 is integrated exactly by every method (each is consistent, sum b_i = 1:
    Hairer, Norsett & Wanner 1993, sec. II.1), so d2 is round-off and observed_order is
    NaN, not a number made of noise; step_error is ~0 and the member passes."""
    case = load_case(tmp_path, LINEAR_GROWTH.format(method=method))
    result = case.chunk(method)
    np.testing.assert_allclose(result.state[:, case.row("X"), -1], 17.5, rtol=1e-14)
    assert np.isnan(result.observed_order).all()
    assert (result.step_error < 1e-10).all() and (result.status == 0).all()


def test_observed_order_formula():
    """log(d1 / d2) / log(r) on hand-made runs whose differences shrink by r^p."""
    exact = np.full((1, 2, 3), 100.0)
    runs = [exact + 0.5 * (0.5 ** 3) ** level for level in range(3)]
    np.testing.assert_allclose(observed_order(*runs, refine=2, noise_floor=0.0), 3.0)
    assert np.isnan(observed_order(*runs, refine=2, noise_floor=1.0))


@pytest.mark.parametrize("report_major", [False, True])
def test_blockwise_reductions_match_whole_array_formulas(report_major):
    """The blocked step_error and observed_order equal, bit for bit, the whole-array
    expressions of their definitions (Richardson 1911, Phil. Trans. R. Soc. A 210:307-357;
    Hairer, Norsett & Wanner 1993, sec. II.4), in both layouts the backends hand out,
    with NaN members and rows spanning several blocks plus a partial one."""
    n_members, n_states, n_reports = 7, 3, ROWS_PER_BLOCK + 5
    rng = np.random.default_rng(5)
    runs = [rng.normal(100.0, 1.0, (n_members + 1, n_states, n_reports)) for _ in range(3)]
    runs[0][0, 2, -1] += 50.0  # member 0's largest difference is in the last, partial block
    runs[1][2, 1, -1] = np.nan
    runs[2][4, 0, 3] = np.nan
    if report_major:  # the compiled backend's views of padded report-major arrays
        runs = [np.ascontiguousarray(run.transpose(2, 1, 0))[:, :, :n_members]
                .transpose(2, 1, 0) for run in runs]
    else:
        runs = [run[:n_members] for run in runs]
    coarse, fine, finest = runs
    expected_error = (np.abs(coarse - fine)
                      / ((1.0 - 2.0 ** -4) * (0.01 + 1e-3 * np.abs(fine)))).max(axis=(1, 2))
    np.testing.assert_array_equal(step_error(coarse, fine, 2, 4, 1e-3, 0.01), expected_error)
    d1 = np.abs(coarse - fine).max(axis=(1, 2))
    d2 = np.abs(fine - finest).max(axis=(1, 2))
    with np.errstate(all="ignore"):
        floor = ROUND_OFF_FACTOR * np.finfo(np.float64).eps * np.abs(fine).max(axis=(1, 2))
        expected_order = np.where(d2 > floor, np.log(d1 / d2) / np.log(2), np.nan)
    np.testing.assert_array_equal(observed_order(coarse, fine, finest, 2, 0.0), expected_order)
    assert np.isnan(expected_error[2]) and np.isnan(expected_order[[2, 4]]).all()


def test_backend_dispatch(tmp_path, monkeypatch):
    """"compiled" calls the compiled backend's integrate_fixed_compiled with
    integrate_fixed's arguments; a missing compiled module or an unknown backend is a
    clear error."""
    case = load_case(tmp_path, SEASONAL)

    def chunk(backend):
        return integrate_chunk(case.model, case.design, case.scenario.solver,
                               case.scenario.n_reports, backend=backend)

    monkeypatch.setitem(sys.modules, COMPILED_MODULE,
                        types.SimpleNamespace(integrate_fixed_compiled=integrate_fixed))
    _results_equal(chunk("compiled"), chunk("numpy"))
    monkeypatch.setitem(sys.modules, COMPILED_MODULE, None)
    with pytest.raises(RuntimeError, match="compiled integration backend is not available"):
        chunk("compiled")
    with pytest.raises(ValueError, match="backend"):
        chunk("fortran")


def test_negative_state_flag(tmp_path):
    """A reported state below -atol sets BELOW_NEGATIVE_ATOL (status bits in the
    project's reference, ``ensemble/scenario/reference.md``)."""
    case = load_case(tmp_path, SEASONAL)
    beta = case.design.parameters[case.row("beta", "parameter")].copy()
    beta[0] = 40.0
    trajectory = case.with_parameter("beta", beta).run("forward-euler")
    assert (trajectory.state[0] < -case.scenario.solver.check.atol).any()
    assert trajectory.status[0] & BELOW_NEGATIVE_ATOL
    assert not (trajectory.status[1:] & BELOW_NEGATIVE_ATOL).any()


SINGULAR = """
[scenario]
name = "singular"
days = 2
members = 2

[model]
compartments = ["X"]
population = 1000
initial = { X = "rest" }

[[model.flows]]
from = "X"
rate = "k * X"

[parameters]
k = 1.0

[solver]
method = "backward-euler"
step = 0.25
"""


def test_singular_newton_matrix_is_flagged_and_others_untouched(tmp_path):
    """k = -4 with h = 0.25 makes backward Euler's Newton matrix 1 + h k exactly 0: that
    member gets NEWTON_NOT_CONVERGED and the run goes on; the other member's numbers are
    those it has alone, where it converges to the exact step y / (1 + h k)."""
    case = load_case(tmp_path, SINGULAR).with_parameter("k", [-4.0, 1.0])
    both = case.run("backward-euler")
    alone = dataclasses.replace(case, design=subset(case.design, [1])).run("backward-euler")
    assert both.status[0] & NEWTON_NOT_CONVERGED
    assert both.status[1] == 0
    np.testing.assert_array_equal(both.state[1], alone.state[0])
    np.testing.assert_allclose(alone.state[0, 0], 1000 / 1.25 ** (4 * np.arange(3)),
                               rtol=1e-12)
