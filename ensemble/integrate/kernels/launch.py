"""The compiled backend's entry points: buffers, padding and threads around a kernel.

:func:`integrate_fixed_compiled` gives the same :class:`~ensemble.integrate.reference.Trajectory`
as the numpy reference :func:`~ensemble.integrate.reference.integrate_fixed` (to
round-off), from the kernel of the (model, method) (:mod:`.source`, cached by
:mod:`.cache`); :func:`step_error_compiled` runs the step check's refined run and compares
it as it goes.

Threads.  The kernel integrates one block of members per call, without holding the GIL;
the blocks of a chunk run one after another in the calling thread, or side by side on a
small pool of threads.  A process that runs chunks alone should use every core (the
default); a worker that shares the machine with others (a dask worker thread or process)
should use one thread: call :func:`set_kernel_threads` with 1 in it (or start it with
``NUMBA_NUM_THREADS=1``) so that workers times threads never exceeds the cores.  Several
threads of one process may integrate at once.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from types import ModuleType

import numba
import numpy as np

from ensemble.integrate.interrupts import stop_if_requested
from ensemble.integrate.kernels.blocks import padding_unit
from ensemble.integrate.kernels.cache import KernelCache
from ensemble.integrate.kernels.schedules import schedule_arrays
from ensemble.integrate.kernels.source import KernelSource
from ensemble.integrate.reference import Trajectory
from ensemble.methods import Method
from ensemble.model.lower import LoweredModel
from ensemble.records import INVALID_START
from ensemble.sampling import Design
from ensemble.scenario.schema import Newton

__all__ = ["ReportBuffers", "integrate_fixed_compiled", "kernel_threads",
           "set_kernel_threads", "step_error_compiled"]


_settings = threading.local()
"""Each thread's number of kernel threads (:func:`set_kernel_threads`)."""

_pool: ThreadPoolExecutor | None = None
_pool_lock = threading.Lock()


def set_kernel_threads(count: int) -> None:
    """Use ``count`` threads for the compiled kernels this thread runs (1 in a dask
    worker that shares the machine with others; all cores, the default, for a
    single-process run); at most ``NUMBA_NUM_THREADS`` (numba's count of the cores)."""
    _settings.threads = max(1, min(int(count), numba.config.NUMBA_NUM_THREADS))


def kernel_threads() -> int:
    """Threads the compiled kernels this thread runs use."""
    return getattr(_settings, "threads", numba.config.NUMBA_NUM_THREADS)


def _shared_pool() -> ThreadPoolExecutor:
    """The process's threads for blocks of members, made on first use."""
    global _pool
    with _pool_lock:
        if _pool is None:
            _pool = ThreadPoolExecutor(max_workers=numba.config.NUMBA_NUM_THREADS,
                                       thread_name_prefix="ensemble-kernel")
        return _pool


class ReportBuffers:
    """Output arrays of compiled runs, kept from one chunk to the next.

    A worker integrates chunk after chunk of the same shape; writing into the same
    arrays each time spares the system from handing out (and zeroing) fresh memory for
    every run, which costs more than the integration itself on some machines (measured:
    50 ms of system time per chunk of 1,536 SEIR members over a year, against a 70 ms
    integration).  One instance per thread; arrays from :meth:`arrays` stay valid until
    the next call with the same ``slot``.
    """

    def __init__(self) -> None:
        self._arrays: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}

    def arrays(self, slot: str, n_reports: int, n_states: int, n_flow_elements: int,
               padded: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(state, flow_count, status) arrays of the given shape for ``slot``."""
        wanted = ((n_reports, n_states, padded), (n_reports, n_flow_elements, padded))
        held = self._arrays.get(slot)
        if held is None or (held[0].shape, held[1].shape) != wanted:
            held = (np.empty(wanted[0]), np.empty(wanted[1]), np.empty(padded, np.uint8))
            self._arrays[slot] = held
        return held


_NO_REPORTS = np.empty((0, 0, 0))
_NO_MEMBERS = np.empty(0)
"""Arrays for the kernel's arguments its mode does not use (outputs, or reference and
error)."""


def integrate_fixed_compiled(model: LoweredModel, design: Design, method: Method,
                             step: float, steps_per_report: int, n_reports: int,
                             newton: Newton, atol: float,
                             buffers: tuple[ReportBuffers, str] | None = None
                             ) -> Trajectory:
    """Integrate every member of ``design`` with ``method`` at a fixed ``step``, as
    :func:`ensemble.integrate.reference.integrate_fixed` does, in a generated kernel.

    Members are padded to whole vectors (:func:`.blocks.padding_unit`) with copies of a valid
    member (members with an impossible drawn start are replaced the same way and reported
    as NaN with ``INVALID_START``), so every member runs through the same vectorised
    code.
    ``buffers`` (a :class:`ReportBuffers` and a slot name) gives the output arrays to
    write into instead of new ones.  The kernel comes from the cache the environment
    names (:meth:`.cache.KernelCache.for_environment`).

    Returns
    -------
    Trajectory
        ``state`` and ``flow_count`` are (M, rows, n_reports) views of report-major
        arrays (the layout the kernel writes fastest); copy them where contiguity matters.
    """
    module, source, padded = _kernel_and_padding(model, method, design)
    n_members = design.member_index.shape[0]
    if buffers is None:
        state = np.empty((n_reports, model.n_states, padded))
        flow_count = np.empty((n_reports, model.n_flow_elements, padded))
        status = np.empty(padded, np.uint8)
    else:
        state, flow_count, status = buffers[0].arrays(
            buffers[1], n_reports, model.n_states, model.n_flow_elements, padded)
    invalid = _launch(module, source, design, step, steps_per_report, n_reports, newton,
                      atol, padded, status, (state, flow_count))
    if invalid.any():
        state[:, :, :n_members][:, :, invalid] = np.nan
        flow_count[:, :, :n_members][:, :, invalid] = np.nan
    return Trajectory(state=state[:, :, :n_members].transpose(2, 1, 0),
                      flow_count=flow_count[:, :, :n_members].transpose(2, 1, 0),
                      status=status[:n_members])


def step_error_compiled(model: LoweredModel, design: Design, method: Method, step: float,
                        steps_per_report: int, n_reports: int, newton: Newton, atol: float,
                        coarse: np.ndarray, refine: int, order: int, rtol: float
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Integrate ``design``'s members at ``step`` (the step check's h / refine) and
    compare them with the trajectories ``coarse`` of the run at h as they go, keeping
    nothing but the comparison.

    Gives the bits of :func:`ensemble.integrate.refine.step_error` applied to
    :func:`integrate_fixed_compiled`'s trajectories (the kernel does its operations in
    its order), without writing the refined run's reports and reading them again.

    Parameters
    ----------
    coarse : (M, n_states, n_reports) states of the run at h.
    refine, order, rtol : the step check's refinement, the method's order and the check's
        relative tolerance (its absolute one is ``atol``).

    Returns
    -------
    (error, status) : (M,) scaled Richardson estimates (NaN for a member with a non-finite
        value in either run) and the refined run's status bits.
    """
    module, source, padded = _kernel_and_padding(model, method, design)
    n_members = design.member_index.shape[0]
    reference = np.ascontiguousarray(coarse.transpose(2, 1, 0))
    error = np.empty(padded)
    status = np.empty(padded, np.uint8)
    invalid = _launch(module, source, design, step, steps_per_report, n_reports, newton,
                      atol, padded, status, None,
                      (reference, rtol, 1.0 - float(refine) ** -order, error))
    error = error[:n_members]
    error[invalid] = np.nan
    return error, status[:n_members]


def _kernel_and_padding(model: LoweredModel, method: Method, design: Design
                        ) -> tuple[ModuleType, KernelSource, int]:
    """The kernel module and its source, and the members of ``design`` padded to whole
    vectors (:func:`.blocks.padding_unit`)."""
    module, source = KernelCache.for_environment().load(model, method)
    unit = padding_unit(source.block, numba.config.USING_SVML)
    return module, source, max(1, -(-design.member_index.shape[0] // unit)) * unit


def _columns(array: np.ndarray, columns: np.ndarray | None) -> np.ndarray:
    """``array[..., columns]`` (``array`` itself for ``None``) as a C-contiguous float64
    array, copied only where needed."""
    array = np.asarray(array, dtype=np.float64)
    if columns is None:
        return np.ascontiguousarray(array)
    return np.take(array, columns, axis=-1)


def _padding_columns(valid: np.ndarray, padded: int) -> np.ndarray | None:
    """The member each of ``padded`` kernel columns runs: itself where valid, else the
    first valid member (None when every column is a valid member already)."""
    if valid.size == padded:
        return None
    member_index = np.full(padded, valid[0])
    member_index[valid] = valid
    return member_index


def block_batches(padded: int, block: int, threads: int) -> list[tuple[int, int]]:
    """The member ranges ``(first, end)`` of ``padded`` members integrated between two
    looks for a request to stop (:mod:`ensemble.integrate.interrupts`): one block per
    thread, starting on block boundaries, so that every block is the one a single pass
    over all members would run (the same bits).  An interrupted run waits at most for
    one block to cross the whole horizon."""
    batch = block * max(1, threads)
    return [(first, min(first + batch, padded)) for first in range(0, padded, batch)]


def _run_blocks(kernel: Callable[..., None], first: int, end: int, block: int,
                threads: int, arguments: tuple) -> None:
    """Integrate members ``first .. end - 1`` block by block: in this thread, or with
    ``threads`` > 1 the blocks side by side on the shared pool (each block writes its own
    members' columns, so the order does not matter)."""
    starts = range(first, end, block)
    if threads == 1 or len(starts) == 1:
        for m0 in starts:
            kernel(m0, min(block, end - m0), *arguments)
        return
    pool = _shared_pool()
    for running in [pool.submit(kernel, m0, min(block, end - m0), *arguments)
                    for m0 in starts]:
        running.result()


def _launch(module: ModuleType, source: KernelSource, design: Design, step: float,
            steps_per_report: int, n_reports: int, newton: Newton, atol: float,
            padded: int, status: np.ndarray,
            outputs: tuple[np.ndarray, np.ndarray] | None,
            compare: tuple[np.ndarray, float, float, np.ndarray] | None = None
            ) -> np.ndarray:
    """Run ``module``'s kernel on ``design`` padded to ``padded`` members, writing
    ``outputs`` (state, flow_count) or, with ``compare`` (reference, rtol, gain, error),
    the comparison; ``status`` gets the status bits.  Returns the mask of members with an
    impossible drawn start (their status is INVALID_START; their values are the caller's
    to blank)."""
    invalid = np.asarray(design.invalid_start, dtype=bool)
    valid = np.flatnonzero(~invalid)
    status[:] = 0
    if not valid.size:
        if outputs is not None:
            for array in outputs:
                array[:] = 0.0
    else:
        columns = _padding_columns(valid, padded)
        state, flow_count = outputs if outputs is not None else (_NO_REPORTS, _NO_REPORTS)
        reference, rtol, gain, error = (compare if compare is not None
                                        else (_NO_REPORTS, 0.0, 1.0, _NO_MEMBERS))
        threads = kernel_threads()
        arguments = (_columns(design.initial, columns), _columns(design.parameters, columns),
                     *schedule_arrays(source.model.schedule_slots, design.schedule_values,
                                      step, columns),
                     *source.data, float(step), int(steps_per_report), int(n_reports),
                     float(atol), float(newton.tol), int(newton.max_iter), state,
                     flow_count, status, compare is not None, reference, float(rtol),
                     float(gain), error)
        for first, end in block_batches(padded, source.block, threads):
            _run_blocks(module.integrate_block, first, end, source.block, threads,
                        arguments)
            stop_if_requested()
    status[:design.member_index.shape[0]][invalid] = INVALID_START
    return invalid
