"""The step check: how far a member's run at step h is from the same run refined.

The trajectory is the run at the requested step h; reruns at h/r (and h/r^2 with three
levels) only estimate its error (the step check of the project's reference,
``ensemble/scenario/reference.md``).  The estimate is Richardson's (Richardson 1911,
Phil. Trans. R. Soc. A 210:307-357; Hairer, Norsett & Wanner 1993, *Solving Ordinary
Differential Equations I*, sec. II.4): for a method of order p the global error of the
run at h is ``(x_h - x_{h/r}) / (1 - r^-p)`` to leading order.  :func:`step_error`
scales it by the check's tolerances, :func:`observed_order` measures p from three runs,
and :func:`mark_failed_checks` turns the estimate into the member's status bit.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ensemble.methods import Method
from ensemble.records import INVALID_START, STEP_CHECK_FAILED
from ensemble.scenario.schema import Newton

ROUND_OFF_FACTOR = 100.0
"""d2 <= ROUND_OFF_FACTOR * eps * max|x| counts as round-off (common practice, no source)."""

NEWTON_TOL_FACTOR = 10.0
"""d2 <= NEWTON_TOL_FACTOR * newton.tol counts as Newton noise for the implicit methods
(common practice, no source)."""


ROWS_PER_BLOCK = 32
"""Rows of (time, state) values per member reduced at once: a few hundred kB of buffers
for thousands of members, so the reductions stay in cache."""


def _member_last(*arrays: np.ndarray) -> tuple[np.ndarray, ...]:
    """(M, n_states, n_reports) arrays as (n_states * n_reports, M) views of one layout.

    The compiled backend stores report-major arrays and hands out their transposes, so
    transposing back gives a view; other layouts are copied once.
    """
    return tuple(array.transpose(2, 1, 0).reshape(array.shape[1] * array.shape[2],
                                                  array.shape[0]) for array in arrays)


def _blockwise_max(rows: int, n_members: int,
                   fill: Callable[[int, int, tuple[np.ndarray, ...]], None],
                   outputs: int = 1) -> tuple[np.ndarray, ...]:
    """Per-member maxima of ``outputs`` quantities computed block by block.

    ``fill(start, stop, buffers)`` writes the values of rows ``start:stop`` of each
    quantity into ``buffers`` (``outputs`` preallocated (stop - start, M) arrays);
    the maxima are NaN for a member with a NaN value, as ``ndarray.max`` gives.
    """
    block = min(ROWS_PER_BLOCK, max(rows, 1))
    buffers = tuple(np.empty((block, n_members)) for _ in range(outputs))
    scratch = np.empty(n_members)
    maxima = tuple(np.full(n_members, -np.inf) for _ in range(outputs))
    for start in range(0, rows, block):
        stop = min(start + block, rows)
        views = tuple(buffer[:stop - start] for buffer in buffers)
        fill(start, stop, views)
        for view, maximum in zip(views, maxima):
            view.max(axis=0, out=scratch)
            np.maximum(maximum, scratch, out=maximum)
    return maxima


def step_error(coarse: np.ndarray, fine: np.ndarray, refine: int, order: int,
               rtol: float, atol: float) -> np.ndarray:
    """Scaled Richardson estimate of the error of ``coarse`` per member.

    ``max over states and times of |x_h - x_{h/r}| / ((1 - r^-p) (atol + rtol |x_{h/r}|))``
    for (M, n_states, n_reports) trajectories at h and h/r; NaN for a member with a
    non-finite value in either.  Computed block by block on member-last rows with
    preallocated buffers (each value is the same elementwise expression; the compiled
    backend's kernels do the same operations in the same order,
    :func:`ensemble.integrate.kernels.launch.step_error_compiled`).
    """
    coarse_rows, fine_rows = _member_last(coarse, fine)
    gain = 1.0 - float(refine) ** -order

    def fill(start: int, stop: int, buffers: tuple[np.ndarray, ...]) -> None:
        error, = buffers
        scale = np.abs(fine_rows[start:stop])
        np.multiply(rtol, scale, out=scale)
        np.add(atol, scale, out=scale)
        np.multiply(gain, scale, out=scale)
        np.subtract(coarse_rows[start:stop], fine_rows[start:stop], out=error)
        np.abs(error, out=error)
        np.divide(error, scale, out=error)

    return _blockwise_max(*fine_rows.shape, fill)[0]


def observed_order(coarse: np.ndarray, fine: np.ndarray, finest: np.ndarray, refine: int,
                   noise_floor: float) -> np.ndarray:
    """``log(d1 / d2) / log(r)`` per member from runs at h, h/r and h/r^2.

    ``d1 = max |x_h - x_{h/r}|`` and ``d2 = max |x_{h/r} - x_{h/r^2}|`` over states and
    times.  NaN where d2 is at the noise level, ``d2 <= ROUND_OFF_FACTOR * eps *
    max|x_{h/r}| + noise_floor``, where the ratio measures noise rather than the
    method's error (``noise_floor`` is ``NEWTON_TOL_FACTOR * newton.tol`` for the
    implicit methods, 0 for the explicit ones).
    """
    coarse_rows, fine_rows, finest_rows = _member_last(coarse, fine, finest)

    def fill(start: int, stop: int, buffers: tuple[np.ndarray, ...]) -> None:
        coarse_gap, fine_gap, size = buffers
        np.subtract(coarse_rows[start:stop], fine_rows[start:stop], out=coarse_gap)
        np.abs(coarse_gap, out=coarse_gap)
        np.subtract(fine_rows[start:stop], finest_rows[start:stop], out=fine_gap)
        np.abs(fine_gap, out=fine_gap)
        np.abs(fine_rows[start:stop], out=size)

    d1, d2, size = _blockwise_max(*fine_rows.shape, fill, outputs=3)
    floor = ROUND_OFF_FACTOR * np.finfo(np.float64).eps * size + noise_floor
    with np.errstate(all="ignore"):
        order = np.log(d1 / d2) / np.log(refine)
    return np.where(d2 > floor, order, np.nan)


def noise_floor(method: Method, newton: Newton) -> float:
    """The ``noise_floor`` of :func:`observed_order` for ``method``: differences the
    Newton tolerance may leave in an implicit method's runs, 0 for an explicit one."""
    return NEWTON_TOL_FACTOR * newton.tol if method.implicit else 0.0


ORDER_SLACK = 1.0
"""An observed order more than this below the method's order fails the step check:
Richardson's estimate assumes the method's order, and a member that does not reach it
(the trapezoid rule's -1.3 in a stiff initial layer) has an error the estimate does not
bound (common practice, no source)."""


def mark_low_orders(order: np.ndarray, method_order: int, status: np.ndarray) -> None:
    """Set STEP_CHECK_FAILED in ``status`` where the observed ``order`` (three levels) is
    more than :data:`ORDER_SLACK` below ``method_order`` (NaN, at the noise level, is
    not judged)."""
    status[order < method_order - ORDER_SLACK] |= STEP_CHECK_FAILED


def mark_failed_checks(error: np.ndarray, status: np.ndarray) -> None:
    """Set STEP_CHECK_FAILED in ``status`` where the scaled ``error`` is above 1 or not a
    number, except for members whose drawn start was impossible (never integrated)."""
    failed = ~(error <= 1.0) & ((status & INVALID_START) == 0)
    status[failed] |= STEP_CHECK_FAILED
