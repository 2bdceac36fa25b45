"""The same scenario gives the same bits whatever the chunk size, the number of workers,
the scheduler, or a worker lost midway: a member's numbers depend on the member alone,
never on the chunk or the worker that computed it (the README's "What a run does")."""

from __future__ import annotations

import os
import signal
import subprocess
from pathlib import Path

import pytest
from distributed import Client, LocalCluster

from ensemble import api
from support import (assert_same_numbers, ensemble_command, saved_chunks,
                     wait_for_saved_chunks, write_scenario)

SLOW = {"members": 16, "days": 60, "step": 1 / 256}
"""A scenario whose chunks of two members each take a noticeable fraction of a second."""


def run_into(directory: Path, name: str, *, members: int = 40, days: int = 30,
             step: float = 0.25, **settings) -> Path:
    """Run the illustrative scenario (2 variants) into ``directory/name``."""
    directory.mkdir(exist_ok=True)
    return api.run(write_scenario(directory, members=members, days=days, step=step),
                   output=directory / name, progress=False, **settings)


@pytest.mark.slow
def test_chunk_size_workers_and_scheduler_change_no_bit(tmp_path: Path) -> None:
    """In this process with chunks of 7, 50 and all 40 members; on a running one-worker
    scheduler given by address; on the default local cluster with two worker threads, and
    with two worker processes."""
    reference = run_into(tmp_path, "in-process-7.nc", workers=0, chunk=7)
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                      dashboard_address=None) as running:
        on_address = run_into(tmp_path, "address-1-worker.nc", chunk=13,
                              address=running.scheduler_address)
    others = [
        run_into(tmp_path, "in-process-50.nc", workers=0, chunk=50),
        run_into(tmp_path, "in-process-all.nc", workers=0, chunk=40),
        on_address,
        run_into(tmp_path, "local-cluster-2-threads.nc", workers=2, chunk=7),
        run_into(tmp_path, "local-cluster-2-processes.nc", workers=2, chunk=7,
                 processes=True),
    ]
    for other in others:
        assert_same_numbers(reference, other)


@pytest.mark.slow
def test_a_killed_worker_does_not_lose_the_run(tmp_path: Path) -> None:
    """SIGKILL a dask worker process that holds a chunk: the scheduler gives the chunk to
    a worker again, the run succeeds, and the result equals a run in one process.

    The run uses a scheduler this test started (``--address``) so that the test can see
    which chunks each worker holds; the kill comes at a barrier (the first chunk saved)
    on a scenario whose chunks are slow and many, so most of the work is still ahead."""
    scenario = write_scenario(tmp_path, **SLOW)
    work = tmp_path / "result.nc.partial"
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        process = subprocess.Popen(
            ensemble_command("run", scenario, "--address", cluster.scheduler_address,
                             "--chunk", "2"),
            cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
            start_new_session=True)
        try:
            wait_for_saved_chunks(process, work, 1)
            victim, held = worker_holding_work(client, process)
            os.kill(client.run(os.getpid, workers=[victim])[victim], signal.SIGKILL)
            saved_at_kill = len(saved_chunks(work))
            _, err = process.communicate(timeout=300)
            history = client.story(*held)
        finally:
            try:
                os.killpg(process.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
    assert process.returncode == 0, err
    assert saved_at_kill < 2 * SLOW["members"] // 2, "no work was in flight at the kill"
    assert any(rerun_after_worker_loss(history, chunk) for chunk in held), (
        f"none of the killed worker's chunks {held} was given to a worker again: {history}")
    reference = run_into(tmp_path / "reference", "result.nc", workers=0, **SLOW)
    assert_same_numbers(tmp_path / "result.nc", reference)


def worker_holding_work(client: Client, process: subprocess.Popen) -> tuple[str, tuple]:
    """A worker and the chunks it is computing, asked of the scheduler until one holds
    some (between a chunk's end and the next submission no worker may hold any); the
    run ending first fails the test."""
    while process.poll() is None:
        busy = [(worker, tuple(chunks)) for worker, chunks in client.processing().items()
                if chunks]
        if busy:
            return busy[0]
    raise AssertionError("the run ended before a worker was seen holding a chunk")


def rerun_after_worker_loss(history: list[tuple], chunk: str) -> bool:
    """Whether the scheduler's transitions of task ``chunk`` (``Client.story``: entries
    ``("scheduler", key, start, finish, recommendations, stimulus, time)``) show it taken
    from a worker at that worker's removal (while computing it, or holding its result not
    yet handed to the run) and finished later."""
    transitions = [(start, finish, stimulus) for source, key, start, finish, _, stimulus, _
                   in (entry for entry in history if entry[0] == "scheduler"
                       and len(entry) == 7) if key == chunk]
    lost = next((index for index, (start, _, stimulus) in enumerate(transitions)
                 if start in ("processing", "memory")
                 and stimulus.startswith("handle-worker-cleanup")),
                None)
    return lost is not None and any(finish == "memory" for _, finish, _
                                    in transitions[lost:])
