"""Interrupts are honoured within seconds in every mode, also while a compiled kernel runs
a long chunk (the command line's contract in the README: exit status 130 when
interrupted, finished work kept).

The integrators work in pieces and stop between them when asked
(:mod:`ensemble.integrate.interrupts`): the compiled backend a batch of blocks of members
at a time, the numpy reference a step at a time.  The first tests check that mechanism in
this process, deterministically: a stop requested before a chunk starts ends it after its
first batch.  The last ones signal a real ``ensemble run`` whose single chunk would take
minutes, once it is computing, and wait for it to end: the wait's timeout is a guard
against a hang, not a measurement (the chunk is several times longer than the guard).
"""

from __future__ import annotations

import os
import signal
import subprocess
import threading
from pathlib import Path

import numba
import numpy as np
import psutil
import pytest

from ensemble import api
from ensemble.examples import seir_text
from ensemble.integrate.interrupts import StopRequested, clear_stop_request, request_stop
from ensemble.integrate.kernels.blocks import padding_unit
from ensemble.integrate.kernels.cache import KernelCache
from ensemble.integrate.kernels.launch import (ReportBuffers, block_batches,
                                               integrate_fixed_compiled, set_kernel_threads)
from ensemble.integrate.reference import integrate_fixed
from ensemble.methods import METHODS
from ensemble.model.lower import lower_model
from ensemble.sampling import make_design
from ensemble.scenario.load import load_scenario
from support import ensemble_command

LONG = {"members": 65536, "days": 30, "step": 1 / 8192}
"""A chunk of 65,536 SEIR members over 30 days at 8,192 steps a day, and its step check:
several minutes of kernel time on the test machines, in one chunk."""

HANG_GUARD = 90
"""Seconds the tests wait for an interrupted run to end before declaring it hung."""

COMPUTING_CPU_SECONDS = 4.0
"""Processor seconds the run must have spent after announcing its chunks before it is
signalled: more than drawing the members and loading the cached kernel take (about a
second), so the signal lands while the kernel integrates."""


@pytest.fixture(autouse=True)
def no_stop_left_behind():
    """Each test starts and ends without a pending stop request."""
    clear_stop_request()
    yield
    clear_stop_request()


def seir_case(directory: Path, members: int):
    """The illustrative SEIR town (invented numbers) with ``members`` members: its
    scenario, the first variant's lowered model and every member's design."""
    path = directory / "town.toml"
    path.write_text(seir_text(members=members, days=10, name="town"))
    scenario = load_scenario(path)
    model = lower_model(scenario, scenario.variants[0])
    design = make_design(scenario, scenario.variants[0], model, np.arange(members))
    return scenario, model, design


def test_block_batches_cover_the_chunk_on_block_boundaries() -> None:
    """Batches are one block per thread, start on block boundaries (so each block is the
    one a single call would run) and cover every member once."""
    assert block_batches(1152, 512, 1) == [(0, 512), (512, 1024), (1024, 1152)]
    assert block_batches(1152, 512, 2) == [(0, 1024), (1024, 1152)]
    assert block_batches(64, 512, 4) == [(0, 64)]


def run_compiled_with_stop_requested(scenario, model, design, buffers: ReportBuffers
                                     ) -> BaseException | None:
    """Request a stop, then integrate ``design`` in one kernel thread into ``buffers``;
    return what the integration raised."""
    set_kernel_threads(1)
    request_stop()
    solver = scenario.solver
    try:
        integrate_fixed_compiled(model, design, METHODS[solver.method], float(solver.step),
                                 solver.steps_per_report, scenario.n_reports, solver.newton,
                                 solver.check.atol, buffers=(buffers, "run"))
    except BaseException as raised:    # noqa: BLE001 - the test looks at what it was
        return raised
    return None


@pytest.mark.parametrize("in_main_thread", [True, False], ids=["main", "worker-thread"])
def test_compiled_kernel_stops_after_its_first_batch(tmp_path: Path,
                                                      in_main_thread: bool) -> None:
    """With a stop requested, the launch integrates the first batch of blocks and ends:
    KeyboardInterrupt in the main thread (as Ctrl-C), StopRequested in a worker thread;
    the members of the later blocks are never written."""
    probe, model, _ = seir_case(tmp_path, members=1)
    _, source = KernelCache.for_environment().load(model, METHODS[probe.solver.method])
    members = 2 * source.block + 10
    scenario, model, design = seir_case(tmp_path, members=members)
    unit = padding_unit(source.block, numba.config.USING_SVML)
    padded = -(-members // unit) * unit
    buffers = ReportBuffers()
    state, _, _ = buffers.arrays("run", scenario.n_reports, model.n_states,
                                 model.n_flow_elements, padded)
    state[:] = -1.0     # no state of a model ever takes this value
    outcome: list[BaseException | None] = []
    if in_main_thread:
        outcome.append(run_compiled_with_stop_requested(scenario, model, design, buffers))
    else:
        worker = threading.Thread(target=lambda: outcome.append(
            run_compiled_with_stop_requested(scenario, model, design, buffers)))
        worker.start()
        worker.join()
    set_kernel_threads(os.cpu_count() or 1)
    expected = KeyboardInterrupt if in_main_thread else StopRequested
    assert type(outcome[0]) is expected
    first, end = block_batches(padded, source.block, 1)[0]
    assert (first, end) == (0, source.block)
    written = (state != -1.0).all(axis=(0, 1))
    assert written[first:end].all(), "the first batch was not integrated"
    assert not written[end:].any(), "the kernel went on past its first batch"


def test_numpy_reference_stops_before_its_next_step(tmp_path: Path) -> None:
    """The readable reference honours a stop request between steps too."""
    scenario, model, design = seir_case(tmp_path, members=8)
    solver = scenario.solver
    arguments = (model, design, METHODS[solver.method], float(solver.step),
                 solver.steps_per_report, scenario.n_reports, solver.newton,
                 solver.check.atol)
    request_stop()
    with pytest.raises(KeyboardInterrupt):
        integrate_fixed(*arguments)
    clear_stop_request()
    assert np.isfinite(integrate_fixed(*arguments).state).all()


# ------------------------------------------------------------------- the real program


@pytest.fixture(scope="module")
def long_scenario(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The long scenario written out, its kernel compiled into the session's cache (so
    that the runs below start integrating at once)."""
    directory = tmp_path_factory.mktemp("long")
    path = directory / "longtown.toml"
    path.write_text(seir_text(members=LONG["members"], days=LONG["days"],
                              step=LONG["step"], name="longtown", output="result.nc",
                              keep_members=False, distancing=True,
                              title="Illustrative town, invented numbers"))
    warm = directory / "warm.toml"
    warm.write_text(seir_text(members=8, days=2, name="warm", distancing=True))
    api.simulate(warm, backend="compiled")
    return path


def process_tree_cpu(process: psutil.Process) -> float:
    """Processor seconds used so far by ``process`` and its children."""
    total = 0.0
    for member in [process, *process.children(recursive=True)]:
        try:
            times = member.cpu_times()
        except psutil.NoSuchProcess:
            continue
        total += times.user + times.system
    return total


def wait_until_computing(process: subprocess.Popen, stderr_lines: list[str]) -> None:
    """Barrier: return once the run has announced its chunks and then spent
    :data:`COMPUTING_CPU_SECONDS` of processor time; fail if it ends first."""
    watched = psutil.Process(process.pid)
    announced_at = None
    while True:
        if process.poll() is not None:
            raise AssertionError("the run ended before it was signalled: "
                                 + "".join(stderr_lines))
        if announced_at is None and any("chunks to compute" in line
                                        for line in stderr_lines):
            announced_at = process_tree_cpu(watched)
        if (announced_at is not None
                and process_tree_cpu(watched) - announced_at >= COMPUTING_CPU_SECONDS):
            return
        threading.Event().wait(0.05)


@pytest.mark.slow
@pytest.mark.parametrize("options, signal_number, whole_group", [
    (("--workers", "0"), signal.SIGTERM, False),
    (("--workers", "0"), signal.SIGINT, True),
    (("--workers", "2"), signal.SIGTERM, False),
    (("--workers", "2", "--processes"), signal.SIGTERM, False),
], ids=["in-process-sigterm", "in-process-ctrl-c", "threads-sigterm", "processes-sigterm"])
def test_interrupted_long_chunk_exits_130(long_scenario: Path, tmp_path: Path,
                                          options: tuple[str, ...], signal_number: int,
                                          whole_group: bool) -> None:
    """A run inside a chunk of several minutes ends with exit status 130 soon after the
    signal, says it was interrupted, and (no chunk being finished) does not promise
    finished chunks to resume from."""
    process = subprocess.Popen(
        ensemble_command("run", long_scenario, "--chunk", str(LONG["members"]), *options),
        cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        start_new_session=True)
    stderr_lines: list[str] = []
    reader = threading.Thread(target=lambda: stderr_lines.extend(iter(process.stderr.readline,
                                                                      "")))
    reader.start()
    try:
        wait_until_computing(process, stderr_lines)
        if whole_group:
            os.killpg(process.pid, signal_number)
        else:
            os.kill(process.pid, signal_number)
        process.wait(timeout=HANG_GUARD)
    finally:
        try:
            os.killpg(process.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        process.wait(timeout=30)
        reader.join(timeout=30)
    err = "".join(stderr_lines)
    assert process.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    assert not list((tmp_path / "result.nc.partial").glob("chunk-*"))
    assert "--resume" not in err
    assert not (tmp_path / "result.nc").exists()
