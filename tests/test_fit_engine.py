"""``ensemble fit`` on the run's engine: each round's likelihood and the projection of the
posterior computed by dask workers (threads, processes, or SLURM worker jobs through a
cluster profile) give the file the fit computed in this process gives, bit for bit, and
so does a fit whose worker process is killed while it computes a chunk; bad engine
options stop the command with exit status 2 before anything is written.

The in-process fit these are compared with is itself checked against a posterior
computed on a fine grid from scipy's ``solve_ivp`` by quadrature
(``tests/test_fit_run.py``); here the check is that the place of the work changes no bit
(the README's fit section: "the same file, bit for bit, wherever").
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import time
from pathlib import Path

import pytest
import xarray as xr
from distributed import Client, LocalCluster

from ensemble import api
from support import REPO, assert_same_values, ensemble_command, invoke_cli, run_cli
from test_fit_run import COUNTS, SCENARIO
from test_run_determinism import rerun_after_worker_loss, worker_holding_work

PARTICLES = 60
"""Few particles: the test is of where the numbers are computed, not of the posterior."""

ARGUMENTS = dict(particles=PARTICLES, chunk=16, seed=11)
"""Four chunks of a round's 60 particles (the last one short), and two variants
projected."""


def assert_same_file(first: Path, second: Path) -> None:
    """Every variable of two fit results is identical bit for bit (NaN matching NaN),
    and so is every attribute but ``history``."""
    with xr.open_dataset(first, decode_times=False) as a, \
            xr.open_dataset(second, decode_times=False) as b:
        assert sorted(a.variables) == sorted(b.variables)
        for name in a.variables:
            assert_same_values(name, a[name].values, b[name].values, first, second)
        assert {k: str(v) for k, v in a.attrs.items() if k != "history"} == \
            {k: str(v) for k, v in b.attrs.items() if k != "history"}
        assert a.sizes["member"] == PARTICLES and a.sizes["fit_round"] >= 1


@pytest.fixture(scope="module")
def in_this_process(tmp_path_factory) -> Path:
    """The scenario of ``tests/test_fit_run.py`` (an invented town, invented counts) and
    its fit computed in this process, without dask (``workers=0``)."""
    directory = tmp_path_factory.mktemp("fit-engine")
    (directory / "cases.csv").write_text(COUNTS)
    (directory / "fitted.toml").write_text(SCENARIO)
    api.fit(directory / "fitted.toml", output=directory / "here.nc", workers=0,
            backend="compiled", **ARGUMENTS)
    return directory


@pytest.mark.parametrize("processes", [False, True], ids=["threads", "processes"])
def test_two_local_workers_give_the_file_of_this_process(in_this_process, tmp_path,
                                                          processes):
    target = tmp_path / "workers.nc"
    api.fit(in_this_process / "fitted.toml", output=target, workers=2,
            processes=processes, backend="compiled", **ARGUMENTS)
    assert_same_file(in_this_process / "here.nc", target)
    assert not (tmp_path / "workers.nc.fit-partial").exists()


def test_the_command_line_takes_the_engine_options_of_run(in_this_process, tmp_path):
    for name in ("cases.csv", "fitted.toml"):
        shutil.copy(in_this_process / name, tmp_path)
    done = run_cli("fit", "fitted.toml", "--particles", str(PARTICLES), "--chunk", "16",
                   "--seed", "11", "--workers", "1", "--dashboard", "-o", "one.nc",
                   cwd=tmp_path, timeout=300)
    assert done.returncode == 0, done.stderr
    assert "dask dashboard at http://127.0.0.1:" in done.stderr
    assert "round 1: temperature" in done.stdout
    assert_same_file(in_this_process / "here.nc", tmp_path / "one.nc")


@pytest.mark.parametrize("options, message", [
    (["--workers", "-1"], "--workers"),
    (["--cluster", "no-such-profile"], "no-such-profile"),
    (["--cluster", "testbed-slurm", "--address", "tcp://127.0.0.1:8786"],
     "--cluster and --address"),
    (["--dashboard-address", "not an address"], "not an address"),
])
def test_bad_engine_options_exit_2_and_write_nothing(in_this_process, tmp_path, options,
                                                     message):
    for name in ("cases.csv", "fitted.toml"):
        shutil.copy(in_this_process / name, tmp_path)
    (tmp_path / "configs").mkdir()
    shutil.copy(REPO / "configs" / "testbed-slurm.toml", tmp_path / "configs")
    done = invoke_cli("fit", "fitted.toml", "--particles", "20", "-o", "bad.nc", *options,
                      cwd=tmp_path)
    assert done.returncode == 2, (done.stdout, done.stderr)
    assert message in done.stderr
    assert sorted(path.name for path in tmp_path.iterdir()) == [
        "cases.csv", "configs", "fitted.toml"]


@pytest.mark.slow
def test_a_killed_worker_does_not_change_the_fit(in_this_process, tmp_path):
    """SIGKILL a dask worker process while it computes a chunk of a round: the scheduler
    gives the chunk (and the problem it held) to a worker again, and the file equals the
    fit in this process.  The fit uses a scheduler this test started (``--address``) so
    that the test sees which tasks each worker holds; the kill comes at a barrier (the
    first round's state kept), with a small step so that each round's chunks take a
    while."""
    for name in ("cases.csv", "fitted.toml"):
        shutil.copy(in_this_process / name, tmp_path)
    options = ("--particles", "40", "--chunk", "10", "--seed", "3", "--backend",
               "compiled", "--set", f"solver.step={1 / 256}")
    state = tmp_path / "killed.nc.fit-partial" / "state.npz"
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        process = subprocess.Popen(
            ensemble_command("fit", "fitted.toml", *options, "--address",
                             cluster.scheduler_address, "-o", "killed.nc"),
            cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
            start_new_session=True)
        try:
            while not state.exists():       # a barrier: the first round is kept
                assert process.poll() is None, process.communicate()
                time.sleep(0.01)
            victim, held = worker_holding_work(client, process)
            os.kill(client.run(os.getpid, workers=[victim])[victim], signal.SIGKILL)
            out, err = process.communicate(timeout=300)
            history = client.story(*held)
        finally:
            try:
                os.killpg(process.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
    assert process.returncode == 0, err
    assert any(rerun_after_worker_loss(history, key) for key in held), (
        f"none of the killed worker's tasks {held} was given to a worker again: {history}")
    done = run_cli("fit", "fitted.toml", *options, "--workers", "0", "-o", "here.nc",
                   cwd=tmp_path, timeout=300)
    assert done.returncode == 0, done.stderr
    with xr.open_dataset(tmp_path / "here.nc", decode_times=False) as a, \
            xr.open_dataset(tmp_path / "killed.nc", decode_times=False) as b:
        for name in a.variables:
            assert_same_values(name, a[name].values, b[name].values, a.encoding["source"],
                               b.encoding["source"])


def _why_no_slurm() -> str | None:
    from test_cluster_slurm import why_no_slurm

    return why_no_slurm()


@pytest.mark.slurm
def test_a_fit_on_slurm_worker_jobs_gives_the_file_of_this_process(in_this_process,
                                                                   tmp_path):
    reason = _why_no_slurm()
    if reason is not None:
        pytest.skip(reason)
    for name in ("cases.csv", "fitted.toml"):
        shutil.copy(in_this_process / name, tmp_path)
    (tmp_path / "configs").mkdir()
    shutil.copy(REPO / "configs" / "testbed-slurm.toml", tmp_path / "configs")
    done = run_cli("fit", "fitted.toml", "--particles", str(PARTICLES), "--chunk", "16",
                   "--seed", "11", "--backend", "compiled", "--cluster", "testbed-slurm",
                   "-o", "slurm.nc", cwd=tmp_path, timeout=400)
    assert done.returncode == 0, done.stderr
    assert_same_file(in_this_process / "here.nc", tmp_path / "slurm.nc")
