"""The same scenario gives the same bits whatever the chunk size, the number of workers,
the scheduler, or a worker lost midway (issue 4 parts 5 and 6; SPEC section 1, solver:
"the same member gives the same bits in any chunk, on any worker")."""

from __future__ import annotations

import os
import signal
import subprocess
import time
from pathlib import Path

import psutil
from distributed import LocalCluster

from ensemble import api
from support import assert_same_numbers, ensemble_command, write_scenario


def run_into(directory: Path, name: str, *, members: int = 40, days: int = 30,
             **settings) -> Path:
    """Run the illustrative scenario (2 variants) into ``directory/name``."""
    directory.mkdir(exist_ok=True)
    return api.run(write_scenario(directory, members=members, days=days),
                   output=directory / name, progress=False, **settings)


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


def test_a_killed_worker_does_not_lose_the_run(tmp_path: Path) -> None:
    """SIGKILL one of two dask worker processes while chunks are running: the scheduler
    reruns its tasks elsewhere, the run succeeds, and the result equals a run in one
    process."""
    scenario = write_scenario(tmp_path, members=30, days=60)
    process = subprocess.Popen(
        ensemble_command("run", scenario, "--workers", "2", "--processes", "--chunk", "2"),
        cwd=tmp_path,
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        victim = wait_for_busy_worker(process, tmp_path / "result.nc.partial")
        victim.kill()
        victim.wait(timeout=10)
        out, err = process.communicate(timeout=120)
    finally:
        try:
            os.killpg(process.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    assert process.returncode == 0, err
    reference = run_into(tmp_path / "reference", "result.nc", members=30, days=60,
                         workers=0)
    assert_same_numbers(tmp_path / "result.nc", reference)


def wait_for_busy_worker(process: subprocess.Popen, work: Path) -> psutil.Process:
    """A dask worker process of the run, once the run has saved a chunk and still has
    most of its work ahead."""
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        assert process.poll() is None, process.stderr.read()
        if work.is_dir() and any(work.glob("chunk-*")):
            workers = [child for child in psutil.Process(process.pid).children(recursive=True)
                       if "spawn_main" in " ".join(child.cmdline())]
            if workers:
                return workers[0]
        time.sleep(0.02)
    raise AssertionError("the run saved no chunk within a minute")
