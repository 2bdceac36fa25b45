"""Both cluster routes against a real SLURM (start one with ``scripts/slurm_testbed.sh``).

* ``ensemble run --cluster testbed-slurm``: dask-jobqueue submits worker jobs;
* ``ensemble array-script``: a job array of shards plus a merge job, submitted with bash;
* a worker job cancelled with ``scancel`` mid-run: a new job replaces it and the run
  completes.

Each result is compared bit for bit with a local run of the same scenario (the README's
cluster section: "identical in every number to a run on one machine").  Skipped, saying
why, where ``sinfo`` is missing or no node is idle.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import time
from pathlib import Path

import pytest

from ensemble import api
from support import (REPO, assert_identical_numbers, ensemble_command, run_cli,
                     write_scenario)

JOB_NAME = "ensemble-testbed-slurm"
"""Name dask-jobqueue gives the worker jobs of the test-bed profile."""

WAIT_SECONDS = 400
"""Longest a SLURM test waits for its jobs (they take well under a minute on the bed)."""


def why_no_slurm() -> str | None:
    """None when a SLURM with an idle node answers, else the reason to skip."""
    if shutil.which("sinfo") is None or shutil.which("sbatch") is None:
        return "no SLURM commands here (start a test bed with scripts/slurm_testbed.sh)"
    try:
        done = subprocess.run(["sinfo", "--noheader", "--format=%T"], capture_output=True,
                              text=True, timeout=20)
    except subprocess.TimeoutExpired:
        return "sinfo did not answer within 20 s (is slurmctld running?)"
    if done.returncode != 0:
        return f"sinfo failed: {done.stderr.strip()}"
    states = done.stdout.split()
    if not any(state.rstrip("*") in ("idle", "mixed") for state in states):
        return f"no idle SLURM node (node states: {', '.join(states) or 'none'})"
    return None


REASON = why_no_slurm()
pytestmark = [pytest.mark.slurm, pytest.mark.skipif(REASON is not None, reason=REASON or "")]


def squeue(*options: str) -> list[str]:
    """Job ids that squeue lists with ``options``."""
    done = subprocess.run(["squeue", "--noheader", "--format=%i", *options],
                          capture_output=True, text=True, timeout=20)
    return done.stdout.split()


def wait_until_gone(job_ids: list[str], timeout: float = WAIT_SECONDS) -> None:
    deadline = time.monotonic() + timeout
    while squeue("--jobs", ",".join(job_ids)):
        assert time.monotonic() < deadline, f"jobs {job_ids} still queued after {timeout} s"
        time.sleep(2)


def job_state(job_id: str) -> str:
    """``JobState`` of a finished job as scontrol remembers it (MinJobAge on the bed)."""
    done = subprocess.run(["scontrol", "show", "job", job_id], capture_output=True, text=True,
                          timeout=20)
    found = re.search(r"JobState=(\S+)", done.stdout)
    return found.group(1) if found else "unknown"


@pytest.fixture(scope="module")
def bed(tmp_path_factory) -> Path:
    """A working directory with the scenario, the test-bed profile in ./configs, and the
    local reference result."""
    directory = tmp_path_factory.mktemp("slurm")
    (directory / "configs").mkdir()
    shutil.copy(REPO / "configs" / "testbed-slurm.toml", directory / "configs")
    scenario = write_scenario(directory, members=30, days=30)
    api.run(scenario, output=directory / "local.nc", workers=0, progress=False)
    return directory


def test_run_on_dask_jobqueue_workers(bed: Path) -> None:
    done = run_cli("run", "testtown.toml", "--cluster", "testbed-slurm", "--chunk", "4",
                   "--output", "jobqueue.nc", cwd=bed, timeout=WAIT_SECONDS)
    assert done.returncode == 0, done.stderr
    assert_identical_numbers(bed / "local.nc", bed / "jobqueue.nc")
    deadline = time.monotonic() + 60
    while squeue("--name", JOB_NAME):  # the worker jobs are cancelled at the end
        assert time.monotonic() < deadline, "worker jobs left running after the run"
        time.sleep(1)


def test_job_array_and_merge(bed: Path) -> None:
    done = run_cli("array-script", "testtown.toml", "--cluster", "testbed-slurm",
                   "--shards", "3", "--output", "array.nc", cwd=bed)
    assert done.returncode == 0, done.stderr
    (bed / "submit.sh").write_text(done.stdout)
    submitted = subprocess.run(["bash", "submit.sh"], cwd=bed, capture_output=True, text=True,
                               timeout=60)
    assert submitted.returncode == 0, submitted.stderr
    array, merge = re.search(r"job array (\d+) and the merge as job (\d+)",
                             submitted.stdout).groups()
    wait_until_gone([array, merge])
    logs = "\n".join(p.read_text() for p in sorted((bed / "array.parts").glob("*.log")))
    assert job_state(merge) == "COMPLETED", logs
    assert len(list((bed / "array.parts").glob("shard-*-of-3.nc"))) == 3
    assert_identical_numbers(bed / "local.nc", bed / "array.nc")


def test_cancelled_worker_job_is_replaced_and_loses_nothing(tmp_path: Path) -> None:
    """A worker job cancelled with scancel while chunks are in flight is replaced by a new
    job before the run ends, and the result equals a local run bit for bit.  The scenario's
    tiny step (1/4096 day) gives its 80 chunks about half a minute of integration on the
    bed, several times the few seconds dask takes to notice the loss and submit the
    replacement (at a step of 1/256 day the kernels finished first, in 7 s)."""
    (tmp_path / "configs").mkdir()
    shutil.copy(REPO / "configs" / "testbed-slurm.toml", tmp_path / "configs")
    scenario = write_scenario(tmp_path, members=120, days=300, step=1 / 4096)
    run = subprocess.Popen(
        ensemble_command("run", "testtown.toml", "--cluster", "testbed-slurm", "--chunk", "3",
                         "--output", "killed.nc"),
        cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        # dask forgets a lost worker's job after this delay (15 s by default), and only
        # then does the adaptive loop submit its replacement
        env={**os.environ, "DASK_DISTRIBUTED__DEPLOY__LOST_WORKER_TIMEOUT": "2s"})
    try:
        work = tmp_path / "killed.nc.partial"
        deadline = time.monotonic() + WAIT_SECONDS
        while len(list(work.glob("chunk-*"))) < 3 or not squeue("--name", JOB_NAME,
                                                                "--states", "RUNNING"):
            assert run.poll() is None, run.communicate()
            assert time.monotonic() < deadline, "the run never got going"
            time.sleep(0.5)
        before = set(squeue("--name", JOB_NAME))
        victim = squeue("--name", JOB_NAME, "--states", "RUNNING")[0]
        subprocess.run(["scancel", victim], check=True, timeout=20)
        while not set(squeue("--name", JOB_NAME)) - before:
            assert run.poll() is None, (
                f"the run ended before the cancelled worker job {victim} was replaced: "
                f"{run.communicate()}")
            time.sleep(1)
        out, err = run.communicate(timeout=WAIT_SECONDS)
    finally:
        if run.poll() is None:
            run.kill()
    assert run.returncode == 0, err
    assert job_state(victim) == "CANCELLED"
    api.run(scenario, output=tmp_path / "local.nc", workers=2, progress=False)
    assert_identical_numbers(tmp_path / "local.nc", tmp_path / "killed.nc")
