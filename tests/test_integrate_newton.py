"""The Newton solve of the implicit methods: the block LU of the compiled kernels and the
Newton iteration of both backends.

The linear-algebra functions of :mod:`ensemble.integrate.kernels` are plain Python before
numba compiles them into a kernel, so they are run here as they are, on small blocks.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from ensemble.integrate.kernels.block_lu import factor_block, solve_factored
from ensemble.integrate.kernels.launch import integrate_fixed_compiled
from ensemble.integrate.kernels.sparsity import elimination_order, factor_pattern
from ensemble.integrate.reference import SHARED_MATRIX_ITERATIONS, integrate_fixed
from ensemble.methods import METHODS
from ensemble.records import NEWTON_NOT_CONVERGED
from support import load_case, one_compartment


def _dense(pattern: list[set[int]]) -> np.ndarray:
    """Boolean matrix of a row pattern, the diagonal included."""
    matrix = np.eye(len(pattern), dtype=bool)
    for i, row in enumerate(pattern):
        matrix[i, sorted(row)] = True
    return matrix


def _factor_nonzeros(pattern: list[set[int]]) -> np.ndarray:
    """Boolean matrix of the positions :func:`factor_pattern` lists (and the diagonal)."""
    lower_start, lower, upper_start, upper = factor_pattern(pattern)
    found = np.eye(len(pattern), dtype=bool)
    for k in range(len(pattern)):
        found[lower[lower_start[k]:lower_start[k + 1]], k] = True
        found[k, upper[upper_start[k]:upper_start[k + 1]]] = True
    return found


def _column_dominant(pattern: list[set[int]], rng: np.random.Generator) -> np.ndarray:
    """Random values on ``pattern`` with each diagonal entry larger than the sum of the
    magnitudes of the rest of its column."""
    matrix = np.where(_dense(pattern), rng.uniform(-1.0, 1.0, (len(pattern),) * 2), 0.0)
    np.fill_diagonal(matrix, 0.0)
    np.fill_diagonal(matrix, 1.0 + np.abs(matrix).sum(axis=0))
    return matrix


def test_factor_pattern_of_arrowhead_matrices():
    """The arrowhead matrix (a full first row and column) fills in completely when
    eliminated in its own order and not at all when its full row and column come last,
    the standard example of why the order matters (George & Liu 1981, *Computer Solution
    of Large Sparse Positive Definite Systems*, ch. 1, cited from memory); the minimum
    Markowitz order finds the second."""
    n = 6
    first_full = [set(range(n)) if i == 0 else {0} for i in range(n)]
    last_full = [set(range(n)) if i == n - 1 else {n - 1} for i in range(n)]
    assert _factor_nonzeros(first_full).all()
    assert (_factor_nonzeros(last_full) == _dense(last_full)).all()
    order = elimination_order(first_full)
    assert order[0] != 0
    place = {state: index for index, state in enumerate(order)}
    placed = [{place[c] for c in first_full[s]} for s in order]
    assert (_factor_nonzeros(placed) == _dense(placed)).all()


def test_factor_pattern_holds_the_numerical_factors():
    """The symbolic pattern is that of the numerical L and U: scipy's LU (LAPACK
    ``getrf``) of a random matrix on the pattern, diagonally dominant by columns so that
    partial pivoting interchanges no rows (Golub & Van Loan 2013, *Matrix Computations*,
    4th ed., sec. 3.4, cited from memory), has its non-zeros exactly there."""
    rng = np.random.default_rng(7)
    n = 9
    pattern = [set(rng.choice(n, size=3, replace=False).tolist()) for _ in range(n)]
    matrix = _column_dominant(pattern, rng)
    permutation, lower, upper = scipy.linalg.lu(matrix)
    assert np.array_equal(permutation, np.eye(n))
    numerical = (lower != 0.0) | (upper != 0.0)
    assert np.array_equal(numerical, _factor_nonzeros(pattern))


def _solve_block(pattern: list[set[int]], matrices: np.ndarray,
                 rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """factor_block and solve_factored on a block (n, n, B) as the kernel calls them."""
    n, width = rhs.shape
    matrix, solution = matrices.copy(), rhs.copy()
    arrays = [np.array(v, dtype=np.int64) for v in factor_pattern(pattern)]
    pivots = np.empty((n, width), np.int64)
    trouble = np.empty(width, np.int8)
    with np.errstate(all="ignore"):      # the singular and non-finite members
        first = factor_block(matrix, *arrays, pivots, np.empty(width), np.empty(width),
                             trouble, np.empty(n, np.int64))
        solve_factored(matrix, solution, *arrays, first, pivots)
    return solution, trouble, first


def test_block_solve_matches_lapack_and_keeps_members_apart():
    """Each member's solution agrees with numpy.linalg.solve (LAPACK ``gesv``, partial
    pivoting) to 1e-12, also for a member that needs row interchanges; a zero pivot and
    a non-finite entry are reported as ``gesv`` would refuse them; and a member needing
    no interchange gets the same bits whether a neighbour forces the pivoting path or not
    (the kernels' member independence)."""
    rng = np.random.default_rng(3)
    n, width = 7, 6
    pattern = [set(rng.choice(n, size=3, replace=False).tolist()) for _ in range(n)]
    matrices = np.stack([_column_dominant(pattern, rng) for _ in range(width)], axis=-1)
    rhs = rng.normal(size=(n, width))
    calm, trouble, first = _solve_block(pattern, matrices, rhs)
    assert first == n and not trouble.any()

    lower_start, lower, _, _ = factor_pattern(pattern)
    column = max(k for k in range(n) if lower_start[k + 1] > lower_start[k])
    mixed = matrices.copy()
    mixed[lower[lower_start[column]], column, 3] = 50.0      # member 3 must interchange
    mixed[:, 2, 4] = 0.0                                       # member 4 singular
    mixed[1, 1, 5] = np.nan                                    # member 5 not finite
    solution, trouble, first = _solve_block(pattern, mixed, rhs)
    assert first == column > 0        # a sparse start, then the pivoting path
    assert trouble.tolist() == [0, 0, 0, 0, 1, 2]
    for b in range(4):
        expected = np.linalg.solve(mixed[:, :, b], rhs[:, b])
        np.testing.assert_allclose(solution[:, b], expected, rtol=1e-12, atol=1e-14)
    with pytest.raises(np.linalg.LinAlgError):
        np.linalg.solve(mixed[:, :, 4], rhs[:, 4])
    assert np.array_equal(solution[:, :3], calm[:, :3])


def curb(step: float, max_iter: int) -> str:
    """x' = -k x^2 / 1000 from 1000 over one step (illustrative)."""
    return one_compartment(name="curb", rate="k * X * X / 1000", k=1.0, days=step, step=step,
                           report_every=step,
                           solver_extra=f"newton = {{ tol = 1e-12, max_iter = {max_iter} }}")


@pytest.mark.parametrize("backend", ["numpy", "compiled"])
@pytest.mark.parametrize("max_iter", [1, 2, 3])
def test_newton_iterates_by_hand(tmp_path, monkeypatch, backend, max_iter):
    """One backward Euler step of x' = -k x^2 / 1000 from x0 = 1000, h = 0.25: the
    iteration ``w <- w - F(w) / F'(v)`` with ``F(w) = w - x0 + h k w^2 / 1000`` starts
    from the explicit Euler predictor p; the first SHARED_MATRIX_ITERATIONS (2) take
    ``v = p`` (simplified Newton, Hairer & Wanner 1996, *Solving Ordinary Differential
    Equations II*, sec. IV.8, cited from memory), later ones ``v = w`` (Newton).  The step
    ends at ``x0 - h k w^2 / 1000`` from the last iterate, flagged as not converged when
    max_iter is too small for the tolerance.  Newton throughout, or simplified Newton
    throughout, would differ by more than 1e-8 after two, or three, iterations (the
    backends are held to 1e-13 here)."""
    monkeypatch.setenv("ENSEMBLE_KERNEL_CACHE", str(tmp_path / "kernels"))
    assert SHARED_MATRIX_ITERATIONS == 2
    h, k, x0 = 0.25, 1.0, 1000.0
    case = load_case(tmp_path, curb(step=h, max_iter=max_iter))

    def residual(w: float) -> float:
        return w - x0 + h * k * w * w / 1000.0

    def slope(v: float) -> float:
        return 1.0 + 2.0 * h * k * v / 1000.0

    predictor = x0 - h * k * x0 * x0 / 1000.0
    iterate = newton = simplified = predictor
    for iteration in range(max_iter):
        iterate -= residual(iterate) / slope(predictor if iteration < 2 else iterate)
        newton -= residual(newton) / slope(newton)
        simplified -= residual(simplified) / slope(predictor)
    if max_iter > 1:
        assert abs(iterate - newton) > 1e-8
    if max_iter > 2:
        assert abs(iterate - simplified) > 1e-8
    integrate = integrate_fixed if backend == "numpy" else integrate_fixed_compiled
    solver = case.scenario.solver
    trajectory = integrate(case.model, case.design, METHODS["backward-euler"], h, 1, 2,
                           solver.newton, solver.check.atol)
    expected = x0 - h * k * iterate * iterate / 1000.0
    assert trajectory.state[0, 0, 1] == pytest.approx(expected, rel=1e-13)
    exact = (-1.0 + math.sqrt(1.0 + 4.0 * h * k * x0 / 1000.0)) / (2.0 * h * k / 1000.0)
    assert abs(iterate - exact) > 1e-12    # not converged at this tolerance
    assert trajectory.status[0] & NEWTON_NOT_CONVERGED
